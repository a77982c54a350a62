"""Issue 15, input side: one-hot encoding, affine scalers and target encoding carried as
preprocessing steps ("lookup" and "arithmetic", format version 3).

Outside reference: scikit-learn 1.9.1 itself. Each fitted encoder or scaler's own
``transform`` on many raw records (strings, None, NaN, unseen categories, values at and
beside split thresholds) against the device scorer's derived features, and the fitted
pipeline's ``predict`` / ``predict_proba`` / ``decision_function`` against the device's
outputs. Data sets are the ones scikit-learn ships: diabetes (Efron, Hastie, Johnstone &
Tibshirani 2004, "Least Angle Regression"), wine (UCI Wine recognition data, Forina et
al.), iris (Fisher 1936). The derived features are compared bit for bit: the lookup tables
are copies of transform's own numbers, and the scalers run the same IEEE 754 float64
operations in the same order (IEEE 754-2019 clause 4.3: each operation correctly rounded),
which is stricter than the 4 ulps the issue allows for transformed values.

Checks of the checker: a changed encoding value, a changed scaler constant and a swapped
one-hot category are each caught by ``boxwood verify``.
"""
from __future__ import annotations

import copy
import json
import math

import numpy as np
import pandas as pd
import pytest

import boxwood_runtime
from boxwood.export import build
from boxwood.formats.json.writer import needs_format_3, to_bytes
from boxwood.reference_rows import arithmetic_of, forward, raw_around
from boxwood.sources import UnsupportedModel, read_model
from boxwood.verify import verify
from boxwood_runtime import RecordError, scorer

import zoo

# unknown categories under drop / infrequent_if_exist warn; TargetEncoder's cv warns
pytestmark = pytest.mark.filterwarnings("ignore::UserWarning", "ignore::FutureWarning")


def _frame(nan_rate=0.06, seed=11):
    """Diabetes with text columns (tests/zoo.py ``_diabetes_frame``), object dtype, NaN
    for missing, and a third text column with a rare value (for infrequent grouping)."""
    X, y = zoo._diabetes_frame(nan_rate=nan_rate)
    for col in ("sex", "bmi_band"):
        X[col] = X[col].astype(object).where(X[col].notna(), np.nan)
    rng = np.random.default_rng(seed)
    X["site"] = np.array(["north", "south", "east", "west", "rare"], dtype=object)[
        np.minimum(rng.geometric(0.45, len(X)) - 1, 4)]
    return X, y


TEXT = ["sex", "bmi_band", "site"]
NUMS = ["age", "bmi", "bp", "s1", "s5"]


def _records(X, extra=()):
    """Raw records: the frame's rows (NaN as None) plus probes of every text value,
    unseen ones, None and NaN in each text column."""
    rows = []
    for rec in X[TEXT + NUMS].itertuples(index=False):
        rows.append([None if isinstance(v, float) and v != v else (v if isinstance(v, str) else float(v))
                     for v in rec])
    base = rows[0]
    for j, col in enumerate(TEXT):
        for v in sorted(set(X[col].dropna())) + ["never-seen", "", None] + list(extra):
            r = list(base)
            r[j] = v
            rows.append(r)
    return rows


def _frame_of(rows):
    cols = {}
    for j, name in enumerate(TEXT + NUMS):
        col = [np.nan if r[j] is None else r[j] for r in rows]
        cols[name] = pd.Series(col, dtype=object if j < len(TEXT) else np.float64)
    return pd.DataFrame(cols)


def _device(pipe):
    ensemble = build(pipe)
    return ensemble, boxwood_runtime.load(to_bytes(ensemble))


def _derived(model, record):
    return model.prepare([float("nan") if v is None else v for v in record])


def _same_bits(a, b):
    a, b = float(a), float(b)
    return (math.isnan(a) and math.isnan(b)) or (a == b and math.copysign(1, a) == math.copysign(1, b)) or a == b


def _check_against_sklearn(pipe, rows, proba=False):
    """Device features == the pipeline's own transform (bit for bit; rows scikit-learn
    refuses must be refused by the device, naming the field), and predictions equal."""
    ensemble, model = _device(pipe)
    pre = pipe[:-1]
    try:  # one batch when scikit-learn accepts every row, else row by row
        wants = list(np.asarray(pre.transform(_frame_of(rows)), dtype=np.float64))
    except ValueError:
        wants = []
        for r in rows:
            try:
                wants.append(np.asarray(pre.transform(_frame_of([r])), dtype=np.float64)[0])
            except ValueError:
                wants.append(None)
    ok_rows = []
    for i, (r, want) in enumerate(zip(rows, wants)):
        if want is None:
            with pytest.raises(RecordError) as err:
                _derived(model, r)
            assert err.value.field in TEXT + NUMS, str(err.value)
            continue
        got = _derived(model, r)
        assert len(got) == len(want)
        bad = [k for k in range(len(want)) if not _same_bits(got[k], want[k])]
        assert not bad, "row %d %r: feature %s device %r, scikit-learn %r" % (
            i, r, ensemble.features[bad[0]].source, got[bad[0]], want[bad[0]])
        ok_rows.append(r)
    X = _frame_of(ok_rows)
    got = np.array([model.predict([float("nan") if v is None else v for v in r]) for r in ok_rows])
    assert np.array_equal(got.ravel(), np.asarray(pipe.predict(X)).ravel())
    if hasattr(pipe, "decision_function"):
        raw = np.array([model.exact_values(model.raw_scores(_derived(model, r))) for r in ok_rows])
        want = np.asarray(pipe.decision_function(X), dtype=np.float64).reshape(len(ok_rows), -1)
        assert np.array_equal(raw, want)  # raw/decision values: bit-identical
    if proba:
        p = np.array([model.predict_proba([float("nan") if v is None else v for v in r]) for r in ok_rows])
        want = pipe.predict_proba(X)
        worst = max(scorer.ulp_distance(float(a), float(b)) for a, b in zip(p.ravel(), want.ravel()))
        assert worst <= 4  # probabilities within 4 ulps (issue 15)
    return ensemble, model, len(ok_rows)


ONE_HOT_SETTINGS = [
    dict(handle_unknown="ignore"),
    dict(handle_unknown="error"),
    dict(handle_unknown="ignore", drop="first"),
    dict(handle_unknown="ignore", drop="if_binary"),
    dict(handle_unknown="error", drop=["male", "b2", "east"]),
    dict(handle_unknown="infrequent_if_exist", min_frequency=40),
    dict(handle_unknown="infrequent_if_exist", max_categories=3, drop="first"),
    dict(handle_unknown="ignore", min_frequency=0.2, sparse_output=False),
    dict(handle_unknown="warn", max_categories=4),
]


@pytest.mark.parametrize("settings", ONE_HOT_SETTINGS, ids=[json.dumps(s, sort_keys=True) for s in ONE_HOT_SETTINGS])
def test_one_hot_matches_scikit_learn_from_raw_records(settings):
    from sklearn.compose import ColumnTransformer
    from sklearn.ensemble import HistGradientBoostingClassifier
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import OneHotEncoder

    X, y = _frame()
    y = (y > np.median(y)).astype(int)
    pipe = make_pipeline(ColumnTransformer([("cat", OneHotEncoder(**settings), TEXT)], remainder="passthrough",
                                           sparse_threshold=0.0),
                         HistGradientBoostingClassifier(max_iter=15, random_state=0, early_stopping=False))
    pipe.fit(X[TEXT + NUMS], y)
    ensemble, _, n = _check_against_sklearn(pipe, _records(X), proba=True)
    assert n > 400
    lookups = [st for f in ensemble.features for st in f.source["steps"] if st["op"] == "lookup"]
    assert lookups and all(sorted(set(st["values"]) | {0.0, 1.0}) == [0.0, 1.0] for st in lookups)


@pytest.mark.parametrize("target", ["binary", "continuous", "multiclass"])
def test_target_encoder_matches_scikit_learn_from_raw_records(target):
    from sklearn.compose import ColumnTransformer
    from sklearn.ensemble import HistGradientBoostingClassifier, HistGradientBoostingRegressor
    from sklearn.model_selection import KFold
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import TargetEncoder

    X, y = _frame()
    final = HistGradientBoostingRegressor if target == "continuous" else HistGradientBoostingClassifier
    if target == "binary":
        y = (y > np.median(y)).astype(int)
    elif target == "multiclass":
        y = np.digitize(y, np.quantile(y, [0.33, 0.66]))
    enc = TargetEncoder(target_type=target, cv=KFold(4, shuffle=True, random_state=0))
    pipe = make_pipeline(ColumnTransformer([("cat", enc, TEXT)], remainder="passthrough"),
                         final(max_iter=15, random_state=0, early_stopping=False))
    pipe.fit(X[TEXT + NUMS], y)
    ensemble, _, n = _check_against_sklearn(pipe, _records(X), proba=target != "continuous")
    fitted = pipe[0].named_transformers_["cat"]
    per_feature = len(fitted.classes_) if target == "multiclass" else 1
    assert len(ensemble.features) == len(TEXT) * per_feature + len(NUMS)
    # unseen -> target_mean_ (scikit-learn's documented rule, checked here on the table)
    first = ensemble.features[0].source["steps"][-1]
    assert first["unknown"] == float(np.atleast_1d(fitted.target_mean_)[0])
    # NaN was seen in fitting for bmi_band: a category with its own encoding
    band = next(f for f in ensemble.features if f.source["field"] == "bmi_band").source["steps"][-1]
    assert "missing" in band


SCALERS = [
    ("StandardScaler", {}), ("StandardScaler", {"with_mean": False}), ("StandardScaler", {"with_std": False}),
    ("MinMaxScaler", {}), ("MinMaxScaler", {"feature_range": (-3, 0.5), "clip": True}),
    ("MaxAbsScaler", {}), ("MaxAbsScaler", {"clip": True}),
    ("RobustScaler", {}), ("RobustScaler", {"with_centering": False, "quantile_range": (5.0, 95.0)}),
    ("RobustScaler", {"with_scaling": False}),
]


@pytest.mark.parametrize("name, kw", SCALERS, ids=["%s%s" % (n, kw) for n, kw in SCALERS])
def test_scalers_same_bits_as_scikit_learn(name, kw):
    """Wine (UCI) with NaN holes; a scaler fitted on the first 120 rows; all rows, each
    threshold's raw neighbours and values beyond the fitted range (clip) scored."""
    from sklearn import datasets, preprocessing
    from sklearn.ensemble import HistGradientBoostingClassifier
    from sklearn.pipeline import make_pipeline

    X, y = datasets.load_wine(return_X_y=True)
    X = zoo._with_nan(X, 0.05, seed=4)
    pipe = make_pipeline(getattr(preprocessing, name)(**kw),
                         HistGradientBoostingClassifier(max_iter=10, random_state=0, early_stopping=False))
    pipe.fit(X[:120], y[:120])
    ensemble, model = _device(pipe)
    probes = [list(r) for r in X]
    for j, f in enumerate(ensemble.features):
        seq = arithmetic_of(f.source["steps"]) if f.source["steps"] else None
        thresholds = {t.threshold[i] for t in ensemble.trees for i in range(t.n_nodes) if t.feature[i] == j}
        for t in sorted(thresholds):
            for v in (raw_around(seq, t) if seq else [t]):
                r = list(X[0])
                r[j] = v
                probes.append(r)
        for v in (1e6, -1e6, 0.0, -0.0):
            r = list(X[1])
            r[j] = v
            probes.append(r)
    P = np.array(probes, dtype=np.float64)
    want = pipe[:-1].transform(P)
    got = np.array([model.prepare([float(v) for v in r]) for r in P])
    assert np.array_equal(np.isnan(got), np.isnan(want))
    assert np.array_equal(got[~np.isnan(got)], want[~np.isnan(want)])
    assert np.array_equal(np.array([model.exact_values(model.raw_scores(model.prepare(list(r)))) for r in P]),
                          pipe.decision_function(P).reshape(len(P), -1))
    with pytest.raises(RecordError, match="infinity"):  # scikit-learn's scalers refuse infinity too
        model.prepare([float("inf")] + [0.0] * (X.shape[1] - 1))


def test_raw_neighbours_bracket_each_threshold_as_scikit_learn_scales_them():
    """raw_around's pair (a, b): the fitted scaler's own transform puts a at or below
    the threshold and b above it, and a, b are float64 neighbours (numpy.nextafter)."""
    from sklearn import datasets
    from sklearn.preprocessing import MinMaxScaler, RobustScaler, StandardScaler

    X = datasets.load_diabetes().data[:, :4]
    for scaler in (StandardScaler(), MinMaxScaler(feature_range=(-7, 3)), RobustScaler()):
        scaler.fit(X)
        seq_of = read_steps(scaler, X)
        for j in range(X.shape[1]):
            seq = seq_of[j]
            for t in np.linspace(-2.5, 2.5, 21):
                a, b = raw_around(seq, float(t))
                assert b == np.nextafter(a, np.inf)
                col = np.zeros((2, X.shape[1]))
                col[:, j] = [a, b]
                ta, tb = scaler.transform(col)[:, j]
                assert ta <= t < tb and forward(seq, a) == ta and forward(seq, b) == tb


def read_steps(scaler, X):
    from sklearn.ensemble import HistGradientBoostingRegressor
    from sklearn.pipeline import make_pipeline

    pipe = make_pipeline(scaler, HistGradientBoostingRegressor(max_iter=2)).fit(X, X[:, 0])
    return [arithmetic_of(f.source["steps"]) for f in read_model(pipe).features]


# ----------------------------------------------------------------------------- zoo pipelines
def test_the_data_scientists_pipelines_are_in_the_zoo():
    """The two shapes the issue names, fitted in tests/zoo.py and run by every zoo suite."""
    from sklearn.ensemble import GradientBoostingRegressor, HistGradientBoostingClassifier
    from sklearn.preprocessing import OneHotEncoder, StandardScaler, TargetEncoder

    a = zoo.fitted("pipe_hgbc_onehot_scaled").model
    ct = a[0]
    assert isinstance(a[-1], HistGradientBoostingClassifier)
    assert isinstance(ct.named_transformers_["cat"], OneHotEncoder) and ct.named_transformers_["cat"].handle_unknown == "ignore"
    assert isinstance(ct.named_transformers_["num"], StandardScaler)
    b = zoo.fitted("pipe_gbr_target_encoded").model
    assert isinstance(b[-1], GradientBoostingRegressor) and isinstance(b[0].named_transformers_["cat"], TargetEncoder)


@pytest.mark.parametrize("name", ["pipe_hgbc_onehot_scaled", "pipe_gbr_target_encoded", "pipe_hgbc_target_multiclass",
                                  "pipe_gbc_onehot_infrequent", "pipe_etr_onehot_strict"])
def test_zoo_pipelines_from_raw_records_with_unseen_and_missing(name):
    """Every data row, plus each text field set to each category, an unseen string, an
    empty string and None: the device's predictions equal the pipeline's predict on the
    same records as a DataFrame; records scikit-learn refuses are refused by the device."""
    case = zoo.fitted(name)
    cols = list(case.X.columns)
    text = [c for c in cols if case.X[c].dtype == object]
    rows = [list(r) for r in case.rows]
    for c in text:
        k = cols.index(c)
        for v in sorted(set(case.X[c].dropna())) + ["never-seen", "", None]:
            r = list(rows[3])
            r[k] = v
            rows.append(r)
    _, model = _device(case.model)
    frame = pd.DataFrame({c: pd.Series([np.nan if r[k] is None else r[k] for r in rows],
                                       dtype=object if c in text else np.float64) for k, c in enumerate(cols)})
    try:  # one batch when scikit-learn accepts every row, else row by row
        wants = list(case.model.predict(frame))
    except ValueError:
        wants = []
        for i in range(len(rows)):
            try:
                wants.append(case.model.predict(frame.iloc[i:i + 1])[0])
            except ValueError:
                wants.append(None)
    n = 0
    for r, want in zip(rows, wants):
        rec = dict(zip(cols, [float("nan") if v is None else v for v in r]))
        if want is None:
            with pytest.raises(RecordError):
                model.predict(rec)
            continue
        assert np.array_equal(np.ravel(model.predict(rec)), np.ravel(want)), rec
        n += 1
    assert n >= len(case.rows)


# ----------------------------------------------------------------------------- format version
def test_format_version_3_only_when_a_new_step_is_used():
    old = json.loads(zoo.exported("pipe_hgbr_encoded")[2].split(b",", 1)[1].join([b"{", b""]))
    new = json.loads(zoo.exported("pipe_hgbc_onehot_scaled")[2].split(b",", 1)[1].join([b"{", b""]))
    assert old["format_version"] == 2 and not needs_format_3(zoo.exported("pipe_hgbr_encoded")[1])
    assert new["format_version"] == 3 and needs_format_3(zoo.exported("pipe_hgbc_onehot_scaled")[1])
    for name in ["gbr_squared_error", "hgbc_categorical", "rfc_binary"]:  # no preprocessing: version 2 as before
        assert b'"format_version":2' in zoo.exported(name)[2]


def test_a_scorer_reading_only_1_and_2_refuses_the_new_steps(monkeypatch):
    data = zoo.exported("pipe_gbr_target_encoded")[2]
    monkeypatch.setattr(scorer, "FORMAT_VERSIONS", (1, 2))
    with pytest.raises(boxwood_runtime.ArtefactError, match="format_version 3 is not one this scorer"):
        boxwood_runtime.load(data)


def _doc(name):
    doc = json.loads(zoo.exported(name)[2])
    del doc[scorer.DIGEST_KEY]
    return doc


def test_new_steps_in_a_version_2_document_are_refused():
    doc = _doc("pipe_hgbc_onehot_scaled")
    doc["format_version"] = 2
    with pytest.raises(boxwood_runtime.ArtefactError, match="not a step this scorer knows"):
        boxwood_runtime.load(scorer.artefact_bytes(doc))
    from boxwood.schema import SchemaError, validate
    with pytest.raises(SchemaError):
        validate(doc)
    plain = _doc("pipe_hgbr_encoded")
    plain["format_version"] = 3  # version 3 with nothing that needs it
    with pytest.raises(SchemaError):
        validate(plain)


@pytest.mark.parametrize("mutate, message", [
    (lambda st: st.__setitem__("values", st["values"][:-1]), "one value per category"),
    (lambda st: st["values"].__setitem__(0, "1"), "is not a number"),
    (lambda st: st.__setitem__("unknown", None), "unknown must be"),
])
def test_malformed_lookup_refused_naming_the_path(mutate, message):
    doc = _doc("pipe_hgbc_onehot_scaled")
    mutate(doc["inputs"]["features"][0]["source"]["steps"][0])
    with pytest.raises(boxwood_runtime.ArtefactError, match=message) as err:
        boxwood_runtime.load(scorer.artefact_bytes(doc))
    assert "inputs.features[0].source.steps[0]" in str(err.value)


@pytest.mark.parametrize("op", [["pow", 2.0], ["div"], ["sub", "inf"], ["clip", 0.0]])
def test_malformed_arithmetic_refused_naming_the_path(op):
    doc = _doc("pipe_hgbc_onehot_scaled")
    j, f = next((j, f) for j, f in enumerate(doc["inputs"]["features"]) if f["source"]["steps"]
                and f["source"]["steps"][-1]["op"] == "arithmetic")
    f["source"]["steps"][-1]["sequence"][0] = op
    with pytest.raises(boxwood_runtime.ArtefactError) as err:
        boxwood_runtime.load(scorer.artefact_bytes(doc))
    assert "inputs.features[%d].source.steps[0].sequence[0]" % j in str(err.value)


# ----------------------------------------------------------------------------- refusals
def test_unseen_category_under_handle_unknown_error_names_the_field():
    _, model = _device(zoo.fitted("pipe_etr_onehot_strict").model)
    rec = dict(zip(["age", "sex", "bmi", "bp", "s1", "s2", "s3", "s4", "s5", "s6", "bmi_band"],
                   zoo.fitted("pipe_etr_onehot_strict").rows[0]))
    rec["bmi_band"] = "b9"
    with pytest.raises(RecordError, match="unknown category 'b9'") as err:
        model.predict(rec)
    assert err.value.field == "bmi_band"


def test_scaler_after_sparse_one_hot_is_refused_by_name():
    from sklearn.ensemble import GradientBoostingRegressor
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import MaxAbsScaler, OneHotEncoder

    X, y = _frame()
    pipe = make_pipeline(OneHotEncoder(), MaxAbsScaler(), GradientBoostingRegressor(n_estimators=2))
    pipe.fit(X[["sex"]], y)
    with pytest.raises(UnsupportedModel, match="maxabsscaler.*sparse"):
        read_model(pipe)


# ----------------------------------------------------------------------------- planted faults
def _verify_planted(tmp_path, name, plant):
    doc = _doc(name)
    plant(doc)
    doc.pop("self_check")
    path = tmp_path / "planted.json"
    path.write_bytes(scorer.artefact_bytes(doc))
    return verify(zoo.fitted(name).model, str(path))


def _first(doc, op, field=None):
    return next(st for f in doc["inputs"]["features"] for st in f["source"]["steps"]
                if st["op"] == op and (field is None or f["source"]["field"] == field))


def _changed_encoding(doc):
    st = _first(doc, "lookup", "bmi_band")
    st["values"][1] = math.nextafter(st["values"][1], math.inf)


def _changed_constant(doc):
    st = _first(doc, "arithmetic")
    st["sequence"][0][1] = math.nextafter(st["sequence"][0][1], math.inf)


def _swapped_category(doc):
    """Swap the first two categories of the bmi_band one-hot column the trees split on
    most (a column no tree reads would change nothing a probe can see)."""
    counts = {}
    for t in doc["ensemble"]["trees"]:
        for f in t["feature"]:
            counts[f] = counts.get(f, 0) + 1
    feats = doc["inputs"]["features"]
    j = max((j for j, f in enumerate(feats) if f["source"]["field"] == "bmi_band"), key=lambda j: counts.get(j, 0))
    st = feats[j]["source"]["steps"][-1]
    k = st["values"].index(1.0)
    other = 0 if k else 1
    st["categories"][k], st["categories"][other] = st["categories"][other], st["categories"][k]


@pytest.mark.parametrize("name, plant", [
    ("pipe_gbr_target_encoded", _changed_encoding),
    ("pipe_hgbc_onehot_scaled", _changed_constant),
    ("pipe_gbr_target_encoded", _changed_constant),
    ("pipe_hgbc_onehot_scaled", _swapped_category),
], ids=["target-encoding value +1ulp", "StandardScaler mean +1ulp", "RobustScaler center +1ulp",
        "one-hot categories swapped"])
def test_planted_step_faults_are_caught_by_verify(tmp_path, name, plant):
    clean = _verify_planted(tmp_path, name, lambda d: None)
    structure = clean.check("structure", evaluator="device scorer")
    assert structure.status == "pass"
    result = _verify_planted(tmp_path, name, plant)
    assert not result.passed
    structure = result.check("structure", evaluator="device scorer")
    assert structure.status == "fail" and "preprocessing" in " ".join([structure.summary] + structure.details)


def test_swapped_category_also_caught_by_probes(tmp_path):
    """Without the structural proof: the probes at every category see the swap."""
    result = _verify_planted(tmp_path, "pipe_hgbc_onehot_scaled", _swapped_category)
    assert result.check("empirical: raw", evaluator="device scorer").status == "fail"


def test_lookup_values_come_from_scikit_learn_transform():
    """The table is transform's own output: rebuild one column by hand from the
    encoder's categories_ (one-hot: 1 where the category is the column's) and compare."""
    case = zoo.fitted("pipe_hgbc_onehot_scaled")
    enc = case.model[0].named_transformers_["cat"]
    ensemble = build(case.model)
    names = list(enc.get_feature_names_out())
    for j, f in enumerate(ensemble.features[:len(names)]):
        st = f.source["steps"][-1]
        want = [float(names[j] == "%s_%s" % (f.source["field"], c)) for c in st["categories"]]
        assert st["values"] == want, (names[j], st)
    assert copy.deepcopy(st) == st


# ----------------------------------------------------------------------------- the C target
def _numeric_steps_pipeline():
    """Numbers only (the C target takes no text): one-hot and target encoding of numeric
    code columns, every scaler; diabetes (scikit-learn's copy) with NaN holes."""
    from sklearn import datasets
    from sklearn.compose import ColumnTransformer
    from sklearn.ensemble import HistGradientBoostingRegressor
    from sklearn.impute import SimpleImputer
    from sklearn.model_selection import KFold
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import (MaxAbsScaler, MinMaxScaler, OneHotEncoder, RobustScaler, StandardScaler,
                                       TargetEncoder)

    X, y = datasets.load_diabetes(return_X_y=True)
    X = np.array(X)
    X[:, 1] = np.digitize(X[:, 2], np.quantile(X[:, 2], [0.25, 0.5, 0.75])) * 10.0  # codes 0, 10, 20, 30
    X[:, 9] = np.digitize(X[:, 3], np.quantile(X[:, 3], [0.3, 0.6])) + 1.0  # codes 1, 2, 3
    X = zoo._with_nan(X, 0.05, seed=9)
    X[:, 9] = np.where(np.isnan(X[:, 9]), 1.0, X[:, 9])  # the one-hot column: no NaN
    ct = ColumnTransformer([
        ("onehot", OneHotEncoder(handle_unknown="ignore", drop="first", sparse_output=False), [9]),
        ("target", TargetEncoder(target_type="continuous", cv=KFold(4, shuffle=True, random_state=0)), [1]),
        ("std", StandardScaler(), [0, 2]),
        ("minmax", MinMaxScaler(feature_range=(-2, 2), clip=True), [3]),
        ("maxabs", make_pipeline(SimpleImputer(strategy="median"), MaxAbsScaler()), [4]),
        ("robust", RobustScaler(), [8]),
    ], remainder="drop")
    model = make_pipeline(ct, HistGradientBoostingRegressor(max_iter=25, random_state=0, early_stopping=False))
    return model.fit(X, y), X


def test_numeric_lookup_and_scaler_steps_run_in_c(tmp_path):
    """The steps in C (-std=c99 -Wall -Wextra -pedantic -Werror, at -O2 and -O3
    -march=native, where a fused multiply-add would show): scikit-learn's predict bit for
    bit on data rows, every code, unseen codes, missing values and raw values beside
    each scaled threshold; IR -> C -> IR identity; a planted scaler constant caught."""
    from boxwood.formats.c import check as c_check
    from boxwood.formats.c import reader as c_reader
    from boxwood.formats.c import writer as c_writer
    from boxwood.formats.c.evaluators import CEvaluator
    from boxwood_runtime import native

    if native.find_compiler() is None:
        pytest.skip("no C compiler on this machine")
    model, X = _numeric_steps_pipeline()
    ensemble = build(model)
    ops = {st["op"] for f in ensemble.features for st in f.source["steps"]}
    assert ops == {"lookup", "arithmetic", "impute"}
    path = tmp_path / "steps.c"
    c_writer.write(ensemble, path)
    back = c_reader.read_c(path)
    assert c_check.same_model(ensemble, back) is None
    rows = [[None if v != v else float(v) for v in r] for r in X]
    for code in (0.0, 10.0, 20.0, 30.0, 99.0, None):
        for k in (1, 9):
            r = list(rows[0])
            r[k] = code
            rows.append(r)
    for j, f in enumerate(ensemble.features):
        seq = arithmetic_of(f.source["steps"])
        if seq is None:
            continue
        fi = ensemble.fields.index(f.source["field"])
        for t in sorted({t.threshold[i] for t in ensemble.trees for i in range(t.n_nodes) if t.feature[i] == j}):
            for v in raw_around(seq, t):
                r = list(rows[1])
                r[fi] = v
                rows.append(r)
    Xs = np.array([[np.nan if v is None else v for v in r] for r in rows])
    want = model.predict(Xs)
    for flags in [("-O2",), ("-O3", "-march=native")]:
        got = CEvaluator(path, back, flags).evaluate(rows)
        assert np.array_equal(got.raw[:, 0], want), flags  # identity regressor: predict is the raw score
    doc = c_writer.to_texts(ensemble, "m")[0]
    assert "PFX_step_cat_value" not in doc and "m_step_cat_value" in doc
    # planted fault: a scaler constant one ulp off, in the C tables: verify fails
    text = path.read_text()
    std = ensemble.features[[f.source["field"] for f in ensemble.features].index("x0")].source["steps"][0]
    mean = std["sequence"][0][1]
    from boxwood_runtime.csource import c_double
    assert text.count(c_double(mean)) == 1
    planted = tmp_path / "planted.c"
    planted.write_text(text.replace(c_double(mean), c_double(math.nextafter(mean, math.inf))))
    result = verify(model, str(planted))
    assert not result.passed


def test_text_lookup_steps_are_refused_by_the_c_target_naming_field_and_step(tmp_path):
    from boxwood import formats
    from boxwood.formats.c import writer as c_writer

    _, ensemble, _ = zoo.exported("pipe_hgbc_onehot_scaled")
    with pytest.raises(formats.FormatError, match=r"field 'sex'.*step 1 encodes text categories"):
        c_writer.write(ensemble, tmp_path / "p.c")
    assert not list(tmp_path.iterdir())


# ----------------------------------------------------------------------------- batch evaluator
@pytest.mark.parametrize("name", ["pipe_hgbc_onehot_scaled", "pipe_hgbc_target_multiclass"])
def test_batch_evaluator_runs_the_steps_as_the_pipeline_does(name):
    """The numpy batch evaluator on raw records (its prepare runs the scorer's steps):
    raw scores bit for bit and labels equal to scikit-learn's on the same DataFrame."""
    from boxwood_runtime.batch import BatchModel

    case = zoo.fitted(name)
    _, model = _device(case.model)
    batch = BatchModel(model)
    records = [[float("nan") if v is None else v for v in r] for r in case.rows]
    X = batch.prepare(records)
    raw = batch.exact_values(batch.raw_scores(X))
    want = np.asarray(case.model.decision_function(case.X), dtype=np.float64).reshape(len(records), -1)
    assert np.array_equal(np.asarray(raw).reshape(want.shape), want)
    assert np.array_equal(np.ravel(batch.predict(records)), np.ravel(case.model.predict(case.X)))
