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
