"""Bad artefacts and bad records fail closed with errors that say where and why."""
from __future__ import annotations

import json

import pytest

import boxwood_runtime
from boxwood_runtime import ArtefactError, RecordError
from boxwood_runtime.scorer import artefact_bytes

import zoo


@pytest.fixture(scope="module")
def gb():
    return zoo.exported("gbr_squared_error")


@pytest.fixture(scope="module")
def hgb_cat():
    return zoo.exported("hgbr_categorical_nan")


def _body(data):
    doc = json.loads(data)
    doc.pop("boxwood_digest")
    return doc


def test_truncated_file(gb):
    _, _, data = gb
    with pytest.raises(ArtefactError, match="digest mismatch|not valid JSON"):
        boxwood_runtime.load(data[: len(data) // 2])


def test_wrong_digest(gb):
    _, _, data = gb
    i = data.index(b'"sha256:') + 8
    flipped = data[:i] + (b"0" if data[i:i + 1] != b"0" else b"1") + data[i + 1:]
    with pytest.raises(ArtefactError, match="digest mismatch"):
        boxwood_runtime.load(flipped)


def test_changed_threshold_detected_by_digest(gb):
    _, _, data = gb
    doc = json.loads(data)
    doc["ensemble"]["trees"][0]["threshold"][0] += 1.0
    with pytest.raises(ArtefactError, match="digest mismatch"):
        boxwood_runtime.load(doc)


def test_pretty_printed_file_still_verifies(gb, tmp_path):
    _, _, data = gb
    path = tmp_path / "pretty.json"
    path.write_text(json.dumps(json.loads(data), indent=2))
    assert boxwood_runtime.load(str(path)).n_trees == 40


@pytest.mark.parametrize("mutate,message", [
    (lambda d: d["ensemble"]["trees"][0]["left"].__setitem__(0, 0), "out of range"),
    (lambda d: d["ensemble"]["trees"][0]["feature"].__setitem__(0, 999), "out of range"),
    (lambda d: d.__setitem__("format_version", 4), "format_version 4"),
    (lambda d: d.__setitem__("format", "something-else"), "not a boxwood"),
    (lambda d: d["ensemble"]["trees"][0]["value"].pop(), "entries"),
    (lambda d: d["ensemble"]["base_values"].append(0.0), "names"),
])
def test_structural_damage_refused_even_with_valid_digest(gb, mutate, message):
    _, _, data = gb
    doc = _body(data)
    mutate(doc)
    with pytest.raises(ArtefactError, match=message):
        boxwood_runtime.load(artefact_bytes(doc))


def test_cycle_refused(gb):
    _, _, data = gb
    doc = _body(data)
    tree = doc["ensemble"]["trees"][0]
    child = tree["left"][0]
    # point a grandchild back at its parent
    tree["right"][child] = child if tree["feature"][child] >= 0 else tree["right"][child]
    with pytest.raises(ArtefactError, match="reached twice|out of range|unreachable|has children"):
        boxwood_runtime.load(artefact_bytes(doc))


def test_size_limits(gb):
    _, _, data = gb
    with pytest.raises(ArtefactError, match="max_trees"):
        boxwood_runtime.load(data, limits={"max_trees": 10})
    with pytest.raises(ArtefactError, match="max_bytes"):
        boxwood_runtime.load(data, limits={"max_bytes": 1000})


def test_self_check_failure_refuses_model(gb):
    _, _, data = gb
    doc = _body(data)
    doc["self_check"]["raw"][0][0] += 1e-9
    with pytest.raises(ArtefactError, match="self-check failed: reference row 0"):
        boxwood_runtime.load(artefact_bytes(doc))


def test_missing_feature_names_field_and_record(gb):
    case, _, data = gb
    m = boxwood_runtime.load(data)
    rec = dict(zip(m.feature_names, case.rows[0]))
    del rec["x2"]
    with pytest.raises(RecordError) as err:
        m.predict([dict(zip(m.feature_names, case.rows[1])), rec])
    assert err.value.row == 1 and err.value.field == "x2"
    assert "record 1, field 'x2'" in str(err.value)


def test_string_in_numeric_field(gb):
    case, _, data = gb
    m = boxwood_runtime.load(data)
    row = list(case.rows[0])
    row[2] = "12.5kg"
    with pytest.raises(RecordError, match="field 'x2': expected a number, got str '12.5kg'"):
        m.predict(row)


def test_missing_value_refused_by_classic_boosting(gb):
    """scikit-learn's GradientBoostingRegressor refuses NaN input; so does its artefact."""
    case, _, data = gb
    m = boxwood_runtime.load(data)
    row = list(case.rows[0])
    row[0] = None
    with pytest.raises(RecordError, match="field 'x0': the value is missing"):
        m.predict(row)
    row[0] = float("inf")
    with pytest.raises(RecordError, match="infinity"):
        m.predict(row)
    row[0] = 1e300  # finite in float64, beyond float32: scikit-learn refuses it too
    with pytest.raises(RecordError, match="float32 range"):
        m.predict(row)
    with pytest.raises(ValueError):
        case.model.predict([row])


def test_wrong_length_and_type(gb):
    case, _, data = gb
    m = boxwood_runtime.load(data)
    with pytest.raises(RecordError, match="has 3 values, the model takes 10"):
        m.predict([1.0, 2.0, 3.0])
    with pytest.raises(RecordError, match="expected a number, got bool"):
        m.predict([True] + case.rows[0][1:])


def test_bad_category_type(hgb_cat):
    case, _, data = hgb_cat
    m = boxwood_runtime.load(data)
    row = list(case.rows[0])
    row[m.feature_names.index("sex")] = ["male"]
    with pytest.raises(RecordError, match="field 'sex': expected a category value, got list"):
        m.predict(row)


def test_predict_proba_on_regressor_is_a_type_error(gb):
    case, _, data = gb
    m = boxwood_runtime.load(data)
    with pytest.raises(TypeError, match="classifiers"):
        m.predict_proba(case.rows[0])
