"""The streaming scorer (boxwood_runtime.stream) against scikit-learn's own predictions.

Reference for every number checked here: scikit-learn's ``predict`` / ``predict_proba``
on the zoo models (tests/zoo.py; data sets shipped with scikit-learn, sources named
there), called on exactly the data the model was fitted on. Error handling is checked
against the promises of the stream module's docstring: every input row gives one
output row, in order, and a bad row names its row, line and field.
"""
import csv
import io
import json
import math
import struct
import tracemalloc

import numpy as np
import pytest

import zoo
from boxwood_runtime import load
from boxwood_runtime.scorer import SELF_CHECK_ULPS, ulp_distance
from boxwood_runtime.stream import Counts, StreamError, score_stream


# ----------------------------------------------------------------------------- helpers
def cell(v):
    """A zoo value as CSV text: empty for missing, repr for floats (exact round trip)."""
    if v is None:
        return ""
    return v if isinstance(v, str) else repr(float(v))


def csv_text(names, rows, ids=None, id_name="id"):
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(([id_name] if ids is not None else []) + list(names))
    for i, r in enumerate(rows):
        w.writerow(([ids[i]] if ids is not None else []) + [cell(v) for v in r])
    return buf.getvalue()


def jsonl_text(names, rows, ids=None, id_name="id"):
    lines = []
    for i, r in enumerate(rows):
        obj = {id_name: ids[i]} if ids is not None else {}
        obj.update(zip(names, r))
        lines.append(json.dumps(obj))
    return "\n".join(lines) + "\n"


def ids_for(n):
    return ["r%05d" % i for i in range(n)]


def same_bits(a, b):
    return struct.pack("<d", a) == struct.pack("<d", b)


def sklearn_reference(case, select=None):
    """scikit-learn's own outputs on the data the case was fitted on (rows ``select``)."""
    X = case.X
    if select is not None:
        X = X.iloc[select] if hasattr(X, "iloc") else X[select]
    if case.task == "classification":
        return [v.item() for v in case.model.predict(X)], case.model.predict_proba(X).tolist()
    if case.task == "outlier_detection":
        return ([int(v) for v in case.model.predict(X)],
                np.c_[case.model.score_samples(X), case.model.decision_function(X)].tolist())
    return np.asarray(case.model.predict(X), dtype=np.float64).reshape(len(X), -1).tolist(), None


def check_against_sklearn(device, case, out_rows, text, select=None):
    """Compare parsed output rows with scikit-learn.

    ``text``: True when values are CSV strings, False for JSON values.
    Regression with the identity post-transform: the output is the raw score and must
    be bit-identical to scikit-learn's predict. Transformed outputs (probabilities,
    exp): within SELF_CHECK_ULPS = 8 units in the last place. That is the bound the
    scorer itself states and enforces on its self-check rows (boxwood_runtime/scorer.py):
    raw scores are bit-identical, and the device then applies math.exp, 1 + e, a division
    (and for softmax a sum) where scikit-learn uses numpy/scipy's exp and expit; each of
    those steps can round differently by about one ulp, so a few ulps is what to expect
    and 8 is the documented ceiling.
    """
    want, proba = sklearn_reference(case, select)
    assert len(out_rows) == len(want)
    for i, row in enumerate(out_rows):
        assert row["error"] in ("", None), row["error"]
        if case.task == "regression":
            for name, w in zip(device.output_names, want[i]):
                got = float(row[name])
                # affine target steps (a wrapper's scaler inverse) keep the outputs exact
                exp_like = any(op in ("exp", "expm1") for op, _ in getattr(device, "target_steps", ()))
                if device.post_transform == "identity" and not exp_like:
                    assert same_bits(got, w), (i, got, w)
                else:
                    assert ulp_distance(got, w) <= SELF_CHECK_ULPS, (i, got, w)
        elif case.task == "outlier_detection":
            # score_samples within the bound; decision = score - offset, so the same
            # absolute error (|score| <= 1: 8 ulps of 1.0 at most)
            assert row["label"] == (str(want[i]) if text else want[i]), (i, row["label"], want[i])
            assert ulp_distance(float(row["score"]), proba[i][0]) <= SELF_CHECK_ULPS
            assert abs(float(row["decision"]) - proba[i][1]) <= SELF_CHECK_ULPS * 2.0 ** -52
        else:
            label = row["label"]
            assert label == (str(want[i]) if text else want[i]), (i, label, want[i])
            for c, w in zip(device.classes, proba[i]):
                got = float(row["proba_%s" % c])
                assert ulp_distance(got, w) <= SELF_CHECK_ULPS, (i, c, got, w)


def parse_csv(text):
    return list(csv.DictReader(io.StringIO(text)))


def parse_jsonl(text):
    return [json.loads(line) for line in text.splitlines()]


def run(device, text, **kw):
    out = io.StringIO()
    counts = score_stream(device, io.StringIO(text), out, **kw)
    return counts, out.getvalue()


@pytest.fixture(scope="module")
def devices():
    cache = {}

    def get(name):
        if name not in cache:
            case, ensemble, data = zoo.exported(name)
            cache[name] = (case, ensemble, load(data))
        return cache[name]

    return get


# ----------------------------------------------------------------------------- the zoo
@pytest.mark.parametrize("name", zoo.ALL_CASES)
def test_zoo_csv_matches_sklearn(devices, name):
    case, ensemble, device = devices(name)
    n = len(case.rows)
    counts, out = run(device, csv_text(device.input_names, case.rows, ids_for(n)))
    assert counts == Counts(n, n, 0, None)
    rows = parse_csv(out)
    assert [r["id"] for r in rows] == ids_for(n)  # id passthrough, in order
    check_against_sklearn(device, case, rows, text=True)


@pytest.mark.parametrize("name", zoo.ALL_CASES)
def test_zoo_jsonl_matches_sklearn(devices, name):
    case, ensemble, device = devices(name)
    n = len(case.rows)
    ids = list(range(n))  # JSON ids keep their JSON type
    text = jsonl_text(device.input_names, case.rows, ids)
    counts, out = run(device, text)
    assert counts == Counts(n, n, 0, None)
    rows = parse_jsonl(out)
    assert [r["id"] for r in rows] == ids
    if device.preprocesses:
        # a pipeline's raw fields are read as pandas.read_json(lines=True) reads them (its
        # default parser keeps 15 fraction digits): the oracle is the pipeline on that frame
        import dataclasses

        import pandas as pd

        columns = list(case.X.columns) if hasattr(case.X, "columns") else list(device.input_names)
        frame = pd.read_json(io.StringIO(text), lines=True)[columns]
        if not hasattr(case.X, "columns"):  # a pipeline fitted on an array: the same numbers as one
            frame = frame.to_numpy(dtype=np.float64)
        case = dataclasses.replace(case, X=frame)
    check_against_sklearn(device, case, rows, text=False)


def test_format_is_sniffed_and_can_be_crossed(devices):
    case, _, device = devices("hgbc_categorical")
    rows, n = case.rows[:50], 50
    csv_in = "\ufeff\n" + csv_text(device.feature_names, rows, ids_for(n))  # BOM and a blank line first
    jsonl_in = "\n  \n" + jsonl_text(device.feature_names, rows, ids_for(n))
    _, out_csv = run(device, csv_in)
    _, out_jsonl = run(device, jsonl_in)
    assert out_csv.startswith("id,label,proba_0,proba_1,proba_2,error\n")
    assert out_jsonl.startswith("{")
    # CSV in, JSON Lines out and back: the same values either way.
    _, crossed = run(device, csv_in, out_fmt="jsonl")
    _, crossed_back = run(device, jsonl_in, out_fmt="csv")
    assert crossed_back == out_csv
    as_json = parse_jsonl(crossed)
    assert [r["id"] for r in as_json] == ids_for(n)
    check_against_sklearn(device, case, as_json, text=False, select=list(range(n)))
    check_against_sklearn(device, case, parse_csv(out_csv), text=True, select=list(range(n)))


# ----------------------------------------------------------------------------- bad rows
def test_csv_bad_rows_are_error_rows_naming_row_line_and_field(devices):
    case, _, device = devices("hgbr_categorical_nan")
    names = device.feature_names
    good = [case.rows[i] for i in range(4)]
    text_good = [",".join(cell(v) for v in r) for r in good]
    bad_number = list(good[1])
    bad_number[names.index("bp")] = "warm"
    bad_category = list(good[2])
    bad_category[names.index("sex")] = "unknown_sex"
    lines = [
        "id," + ",".join(names),                               # line 1
        "a," + text_good[0],                                  # line 2, row 1 ok
        "b," + ",".join(cell(v) for v in bad_number),          # line 3, row 2 string in numeric
        "",                                                   # line 4, blank: not a row
        "c," + ",".join(cell(v) for v in bad_category),        # line 5, row 3 unknown category
        "d," + text_good[1] + ",1.5",                          # line 6, row 4 one cell too many
        '"e\nx",' + text_good[2],                              # lines 7-8, row 5 ok (quoted id spans lines)
        "f," + ",".join(text_good[3].split(",")[:-2]),         # line 9, row 6 two cells short
        "g," + text_good[3],                                   # line 10, row 7 ok
    ]
    counts, out = run(device, "\n".join(lines) + "\n")
    rows = parse_csv(out)
    assert [r["id"] for r in rows] == ["a", "b", "c", "d", "e\nx", "f", "g"]
    assert (counts.rows, counts.scored, counts.errors) == (7, 3, 4)
    errors = [r["error"] for r in rows]
    assert errors[1].startswith("row 2 (line 3), field 'bp': expected a number")
    assert errors[2].startswith("row 3 (line 5), field 'sex': unknown category 'unknown_sex'")
    assert errors[3] == "row 4 (line 6): has %d cells, the header has %d" % (len(names) + 2, len(names) + 1)
    assert errors[5] == "row 6 (line 9): has %d cells, the header has %d" % (len(names) - 1, len(names) + 1)
    assert counts.first_error == errors[1]
    for r in (rows[1], rows[2], rows[3], rows[5]):
        assert r["prediction"] == ""
    check_against_sklearn(device, case, [rows[0], rows[4], rows[6]], text=True, select=[0, 2, 3])


def test_jsonl_bad_rows_are_error_rows_naming_row_line_and_field(devices):
    case, _, device = devices("hgbr_categorical_nan")
    names = device.feature_names
    rec = [dict(zip(names, case.rows[i])) for i in range(3)]
    absent = dict(rec[1])
    del absent["s5"]
    as_text = dict(rec[1], bmi="27.5")
    unknown = dict(rec[1], bmi_band="b9")
    boolean = dict(rec[1], age=True)
    huge = '{"age": 1%s, "sex": "male"}' % ("0" * 400)  # an integer no float can hold
    lines = [
        json.dumps(dict(rec[0], id="a")),      # row 1 ok
        '{"id": "b", "age": ',                 # row 2 malformed JSON
        json.dumps(dict(absent, id="c")),      # row 3 absent field
        "",                                    # line 4 blank: not a row
        "[1, 2, 3]",                           # row 4 not an object
        json.dumps(dict(as_text, id="e")),     # row 5 string in a numeric field
        json.dumps(dict(unknown, id="f")),     # row 6 unknown category
        json.dumps(dict(boolean, id="g")),     # row 7 true in a numeric field
        huge,                                  # row 8 number out of range
        json.dumps(dict(rec[2], id="i")),      # row 9 ok
    ]
    counts, out = run(device, "\n".join(lines) + "\n")
    rows = parse_jsonl(out)
    assert len(rows) == 9 == counts.rows
    assert (counts.scored, counts.errors) == (2, 7)
    assert [r.get("id") for r in rows] == ["a", None, "c", None, "e", "f", "g", None, "i"]
    err = [r["error"] for r in rows]
    assert err[1].startswith("row 2 (line 2): not valid JSON")
    assert err[2].startswith("row 3 (line 3), field 's5': the field is absent")
    assert err[3] == "row 4 (line 5): expected a JSON object, got an array"
    assert err[4].startswith("row 5 (line 6), field 'bmi': expected a number, got str")
    assert err[5].startswith("row 6 (line 7), field 'bmi_band': unknown category 'b9'")
    assert err[6].startswith("row 7 (line 8), field 'age': expected a number, got bool")
    assert err[7].startswith("row 8 (line 9)")
    for r in rows[1:8]:
        assert r["prediction"] is None
    check_against_sklearn(device, case, [rows[0], rows[8]], text=False, select=[0, 2])


def test_missing_value_refused_by_classic_trees_is_an_error_row(devices):
    # Classic GradientBoosting artefacts declare missing_values "reject": an empty cell
    # or a null is an error row that names the field, and the next row is still scored.
    case, _, device = devices("gbr_squared_error")
    names = device.feature_names
    rows = [list(case.rows[0]), list(case.rows[1])]
    rows[0][3] = None
    counts, out = run(device, csv_text(names, rows, ["x", "y"]))
    got = parse_csv(out)
    assert counts.errors == 1 and counts.scored == 1
    assert got[0]["error"] == ("row 1 (line 2), field %r: the value is missing, and this model "
                               "does not accept missing values" % names[3])
    check_against_sklearn(device, case, got[1:], text=True, select=[1])
    counts, out = run(device, jsonl_text(names, rows))
    assert parse_jsonl(out)[0]["error"].startswith("row 1 (line 1), field %r: the value is missing" % names[3])


def test_unknown_category_as_missing_follows_sklearn(devices):
    # scikit-learn routes a category it never saw like a missing value; with
    # unknown_category="as_missing" the device must give the same number as
    # scikit-learn gives for the same row with the value missing.
    case, _, _ = devices("hgbr_categorical_nan")
    _, _, data = zoo.exported("hgbr_categorical_nan")
    device = load(data, unknown_category="as_missing")
    names = device.feature_names
    j = names.index("bmi_band")
    row = list(case.rows[0])
    row[j] = "b_never_seen"
    X = case.X.iloc[[0]].copy()
    X.iloc[0, X.columns.get_loc("bmi_band")] = np.nan
    want = float(case.model.predict(X)[0])
    counts, out = run(device, csv_text(names, [row]))
    assert counts.errors == 0
    assert same_bits(float(parse_csv(out)[0]["prediction"]), want)


# ----------------------------------------------------------------------------- ids and headers
def test_id_column_choices(devices):
    case, _, device = devices("gbc_binary")
    names = device.feature_names
    rows = case.rows[:3]
    # explicit id column
    text = csv_text(names, rows, ["p", "q", "r"], id_name="reading")
    _, out = run(device, text, id_column="reading")
    assert out.splitlines()[0] == "reading,label,proba_0,proba_1,error"
    assert [r["reading"] for r in parse_csv(out)] == ["p", "q", "r"]
    # no "id" column and none asked for: no id column in the output
    _, out = run(device, text)
    assert out.splitlines()[0] == "label,proba_0,proba_1,error"
    # an id column that is not in the header: a clear error, nothing written
    out = io.StringIO()
    with pytest.raises(StreamError, match="'serial' is not in the CSV header"):
        score_stream(device, io.StringIO(text), out, id_column="serial")
    assert out.getvalue() == ""
    # JSON Lines: a record without the requested id field is an error row
    lines = jsonl_text(names, rows, ["p", "q", "r"], id_name="reading").splitlines()
    lines[1] = json.dumps(dict(zip(names, rows[1])))
    counts, out = run(device, "\n".join(lines), id_column="reading")
    got = parse_jsonl(out)
    assert [g["reading"] for g in got] == ["p", None, "r"]
    assert got[1]["error"] == "row 2 (line 2), field 'reading': the id field is absent"
    check_against_sklearn(device, case, [got[0], got[2]], text=False, select=[0, 2])


def test_header_problems_raise_before_anything_is_written(devices):
    _, _, device = devices("gbr_squared_error")
    names = device.feature_names
    out = io.StringIO()
    with pytest.raises(StreamError, match="lacks the model's input column"):
        score_stream(device, io.StringIO(",".join(names[1:]) + "\n1,2\n"), out)
    with pytest.raises(StreamError, match="repeats the column"):
        score_stream(device, io.StringIO(",".join(names + names[:1]) + "\n"), out)
    with pytest.raises(StreamError, match="unknown input format"):
        score_stream(device, io.StringIO(""), out, fmt="xml")
    assert out.getvalue() == ""


def test_empty_and_header_only_inputs(devices):
    _, _, device = devices("gbr_squared_error")
    assert run(device, "") == (Counts(0, 0, 0, None), "")
    assert run(device, "\n\n") == (Counts(0, 0, 0, None), "")
    header = ",".join(["id"] + device.feature_names) + "\n"
    assert run(device, header) == (Counts(0, 0, 0, None), "id,prediction,error\n")


# ----------------------------------------------------------------------------- streaming
def _generated_lines(device, case, n, fmt, observe, out):
    """Yield n data lines; before each, note how many output lines already exist."""
    names = device.feature_names
    if fmt == "csv":
        yield ",".join(["id"] + names) + "\n"
    for i in range(n):
        if i % 1000 == 0:
            observe.append((i, out.getvalue().count("\n")))
        r = case.rows[i % len(case.rows)]
        if fmt == "csv":
            yield "%d,%s\n" % (i, ",".join(cell(v) for v in r))
        else:
            yield json.dumps(dict(zip(names, r), id=i)) + "\n"


@pytest.mark.parametrize("fmt", ["csv", "jsonl"])
def test_rows_are_written_before_the_input_is_exhausted(devices, fmt):
    case, _, device = devices("hgbr_nan")
    n = 20000
    out, seen = io.StringIO(), []
    counts = score_stream(device, _generated_lines(device, case, n, fmt, seen, out), out)
    assert counts == Counts(n, n, 0, None)
    header = 1 if fmt == "csv" else 0
    # When the generator is asked for data row i, rows before it are already out
    # (a lagging writer would show far fewer; a collect-then-write one would show none).
    assert len(seen) == n // 1000
    for i, lines_out in seen[1:]:
        assert lines_out >= header + i - 1, (i, lines_out)
    assert out.getvalue().count("\n") == header + n


class _Sink:
    """An output that keeps nothing, so memory use measures the scorer alone."""

    lines = 0

    def write(self, text):
        self.lines += text.count("\n")


def _peak_bytes(device, case, n):
    sink = _Sink()
    lines = _generated_lines(device, case, n, "csv", [], io.StringIO())
    tracemalloc.start()
    try:
        score_stream(device, lines, sink)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert sink.lines == n + 1
    return peak


def test_memory_does_not_grow_with_the_number_of_rows(devices):
    # Ten times the rows must not need (anywhere near) ten times the memory. Holding
    # the input or the output of 10000 rows would take megabytes; a streaming scorer
    # needs about the same few kilobytes for 1000 rows as for 10000.
    case, _, device = devices("hgbr_nan")
    small = _peak_bytes(device, case, 1000)
    large = _peak_bytes(device, case, 10000)
    assert large <= 1.5 * small + 64 * 1024, (small, large)


def test_non_finite_outputs_round_trip():
    # JSON has no infinity: the stream writes such outputs as strings, and a CSV cell
    # written with repr reads back with float(); checked against Python's own float().
    from boxwood_runtime.stream import _json_value, _text

    for v in (math.inf, -math.inf):
        assert float(_json_value(v)) == v
        assert float(_text(v)) == v
    assert _json_value(0.1) == 0.1 and _text(0.1) == "0.1"
