"""Starting constants of boosting, worked by hand from their textbook definitions and
compared with the base values that the exporter wrote into the artefact.

The starting model of gradient boosting is the constant that minimises the loss over
the training targets (Friedman 2001, "Greedy Function Approximation: A Gradient
Boosting Machine", Ann. Statist., Algorithm 1 line 1; Hastie, Tibshirani & Friedman,
The Elements of Statistical Learning, 2nd ed., Algorithm 10.3):
- squared error: the mean of y;
- absolute error: the median of y;
- pinball (quantile) loss at level alpha: the alpha-quantile of y;
- binary log-loss: the log-odds log(p / (1 - p)) of the positive-class prior p;
- exponential loss: half the log-odds (Friedman, Hastie & Tibshirani 2000,
  "Additive logistic regression", Ann. Statist., Result 1);
- multinomial log-loss: the log class priors, here in scikit-learn's symmetric form
  log p_k - mean_j log p_j (only differences between classes matter);
- Poisson and gamma deviance with a log link: log of the mean of y.

Each hand computation uses plain Python (sorted lists, math.log, math.fsum) on the
training targets; the comparison allows a few units in the last place because the
library sums in a different order (numpy's pairwise summation).
"""
from __future__ import annotations

import math

import numpy as np
import pytest

from boxwood.export import build
from boxwood_runtime.scorer import ulp_distance

import zoo


def _mean(ys):
    return math.fsum(ys) / len(ys)


def _quantile_lower(ys, alpha):
    """The alpha-quantile as the smallest y with at least alpha of the sample at or below it
    (the inverse of the empirical distribution function; Hyndman & Fan 1996, definition 1)."""
    s = sorted(ys)
    k = max(int(math.ceil(alpha * len(s))) - 1, 0)
    return s[k]


def _median_midpoint(ys):
    s = sorted(ys)
    n = len(s)
    return s[n // 2] if n % 2 else (s[n // 2 - 1] + s[n // 2]) / 2.0


def _close(a, b, ulps=8):
    return ulp_distance(float(a), float(b)) <= ulps or abs(a - b) <= 1e-12 * max(1.0, abs(b))


def _base(name):
    case = zoo.fitted(name)
    return case, build(case.model).base_values


@pytest.mark.parametrize("name", ["gbr_squared_error", "hgbr_squared_error"])
def test_squared_error_starts_at_the_mean(name):
    case, base = _base(name)
    assert _close(base[0], _mean(list(case.y)))


@pytest.mark.parametrize("name", ["gbr_absolute_error", "hgbr_absolute_error"])
def test_absolute_error_starts_at_the_median(name):
    case, base = _base(name)
    ys = list(map(float, case.y))
    # Any value between the two middle order statistics minimises the absolute error;
    # both of scikit-learn's estimators pick a value in that interval.
    s = sorted(ys)
    n = len(s)
    lo, hi = (s[(n - 1) // 2], s[n // 2])
    assert lo <= base[0] <= hi
    assert _close(base[0], _median_midpoint(ys)) or _close(base[0], _quantile_lower(ys, 0.5))


@pytest.mark.parametrize("name,alpha", [("gbr_quantile", 0.9), ("hgbr_quantile", 0.2)])
def test_quantile_loss_starts_at_the_quantile(name, alpha):
    case, base = _base(name)
    ys = sorted(map(float, case.y))
    n = len(ys)
    # The minimisers of the pinball loss form the interval between the order statistics
    # around rank alpha * n; the base value must lie in it.
    k = alpha * n
    lo = ys[max(int(math.ceil(k)) - 1, 0)]
    hi = ys[min(int(math.floor(k)), n - 1)]
    assert lo - 1e-12 <= base[0] <= hi + 1e-12, (lo, base[0], hi)


@pytest.mark.parametrize("name", ["gbc_binary", "hgbc_binary"])
def test_binary_log_loss_starts_at_the_log_odds(name):
    case, base = _base(name)
    p = _mean([1.0 if v == case.model.classes_[1] else 0.0 for v in case.y])
    assert _close(base[0], math.log(p / (1.0 - p)))


def test_exponential_loss_starts_at_half_the_log_odds():
    case, base = _base("gbc_exponential")
    p = _mean([1.0 if v == case.model.classes_[1] else 0.0 for v in case.y])
    assert _close(base[0], 0.5 * math.log(p / (1.0 - p)))


@pytest.mark.parametrize("name", ["gbc_multiclass", "gbc_wine", "hgbc_multiclass"])
def test_multinomial_starts_at_the_log_priors(name):
    case, base = _base(name)
    classes = list(case.model.classes_)
    priors = [_mean([1.0 if v == c else 0.0 for v in case.y]) for c in classes]
    logs = [math.log(p) for p in priors]
    centre = _mean(logs)
    # Only differences between classes matter; compare the centred forms.
    got_centre = _mean(base)
    for k in range(len(classes)):
        assert abs((base[k] - got_centre) - (logs[k] - centre)) <= 1e-12


@pytest.mark.parametrize("name", ["hgbr_poisson", "hgbr_gamma"])
def test_log_link_starts_at_the_log_mean(name):
    case, base = _base(name)
    assert _close(base[0], math.log(_mean(list(case.y))))


def test_init_zero_starts_at_zero():
    _, base = _base("gbr_init_zero")
    assert base == [0.0]


def test_init_dummy_median_starts_at_the_median():
    case, base = _base("gbr_init_dummy_median")
    ys = list(map(float, case.y))
    assert _close(base[0], _median_midpoint(ys))


def test_learning_rate_applied_to_leaves():
    """Classic boosting adds learning_rate * leaf value (ESL Algorithm 10.3 with
    shrinkage, eq. 10.41); the exported leaves are the fitted leaves times the rate."""
    case = zoo.fitted("gbr_squared_error")
    ensemble = build(case.model)
    tree = case.model.estimators_[3, 0].tree_
    lr = case.model.learning_rate
    leaves = [i for i in range(tree.node_count) if tree.children_left[i] == -1]
    exported = ensemble.trees[3]
    for i in leaves:
        assert exported.value[i] == lr * float(tree.value[i, 0, 0])
    assert len(ensemble.trees) == case.model.n_estimators_


def _harmonic(n):
    return math.fsum(1.0 / i for i in range(1, n + 1))


def test_isolation_forest_average_path_length_by_hand():
    """c(n) = 2 H(n - 1) - 2 (n - 1) / n, the average path length of an unsuccessful search
    in a binary search tree (Liu, Ting & Zhou 2008, Isolation Forest, ICDM, eq. 1), with
    H(i) the harmonic number. scikit-learn approximates H(i) by ln(i) + Euler's constant
    (0.5772156649..., from memory), so compare within that approximation's error, which
    is below 1 / (2 i) (common practice: H(i) - ln(i) - gamma lies in (1/(2(i+1)), 1/(2i)))."""
    case = zoo.fitted("iforest_subsets")
    ensemble = build(case.model)
    n = int(case.model.max_samples_)
    c_exact = 2.0 * _harmonic(n - 1) - 2.0 * (n - 1) / n
    denominator = ensemble.post_transform_params["denominator"]
    per_tree = denominator / len(case.model.estimators_)
    assert abs(per_tree - c_exact) <= 2.0 * (1.0 / (2 * (n - 1)))
    # and the score formula s = 2 ** (-E[h(x)] / c(n)) (eq. 2) on one row, by hand
    import boxwood_runtime
    from boxwood.formats.json.writer import to_bytes

    device = boxwood_runtime.load(to_bytes(ensemble))
    row = case.rows[0]
    total_path = device.raw_scores(device.prepare(row))[0]
    mean_path = total_path / len(case.model.estimators_)
    assert _close(device.score_samples(row), -(2.0 ** (-mean_path / per_tree)), ulps=16)


def test_forest_is_the_mean_of_its_trees_by_hand():
    """Breiman (2001), Random Forests, Machine Learning 45(1): the forest's regression
    prediction is the average of its trees' predictions. Average scikit-learn's own
    per-tree predictions by hand and compare with the device."""
    import boxwood_runtime

    case, _, data = zoo.exported("rfr")
    device = boxwood_runtime.load(data)
    X = np.asarray(case.X, dtype=np.float64)[:50]
    per_tree = [est.predict(X) for est in case.model.estimators_]
    for i in range(len(X)):
        by_hand = math.fsum(p[i] for p in per_tree) / len(per_tree)
        assert _close(device.predict(case.rows[i]), by_hand)


def test_samme_class_weights_by_hand():
    """SAMME (Zhu, Zou, Rosset & Hastie 2009, Multi-class AdaBoost, Algorithm 2): tree m
    gets weight alpha_m = learning_rate * (log((1 - err_m) / err_m) + log(K - 1)), and a
    record's class scores are sum_m alpha_m [tree m votes k] (scikit-learn's symmetric
    form subtracts alpha_m / (K - 1) for the other classes, which shifts all classes
    equally). Check the weights from the recorded errors and the device's vote by hand."""
    import boxwood_runtime

    case, ensemble, data = zoo.exported("ada_multiclass")
    model = case.model
    K = len(model.classes_)
    for err, alpha in zip(model.estimator_errors_, model.estimator_weights_):
        if err > 0:
            want = model.learning_rate * (math.log((1.0 - err) / err) + math.log(K - 1.0))
            assert _close(alpha, want)
    device = boxwood_runtime.load(data)
    X = np.asarray(case.X, dtype=np.float64)[:40]
    votes = [est.predict(X) for est in model.estimators_]
    for i in range(len(X)):
        scores = [math.fsum(w for w, v in zip(model.estimator_weights_, votes) if v[i] == c) for c in model.classes_]
        by_hand = model.classes_[int(np.argmax(scores))]
        assert device.predict(case.rows[i]) == by_hand
