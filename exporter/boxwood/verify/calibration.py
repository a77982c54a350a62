"""The verifier's calibration part (``Ensemble.calibration``, CalibratedClassifierCV).

* :func:`compare` - the structural proof's comparison of the two sides' calibrations:
  response, normalisation, fold count, each fold's post-transform parameters and each
  calibrator (sigmoid a and b, every isotonic knot x and y) bit for bit. Any difference is a
  "fail" finding naming the fold, the class and the knot: the bound is not carried through a
  changed calibrator.
* ``bounds.calibrated_bounds`` (verify/bounds.py) - the bounds of the compared values. Exact values are every fold's
  raw scores (AdaBoost: its decision values), bounded as the raw scores are. The calibrated
  probabilities: when every raw score is proven bit-identical and the calibrations are
  identical, isotonic calibrators and the normalisation use only correctly rounded +, -, *, /
  in the same order on both sides, so the probabilities are bit-identical (bound 0) unless a
  sigmoid is involved; a sigmoid adds each side's logistic error eta (bounds.py) to p, then
  - two classes: ``|d p1| <= eta p1 + u`` after the mean, and p0 = 1 - p1 moves by as much
    plus ``u``: an absolute bound ``eta + 4u``; relatively ``eta + (F + 2) u`` for p1 only;
  - more classes: every term positive, so the row sum keeps the relative error (plus
    gamma_{K-1}), the division adds ``eta`` of the sum and ``u``, the fold mean ``gamma_F``
    and ``u``: relative ``2 eta + (K + F + 3) u`` (first order; doubled as slack).
  When raw scores may differ, no bound is carried (isotonic steps are not bounded by the
  raw difference in general): the empirical checks judge.
"""
from __future__ import annotations

from typing import Any

from .findings import Finding, Proof, identical_bits


def compare(proof: Proof, es: Any, ea: Any) -> None:
    """Add a "fail" finding for each difference between the two sides' calibrations."""
    cs, ca = getattr(es, "calibration", None), getattr(ea, "calibration", None)
    if cs is None and ca is None:
        return

    def fail(msg: str) -> None:
        proof.add(Finding("calibration", "fail", msg))

    if cs is None or ca is None:
        fail("the %s is calibrated, the %s is not" % (("source", "artefact") if cs else ("artefact", "source")))
        return
    for key in ("response", "normalisation"):
        if cs[key] != ca[key]:
            fail("%s: source %r, artefact %r" % (key, cs[key], ca[key]))
    fs, fa = cs["folds"], ca["folds"]
    if len(fs) != len(fa):
        fail("the source has %d calibrated folds, the artefact %d" % (len(fs), len(fa)))
    for f, (a, b) in enumerate(zip(fs, fa)):
        pa, pb = a["post_transform_params"], b["post_transform_params"]
        for key in sorted(set(pa) | set(pb)):
            if key not in pa or key not in pb or not identical_bits(pa[key], pb[key]):
                fail("fold %d post-transform parameter %s: source %r, artefact %r" % (f, key, pa.get(key), pb.get(key)))
        if len(a["calibrators"]) != len(b["calibrators"]):
            fail("fold %d: %d calibrators in the source, %d in the artefact"
                 % (f, len(a["calibrators"]), len(b["calibrators"])))
        for c, (x, y) in enumerate(zip(a["calibrators"], b["calibrators"])):
            _compare_one(fail, "fold %d calibrator %d" % (f, c), x, y)


def _compare_one(fail: Any, where: str, s: Any, a: Any) -> None:
    if s["method"] != a["method"]:
        fail("%s: method %s in the source, %s in the artefact" % (where, s["method"], a["method"]))
        return
    if s["method"] == "sigmoid":
        for key in ("a", "b"):
            if not identical_bits(s[key], a[key]):
                fail("%s: sigmoid %s: source %r, artefact %r" % (where, key, s[key], a[key]))
        return
    if len(s["x"]) != len(a["x"]):
        fail("%s: %d isotonic knots in the source, %d in the artefact" % (where, len(s["x"]), len(a["x"])))
    for i, (xs, xa, ys, ya) in enumerate(zip(s["x"], a["x"], s["y"], a["y"])):
        if not identical_bits(xs, xa):
            fail("%s: isotonic knot %d: x source %r, artefact %r" % (where, i, xs, xa))
        if not identical_bits(ys, ya):
            fail("%s: isotonic knot %d: y source %r, artefact %r" % (where, i, ys, ya))
