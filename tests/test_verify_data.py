"""``verify --data``: each side reads the data file its own way, and any difference fails the run.

The source model gets what the workstation reads from the file (pandas.read_csv, or
pandas.read_json(lines=True) for JSON Lines: the pandas documentation's defaults, as a user
would call them); the artefact gets the same bytes through the box's reader
(boxwood_runtime.stream.read_records). The oracle for "same reading" is pandas itself.
"""
from __future__ import annotations

import json

import numpy as np
import pytest

import zoo
from boxwood.cli import main
from boxwood.verify import verify
from boxwood_runtime import scorer

PIPELINE = "pipe_hgbr_encoded"  # string columns imputed + ordinal-encoded, numerics imputed, HGB


@pytest.fixture(scope="module")
def pipeline_files(tmp_path_factory):
    import joblib

    case, _, data = zoo.exported(PIPELINE)
    tmp = tmp_path_factory.mktemp("vdata")
    model = tmp / "pipe.joblib"
    joblib.dump(case.model, model)
    artefact = tmp / "pipe.json"
    artefact.write_bytes(data)
    frame = case.X.iloc[:40] if hasattr(case.X, "iloc") else None
    return case, model, artefact, frame


def _check(result, name="data reading"):
    return result.check(name)


def test_clean_csv_and_jsonl_read_the_same_on_both_sides(pipeline_files, tmp_path):
    case, model, artefact, frame = pipeline_files
    csv_path = tmp_path / "d.csv"
    frame.to_csv(csv_path, index=False)
    jsonl = tmp_path / "d.jsonl"
    frame.to_json(jsonl, orient="records", lines=True)
    for data in (csv_path, jsonl):
        result = verify(case.model, str(artefact), data=str(data), probes=0)
        c = _check(result)
        assert c.status == "pass", c.details
        assert "40 data rows" in c.summary and ("read_csv" in c.summary or "read_json" in c.summary)
        assert result.passed, result.summary()
        assert result.rows["data"] == 40


def test_planted_parsing_difference_fails_naming_row_and_field(pipeline_files, tmp_path, monkeypatch, capsys):
    """A box reader that trims spaces (a planted fault) reads ' male' as 'male'; pandas keeps
    the space. verify must fail (exit 1) and name the row and the field."""
    case, model, artefact, frame = pipeline_files
    padded = frame.copy()
    padded["sex"] = padded["sex"].astype(object)
    padded.iloc[2, padded.columns.get_loc("sex")] = " " + str(padded.iloc[2]["sex"])
    csv_path = tmp_path / "padded.csv"
    padded.to_csv(csv_path, index=False)
    import pandas as pd

    assert pd.read_csv(csv_path)["sex"][2].startswith(" ")  # the workstation keeps the space

    original = scorer.Model.record_from_text

    def trimming(self, fields, row=None):
        return original(self, {k: (v.strip() if isinstance(v, str) else v) for k, v in fields.items()}, row)

    monkeypatch.setattr(scorer.Model, "record_from_text", trimming)
    report = tmp_path / "r.json"
    junit = tmp_path / "r.xml"
    code = main(["verify", str(model), str(artefact), "--data", str(csv_path), "--probes", "0",
                 "--report-json", str(report), "--junit", str(junit)])
    out = capsys.readouterr().out
    assert code == 1
    assert "data reading" in out and "row 3 (line 4), field 'sex'" in out
    doc = json.loads(report.read_text())
    reading = [c for a in doc["artefacts"] for c in a["checks"] if c["name"] == "data reading"]
    assert reading and reading[0]["status"] == "fail"
    assert any("field 'sex'" in d and "pandas.read_csv reads ' male'" in d or "pandas.read_csv reads ' female'" in d
               for d in reading[0]["details"])


def test_padded_strings_read_the_same_on_both_sides(pipeline_files, tmp_path):
    """The box keeps the spaces around ' male' as pandas.read_csv does (no trimming)."""
    case, model, artefact, frame = pipeline_files
    padded = frame.copy()
    padded["sex"] = padded["sex"].astype(object)
    padded.iloc[2, padded.columns.get_loc("sex")] = " " + str(padded.iloc[2]["sex"]) + " "
    csv_path = tmp_path / "padded.csv"
    padded.to_csv(csv_path, index=False)
    result = verify(case.model, str(artefact), data=str(csv_path), probes=0)
    assert _check(result).status == "pass", _check(result).details
    assert result.passed, result.summary()


def test_the_source_model_is_fed_pandas_reading(pipeline_files, tmp_path, monkeypatch):
    """Where the readings differ, the source gets pandas' values: its outputs on that row
    equal scikit-learn's predict on pandas.read_csv of the file."""
    case, model, artefact, frame = pipeline_files
    csv_path = tmp_path / "d.csv"
    frame.to_csv(csv_path, index=False)
    original = scorer.Model.record_from_text

    def upper(self, fields, row=None):  # planted: the box upper-cases one field
        fields = dict(fields)
        fields["bmi_band"] = fields["bmi_band"].upper()
        return original(self, fields, row)

    monkeypatch.setattr(scorer.Model, "record_from_text", upper)
    result = verify(case.model, str(artefact), data=str(csv_path), probes=0)
    import pandas as pd

    present = int(pd.read_csv(csv_path)["bmi_band"].notna().sum())  # a missing cell stays missing
    assert _check(result).status == "fail" and len(_check(result).details) == present > 0

    want = case.model.predict(pd.read_csv(csv_path))
    ev = result.artefacts[0].evaluators[0]
    # the report's per-value metrics compare the artefact with the source's outputs on
    # pandas' rows; the source's own predictions are scikit-learn's on pandas' frame
    assert ev.empirical["rows"] == 40
    from boxwood.sources import read_model
    from boxwood.sources.model import SourceModel
    from boxwood.verify.probes import read_data

    rows = read_data(str(csv_path), read_model(case.model))
    got = SourceModel(case.model, read_model(case.model)).transformed(rows.for_source()).ravel()
    assert np.array_equal(got, np.asarray(want, dtype=np.float64))


def test_a_value_both_sides_refuse_is_bad_input(pipeline_files, tmp_path, capsys):
    case, model, artefact, frame = pipeline_files
    bad = frame.copy()
    bad["bp"] = bad["bp"].astype(object)
    bad.iloc[1, bad.columns.get_loc("bp")] = "warm"
    csv_path = tmp_path / "bad.csv"
    bad.to_csv(csv_path, index=False)
    assert main(["verify", str(model), str(artefact), "--data", str(csv_path)]) == 2
    err = capsys.readouterr().err
    assert "row 2 (line 3)" in err and "'bp'" in err and "Traceback" not in err


def test_a_token_only_pandas_treats_as_missing_is_a_reading_difference(pipeline_files, tmp_path, monkeypatch):
    """A box whose missing tokens lack one of pandas' (planted: the artefact's token list is
    cut to "") refuses or misreads the cell pandas reads as missing: verify fails by row and
    field instead of exiting with bad input."""
    case, model, artefact, frame = pipeline_files
    cells = frame.copy()
    cells["bp"] = cells["bp"].astype(object)
    cells.iloc[4, cells.columns.get_loc("bp")] = "NA"  # pandas: missing (its default na_values)
    csv_path = tmp_path / "na.csv"
    cells.to_csv(csv_path, index=False)
    import pandas as pd

    assert pd.isna(pd.read_csv(csv_path)["bp"][4])
    original = scorer.Model.record_from_text

    def no_tokens(self, fields, row=None):
        saved, self.missing_tokens = self.missing_tokens, {""}
        try:
            return original(self, fields, row)
        finally:
            self.missing_tokens = saved

    monkeypatch.setattr(scorer.Model, "record_from_text", no_tokens)
    result = verify(case.model, str(artefact), data=str(csv_path), probes=0)
    c = _check(result)
    assert c.status == "fail" and not result.passed
    assert any("row 5 (line 6), field 'bp'" in d and "missing" in d for d in c.details), c.details


def test_pandas_default_json_float_parser_is_not_correctly_rounded(tmp_path):
    """Why the workstation's JSON Lines reading is pandas.read_json(..., precise_float=True):
    with pandas' default (precise_float=False) a plain decimal such as -0.0514740612 (a
    diabetes 'bmi' value) is read one float64 step away from the correctly rounded value that
    Python's float() (and so the box) gives; with precise_float=True it is the same.
    Measured with the pandas installed here; if a pandas release fixes its parser, the first
    assertion is what changes."""
    import pandas as pd

    text = "-0.0514740612"
    path = tmp_path / "one.jsonl"
    path.write_text('{"bmi": %s}\n' % text)
    default = float(pd.read_json(path, lines=True)["bmi"][0])
    precise = float(pd.read_json(path, lines=True, precise_float=True)["bmi"][0])
    assert precise == float(text)
    assert default != float(text) and abs(np.nextafter(default, float(text)) - float(text)) == 0.0
