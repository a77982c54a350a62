"""The output contract is written once on the workstation (boxwood.contract) and kept as two
standalone copies on the device side (boxwood_runtime.scorer, pure Python; boxwood_runtime.batch,
numpy). These tests hold the three together, constant by constant and value by value, on every
task of the zoo, and hold the contract itself to scikit-learn's own predict / predict_proba.

Agreement rules: exact values, decision values and labels are bit-identical in all three
(they are the same IEEE operations in the same order). Transformed outputs: the contract and
the numpy batch copy run the same numpy operations and agree bit for bit; the pure-Python
scorer uses ``math.exp`` and ``**`` and agrees within SELF_CHECK_ULPS units in the last
place (math.exp and numpy.exp are both faithfully rounded, so they differ by at most an ulp
or two per call - common practice, measured ≤ 2 in tests/test_conformance.py).
"""
from __future__ import annotations

import numpy as np
import pytest

import boxwood_runtime
import zoo
from boxwood import contract, ir
from boxwood.sources.model import SourceModel
from boxwood_runtime import batch as batch_mod
from boxwood_runtime import scorer
from boxwood_runtime.scorer import SELF_CHECK_ULPS, ulp_distance


def test_constants_agree_one_by_one():
    # every post-transform, with the same parameters, on all three sides
    assert sorted(scorer._TRANSFORM_PARAMS) == sorted(ir.POST_TRANSFORMS)
    for name in ir.POST_TRANSFORMS:
        assert tuple(scorer._TRANSFORM_PARAMS[name]) == tuple(ir.TRANSFORM_PARAMS.get(name, ())), name
    assert tuple(scorer._PER_CLASS) == tuple(ir.PER_CLASS_TRANSFORMS)
    assert set(ir.BINARY_RULES) == {"raw_gt_0", "raw_ge_0"}
    raw = np.array([[0.25, -1.5, 2.0]])
    params = {"weight_total": 3.0, "denominator": 2.5, "offset": -0.5}
    for name in ir.POST_TRANSFORMS:  # each copy knows each transform (no "unknown" error)
        contract.transform(name, raw, params)
        batch_mod.transform(name, raw, params)
        scorer.transform(name, list(raw[0]), params)
    for copy in (lambda: contract.transform("nope", raw), lambda: batch_mod.transform("nope", raw),
                 lambda: scorer.transform("nope", [0.0])):
        with pytest.raises(ValueError, match="unknown post_transform"):
            copy()


def test_target_steps_agree_in_all_three_copies():
    """The target steps (a regressor's inverse target transform) are the same list of ops in
    the hub and the scorer, and each copy applies each op the same way: the contract and the
    numpy batch copy bit for bit; the scorer bit for bit for the IEEE *, +, -, / and within
    SELF_CHECK_ULPS for math.exp / math.expm1 against numpy's (reference: numpy itself)."""
    assert tuple(scorer._TARGET_OPS) == tuple(ir.TARGET_OPS)
    rng = np.random.default_rng(7)
    y = np.concatenate([rng.normal(0, 3, (200, 2)), [[0.0, -0.0], [1e-300, -1e-300], [700.0, -745.0],
                                                     [800.0, -800.0], [5e-324, 1e-17]]])
    for op in ir.TARGET_OPS:
        step = {"op": op}
        if op in ir.TARGET_OPS_WITH_VALUES:
            step["values"] = [0.37, -12.5]
        want = {"exp": np.exp, "expm1": np.expm1}.get(op)
        with np.errstate(over="ignore"):
            if want is None:
                c = np.array(step["values"])
                want = {"mul": lambda v: v * c, "add": lambda v: v + c, "sub": lambda v: v - c,
                        "div": lambda v: v / c}[op]
            expected = want(y)
        ours = contract.apply_target_steps([step], y)
        pair = (op, step.get("values"))
        assert _bits_equal(ours, expected), op
        assert _bits_equal(batch_mod.apply_target_steps([pair], y), expected), op
        got_s = np.array([scorer.apply_target_steps([pair], list(r)) for r in y])
        if op in ("exp", "expm1"):
            worst = max(ulp_distance(float(a), float(b)) for a, b in zip(got_s.ravel(), expected.ravel()))
            assert worst <= SELF_CHECK_ULPS, (op, worst)
        else:
            assert _bits_equal(got_s, expected), op
    for copy in (lambda: contract.apply_target_steps([{"op": "log"}], y),
                 lambda: batch_mod.apply_target_steps([("log", None)], y),
                 lambda: scorer.apply_target_steps([("log", None)], [0.0])):
        with pytest.raises(ValueError, match="unknown target step"):
            copy()


def _raw_rows(device, case):
    """Raw scores of the device on the case's rows, plus synthetic raw rows that sit on the
    contract's edges: exact zeros (the binary rules differ there), ties between classes
    (the first of equal maxima wins), and values far outside exp's range."""
    # the zoo's rows write NaN as None; the device reads a None in a text field as Python None
    rows = [device.raw_scores(device.prepare([float("nan") if v is None else v for v in r], i))
            for i, r in enumerate(case.rows[:300])]
    k = len(rows[0])
    rows += [[0.0] * k, [-0.0] * k, [5e-324] * k, [1.0] * k, [800.0] * k, [-800.0] * k]
    if k > 1:
        rows += [[1.0, 1.0] + [0.0] * (k - 2), [0.0] + [2.0] * (k - 1), [-800.0] + [800.0] * (k - 1)]
    return np.array(rows, dtype=np.float64)


def _bits_equal(a, b):
    a, b = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    return a.shape == b.shape and a.tobytes() == b.tobytes()


@pytest.mark.parametrize("name", zoo.ALL_CASES)
def test_three_copies_agree_on_every_task(name):
    case, ensemble, data = zoo.exported(name)
    device = boxwood_runtime.load(data)
    gateway = batch_mod.BatchModel(device)
    c = contract.OutputContract(ensemble)
    raw = _raw_rows(device, case)
    with np.errstate(over="ignore"):
        ours = c.outputs(raw)
        exact_b, trans_b = gateway.exact_values(raw), gateway.transform_raw(raw)
        dec_c, dec_b = c.decision_values(raw), gateway.decision_values(raw)
    exact_s = [device.exact_values(list(r)) for r in raw]
    trans_s = [device.transform_raw(list(r)) for r in raw]
    dec_s = [device.decision_values(list(r)) for r in raw]
    assert c.n_exact == len(exact_s[0]) and c.n_transformed == len(trans_s[0])
    assert _bits_equal(ours.raw, exact_s) and _bits_equal(ours.raw, exact_b)
    assert _bits_equal(ours.transformed, trans_b)
    worst = max(ulp_distance(float(a), float(b)) for a, b in zip(ours.transformed.ravel(), np.ravel(trans_s)))
    assert worst <= SELF_CHECK_ULPS, worst
    if ensemble.post_transform == "isolation":
        # decision = score_samples - offset: the scores' difference (ulps of the power) carried
        # through one subtraction, which rounds each side by at most half an ulp of the result;
        # counted in ulps of the decision itself it is unbounded near 0 (cancellation)
        assert _bits_equal(dec_c, dec_b)
        d_c, d_s = dec_c.ravel(), np.ravel(dec_s).astype(np.float64)
        gap = np.abs(d_c - d_s)
        allowed = np.abs(ours.transformed.ravel() - np.ravel(trans_s)) + np.spacing(np.maximum(np.abs(d_c), np.abs(d_s)))
        assert np.all(gap <= allowed), float((gap - allowed).max())
    elif ensemble.calibration is not None:
        # a calibrated classifier has no decision function: its "decision values" are its
        # calibrated probabilities (sigmoid calibrators call exp: within SELF_CHECK_ULPS)
        assert _bits_equal(dec_c, ours.transformed) and _bits_equal(dec_c, dec_b)
        assert max(ulp_distance(float(a), float(b)) for a, b in zip(dec_c.ravel(), np.ravel(dec_s))) <= SELF_CHECK_ULPS
    else:
        assert _bits_equal(dec_c, dec_s) and _bits_equal(dec_c, dec_b)
    if ensemble.task == "regression":
        assert ours.labels is None
    else:
        labels_s = [device.classes[device.class_index(list(r))] for r in raw]
        labels_b = [device.classes[i] for i in gateway.class_index(raw).tolist()]
        assert ours.labels == labels_s == labels_b


@pytest.mark.parametrize("name", [n for n in zoo.ALL_CASES
                                  if zoo.fitted(n).task != "regression" or "hgbr_gamma" in n
                                  or n in zoo.WRAPPER_CASES])
def test_contract_matches_scikit_learn(name):
    """From scikit-learn's own raw scores, the contract gives scikit-learn's own labels
    (predict) and outputs (predict_proba / score_samples) - the outside reference."""
    case, ensemble, _ = zoo.exported(name)
    if ensemble.post_transform == "samme":
        pytest.skip("scikit-learn shows AdaBoost's decision values, not the vote sums the contract starts from")
    source = SourceModel(case.model, ensemble)
    rows = case.rows[:400]
    raw = source.raw(rows)
    c = contract.OutputContract(ensemble)
    with np.errstate(over="ignore"):
        got = c.outputs(raw)
    want = source.transformed(rows)
    worst = max(ulp_distance(float(a), float(b)) for a, b in zip(got.transformed.ravel(), want.ravel()))
    assert worst <= 4, worst
    if ensemble.task != "regression":
        sk = [v.item() if hasattr(v, "item") else v for v in case.model.predict(source.matrix(rows))]
        assert got.labels == sk
