"""Read fitted scikit-learn trees, forests, isolation forests and AdaBoost into the hub.

All of these are built from scikit-learn's classic ``Tree`` objects, which compare
inputs converted to float32 against float64 thresholds and route NaN per node. How
each estimator combines its trees, and the arithmetic the exporter reproduces so the
device gets the same bits:

- DecisionTreeRegressor / ExtraTreeRegressor: the leaf value, per output.
- DecisionTreeClassifier / ExtraTreeClassifier: ``value / value.sum()`` per leaf (the
  normalisation ``predict_proba`` applies), one hub tree per class.
- RandomForest* / ExtraTrees*: the per-tree outputs added in tree order, then divided
  by the number of trees (Breiman 2001, "Random Forests", Machine Learning 45: the forest
  prediction is the average of the tree predictions): ``combine == "mean"``.
  scikit-learn adds in this order when ``n_jobs`` is None or 1.
- IsolationForest: per tree, the leaf's depth plus c(leaf size) - 1 (Liu, Ting & Zhou
  2008, "Isolation Forest", ICDM, eq. 1-2), summed over trees in order; the
  post-transform ``isolation`` turns the sum into ``score_samples`` and
  ``decision_function``. Trees fitted on feature subsets are mapped back to the
  original columns.
- AdaBoostClassifier (SAMME; Zhu, Zou, Rosset & Hastie 2009, "Multi-class AdaBoost",
  Statistics and Its Interface 2): per tree and class, ``w`` when the tree votes for the
  class and ``-w / (K - 1)`` otherwise, summed in order; the post-transform ``samme``
  divides by the total weight and forms the decision and probabilities.
"""
from __future__ import annotations

import functools
from typing import Any, List, Optional

import numpy as np

from ..ir import Ensemble, Feature, Tree
from .common import UnsupportedModel, feature_names, plain, provenance
from .trees import classic_tree


@functools.lru_cache(maxsize=None)
def _predict_proba_normalises() -> bool:
    """Whether the installed DecisionTreeClassifier.predict_proba divides ``tree_.value`` by its
    row sum (older scikit-learn) or returns the stored fractions as they are (1.9 does): asked
    of scikit-learn on a one-leaf tree whose fractions 3/6, 2/6, 1/6 add up to 1 - 2**-53."""
    from sklearn.tree import DecisionTreeClassifier

    t = DecisionTreeClassifier().fit([[0.0]] * 6, [0, 0, 0, 1, 1, 2])
    stored = np.array(t.tree_.value[0, 0, :3], dtype=np.float64)
    return bool(t.predict_proba([[0.0]])[0][0] != stored[0])


def _tree_proba(tree: Any, n_classes: int) -> np.ndarray:
    """Per-node class probabilities as DecisionTreeClassifier.predict_proba computes them:
    value[:, 0, :n_classes], divided by its row sum (0 sums replaced by 1) where the installed
    scikit-learn does so (:func:`_predict_proba_normalises`)."""
    proba = np.array(tree.value[:, 0, :n_classes], dtype=np.float64)
    if not _predict_proba_normalises():
        return proba
    normalizer = proba.sum(axis=1)[:, np.newaxis]
    normalizer[normalizer == 0.0] = 1.0
    proba /= normalizer
    return proba


def _policies(model: Any) -> dict:
    """Missing-value and infinity policies from the estimator's own input tags."""
    allow_nan = bool(model.__sklearn_tags__().input_tags.allow_nan)
    return {"missing_values": "route" if allow_nan else "reject", "accepts_infinity": False}


def _classes(model: Any) -> List[Any]:
    return [plain(c) for c in model.classes_]


def _check_single_output_classifier(model: Any) -> None:
    if getattr(model, "n_outputs_", 1) != 1:
        raise UnsupportedModel("%s with several outputs (multi-output classification) is not supported"
                               % type(model).__name__)


def _trees_of(estimator: Any, model: Any, n_outputs: int, classifier: bool, n_classes: int) -> List[Tree]:
    t = estimator.tree_
    if classifier:
        proba = _tree_proba(t, n_classes)
        return [classic_tree(t, k, proba[:, k]) for k in range(n_classes)]
    return [classic_tree(t, k, t.value[:, k, 0]) for k in range(n_outputs)]


def read_tree_or_forest(model: Any) -> Ensemble:
    """A single decision tree or a random / extremely randomised forest."""
    from sklearn.base import is_classifier

    classifier = is_classifier(model)
    single = hasattr(model, "tree_")
    estimators = [model] if single else list(model.estimators_)
    if classifier:
        _check_single_output_classifier(model)
        classes = _classes(model)
        n_out = len(classes)
    else:
        classes = None
        n_out = int(model.n_outputs_)
    trees: List[Tree] = []
    for est in estimators:
        trees.extend(_trees_of(est, model, n_out, classifier, n_out))
    # Hub trees are emitted estimator by estimator; reorder so each output's trees stay
    # in estimator order (they are independent sums, so only per-output order matters).
    params = {"n_estimators": len(estimators), "max_depth": model.max_depth}
    if not single:
        params["bootstrap"] = bool(model.bootstrap)
    return Ensemble(
        task="classification" if classifier else "regression",
        features=[Feature(n) for n in feature_names(model)],
        trees=trees,
        base_values=[0.0] * n_out,
        post_transform="identity",
        combine="sum" if single else "mean",
        compare_precision="float32",
        classes=classes,
        output_names=[str(c) for c in classes] if classifier else (
            ["prediction"] if n_out == 1 else ["prediction_%d" % k for k in range(n_out)]),
        provenance=provenance(model, params),
        **_policies(model),
    ).check()


def _average_path_length(n: int) -> float:
    """c(n) exactly as scikit-learn's IsolationForest computes it (float64)."""
    from sklearn.ensemble._iforest import _average_path_length

    return float(_average_path_length([n])[0])


def read_isolation_forest(model: Any) -> Ensemble:
    """IsolationForest -> Ensemble with the ``isolation`` post-transform."""
    n_features = int(model.n_features_in_)
    trees: List[Tree] = []
    for idx, (est, feats) in enumerate(zip(model.estimators_, model.estimators_features_)):
        # the same float64 expression scikit-learn evaluates per sample:
        # decision_path_length[leaf] + average_path_length[leaf] - 1.0
        leaf_values = (model._decision_path_lengths[idx] + model._average_path_length_per_tree[idx] - 1.0)
        feature_map = [int(f) for f in feats] if model._max_features != n_features else None
        trees.append(classic_tree(est.tree_, 0, leaf_values, feature_map))
    denominator = len(model.estimators_) * _average_path_length(int(model._max_samples))
    params = {"n_estimators": len(model.estimators_), "max_samples": int(model._max_samples),
              "max_features": int(model._max_features), "contamination": plain(model.contamination)}
    return Ensemble(
        task="outlier_detection",
        features=[Feature(n) for n in feature_names(model)],
        trees=trees,
        base_values=[0.0],
        post_transform="isolation",
        post_transform_params={"denominator": float(denominator), "offset": float(model.offset_)},
        combine="sum",
        compare_precision="float32",
        missing_values="route",
        accepts_infinity=True,
        classes=[-1, 1],
        output_names=["path_length_sum"],
        provenance=provenance(model, params),
    ).check()


def isolation_path_sums(model: Any, X: Any) -> np.ndarray:
    """Per row, the sum over trees of (leaf depth + c(leaf size) - 1), computed with the
    fitted trees the way IsolationForest._compute_score_samples does (scikit-learn 1.x):
    inputs as float32, trees applied one by one, added in tree order from 0."""
    from sklearn.utils.validation import validate_data

    X = validate_data(model, X, dtype=np.float32, reset=False, ensure_all_finite=False)
    subsets = model._max_features != X.shape[1]
    depths = np.zeros(X.shape[0], order="f")
    for idx, (est, feats) in enumerate(zip(model.estimators_, model.estimators_features_)):
        leaves = est.apply(X[:, feats] if subsets else X, check_input=False)
        depths += model._decision_path_lengths[idx][leaves] + model._average_path_length_per_tree[idx][leaves] - 1.0
    return depths


def read_adaboost(model: Any) -> Ensemble:
    """AdaBoostClassifier (SAMME) with decision-tree base learners -> Ensemble."""
    from sklearn.tree import BaseDecisionTree

    for est in model.estimators_:
        if not isinstance(est, BaseDecisionTree):
            raise UnsupportedModel("AdaBoostClassifier with %s base learners is not supported; use decision trees"
                                   % type(est).__name__)
    classes = _classes(model)
    k = len(classes)
    if k < 2:
        raise UnsupportedModel("AdaBoostClassifier fitted on a single class is not supported")
    trees: List[Tree] = []
    for est, w in zip(model.estimators_, model.estimator_weights_):
        w = float(w)
        against = -1 / (k - 1) * w  # the expression scikit-learn evaluates
        proba = np.asarray(est.tree_.value[:, 0, :], dtype=np.float64)
        votes = [list(model.classes_).index(c) for c in est.classes_[np.argmax(proba, axis=1)]]
        for out in range(k):
            values = [w if votes[i] == out else against for i in range(len(votes))]
            trees.append(classic_tree(est.tree_, out, values))
    weight_total = float(model.estimator_weights_.sum())
    params = {"n_estimators": len(model.estimators_), "learning_rate": float(model.learning_rate)}
    return Ensemble(
        task="classification",
        features=[Feature(n) for n in feature_names(model)],
        trees=trees,
        base_values=[0.0] * k,
        post_transform="samme",
        # predict_proba: sklearn.utils.extmath.softmax of the decision, which AdaBoost builds
        # column-major (np.where on a transposed mask); numpy then sums a row column after
        # column, left to right (tests/test_many_classes.py: bit-identical on 10 classes)
        softmax_sum="sequential",
        post_transform_params={"weight_total": weight_total},
        combine="sum",
        compare_precision="float32",
        classes=classes,
        output_names=[str(c) for c in classes],
        provenance=provenance(model, params),
        **_policies(model),
    ).check()


def read(model: Any) -> Optional[Ensemble]:
    """Return the Ensemble for a supported tree-based estimator, or None if not ours."""
    from sklearn.ensemble import (
        AdaBoostClassifier,
        ExtraTreesClassifier,
        ExtraTreesRegressor,
        IsolationForest,
        RandomForestClassifier,
        RandomForestRegressor,
    )
    from sklearn.tree import BaseDecisionTree

    if isinstance(model, IsolationForest):
        return read_isolation_forest(model)
    if isinstance(model, AdaBoostClassifier):
        return read_adaboost(model)
    if isinstance(model, (BaseDecisionTree, RandomForestClassifier, RandomForestRegressor,
                          ExtraTreesClassifier, ExtraTreesRegressor)):
        return read_tree_or_forest(model)
    return None
