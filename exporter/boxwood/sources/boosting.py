"""Read fitted scikit-learn gradient boosting estimators into the hub.

Covers GradientBoostingRegressor/Classifier (classic trees, inputs compared as
float32) and HistGradientBoostingRegressor/Classifier (histogram trees, inputs
compared as float64, native NaN routing and categorical splits).

This module reads scikit-learn's fitted attributes, some of them private
(``_predictors``, ``_baseline_prediction``, ``_preprocessor``, ``_raw_predict_init``).
The conformance suite checks every reader against the estimator's own predictions,
so a change in scikit-learn's internals shows up as a failing test, not as a
silently different model.
"""
from __future__ import annotations

from typing import Any, List, Optional

import numpy as np

from ..ir import LEAF, Ensemble, Feature, Tree
from .common import UnsupportedModel, feature_names, is_nan, plain, provenance
from .trees import classic_tree

GB_REGRESSION_LOSSES = ("squared_error", "absolute_error", "huber", "quantile")
GB_CLASSIFICATION_LOSSES = ("log_loss", "exponential")
HGB_REGRESSION_LOSSES = {
    "squared_error": "identity",
    "absolute_error": "identity",
    "quantile": "identity",
    "gamma": "exp",
    "poisson": "exp",
}


# --------------------------------------------------------------------------- classic
def read_gradient_boosting(model: Any) -> Ensemble:
    """GradientBoostingRegressor or GradientBoostingClassifier -> Ensemble."""
    from sklearn.base import is_classifier
    from sklearn.dummy import DummyClassifier, DummyRegressor

    name = type(model).__name__
    classifier = is_classifier(model)
    allowed = GB_CLASSIFICATION_LOSSES if classifier else GB_REGRESSION_LOSSES
    if model.loss not in allowed:
        raise UnsupportedModel("%s with loss=%r is not supported; supported losses: %s"
                               % (name, model.loss, ", ".join(allowed)))
    init = model.init_
    if not (isinstance(init, str) and init == "zero") and not isinstance(init, (DummyRegressor, DummyClassifier)):
        raise UnsupportedModel(
            "%s with init=%s is not supported: the starting score must be a constant "
            "(init=None, 'zero', or a fitted DummyRegressor/DummyClassifier)" % (name, type(init).__name__))

    n_features = int(model.n_features_in_)
    # The starting raw score is the same for every row when init is constant; ask
    # scikit-learn for it on one all-zero row so its bits are exactly the source's.
    zero_row = np.zeros((1, n_features), dtype=np.float64)
    base = [float(v) for v in np.asarray(model._raw_predict_init(zero_row), dtype=np.float64).ravel()]

    lr = float(model.learning_rate)
    trees: List[Tree] = []
    stages = model.estimators_
    for stage in range(stages.shape[0]):
        for k in range(stages.shape[1]):
            tree = stages[stage, k].tree_
            # predict_stages adds ``learning_rate * value`` in float64 at predict time;
            # the same IEEE product formed here gives the same bits.
            trees.append(classic_tree(tree, k, [lr * float(v) for v in tree.value[:, 0, 0]]))

    features = [Feature(n) for n in feature_names(model)]
    if classifier:
        classes = [plain(c) for c in model.classes_]
        post = "softmax" if len(classes) > 2 else ("logistic_double" if model.loss == "exponential" else "logistic")
        binary_rule = "raw_ge_0" if len(classes) == 2 else None
        outputs = [str(c) for c in classes] if len(classes) > 2 else [str(classes[1])]
    else:
        classes, post, binary_rule, outputs = None, "identity", None, ["prediction"]

    params = {
        "loss": model.loss,
        "learning_rate": lr,
        "n_estimators_fitted": int(stages.shape[0]),
        "max_depth": model.max_depth,
        "init": "zero" if isinstance(init, str) else type(init).__name__,
    }
    if model.loss in ("huber", "quantile"):
        params["alpha"] = float(model.alpha)
    return Ensemble(
        task="classification" if classifier else "regression",
        features=features,
        trees=trees,
        base_values=base,
        post_transform=post,
        softmax_sum="pairwise",  # predict_proba: sklearn.utils.extmath.softmax, numpy's row sum
        combine="sum",
        compare_precision="float32",
        missing_values="reject",
        accepts_infinity=False,
        classes=classes,
        binary_rule=binary_rule,
        output_names=outputs,
        provenance=provenance(model, params),
    ).check()


# --------------------------------------------------------------------------- histogram
def read_hist_gradient_boosting(model: Any) -> Ensemble:
    """HistGradientBoostingRegressor or HistGradientBoostingClassifier -> Ensemble."""
    from sklearn.base import is_classifier

    name = type(model).__name__
    classifier = is_classifier(model)
    loss = model.loss
    if not classifier and loss not in HGB_REGRESSION_LOSSES:
        raise UnsupportedModel("%s with loss=%r is not supported; supported losses: %s"
                               % (name, loss, ", ".join(HGB_REGRESSION_LOSSES)))
    n_features = int(model.n_features_in_)
    names = feature_names(model)
    features = [Feature(n) for n in names]

    # With categorical features scikit-learn ordinal-encodes them and moves them in
    # front of the numeric ones; the trees index that reordered matrix.
    order = list(range(n_features))
    is_cat = getattr(model, "is_categorical_", None)
    if is_cat is not None and getattr(model, "_preprocessor", None) is not None:
        is_cat = np.asarray(is_cat, dtype=bool)
        order = [int(i) for i in np.flatnonzero(is_cat)] + [int(i) for i in np.flatnonzero(~is_cat)]
        indices = model._preprocessor.output_indices_
        if indices["encoder"].stop != int(is_cat.sum()):
            raise UnsupportedModel("%s: unexpected layout of the categorical preprocessing" % name)
        encoder = model._preprocessor.named_transformers_["encoder"]
        for original, categories in zip(np.flatnonzero(is_cat), encoder.categories_):
            values = [plain(c) for c in categories]
            if values and is_nan(values[-1]):
                values = values[:-1]  # the encoder lists NaN last; it is the missing marker
            features[original] = Feature(names[original], "categorical", values)

    trees: List[Tree] = []
    for iteration in model._predictors:
        for k, predictor in enumerate(iteration):
            trees.append(_hist_tree(predictor, k, order))

    base = [float(v) for v in np.asarray(model._baseline_prediction, dtype=np.float64).ravel()]
    if classifier:
        classes = [plain(c) for c in model.classes_]
        post = "softmax" if len(classes) > 2 else "logistic"
        binary_rule = "raw_gt_0" if len(classes) == 2 else None
        outputs = [str(c) for c in classes] if len(classes) > 2 else [str(classes[1])]
    else:
        classes, post, binary_rule, outputs = None, HGB_REGRESSION_LOSSES[loss], None, ["prediction"]

    params = {
        "loss": loss,
        "learning_rate": float(model.learning_rate),
        "n_iter": int(model.n_iter_),
        "max_depth": model.max_depth,
        "max_leaf_nodes": model.max_leaf_nodes,
    }
    if loss == "quantile":
        params["quantile"] = float(model.quantile)
    return Ensemble(
        task="classification" if classifier else "regression",
        features=features,
        trees=trees,
        base_values=base,
        post_transform=post,
        combine="sum",
        compare_precision="float64",
        missing_values="route",
        classes=classes,
        binary_rule=binary_rule,
        output_names=outputs,
        provenance=provenance(model, params),
    ).check()


def _hist_tree(predictor: Any, output: int, order: List[int]) -> Tree:
    nodes = predictor.nodes
    bitsets = predictor.raw_left_cat_bitsets
    feature, threshold, left, right, missing, value, cats = [], [], [], [], [], [], []
    for node in nodes:
        if node["is_leaf"]:
            feature.append(LEAF)
            threshold.append(0.0)
            left.append(LEAF)
            right.append(LEAF)
            missing.append(False)
            value.append(float(node["value"]))
            cats.append(None)
            continue
        feature.append(order[int(node["feature_idx"])])
        left.append(int(node["left"]))
        right.append(int(node["right"]))
        missing.append(bool(node["missing_go_to_left"]))
        value.append(0.0)
        if node["is_categorical"]:
            words = bitsets[int(node["bitset_idx"])]
            codes = tuple(c for c in range(256) if (int(words[c // 32]) >> (c % 32)) & 1)
            cats.append(codes)
            threshold.append(0.0)
        else:
            cats.append(None)
            threshold.append(float(node["num_threshold"]))
    return Tree(output, feature, threshold, left, right, missing, value, cats)


def read(model: Any) -> Optional[Ensemble]:
    """Return the Ensemble for a supported boosting estimator, or None if not ours."""
    from sklearn.ensemble import (
        GradientBoostingClassifier,
        GradientBoostingRegressor,
        HistGradientBoostingClassifier,
        HistGradientBoostingRegressor,
    )

    if isinstance(model, (GradientBoostingRegressor, GradientBoostingClassifier)):
        return read_gradient_boosting(model)
    if isinstance(model, (HistGradientBoostingRegressor, HistGradientBoostingClassifier)):
        return read_hist_gradient_boosting(model)
    return None
