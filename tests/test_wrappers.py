"""MultiOutputRegressor and TransformedTargetRegressor (issue 15, item 5) through the whole chain.

Outside references: scikit-learn 1.x's own ``predict`` of the fitted wrappers (the numbers a
user sees on the workstation), the fitted scalers' own ``inverse_transform``, numpy's
``exp`` / ``expm1`` (what scikit-learn calls), onnxruntime, and the C compiler's build of
the written file. Data sets scikit-learn ships: linnerud (three targets: Tenenhaus 1998),
diabetes (positive targets: Efron et al. 2004) and friedman1 (Friedman 1991); tests/zoo.py
fits the wrapper cases (``WRAPPER_CASES``), which every suite that runs ``ALL_CASES`` also picks up.

Stated bounds, checked here: raw scores (the inner regressors' own, before the target steps)
bit-identical; predictions bit-identical where the target steps are IEEE *, +, -, / (the same
operations in scikit-learn's order), within 4 ulps where an exp or expm1 is involved (math's,
the C library's or onnxruntime's against numpy's SIMD one; the largest seen is recorded).
"""
from __future__ import annotations

import json

import numpy as np
import pytest

import boxwood_runtime
import zoo
from boxwood.export import build
from boxwood.formats.json.writer import needs_format_3, to_bytes
from boxwood.sources import UnsupportedModel, read_model
from boxwood.sources.model import SourceModel
from boxwood.verify import verify
from boxwood_runtime import scorer
from boxwood_runtime.batch import BatchModel
from boxwood_runtime.scorer import ulp_distance
from test_conformance import _nan, probe_rows
from test_verify import document, findings, status, write

ULPS = 4


def _worst(got, want):
    return max(ulp_distance(float(a), float(b)) for a, b in zip(np.ravel(got), np.ravel(want)))


def _exp_like(ensemble):
    return ensemble.post_transform != "identity" or any(st["op"] in ("exp", "expm1") for st in ensemble.target_steps)


# ----------------------------------------------------------------------------- conformance
@pytest.mark.parametrize("name", zoo.WRAPPER_CASES)
def test_device_and_batch_match_scikit_learn(name, record_property):
    """Device scorer and numpy batch evaluator against the wrapper's own predict on the data
    rows and threshold probes: raw scores bit for bit, predictions bit for bit or within ULPS."""
    case, ensemble, data = zoo.exported(name)
    device = boxwood_runtime.load(data)
    rows = probe_rows(case, ensemble, limit=3000)
    source = SourceModel(case.model, ensemble)
    X = source.matrix(rows)
    want_raw = source.raw(rows)
    want = np.asarray(case.model.predict(X), dtype=np.float64).reshape(len(rows), -1)
    records = [_nan(r) for r in rows]
    got_raw = np.array([device.exact_values(device.raw_scores(device.prepare(r, i))) for i, r in enumerate(records)])
    assert np.array_equal(got_raw, want_raw)
    got = np.array(device.predict(records), dtype=np.float64).reshape(len(rows), -1)
    batch = BatchModel(device)
    got_b = np.asarray(batch.predict(records), dtype=np.float64).reshape(len(rows), -1)
    assert np.array_equal(batch.raw_scores(batch.prepare(records)), want_raw)
    worst, worst_b = _worst(got, want), _worst(got_b, want)
    record_property("device_ulps", worst)
    record_property("batch_ulps", worst_b)
    if _exp_like(ensemble):
        assert worst <= ULPS and worst_b <= ULPS, (worst, worst_b)
    else:
        assert np.array_equal(got, want) and np.array_equal(got_b, want)
    assert got.shape[1] == ensemble.n_outputs == want.shape[1]


def test_multi_output_merges_one_output_per_target():
    """MultiOutputRegressor(GradientBoostingRegressor) on linnerud's three targets: one
    artefact, output j = target j, each output's trees those of estimators_[j] in order."""
    case, ensemble, _ = zoo.exported("mor_gbr")
    assert ensemble.n_outputs == 3 == len(case.model.estimators_)
    for j, est in enumerate(case.model.estimators_):
        mine = [t for t in ensemble.trees if t.output == j]
        assert len(mine) == est.estimators_.shape[0]
        assert ensemble.base_values[j] == float(est._raw_predict_init(np.zeros((1, 3)))[0, 0])
    assert not ensemble.target_steps


@pytest.mark.parametrize("scaler", ["StandardScaler", "MinMaxScaler", "MaxAbsScaler", "RobustScaler"])
def test_scaler_steps_are_inverse_transform_bit_for_bit(scaler):
    """The target steps read from a fitted scaler give its own inverse_transform's bits
    (scikit-learn's float64 operations in its order), on diabetes' targets and on values far
    outside them, for one target and for linnerud's three."""
    import sklearn.preprocessing as pre
    from sklearn import datasets

    from boxwood.contract import apply_target_steps
    from boxwood.sources.wrappers import inverse_steps

    rng = np.random.default_rng(3)
    for y in (datasets.load_diabetes(return_X_y=True)[1].reshape(-1, 1), datasets.load_linnerud(return_X_y=True)[1]):
        t = getattr(pre, scaler)().fit(y)
        z = np.concatenate([t.transform(y), rng.normal(0, 50, (300, y.shape[1]))])
        steps = inverse_steps(t, y.shape[1])
        assert steps and all(st["op"] in ("mul", "add", "sub", "div") for st in steps)
        want = t.inverse_transform(z)
        assert np.array_equal(apply_target_steps(steps, z), want)
        device = [(st["op"], st["values"]) for st in steps]
        assert np.array_equal(np.array([scorer.apply_target_steps(device, list(r)) for r in z]), want)


def test_format_version_3_only_with_target_steps():
    """Artefacts without target steps keep format version 2 (and their bytes); with them the
    writer says 3; a scorer that reads only 1 and 2 refuses it with its usual message; target
    steps in a version 2 document are refused."""
    for name in ("mor_gbr", "gbr_squared_error"):
        _, ensemble, data = zoo.exported(name)
        assert not needs_format_3(ensemble) and json.loads(data)["format_version"] == 2
    _, ensemble, data = zoo.exported("ttr_hgbr_log")
    assert needs_format_3(ensemble) and json.loads(data)["format_version"] == 3
    doc = json.loads(data)
    saved = scorer.FORMAT_VERSIONS
    scorer.FORMAT_VERSIONS = (1, 2)  # what a scorer before target steps lists
    try:
        with pytest.raises(boxwood_runtime.ArtefactError, match="format_version 3 is not one this scorer"):
            boxwood_runtime.load(data)
    finally:
        scorer.FORMAT_VERSIONS = saved
    doc.pop("boxwood_digest")
    doc["format_version"] = 2
    with pytest.raises(boxwood_runtime.ArtefactError, match="target_steps needs format_version 3"):
        boxwood_runtime.load(scorer.artefact_bytes(doc), self_check=False)


# ----------------------------------------------------------------------------- refusals
def _diabetes():
    from sklearn import datasets

    return datasets.load_diabetes(return_X_y=True)


@pytest.mark.parametrize("func, inverse, named", [
    (np.sqrt, np.square, "numpy.square"),
    (np.log2, np.exp2, "numpy.exp2"),
    (np.log, lambda v: np.exp(v), "<lambda>"),
])
def test_unsupported_inverse_function_is_refused_by_name(func, inverse, named):
    from sklearn.compose import TransformedTargetRegressor
    from sklearn.ensemble import HistGradientBoostingRegressor

    X, y = _diabetes()
    model = TransformedTargetRegressor(HistGradientBoostingRegressor(max_iter=5), func=func, inverse_func=inverse,
                                       check_inverse=False).fit(X, y)
    with pytest.raises(UnsupportedModel) as err:
        read_model(model)
    assert named in str(err.value) and "TransformedTargetRegressor" in str(err.value)
    assert "numpy.expm1" in str(err.value)  # and it says what is supported


def test_unsupported_transformer_is_refused_by_name():
    from sklearn.compose import TransformedTargetRegressor
    from sklearn.ensemble import GradientBoostingRegressor
    from sklearn.preprocessing import QuantileTransformer

    X, y = _diabetes()
    model = TransformedTargetRegressor(GradientBoostingRegressor(n_estimators=5),
                                       transformer=QuantileTransformer(n_quantiles=50)).fit(X, y)
    with pytest.raises(UnsupportedModel, match="transformer QuantileTransformer is not supported"):
        read_model(model)


def test_multi_output_with_differing_targets_names_the_first_difference():
    """Targets whose regressors disagree on something ensemble-wide (here target 1 swapped for
    a classic booster: float32 comparisons and no missing values) are refused, naming it."""
    from sklearn.ensemble import GradientBoostingRegressor
    from sklearn.multioutput import MultiOutputRegressor

    case = zoo.fitted("mor_hgbr")
    model = MultiOutputRegressor(case.model.estimator).fit(case.X, case.y)
    model.estimators_[1] = GradientBoostingRegressor(n_estimators=5).fit(case.X, case.y[:, 1])
    with pytest.raises(UnsupportedModel) as err:
        read_model(model)
    assert "target 1" in str(err.value) and "compare_precision" in str(err.value)


def test_wrapped_classifier_is_refused():
    from sklearn import datasets
    from sklearn.ensemble import RandomForestClassifier
    from sklearn.multioutput import MultiOutputRegressor

    X, y = datasets.load_linnerud(return_X_y=True)
    model = MultiOutputRegressor(RandomForestClassifier(n_estimators=3)).fit(X, (y > y.mean(axis=0)).astype(int))
    with pytest.raises(UnsupportedModel, match="not a regressor"):
        read_model(model)


def test_onnx_refuses_expm1_and_the_legacy_graph_naming_the_wrapper(tmp_path):
    """numpy.expm1 has no ONNX operator (Exp then Sub 1 loses the digits of small results), so
    the writer refuses it by name, and the CLI exits 2; the legacy float32 graph refuses any
    target step. The exact graph of a log target is written."""
    import joblib

    from boxwood.cli import main
    from boxwood.formats.onnx import exact, legacy

    _, ensemble, _ = zoo.exported("ttr_hgbr_log1p")
    with pytest.raises(ValueError) as err:
        exact.to_model(ensemble)
    assert "TransformedTargetRegressor" in str(err.value) and "expm1" in str(err.value)
    _, ensemble, _ = zoo.exported("ttr_gbr_standard")
    with pytest.raises(ValueError, match="legacy float32 ONNX graph cannot apply target steps"):
        legacy.to_model(ensemble)
    exact.to_model(ensemble)
    path = tmp_path / "m.joblib"
    joblib.dump(zoo.fitted("ttr_hgbr_log1p").model, path)
    assert main(["export", str(path), "-o", str(tmp_path / "m.onnx")]) == 2
    assert main(["export", str(path), "-o", str(tmp_path / "m.json")]) == 0


# ----------------------------------------------------------------------------- verify
@pytest.mark.parametrize("name, ext", [("ttr_hgbr_log", "onnx"), ("ttr_mor_robust", "onnx"), ("ttr_hgbr_log1p", "c"),
                                       ("ttr_gbr_standard", "c"), ("mor_gbr", "c")])
def test_verify_passes_on_onnx_and_c(name, ext, tmp_path):
    from boxwood.export import export

    case = zoo.fitted(name)
    path = tmp_path / ("m." + ext)
    export(case.model, str(path))
    result = verify(case.model, str(path))
    assert result.passed, result.summary()


def _fault_scaler_mean(doc):
    step = next(st for st in doc["outputs"]["target_steps"] if st["op"] == "add")
    step["values"][0] = float(np.nextafter(step["values"][0], np.inf))  # one ulp


def _fault_scaler_scale(doc):
    step = next(st for st in doc["outputs"]["target_steps"] if st["op"] == "mul")
    step["values"][0] *= 1.01


def _fault_exp_to_expm1(doc):
    doc["outputs"]["target_steps"][0]["op"] = "expm1"


@pytest.mark.parametrize("name, fault", [("ttr_gbr_standard", _fault_scaler_mean),
                                         ("ttr_gbr_standard", _fault_scaler_scale),
                                         ("ttr_hgbr_log", _fault_exp_to_expm1)])
def test_planted_target_step_faults_fail_the_structural_proof(name, fault, tmp_path):
    """A changed scaler mean (one ulp) or scale, or exp swapped for expm1, in an artefact whose
    self-check was recomputed (so the loader accepts it): verify fails at "target steps"."""
    case, doc = document(name)
    fault(doc)
    result = verify(case.model, str(write(doc, tmp_path / "m.json")))
    assert not result.passed
    assert findings(result, "target steps", "fail")
    assert status(result, "structure") == "fail"


def test_planted_dropped_output_of_a_multi_output_regressor_fails(tmp_path):
    case, doc = document("mor_gbr")
    doc["ensemble"]["trees"] = [t for t in doc["ensemble"]["trees"] if t["output"] != 2]
    doc["ensemble"]["base_values"].pop()
    doc["outputs"]["names"].pop()
    result = verify(case.model, str(write(doc, tmp_path / "m.json")))
    assert not result.passed
    assert findings(result, "outputs", "fail")


def test_structure_passes_identical_steps_and_fails_a_dropped_step():
    """The structural proof itself: identical target steps give no finding; a dropped step fails."""
    from boxwood.verify.structure import Side, prove

    case = zoo.fitted("ttr_hgbr_minmax")
    source = read_model(case.model)
    same = prove(Side(source, "float64"), Side(build(case.model), "float64"))
    assert not [f for f in same.findings if f.kind == "target steps"]
    other = build(case.model)
    other.target_steps = other.target_steps[:1]
    proof = prove(Side(source, "float64"), Side(other, "float64"))
    assert [f for f in proof.findings if f.kind == "target steps" and f.severity == "fail"]
    assert to_bytes(other) != to_bytes(build(case.model))
