"""CalibratedClassifierCV (issue 15, item 4): the calibration stage against its outside
references, the format rule, the verifier's planted faults and the refusals.

Outside references:
- scikit-learn 1.9 itself: ``CalibratedClassifierCV.predict_proba`` / ``predict``, each
  fold's ``decision_function`` / ``predict_proba``, and each fitted calibrator's own
  ``predict`` (``IsotonicRegression(out_of_bounds="clip")``, ``_SigmoidCalibration``);
- ``numpy.interp`` (the issue asks for it as the interpolation's reference) and
  ``scipy.interpolate.interp1d(kind="linear")`` (what IsotonicRegression builds; for float64
  knots scipy hands the call to numpy.interp: ``_call_linear_np`` in scipy's
  ``_interpolate.py``, read in scipy 1.17);
- data sets scikit-learn ships (tests/zoo.py names them).
The zoo's calibration cases also run through test_conformance (raw values bit-identical,
probabilities within 4 ulps, labels equal), test_contract, test_roundtrip, test_schema,
test_stream, test_compiled, test_verify and test_micropython.
"""
from __future__ import annotations

import copy
import math

import numpy as np
import pytest

import boxwood_runtime
import zoo
from boxwood import contract
from boxwood.export import build
from boxwood.formats.json.writer import needs_format_3, to_bytes
from boxwood.sources import UnsupportedModel, read_model
from boxwood.sources.model import SourceModel
from boxwood.verify import verify
from boxwood_runtime import batch as batch_mod
from boxwood_runtime import scorer
from boxwood_runtime.scorer import ulp_distance
from test_verify import document, findings, status, write

PROBA_ULPS = 4


def _calibrators(name):
    """(scikit-learn calibrator, its hub form) for every calibrator of a zoo case."""
    case, ensemble, _ = zoo.exported(name)
    model = case.model.steps[-1][1] if hasattr(case.model, "steps") else case.model  # calibration last
    out = []
    for cc, fold in zip(model.calibrated_classifiers_, ensemble.calibration["folds"]):
        out += list(zip(cc.calibrators, fold["calibrators"]))
    return out


def _isotonic_points(x):
    """Every knot, its two neighbouring floats, midpoints and a spread between knots, and
    points outside the knots' range (scikit-learn refuses infinite inputs: checked apart)."""
    x = [float(v) for v in x]
    pts = []
    for v in x:
        pts += [v, math.nextafter(v, -math.inf), math.nextafter(v, math.inf)]
    for a, b in zip(x, x[1:]):
        pts += [a + (b - a) / 2, a + (b - a) / 3, a + (b - a) * 0.999]
    lo, hi = x[0], x[-1]
    span = max(hi - lo, 1.0)
    pts += [lo - span, hi + span, lo - 1e300, hi + 1e300]
    return np.array(pts, dtype=np.float64)


def _bits(a):
    return np.asarray(a, dtype=np.float64).tobytes()


ISOTONIC_CASES = [n for n in zoo.CALIBRATION_CASES if "isotonic" in n]
SIGMOID_CASES = [n for n in zoo.CALIBRATION_CASES if "sigmoid" in n]


@pytest.mark.parametrize("name", ISOTONIC_CASES)
def test_isotonic_interpolation_is_scikit_learns_bit_for_bit(name):
    """At every knot, both neighbouring floats, between knots and outside the range, the
    device's formula (scorer), the contract's and the batch copy's give the bits of the
    fitted IsotonicRegression.predict, of scipy's interp1d after the clip, and of numpy.interp."""
    from scipy.interpolate import interp1d

    n_knots = 0
    for sk, hub in _calibrators(name):
        xs, ys = hub["x"], hub["y"]
        t = _isotonic_points(xs)
        want = sk.predict(t)  # scikit-learn: clip, then interp1d
        clipped = np.clip(t, xs[0], xs[-1])
        ref_np = np.interp(clipped, xs, ys) if len(xs) > 1 else np.full(len(t), ys[0])
        assert _bits(ref_np) == _bits(want)
        if len(xs) > 1:
            ref_scipy = interp1d(np.array(xs), np.array(ys), kind="linear")(clipped)
            assert _bits(ref_scipy) == _bits(want)  # scipy delegates to numpy.interp: no difference
        device = [scorer.isotonic_interpolate(float(v), xs, ys) for v in t]
        assert _bits(device) == _bits(want)
        assert _bits(contract.isotonic_interpolate(t, xs, ys)) == _bits(want)
        assert _bits(batch_mod._calibrate(("isotonic", xs, ys), t)) == _bits(want)
        # infinite responses (not reachable from finite leaves): clipped like any other value
        assert [scorer.isotonic_interpolate(v, xs, ys) for v in (-math.inf, math.inf)] == [ys[0], ys[-1]]
        n_knots += len(xs)
    assert n_knots > 10


def test_isotonic_single_knot_and_hand_made_knots():
    """One knot: scikit-learn's constant (IsotonicRegression._build_f); hand-made knots with
    steep, flat and tiny intervals against numpy.interp and IsotonicRegression itself."""
    from sklearn.isotonic import IsotonicRegression

    one = IsotonicRegression(out_of_bounds="clip").fit([2.0, 2.0, 2.0], [0.0, 1.0, 1.0])
    assert len(one.X_thresholds_) == 1
    xs, ys = [float(v) for v in one.X_thresholds_], [float(v) for v in one.y_thresholds_]
    for t in (-1e300, 1.0, 2.0, math.nextafter(2.0, 3.0), 5.0, 1e300):
        want = one.predict([t])[0]
        assert scorer.isotonic_interpolate(t, xs, ys) == want
        assert contract.isotonic_interpolate(np.array([t]), xs, ys)[0] == want
    xs = [-3.0, -1e-300, 0.0, 5e-324, 1.0, 1.0 + 2 ** -52, 7.5, 1e300]
    ys = [0.0, 0.1, 0.1, 0.3, 0.3 + 2 ** -50, 0.9, 0.9, 1.0]
    t = _isotonic_points(xs)
    want = np.interp(np.clip(t, xs[0], xs[-1]), xs, ys)
    assert _bits([scorer.isotonic_interpolate(float(v), xs, ys) for v in t]) == _bits(want)
    assert _bits(contract.isotonic_interpolate(t, xs, ys)) == _bits(want)
    # IsotonicRegression merges x closer than float64 resolution (its _make_unique): fit it on
    # spread knots with a flat pair and compare its own predict
    xs = [-3.0, -1.0, 0.0, 1.0, 7.5, 1e300]
    ys = [0.0, 0.1, 0.1, 0.3, 0.9, 1.0]
    fitted = IsotonicRegression(out_of_bounds="clip").fit(xs, ys)
    assert [float(v) for v in fitted.X_thresholds_] == xs
    t = _isotonic_points(xs)
    assert _bits([scorer.isotonic_interpolate(float(v), xs, ys) for v in t]) == _bits(fitted.predict(t))


@pytest.mark.parametrize("name", SIGMOID_CASES)
def test_sigmoid_is_scikit_learns(name):
    """expit(-(a t + b)) on the device (math.exp) and in the contract (numpy.exp) against
    _SigmoidCalibration.predict (scipy's expit): measured equal bit for bit here; allowed
    PROBA_ULPS."""
    case, ensemble, _ = zoo.exported(name)
    worst = 0
    for sk, hub in _calibrators(name):
        t = np.linspace(-40.0, 40.0, 801)
        want = sk.predict(t)
        device = [scorer._calibrate(("sigmoid", hub["a"], hub["b"]), float(v)) for v in t]
        ours = contract.sigmoid_calibrate(t, hub["a"], hub["b"])
        worst = max(worst, max(ulp_distance(float(a), float(b)) for a, b in zip(device, want)),
                    max(ulp_distance(float(a), float(b)) for a, b in zip(ours, want)))
    assert worst <= PROBA_ULPS


@pytest.mark.parametrize("name", zoo.CALIBRATION_CASES)
def test_scorer_and_batch_match_scikit_learn(name, record_property):
    """Device scorer and numpy batch evaluator against CalibratedClassifierCV on the case's
    rows: the per-fold raw values bit-identical to each fold's own classifier, probabilities
    within PROBA_ULPS (max recorded), labels equal; no decision_function, as in scikit-learn."""
    case, ensemble, data = zoo.exported(name)
    device = boxwood_runtime.load(data)
    gateway = batch_mod.BatchModel(device)
    source = SourceModel(case.model, ensemble)
    rows = case.rows
    X = source.matrix(rows)
    recs = [[float("nan") if v is None else v for v in r] for r in rows]
    raw = [device.raw_scores(device.prepare(r, i)) for i, r in enumerate(recs)]
    assert _bits([device.exact_values(r) for r in raw]) == _bits(source.raw(rows))
    want = case.model.predict_proba(X)
    got = np.array(device.predict_proba(recs))
    worst = max(ulp_distance(float(a), float(b)) for a, b in zip(got.ravel(), want.ravel()))
    batch_in = recs if ensemble.fields else np.array(recs)  # a pipeline takes a list of records
    got_b = gateway.predict_proba(batch_in)
    worst_b = max(ulp_distance(float(a), float(b)) for a, b in zip(np.ravel(got_b), want.ravel()))
    record_property("proba_ulps_device", worst)
    record_property("proba_ulps_batch", worst_b)
    assert worst <= PROBA_ULPS and worst_b <= PROBA_ULPS
    labels = list(case.model.predict(X))
    assert device.predict(recs) == labels
    assert list(gateway.predict(batch_in)) == labels
    assert not device.has_decision_function and not hasattr(case.model, "decision_function")
    with pytest.raises(TypeError):
        device.decision_function(recs[0])
    with pytest.raises(TypeError):
        gateway.decision_function(np.array(recs[:2]))


def test_training_rows_reach_every_isotonic_knot():
    """The knots are responses of the rows the calibrators were fitted on: scoring the
    training rows hits every knot exactly (what verify --data with the training data
    covers; docs/calibration.md). Checked on a cv=3 case: each fold's calibrators saw the
    responses of that fold's held-out rows."""
    case, ensemble, data = zoo.exported("cal_hgbc_isotonic_multiclass")
    device = boxwood_runtime.load(data)
    cal = ensemble.calibration
    m = ensemble.fold_outputs
    hit = [[set() for _ in fold["calibrators"]] for fold in cal["folds"]]
    for i, r in enumerate(case.rows):
        raw = device.raw_scores(device.prepare(r, i))
        for f, fold in enumerate(cal["folds"]):
            for c in range(len(fold["calibrators"])):
                hit[f][c].add(raw[f * m + c])
    for f, fold in enumerate(cal["folds"]):
        for c, one in enumerate(fold["calibrators"]):
            assert set(one["x"]) <= hit[f][c], (f, c)


# ----------------------------------------------------------------------------- format
def test_format_version_3_only_with_calibration(monkeypatch):
    """A calibrated artefact says format_version 3; every other stays at 2 (bytes unchanged);
    a scorer that reads only 1 and 2 refuses it with its usual message."""
    _, ensemble, data = zoo.exported("cal_rfc_isotonic_binary")
    assert needs_format_3(ensemble) and b'"format_version":3' in data
    for name in ("gbc_binary", "rfc_multiclass", "pipe_hgbr_encoded"):
        _, plain_ens, plain_data = zoo.exported(name)
        assert not needs_format_3(plain_ens)
        assert b'"format_version":2' in plain_data and b"calibration" not in plain_data
    monkeypatch.setattr(scorer, "FORMAT_VERSIONS", (1, 2))
    with pytest.raises(scorer.ArtefactError, match="format_version 3 is not one this scorer"):
        boxwood_runtime.load(data)


def test_damaged_calibration_is_refused_at_load():
    """The loader names the path of a bad calibration entry."""
    _, doc = document("cal_hgbc_isotonic_multiclass")
    bad = copy.deepcopy(doc)
    xs = bad["outputs"]["calibration"]["folds"][1]["calibrators"][2]["x"]
    xs[1], xs[2] = xs[2], xs[1]
    with pytest.raises(scorer.ArtefactError, match=r"folds\[1\]\.calibrators\[2\]\.x\[2\] does not increase"):
        boxwood_runtime.load(scorer.artefact_bytes(bad))
    bad = copy.deepcopy(doc)
    bad["outputs"]["calibration"]["folds"][0]["calibrators"].pop()
    with pytest.raises(scorer.ArtefactError, match=r"folds\[0\]\.calibrators: 3 classes need 3"):
        boxwood_runtime.load(scorer.artefact_bytes(bad))
    bad = copy.deepcopy(doc)
    bad["format_version"] = 2
    with pytest.raises(scorer.ArtefactError, match="outputs.calibration needs format_version 3"):
        boxwood_runtime.load(scorer.artefact_bytes(bad))


def test_fold_weight_total_of_zero_is_refused_at_load():
    """AdaBoost's decision values divide by weight_total (scikit-learn's SAMME): a later fold's
    weight_total of 0 must be refused at load, not end in ZeroDivisionError when scoring (the
    top-level one, fold 0's, was already checked)."""
    _, doc = document("cal_ada_isotonic_multiclass")
    bad = copy.deepcopy(doc)
    bad["outputs"]["calibration"]["folds"][2]["post_transform_params"]["weight_total"] = 0.0
    with pytest.raises(scorer.ArtefactError, match=r"folds\[2\]\.post_transform_params\.weight_total must be > 0"):
        boxwood_runtime.load(scorer.artefact_bytes(bad))


# ----------------------------------------------------------------------------- verify
def test_clean_calibrated_artefact_verifies(tmp_path):
    case, _, data = zoo.exported("cal_gbc_sigmoid_multiclass")
    path = tmp_path / "m.json"
    path.write_bytes(data)
    result = verify(case.model, str(path))
    assert result.passed, result.summary()


def _knot_moved(doc):
    one = doc["outputs"]["calibration"]["folds"][1]["calibrators"][0]
    i = len(one["x"]) // 2
    one["x"][i] = math.nextafter(one["x"][i], math.inf)
    return "fold 1 calibrator 0: isotonic knot %d: x" % i


def _knot_value_moved(doc):
    one = doc["outputs"]["calibration"]["folds"][2]["calibrators"][1]
    i = len(one["y"]) // 2
    one["y"][i] = one["y"][i] + 0.01
    return "fold 2 calibrator 1: isotonic knot %d: y" % i


def _sigmoid_a_changed(doc):
    one = doc["outputs"]["calibration"]["folds"][0]["calibrators"][0]
    one["a"] = one["a"] * (1 + 2 ** -40)
    return "fold 0 calibrator 0: sigmoid a"


def _fold_dropped(doc):
    cal = doc["outputs"]["calibration"]
    n_f = len(cal["folds"])
    ens = doc["ensemble"]
    m = len(ens["base_values"]) // n_f
    keep = (n_f - 1) * m
    cal["folds"].pop()
    ens["base_values"] = ens["base_values"][:keep]
    ens["trees"] = [t for t in ens["trees"] if t["output"] < keep]
    doc["outputs"]["names"] = doc["outputs"]["names"][:keep]
    return "calibrated folds"


@pytest.mark.parametrize("case_name,plant", [
    ("cal_hgbc_isotonic_multiclass", _knot_moved),
    ("cal_hgbc_isotonic_multiclass", _knot_value_moved),
    ("cal_gbc_sigmoid_multiclass", _sigmoid_a_changed),
    ("cal_rfc_isotonic_binary", _fold_dropped),
])
def test_planted_calibration_faults_are_caught(tmp_path, case_name, plant):
    """A knot moved by one float step, a knot's probability changed, a sigmoid slope changed in
    its 40th bit, a fold dropped (its trees, base values and calibrators): the artefact loads
    (its self-check re-scored by the faulty document) but verify fails its structure check,
    naming the fold, calibrator and knot."""
    case, doc = document(case_name)
    where = plant(doc)
    path = write(doc, tmp_path / "m.json")
    result = verify(case.model, str(path))
    assert not result.passed
    assert status(result, "structure") == "fail"
    messages = [f["message"] for f in findings(result, "calibration", "fail")]
    messages += [f["message"] for f in findings(result, "outputs", "fail")]
    assert any(where in msg for msg in messages), messages


# ----------------------------------------------------------------------------- refusals
def _iris():
    from sklearn.datasets import load_iris

    return load_iris(return_X_y=True)


def test_temperature_is_refused_by_name():
    from sklearn.calibration import CalibratedClassifierCV
    from sklearn.ensemble import RandomForestClassifier

    X, y = _iris()
    model = CalibratedClassifierCV(RandomForestClassifier(n_estimators=3, random_state=0), method="temperature",
                                   cv=3).fit(X, y)
    with pytest.raises(UnsupportedModel, match="method='temperature' is not supported"):
        read_model(model)


def test_folds_with_different_preprocessing_are_refused():
    """cv=3 over a pipeline with a mean imputer: each fold's imputer learnt other means, which
    the artefact cannot state once; the refusal names the fold and the difference."""
    from sklearn.calibration import CalibratedClassifierCV
    from sklearn.ensemble import HistGradientBoostingClassifier
    from sklearn.impute import SimpleImputer
    from sklearn.pipeline import make_pipeline

    X, y = _iris()
    X = zoo._with_nan(X, 0.1, seed=1)
    pipe = make_pipeline(SimpleImputer(strategy="mean"), HistGradientBoostingClassifier(max_iter=3))
    model = CalibratedClassifierCV(pipe, cv=3).fit(X, y)
    with pytest.raises(UnsupportedModel, match=r"fold 1 differs from fold 0 in features .*preprocessing"):
        read_model(model)


def test_unsupported_inner_classifier_is_named():
    from sklearn.calibration import CalibratedClassifierCV
    from sklearn.linear_model import LogisticRegression

    X, y = _iris()
    model = CalibratedClassifierCV(LogisticRegression(max_iter=200), cv=3).fit(X, y)
    with pytest.raises(UnsupportedModel, match="fold 0 wraps LogisticRegression"):
        read_model(model)


def test_onnx_refuses_calibration_by_name_and_c_writes_it(tmp_path):
    """ONNX refuses CalibratedClassifierCV by name; the C target writes it (tests/test_c_target.py
    runs every calibration zoo case through the C conformance)."""
    from boxwood.export import export
    from boxwood.ir import ModelError

    case = zoo.fitted("cal_rfc_isotonic_binary")
    with pytest.raises(ModelError, match="CalibratedClassifierCV .* is not written to ONNX"):
        export(case.model, tmp_path / "m.onnx")
    assert not (tmp_path / "m.onnx").exists()
    export(case.model, tmp_path / "m.c")
    assert "_cal_knot_start[" in (tmp_path / "m.c").read_text()


def test_hub_rules_refuse_bad_calibration():
    from boxwood.ir import ModelError

    ensemble = build(zoo.fitted("cal_gbc_sigmoid_multiclass").model)
    bad = copy.deepcopy(ensemble)
    bad.calibration["folds"][0]["calibrators"][0] = {"method": "isotonic", "x": [1.0, 1.0], "y": [0.0, 1.0]}
    with pytest.raises(ModelError, match=r"knot x\[1\] = 1.0 does not follow"):
        bad.check()
    bad = copy.deepcopy(ensemble)
    bad.base_values.append(0.0)
    with pytest.raises(ModelError, match="do not split into 3 folds"):
        bad.check()
    assert to_bytes(ensemble)  # the original is fine
