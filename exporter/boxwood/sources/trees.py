"""The one conversion of a scikit-learn classic ``Tree`` (``estimator.tree_``) into a hub
:class:`~boxwood.ir.Tree`, shared by the boosting, forest, isolation-forest and AdaBoost
readers. Histogram-gradient-boosting predictors have their own node layout and are
converted in :mod:`.boosting`.
"""
from __future__ import annotations

from typing import Any, Optional, Sequence

from ..ir import LEAF, Tree


def classic_tree(tree: Any, output: int, leaf_values: Sequence[float],
                 feature_map: Optional[Sequence[int]] = None) -> Tree:
    """``tree`` (sklearn.tree._tree.Tree) as a hub Tree feeding ``output``.

    ``leaf_values[i]`` is node i's value (read at leaves only; the caller forms it with
    the arithmetic the estimator uses at predict time). ``feature_map`` maps the tree's
    feature indices back to the model's columns (isolation forests fitted on feature
    subsets). scikit-learn's trees compare ``float32(x) <= threshold`` and send NaN to
    the side ``missing_go_to_left`` names; leaves carry no split and no direction.
    """
    left = [int(c) for c in tree.children_left]
    right = [int(c) for c in tree.children_right]
    feature, threshold, missing, value = [], [], [], []
    for i, f in enumerate(tree.feature):
        if left[i] == LEAF:
            feature.append(LEAF)
            threshold.append(0.0)
            missing.append(False)
            value.append(float(leaf_values[i]))
        else:
            feature.append(int(feature_map[f]) if feature_map is not None else int(f))
            threshold.append(float(tree.threshold[i]))
            missing.append(bool(tree.missing_go_to_left[i]))
            value.append(0.0)
    return Tree(output, feature, threshold, left, right, missing, value)
