"""Probabilities of many-class models match scikit-learn's: the device adds a softmax's
exponentials in the source's own order (``outputs.softmax_sum``).

Data: the handwritten digits that scikit-learn ships (sklearn.datasets.load_digits: 1,797
8x8 images, 10 classes; from the UCI "Optical Recognition of Handwritten Digits" set).

scikit-learn computes the probabilities of classic GradientBoostingClassifier with
sklearn.utils.extmath.softmax (numpy.exp, then numpy's sum along each C-ordered row, which
is pairwise); AdaBoostClassifier with the same function on a column-major decision array,
which numpy sums column after column (left to right); HistGradientBoostingClassifier in its
Cython loss (exp, then a left-to-right sum). The promise, derived from the operations:

* where the platform's math.exp gives the same bits as numpy.exp for a row's exponentials
  (measured: everywhere on the test machines), the device's probabilities are bit-identical
  to scikit-learn's - the same IEEE operations in the same order;
* otherwise, with both exps faithfully rounded (error < 1 ulp, relative eps = 2**-52), each
  probability p = e_k / S differs by at most (2 eps + 2 gamma_{K-1} + 2 u) p, u = 2**-53,
  gamma_n = n u / (1 - n u) (N. J. Higham, "Accuracy and Stability of Numerical Algorithms",
  2nd ed., SIAM 2002, eq. (3.4) and Lemma 3.1; all terms are positive, so the sum's relative
  error is bounded by gamma_{K-1}): that is at most 4 + 2 (K - 1) + 2 + 1 ulps of p
  (:func:`probability_ulps`, +1 for rounding the bound itself).
"""
from __future__ import annotations

import math

import numpy as np
import pytest

import boxwood_runtime
from boxwood import contract
from boxwood.export import build
from boxwood.formats.json.writer import to_bytes
from boxwood_runtime.batch import BatchModel
from boxwood_runtime.scorer import pairwise_sum, ulp_distance


def probability_ulps(k: int) -> int:
    """The derived bound, in ulps of the probability, for K classes when exps may differ."""
    return 4 + 2 * (k - 1) + 2 + 1


@pytest.fixture(scope="module")
def digits():
    from sklearn.datasets import load_digits

    X, y = load_digits(return_X_y=True)
    return X[:1200], y[:1200], X[1200:1500]


def _models():
    from sklearn.ensemble import (AdaBoostClassifier, GradientBoostingClassifier,
                                  HistGradientBoostingClassifier)
    from sklearn.tree import DecisionTreeClassifier

    return {
        "classic": GradientBoostingClassifier(n_estimators=8, max_depth=2, random_state=0),
        "histogram": HistGradientBoostingClassifier(max_iter=15, random_state=0, early_stopping=False),
        "adaboost": AdaBoostClassifier(DecisionTreeClassifier(max_depth=3, random_state=0), n_estimators=20,
                                       random_state=0),
    }


def _exps_agree(z):
    """Whether math.exp and numpy.exp give the same bits for this row's softmax terms."""
    z = np.asarray(z, dtype=np.float64)
    shifted = z - z.max()
    return all(math.exp(float(v)) == float(np.exp(v)) for v in shifted)


@pytest.mark.parametrize("kind", ["classic", "histogram", "adaboost"])
def test_ten_class_probabilities_match_scikit_learn(digits, kind):
    X, y, held_out = digits
    model = _models()[kind].fit(X, y)
    ensemble = build(model)
    assert ensemble.softmax_sum == ("pairwise" if kind == "classic" else "sequential")
    device = boxwood_runtime.load(to_bytes(ensemble))
    want = model.predict_proba(held_out)
    rows = [[float(v) for v in r] for r in held_out]
    got = np.array(device.predict_proba(rows))
    gateway = BatchModel(device).predict_proba(np.asarray(held_out, dtype=np.float64))
    ours = contract.OutputContract(ensemble).transformed(
        np.array([device.raw_scores(device.prepare(r)) for r in rows]))
    bound = probability_ulps(10)
    exact_rows = 0
    for i, r in enumerate(rows):
        d = device.decision_values(device.raw_scores(device.prepare(r)))
        terms = d if kind != "adaboost" else [v / 9 for v in d]  # samme: softmax of d / (K - 1)
        worst = max(ulp_distance(float(a), float(b)) for a, b in zip(got[i], want[i]))
        if _exps_agree(terms):
            exact_rows += 1
            assert worst == 0, (i, worst)
        else:
            assert worst <= bound, (i, worst)
    assert exact_rows > 0
    # the numpy copies agree with the pure-Python one bit for bit where numpy's exp is the one used
    assert np.array_equal(gateway, ours)


def test_the_order_matters_planted_fault(digits):
    """Planted fault: adding a classic model's exponentials left to right (the old device
    behaviour) is not scikit-learn's order; with ten classes some probabilities move."""
    X, y, held_out = digits
    model = _models()["classic"].fit(X, y)
    ensemble = build(model)
    ensemble.softmax_sum = "sequential"
    device = boxwood_runtime.load(to_bytes(ensemble))
    want = model.predict_proba(held_out)
    got = np.array(device.predict_proba([[float(v) for v in r] for r in held_out]))
    assert max(ulp_distance(float(a), float(b)) for a, b in zip(got.ravel(), want.ravel())) > 0


def test_pairwise_sum_is_numpys_row_sum():
    """boxwood_runtime.scorer.pairwise_sum against numpy.sum along a contiguous row, for rows
    of 1 to 300 positive and mixed-sign values (seeded)."""
    rng = np.random.default_rng(7)
    for n in range(1, 301):
        for scale in (1.0, 1e-3, 40.0):
            rows = np.exp(rng.normal(size=(3, n)) * scale)
            rows[1] *= np.where(rng.random(n) < 0.5, -1.0, 1.0)
            for row, total in zip(rows, rows.sum(axis=1)):
                assert pairwise_sum([float(v) for v in row]) == float(total), n
