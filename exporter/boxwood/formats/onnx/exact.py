"""Write an :class:`~boxwood.ir.Ensemble` as an ONNX graph that computes the source's bits.

The graph (ai.onnx opset 21, ai.onnx.ml opset 5; page docs/onnx.md) is::

    input [N, F]  --(prepare)-->  TreeEnsemble  -->  raw_score [N, K] (float64)
                                                  \\-> post-transform ops -> prediction
                                                                        or label + probabilities

Exactness, decision by decision (each one is tested in tests/test_onnx.py against
scikit-learn, onnxruntime and onnx.reference):

* **Thresholds and leaves are float64** (``nodes_splits`` and ``leaf_weights`` are
  double tensors) and the tree operator runs on a float64 input, so every comparison
  is the source's own ``x <= t`` and every leaf is the source's own number.
* **Inputs compared as float32** (classic GradientBoosting rounds its input to float32
  before the trees): a float64 graph input goes through ``Cast(to=FLOAT)`` and back
  ``Cast(to=DOUBLE)``, the same round-to-nearest as numpy's ``astype(float32)``, and the
  trees then compare it with the unchanged float64 threshold. A float32 graph input
  (``input_type="float32"``) is widened with ``Cast(to=DOUBLE)``, which is exact.
* **Summation order.** The tree operator adds leaf values per target in the order of
  ``tree_roots``, starting from 0.0 (onnxruntime in single-thread mode and
  onnx.reference both do; see docs/onnx.md). The source computes ``base + leaf_1 +
  leaf_2 + ...``. Adding the base value afterwards (an ``Add`` node, or opset 3's
  ``base_values``) computes ``(leaf_1 + leaf_2 + ...) + base`` instead, which differs
  in the last bits; so the base value of each output is written as a **leading
  single-leaf tree** for that output, which gives ``0.0 + base + leaf_1 + ...`` -- the
  source's sum, bit for bit. The metadata says how many leading trees carry base
  values, so the reader restores them as base values.
* **Mean of trees** (``combine == "mean"``): the operator sums, then ``Div`` by the
  number of trees of each output and ``Add`` the base value -- the IR's order.
* **Categorical splits** are ``BRANCH_MEMBER`` nodes. The graph takes the category
  *code* (the index into the feature's category list, stated in the metadata). Before
  the trees, a code that is not one of the known codes (unseen category, negative,
  fractional) becomes NaN, so it follows the node's missing-value direction as
  scikit-learn does with unseen categories; and the codes are shifted by +1, because
  onnx.reference (1.23) reads a set member equal to 0.0 as the end of the set
  (``while (m := next(it)) and not isnan(m)``). The shift is an ``Add`` of 0.0 on the
  numeric columns, which changes no value a comparison can see.
* **Missing values** are NaN; ``nodes_missing_value_tracks_true`` carries each node's
  direction (the true branch is the IR's left branch).

The legacy float32 variant (ai.onnx.ml opset 3) is in :mod:`boxwood.formats.onnx.legacy`;
both take the preparation and post-transform parts from :mod:`boxwood.formats.onnx.build`.
"""
from __future__ import annotations

import math
from typing import Any, Dict, List, Tuple

import numpy as np

from ...ir import LEAF, Ensemble
from .build import (INPUT_NAME, INPUT_TYPES, MODE_LEQ, MODE_MEMBER, NEVER_MEMBER, CODE_OFFSET, ONNX_ML_OPSET,
                    ONNX_OPSET, RAW_NAME, TREE_NODE_NAME, GraphKit, _doc, _onnx, _preorder, add_outputs, assemble,
                    finish_mean, metadata, prepare_input, refuse_unsupported)


def tree_ensemble_node(kit: GraphKit, ensemble: Ensemble, x: str, output: str) -> int:
    """Append the ai.onnx.ml TreeEnsemble (opset 5) node; return the number of leading
    base-value trees written before the ensemble's own trees."""
    onnx = kit.onnx
    feat, split, mode, tnode, tleaf, fnode, fleaf, miss = [], [], [], [], [], [], [], []
    members: List[float] = []
    weights: List[float] = []
    targets: List[int] = []
    roots: List[int] = []

    def leaf(value: float, target: int) -> int:
        weights.append(float(value))
        targets.append(target)
        return len(weights) - 1

    def single_leaf_tree(value: float, target: int) -> None:
        # "a single nodes_* entry with true and false branches referencing the same leaf"
        index = leaf(value, target)
        roots.append(len(feat))
        feat.append(0)
        split.append(0.0)
        mode.append(MODE_LEQ)
        tnode.append(index)
        tleaf.append(1)
        fnode.append(index)
        fleaf.append(1)
        miss.append(0)

    leading = 0
    if ensemble.combine == "sum":
        for k, base in enumerate(ensemble.base_values):
            single_leaf_tree(base, k)
            leading += 1
    for tree in ensemble.trees:
        if tree.feature[0] == LEAF:
            single_leaf_tree(tree.value[0], tree.output)
            continue
        order = _preorder(tree)
        position: Dict[int, Tuple[bool, int]] = {}
        for node in order:
            if tree.feature[node] == LEAF:
                position[node] = (True, leaf(tree.value[node], tree.output))
            else:
                position[node] = (False, len(feat))
                feat.append(tree.feature[node])
                cats = tree.left_categories[node]
                if cats is None:
                    split.append(float(tree.threshold[node]))
                    mode.append(MODE_LEQ)
                else:
                    split.append(0.0)
                    mode.append(MODE_MEMBER)
                    # onnxruntime refuses an empty set; NEVER_MEMBER matches no input
                    # (inputs reach the trees as code + 1 >= 1, or NaN).
                    members.extend([float(c) + CODE_OFFSET for c in cats] or [NEVER_MEMBER])
                    members.append(math.nan)
                miss.append(1 if tree.missing_left[node] else 0)
                tnode.append(-1)
                tleaf.append(0)
                fnode.append(-1)
                fleaf.append(0)
        roots.append(position[0][1])
        for node in order:
            is_leaf, index = position[node]
            if is_leaf:
                continue
            lk, li = position[tree.left[node]]
            rk, ri = position[tree.right[node]]
            tleaf[index], tnode[index] = int(lk), li
            fleaf[index], fnode[index] = int(rk), ri
    T = onnx.TensorProto
    dt = kit.np_float
    attrs: Dict[str, Any] = dict(
        aggregate_function=1,  # SUM
        post_transform=0,  # NONE: the post-transform is done by standard operators
        n_targets=ensemble.n_outputs,
        tree_roots=roots,
        nodes_featureids=feat,
        nodes_splits=onnx.numpy_helper.from_array(np.asarray(split, dtype=dt), "nodes_splits"),
        nodes_modes=onnx.numpy_helper.from_array(np.asarray(mode, dtype=np.uint8), "nodes_modes"),
        nodes_truenodeids=tnode,
        nodes_trueleafs=tleaf,
        nodes_falsenodeids=fnode,
        nodes_falseleafs=fleaf,
        nodes_missing_value_tracks_true=miss,
        leaf_targetids=targets,
        leaf_weights=onnx.numpy_helper.from_array(np.asarray(weights, dtype=dt), "leaf_weights"),
    )
    if members:
        attrs["membership_values"] = onnx.numpy_helper.from_array(np.asarray(members, dtype=dt),
                                                                  "membership_values")
    assert kit.float_type == T.DOUBLE
    kit.nodes.append(onnx.helper.make_node("TreeEnsemble", [x], [output], name=TREE_NODE_NAME,
                                           domain="ai.onnx.ml", **attrs))
    return leading


def to_model(ensemble: Ensemble, input_type: str = "float64") -> Any:
    """The ONNX ModelProto (ai.onnx.ml opset 5, float64 trees) for ``ensemble``."""
    ensemble.check()
    refuse_unsupported(ensemble)
    if input_type not in INPUT_TYPES:
        raise ValueError("input_type is %r; expected one of %s" % (input_type, ", ".join(INPUT_TYPES)))
    onnx = _onnx()
    T = onnx.TensorProto
    kit = GraphKit(T.DOUBLE)
    graph_input = T.DOUBLE if input_type == "float64" else T.FLOAT
    x = prepare_input(kit, ensemble, INPUT_NAME, graph_input, ensemble.compare_precision == "float32")
    if ensemble.combine == "sum":
        leading = tree_ensemble_node(kit, ensemble, x, RAW_NAME)
    else:
        summed = kit.name("tree_sum")
        leading = tree_ensemble_node(kit, ensemble, x, summed)
        finish_mean(kit, ensemble, summed, RAW_NAME)
    outputs = add_outputs(kit, ensemble, RAW_NAME)
    meta = metadata(ensemble, leading, input_type, "exact")
    return assemble(kit, ensemble, graph_input, outputs, meta,
                    {"": ONNX_OPSET, "ai.onnx.ml": ONNX_ML_OPSET}, _doc(ensemble))


