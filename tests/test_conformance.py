"""Conformance suite: every supported estimator x task x option, scored by the device
scorer, against scikit-learn's own predictions on the same float64 inputs.

Outside reference: scikit-learn 1.x ``decision_function`` / ``predict`` /
``predict_proba`` of the fitted source model (the numbers a user sees on the
workstation). Rows: the open data set the case was fitted on (tests/zoo.py names
each source), plus probes at every split threshold and one float step either side
(float64 steps, and float32 steps for models that compare in float32), NaN in each
feature where the model accepts it, and each known plus one unseen category.

Stated bounds, checked here:
- raw scores: bit-identical (same float64 additions in the same order); for forests
  and trees the averaged class probabilities or predictions, for AdaBoost its
  decision values, for isolation forests the sum of path lengths: all bit-identical;
- probabilities and exp-transformed predictions: within PROBA_ULPS units in the last
  place (libm's exp may differ from numpy's vectorised exp by an ulp, then one
  division; measured here: at most 2);
- isolation forests: score_samples within PROBA_ULPS ulps (numpy's vectorised power
  differs from libm's pow in the last place), decision_function within the same
  absolute error, predict (-1/1) identical;
- predicted labels: identical.
"""
from __future__ import annotations

import math

import numpy as np
import pytest

import boxwood_runtime
from boxwood.reference_rows import arithmetic_of, raw_around
from boxwood.sources.model import SourceModel
from boxwood_runtime.scorer import ulp_distance

import zoo

PROBA_ULPS = 4
MIN_ROWS = 1000


def _pipeline_routes(ensemble):
    """For an ensemble with preprocessing: per feature, the raw field index it reads and
    whether a threshold probe on the field reaches the feature unchanged (impute only) or
    through a scaler (issue 15: then the probe is the raw value mapped back)."""
    field_of = [ensemble.fields.index(f.source["field"]) for f in ensemble.features]
    direct = [all(st["op"] == "impute" for st in f.source["steps"])
              or arithmetic_of(f.source["steps"]) is not None for f in ensemble.features]
    return field_of, direct


def _pipeline_value_probes(ensemble):
    """(field, value) probes for raw fields: every category of each encoder, an unseen
    one where the encoder maps unknowns to a value, and missing where something upstream
    of the trees accepts it (an imputer, an encoder that encodes missing, or trees that
    route missing)."""
    probes = []
    for f in ensemble.features:
        fi = ensemble.fields.index(f.source["field"])
        steps = f.source["steps"]
        first = steps[0] if steps else None
        takes_missing = (ensemble.missing_values == "route" or (first and first["op"] == "impute")
                         or (first and first["op"] == "encode" and "missing" in first))
        if takes_missing:
            probes.append((fi, None))
        for st in steps:
            if st["op"] in ("encode", "lookup"):
                probes.extend((fi, c) for c in st["categories"])
                if st["unknown"] != "error":
                    probes.append((fi, "zz-never-seen"))
                if st["op"] == "lookup" and ("missing" in st or st["unknown"] != "error") and not takes_missing:
                    probes.append((fi, None))  # NaN: a fitted category, or unknown
    return probes


def _nan(row):
    """A hub row (None = missing = NaN, as SourceModel reads it) as the device's record."""
    return [float("nan") if v is None else v for v in row]


def probe_rows(case, ensemble, limit=4000):
    """Data rows plus threshold, NaN and category probes; at least MIN_ROWS rows."""
    base_rows = case.rows
    if ensemble.fields is not None:
        field_of, direct = _pipeline_routes(ensemble)
    else:
        field_of, direct = list(range(len(ensemble.features))), [True] * len(ensemble.features)
    rows = [list(r) for r in base_rows]
    probes = []
    seen = set()
    for t in ensemble.trees:
        for i in range(t.n_nodes):
            f = t.feature[i]
            if f < 0 or t.left_categories[i] is not None or not direct[f]:
                continue
            thr = t.threshold[i]
            if not math.isfinite(thr) or (f, thr) in seen:
                continue
            seen.add((f, thr))
            seq = arithmetic_of(ensemble.features[f].source["steps"]) if ensemble.fields is not None else None
            if seq is not None:  # a scaled column: the raw values either side of the threshold
                for v in raw_around(seq, thr):
                    probes.extend((field_of[f], w) for w in (v, float(np.nextafter(v, -np.inf)),
                                                             float(np.nextafter(v, np.inf))))
                continue
            values = [thr, float(np.nextafter(thr, -np.inf)), float(np.nextafter(thr, np.inf))]
            if ensemble.compare_precision == "float32":
                t32 = np.float32(thr)
                values += [float(t32), float(np.nextafter(t32, np.float32(-np.inf))),
                           float(np.nextafter(t32, np.float32(np.inf)))]
            for v in values:
                probes.append((field_of[f], v))
    if ensemble.fields is not None:
        probes.extend(_pipeline_value_probes(ensemble))
    else:
        for j, feat in enumerate(ensemble.features):
            if ensemble.missing_values == "route":
                probes.append((j, None))
            if feat.is_categorical:
                probes.extend((j, c) for c in feat.categories)
    for n, (f, v) in enumerate(probes):
        row = list(base_rows[n % len(base_rows)])
        row[f] = v
        rows.append(row)
    n = 0
    while len(rows) < MIN_ROWS:  # small data sets: pad with more probe variations
        f, v = probes[n % len(probes)]
        row = list(base_rows[(n * 7 + 3) % len(base_rows)])
        row[f] = v
        rows.append(row)
        n += 1
    return rows[:max(limit, MIN_ROWS)]


@pytest.fixture(scope="module", params=zoo.ALL_CASES)
def exported(request):
    case, ensemble, data = zoo.exported(request.param)
    model = boxwood_runtime.load(data)
    rows = probe_rows(case, ensemble)
    return case, ensemble, model, rows, SourceModel(case.model, ensemble)


def test_raw_scores_bit_identical(exported):
    case, ensemble, model, rows, source = exported
    assert len(rows) >= MIN_ROWS
    want = source.raw(rows)
    # the rows write NaN as None (as SourceModel reads them); a None in a text field is Python None to the device
    got = np.array([model.exact_values(model.raw_scores(model.prepare(_nan(r), i))) for i, r in enumerate(rows)])
    assert got.shape == want.shape
    mismatch = np.flatnonzero(np.any(got != want, axis=1))
    assert mismatch.size == 0, "row %d: device %r, scikit-learn %r" % (
        mismatch[0], got[mismatch[0]], want[mismatch[0]])


def test_public_methods_match_sklearn(exported):
    case, ensemble, model, rows, source = exported
    X = source.matrix(rows)
    rows = [_nan(r) for r in rows]  # as SourceModel reads the hub rows (None = NaN)
    if case.task == "outlier_detection":
        assert model.predict(rows) == list(case.model.predict(X))
        scores = model.score_samples(rows)
        want = case.model.score_samples(X)
        assert max(ulp_distance(float(a), float(b)) for a, b in zip(scores, want)) <= PROBA_ULPS
        # |score| <= 1, so PROBA_ULPS ulps of the score are at most PROBA_ULPS * 2**-53 absolute
        gap = np.abs(np.array(model.decision_function(rows)) - case.model.decision_function(X))
        assert gap.max() <= PROBA_ULPS * 2.0 ** -53
    elif case.task == "classification":
        assert model.predict(rows) == list(case.model.predict(X))
        want = case.model.predict_proba(X)
        got = np.array(model.predict_proba(rows))
        worst = max(ulp_distance(float(a), float(b)) for a, b in zip(got.ravel(), want.ravel()))
        assert worst <= PROBA_ULPS
        if hasattr(case.model, "decision_function"):
            df = np.asarray(case.model.decision_function(X))
            assert np.array_equal(np.array(model.decision_function(rows)), df)
    else:
        want = case.model.predict(X)
        got = np.array(model.predict(rows))
        exp_like = any(st["op"] in ("exp", "expm1") for st in ensemble.target_steps)
        if ensemble.post_transform == "identity" and not exp_like:  # affine target steps: exact too
            assert np.array_equal(got, want)
        else:
            worst = max(ulp_distance(float(a), float(b)) for a, b in zip(got.ravel(), np.ravel(want)))
            assert worst <= PROBA_ULPS


def test_probes_cross_every_threshold(exported):
    """The probe set is meaningful: for each numeric split, rows land on both sides."""
    case, ensemble, model, rows, source = exported
    checked = 0
    for t in ensemble.trees[:5]:
        for i in range(t.n_nodes):
            f = t.feature[i]
            if f < 0 or t.left_categories[i] is not None or not math.isfinite(t.threshold[i]):
                continue
            if ensemble.fields is not None and not _pipeline_routes(ensemble)[1][f]:
                continue  # an encoded feature: its values are codes, probed by category
            xs = [model.prepare(_nan(r))[f] for r in rows]
            assert any(x <= t.threshold[i] for x in xs) and any(x > t.threshold[i] for x in xs)
            checked += 1
    assert checked > 0


def test_single_record_forms_agree(exported):
    """A dict record, a list record and a batch give the same numbers."""
    case, ensemble, model, rows, source = exported
    names = model.input_names
    rows = [_nan(r) for r in rows[:20]]
    # trees and forests have no decision_function (scikit-learn's neither): compare predict there
    values = model.decision_function if model.has_decision_function else model.predict
    same = (lambda a, b: np.array_equal(np.asarray(a, dtype=object), np.asarray(b, dtype=object)))
    for r in rows:
        as_dict = dict(zip(names, r))
        assert same(values(as_dict), values(r))
    assert same(values(rows), [values(r) for r in rows])
    if not model.has_decision_function:  # refused only where scikit-learn has none (boosted
        assert not hasattr(case.model, "decision_function")  # regressors keep their raw scores)


def test_unseen_category_follows_source_as_missing():
    """scikit-learn's histogram models route an unseen category like a missing value
    (HistGradientBoosting docs, "Categorical Features Support"); the scorer does the
    same when asked to, and refuses it by default."""
    case, ensemble, data = zoo.exported("hgbr_categorical_nan")
    strict = boxwood_runtime.load(data)
    lenient = boxwood_runtime.load(data, unknown_category="as_missing")
    j = strict.feature_names.index("bmi_band")
    row = list(case.rows[0])
    row[j] = "not-a-band"
    with pytest.raises(boxwood_runtime.RecordError) as err:
        strict.predict(row)
    assert "bmi_band" in str(err.value) and "not-a-band" in str(err.value)
    want = case.model.predict(SourceModel(case.model, ensemble).matrix([row]))
    assert lenient.predict(row) == want[0]
    missing = list(row)
    missing[j] = None
    assert lenient.predict(row) == strict.predict(missing)


def test_categorical_cases_use_categorical_splits():
    """The categorical zoo cases really exercise set-membership splits."""
    for name in ("hgbr_categorical", "hgbr_categorical_nan", "hgbr_categorical_codes", "hgbc_categorical"):
        _, ensemble, _ = zoo.exported(name)
        assert any(c is not None for t in ensemble.trees for c in t.left_categories), name


def test_missing_cases_route_both_ways():
    """The NaN zoo cases send missing values left at some nodes and right at others."""
    for name in ("hgbr_nan", "hgbc_nan"):
        _, ensemble, _ = zoo.exported(name)
        flags = {t.missing_left[i] for t in ensemble.trees for i in range(t.n_nodes) if t.feature[i] >= 0}
        assert flags == {True, False}, name


# --------------------------------------------------------------------------- pipelines
def test_pipeline_scores_raw_dict_records():
    """A Pipeline fitted on a DataFrame with string categories and missing values scores
    raw dict records on the device exactly as pipeline.predict does on the DataFrame."""
    case, ensemble, data = zoo.exported("pipe_hgbr_encoded")
    device = boxwood_runtime.load(data)
    records = case.X.to_dict("records")  # raw records: strings, floats, NaN
    assert any(isinstance(r["sex"], str) for r in records)
    assert any(r["bmi_band"] != r["bmi_band"] for r in records)  # NaN present
    assert np.array_equal(np.array(device.predict(records)), case.model.predict(case.X))


def test_encoder_unknown_value_is_followed():
    """OrdinalEncoder(handle_unknown="use_encoded_value", unknown_value=-1): an unseen
    category becomes -1 on the device as in scikit-learn (the histogram model behind it
    then routes the unseen code like a missing value)."""
    import pandas as pd

    case, ensemble, data = zoo.exported("pipe_hgbr_encoded")
    device = boxwood_runtime.load(data)  # default unknown_category="error" does not apply here
    rec = case.X.iloc[[3]].to_dict("records")[0]
    rec["bmi_band"] = "b99"
    assert device.predict(rec) == case.model.predict(pd.DataFrame([rec]))[0]


def test_encoder_unknown_error_is_followed():
    """OrdinalEncoder(handle_unknown="error"): scikit-learn raises on an unseen category;
    the device raises a RecordError naming the raw field, never guesses."""
    import pandas as pd

    case, ensemble, data = zoo.exported("pipe_gbc_strict_encoder")
    device = boxwood_runtime.load(data)
    rec = case.X.iloc[[0]].to_dict("records")[0]
    rec["bmi_band"] = "b99"
    with pytest.raises(ValueError):
        case.model.predict(pd.DataFrame([rec]))
    with pytest.raises(boxwood_runtime.RecordError) as err:
        device.predict(rec)
    assert err.value.field == "bmi_band" and "unknown category 'b99'" in str(err.value)
    # a missing band is encoded as -1 (encoded_missing_value) by both
    rec["bmi_band"] = np.nan
    frame = pd.DataFrame([rec]).astype({"bmi_band": object, "sex": object})
    assert device.predict(rec) == case.model.predict(frame)[0]


def test_unsupported_pipeline_step_is_named():
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import PowerTransformer

    from boxwood.sources import UnsupportedModel, read_model

    case = zoo.fitted("gbr_squared_error")
    pipe = make_pipeline(PowerTransformer(), case.model.__class__(n_estimators=5)).fit(case.X, case.y)
    with pytest.raises(UnsupportedModel) as err:
        read_model(pipe)
    assert "powertransformer (PowerTransformer)" in str(err.value) and "OrdinalEncoder" in str(err.value)
