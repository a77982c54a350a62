"""Streams that fail closed: every bad row is an error row for that row, rows in = rows out.

Outside references: pandas.read_csv / pandas.read_json(lines=True) for what a row is in a
well-formed file (quoted line breaks, blank lines, CRLF and CR line ends, a byte-order mark)
and for the rows around a damaged one; scikit-learn's own predictions for the scores (through
test_stream.check_against_sklearn); Python's csv module for its field limit
(csv.field_size_limit()); the UTF-8 definition (RFC 3629: 0xff never appears) for bad bytes;
hypothesis for random byte mutations (property: rows in = rows out, and the run ends with its
counts, never an exception). Planted faults: a stray quote that, read the way csv reads it,
swallows every later row (shown with csv itself), and a text-mode reader that dies on bad bytes.
"""
from __future__ import annotations

import csv
import io
import json
import os
import subprocess
import sys

import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import zoo
from boxwood_runtime import load
from boxwood_runtime.stream import INCOMPLETE, MAX_JSON_DEPTH, StreamError, score_stream
from test_stream import cell, check_against_sklearn, parse_csv, parse_jsonl

CASE = "gbr_squared_error"  # diabetes (Efron et al. 2004), all numeric
N = 12
SETTINGS = settings(max_examples=60, deadline=None, derandomize=True,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])


@pytest.fixture(scope="module")
def model():
    case, _, data = zoo.exported(CASE)
    return case, load(data)


def csv_bytes(case, device, n=N, quoted_ids=False):
    lines = [",".join(["id"] + device.feature_names)]
    for i in range(n):
        ident = '"r%d\nnext line"' % i if quoted_ids and i % 3 == 0 else "r%d" % i
        lines.append(",".join([ident] + [cell(v) for v in case.rows[i]]))
    return ("\n".join(lines) + "\n").encode()


def jsonl_bytes(case, device, n=N):
    return "".join(json.dumps(dict(zip(device.feature_names, case.rows[i]), id="r%d" % i)) + "\n"
                   for i in range(n)).encode()


def score(device, data, **kw):
    out = io.StringIO()
    counts = score_stream(device, io.BytesIO(data), out, **kw)
    return counts, out.getvalue()


def data_lines(data):
    return [line for line in data.split(b"\n") if line.strip(b"\r")]


# ----------------------------------------------------------------------------- well-formed: as pandas
@pytest.mark.parametrize("variant", ["plain", "crlf", "cr", "bom", "blank_lines", "quoted_newlines"])
def test_rows_are_the_rows_pandas_reads(model, variant):
    case, device = model
    data = csv_bytes(case, device, quoted_ids=variant == "quoted_newlines")
    if variant == "crlf":
        data = data.replace(b"\n", b"\r\n")
    elif variant == "cr":
        data = data.replace(b"\n", b"\r")
    elif variant == "bom":
        data = b"\xef\xbb\xbf" + data
    elif variant == "blank_lines":
        data = data.replace(b"\nr3,", b"\n\n\nr3,")
    want = pd.read_csv(io.BytesIO(data), dtype=str, keep_default_na=False, encoding="utf-8-sig")
    counts, out = score(device, data)
    rows = parse_csv(out)
    assert counts.rows == len(rows) == len(want) == N
    assert [r["id"] for r in rows] == list(want["id"])
    check_against_sklearn(device, case, rows, text=True, select=list(range(N)))


def test_jsonl_rows_are_the_rows_pandas_reads(model):
    case, device = model
    data = jsonl_bytes(case, device)
    want = pd.read_json(io.BytesIO(data), lines=True)
    counts, out = score(device, data)
    rows = parse_jsonl(out)
    assert counts.rows == len(rows) == len(want) == N
    assert [r["id"] for r in rows] == list(want["id"])
    check_against_sklearn(device, case, rows, text=False, select=list(range(N)))


# ----------------------------------------------------------------------------- issue 11's stream cases
def test_bad_utf8_mid_file_is_one_error_row(model):
    case, device = model
    for fmt, data in (("csv", csv_bytes(case, device)), ("jsonl", jsonl_bytes(case, device))):
        lines = data.split(b"\n")
        bad = 6 if fmt == "csv" else 5  # data row 6 in both
        assert lines[bad].count(b",") > 2
        cut = lines[bad].index(b",", lines[bad].index(b",") + 1) + 2  # inside the second feature's cell
        lines[bad] = lines[bad][:cut] + b"\xff" + lines[bad][cut:]  # 0xff never occurs in UTF-8 (RFC 3629)
        damaged = b"\n".join(lines)
        with pytest.raises(UnicodeDecodeError):
            damaged.decode("utf-8")  # the reference: this input is not UTF-8
        counts, out = score(device, damaged)
        rows = parse_csv(out) if fmt == "csv" else parse_jsonl(out)
        assert counts.rows == len(rows) == N and counts.errors == 1
        err = rows[5]["error"]
        line = bad + 1
        if fmt == "csv":
            assert err.startswith("row 6 (line %d), field %r: not UTF-8 text (byte 0xff" % (line, device.feature_names[1]))
        else:
            assert err.startswith("row 6 (line %d): not UTF-8 text (byte 0xff" % line)
        good = [i for i in range(N) if i != 5]
        check_against_sklearn(device, case, [rows[i] for i in good], text=fmt == "csv", select=good)
        # pandas reads the same rows around the damaged one
        kept = b"\n".join(lines[:bad] + lines[bad + 1:])
        if fmt == "csv":
            assert list(pd.read_csv(io.BytesIO(kept), dtype=str)["id"]) == [rows[i]["id"] for i in good]


def test_text_mode_reader_dying_mid_file_leaves_an_incomplete_line(model):
    """The planted fault: a text-mode reader stops at bad bytes; the output must say the run is incomplete."""
    case, device = model
    many = csv_bytes(case, device, n=200)  # well past the text reader's first 8 KiB chunk
    data = many + b"r9,\xff\n" + csv_bytes(case, device, n=3).split(b"\n", 1)[1]
    src = io.TextIOWrapper(io.BufferedReader(io.BytesIO(data), buffer_size=16), encoding="utf-8", newline="")
    out = io.StringIO()
    with pytest.raises(StreamError, match="not UTF-8 text after row"):
        score_stream(device, src, out)
    last = parse_csv(out.getvalue())[-1]
    assert last["error"].startswith(INCOMPLETE) and "the rows after those were not scored" in last["error"]


def test_input_error_mid_file_leaves_an_incomplete_line(model):
    case, device = model
    lines = jsonl_bytes(case, device).decode().splitlines(True)

    def source():
        yield from lines[:4]
        raise OSError("the device was unplugged")

    out = io.StringIO()
    with pytest.raises(OSError):
        score_stream(device, source(), out)
    rows = parse_jsonl(out.getvalue())
    assert len(rows) == 5 and rows[-1]["error"].startswith(INCOMPLETE + " the run stopped after 4 rows (OSError")


def test_stray_quote_costs_one_row(model):
    case, device = model
    lines = csv_bytes(case, device).split(b"\n")
    lines[3] = lines[3].replace(b",", b',"', 1)  # row 3: a quote opens the first feature's cell, never closed
    damaged = b"\n".join(lines)
    # the planted fault, read as csv reads it: everything after the quote is one record
    assert len(list(csv.reader(io.StringIO(damaged.decode(), newline="")))) == 3 + 1
    counts, out = score(device, damaged)
    rows = parse_csv(out)
    assert counts.rows == len(rows) == N and counts.errors == 1
    assert rows[2]["error"].startswith("row 3 (line 4), field %r: a quote opens a quoted cell here that is not "
                                       "closed by the end of the input; read as a stray quote" % device.feature_names[0])
    good = [i for i in range(N) if i != 2]
    check_against_sklearn(device, case, [rows[i] for i in good], text=True, select=good)


def test_two_stray_quotes_that_close_each_other_cost_two_rows(model):
    case, device = model
    lines = csv_bytes(case, device).split(b"\n")
    lines[3] = lines[3].replace(b",", b',"', 1)
    lines[6] = lines[6] + b'"'  # closes it three lines later, with the wrong number of cells
    counts, out = score(device, b"\n".join(lines))
    rows = parse_csv(out)
    assert counts.rows == len(rows) == N and counts.errors == 2
    assert "joins lines 4-7 into one record" in rows[2]["error"]
    assert rows[5]["error"].startswith("row 6 (line 7)")


def test_header_cell_over_the_csv_field_limit(model):
    case, device = model
    limit = csv.field_size_limit()
    data = csv_bytes(case, device)
    long_header = b"x" * (limit + 10) + b"," + data
    with pytest.raises(csv.Error):  # the reference: csv itself refuses the cell
        list(csv.reader(io.StringIO(long_header.decode())))
    with pytest.raises(StreamError, match=r"the CSV header \(line 1\) cannot be read: unreadable CSV: field larger"):
        score(device, long_header)
    # a data cell over the limit: an error row for that row, the run goes on
    lines = data.split(b"\n")
    lines[2] = b"r1," + b"9" * (limit + 10) + lines[2][lines[2].index(b",", 3):]
    counts, out = score(device, b"\n".join(lines))
    rows = parse_csv(out)
    assert counts.rows == len(rows) == N and counts.errors == 1
    assert rows[1]["error"].startswith("row 2 (line 3): unreadable CSV: field larger than field limit")


def test_jsonl_first_line_not_an_object(model):
    case, device = model
    data = jsonl_bytes(case, device)
    for first in (b"[1, 2, 3]", b"[[[[" * 300 + b"]]]]" * 300, b"\xff\xfe"):
        for fmt in ("auto", "jsonl"):
            counts, out = score(device, first + b"\n" + data, fmt=fmt)
            rows = parse_jsonl(out)
            assert counts.rows == len(rows) == N + 1 and counts.errors == 1, (first[:10], fmt)
            assert rows[0]["error"].startswith("row 1 (line 1): ")
    counts, out = score(device, b"7\n" + data, fmt="jsonl")  # a number first: JSON Lines when told so
    assert counts.rows == N + 1 and parse_jsonl(out)[0]["error"] == "row 1 (line 1): expected a JSON object, got a number"


def test_jsonl_deeply_nested_id(model):
    case, device = model
    lines = jsonl_bytes(case, device).split(b"\n")
    deep = "[" * 990 + "]" * 990
    # the reference: Python's json reads it in a fresh interpreter (so the stream must refuse it on purpose)
    assert subprocess.run([sys.executable, "-c", "import json, sys; json.loads(sys.stdin.read())"], input=deep,
                          text=True, timeout=60).returncode == 0
    lines[2] = lines[2].replace(b'"id": "r2"', b'"id": ' + deep.encode())
    lines[4] = lines[4].replace(b'"id": "r4"', b'"id": ' + ("[" * 10 + "]" * 10).encode())  # shallow: kept
    for out_fmt in ("jsonl", "csv"):
        counts, out = score(device, b"\n".join(lines), out_fmt=out_fmt)
        rows = parse_jsonl(out) if out_fmt == "jsonl" else parse_csv(out)
        assert counts.rows == len(rows) == N and counts.errors == 1
        assert rows[2]["error"] == "row 3 (line 3): nested deeper than %d levels (not read)" % MAX_JSON_DEPTH
    assert parse_jsonl(score(device, b"\n".join(lines))[1])[4]["id"] == json.loads("[" * 10 + "]" * 10)


def test_lone_surrogate_id_is_written_escaped(model):
    case, device = model
    lines = jsonl_bytes(case, device).split(b"\n")
    lines[1] = lines[1].replace(b'"id": "r1"', b'"id": "\\ud800"')
    for out_fmt in ("jsonl", "csv"):
        counts, out = score(device, b"\n".join(lines), out_fmt=out_fmt)
        out.encode("utf-8")  # the output is UTF-8 text
        assert counts.rows == N


# ----------------------------------------------------------------------------- box.py ends with a summary
def test_box_score_reports_every_row(tmp_path, model):
    from boxwood.cli import main

    case, device = model
    import joblib

    joblib.dump(case.model, tmp_path / "m.joblib")
    assert main(["bundle", str(tmp_path / "m.joblib"), "-o", str(tmp_path / "b"), "--micropython-footprint",
                 "skip"]) == 0
    lines = csv_bytes(case, device).split(b"\n")
    lines[3] = lines[3] + b"\xff"
    lines[5] = lines[5].replace(b",", b',"', 1)
    (tmp_path / "in.csv").write_bytes(b"\n".join(lines))
    env = {"PATH": os.environ.get("PATH", "/usr/bin:/bin")}
    for cmd in ([sys.executable, str(tmp_path / "b" / "box.py"), "score", str(tmp_path / "in.csv")],
                [sys.executable, "-m", "boxwood", "score", str(tmp_path / "b" / "model.json"), str(tmp_path / "in.csv")]):
        done = subprocess.run(cmd, capture_output=True, text=True, timeout=300,
                              env=env if "box.py" in cmd[1] else None)
        assert done.returncode == 2, done.stderr
        assert "scored %d rows, 2 errors (first: row 3 (line 4), field" % N in done.stderr
        assert len(parse_csv(done.stdout)) == N and "Traceback" not in done.stderr


# ----------------------------------------------------------------------------- properties
def _mutate(data, edits, forbidden):
    """Replace bytes of the data lines (not the CSV header) at the given positions."""
    head = data.index(b"\n") + 1 if data[:1] != b"{" else 0
    body = bytearray(data[head:])
    for pos, value in edits:
        i = pos % len(body)
        if body[i:i + 1] in (b"\n",) or value in forbidden:
            continue
        body[i] = value
    return data[:head] + bytes(body)


NO_BREAKS = set(b'\n\r"')


@SETTINGS
@given(edits=st.lists(st.tuples(st.integers(0, 10 ** 6), st.integers(0, 255)), min_size=1, max_size=12))
def test_property_csv_byte_mutations_keep_rows(model, edits):
    case, device = model
    data = _mutate(csv_bytes(case, device), edits, NO_BREAKS)
    counts, out = score(device, data)
    rows = parse_csv(out)
    assert counts.rows == len(rows) == len(data_lines(data)) - 1 == N
    assert counts.scored + counts.errors == N
    assert not any(r["error"].startswith(INCOMPLETE) for r in rows)
    for n, r in enumerate(rows, 1):
        assert r["error"] == "" or r["error"].startswith("row %d (line %d)" % (n, n + 1))


@SETTINGS
@given(position=st.integers(0, 10 ** 6), edits=st.lists(st.tuples(st.integers(0, 10 ** 6), st.integers(0, 255)),
                                                         max_size=6))
def test_property_one_stray_quote_keeps_rows(model, position, edits):
    case, device = model
    data = _mutate(csv_bytes(case, device), edits, NO_BREAKS)
    head = data.index(b"\n") + 1
    at = head + position % (len(data) - head - 1)
    data = data[:at] + b'"' + data[at:]
    counts, out = score(device, data)
    rows = parse_csv(out)
    assert counts.rows == len(rows) == N
    assert counts.errors >= 1 or b',"' not in data  # a quote that opens a cell costs its row


@SETTINGS
@given(edits=st.lists(st.tuples(st.integers(0, 10 ** 6), st.integers(0, 255)), min_size=1, max_size=12))
def test_property_jsonl_byte_mutations_keep_rows(model, edits):
    case, device = model
    data = _mutate(jsonl_bytes(case, device), edits, set(b"\n\r"))
    counts, out = score(device, data, fmt="jsonl")
    rows = parse_jsonl(out)
    assert counts.rows == len(rows) == N
    assert not any((r["error"] or "").startswith(INCOMPLETE) for r in rows)


@SETTINGS
@given(data=st.binary(max_size=400), fmt=st.sampled_from(["auto", "csv", "jsonl"]))
def test_property_any_bytes_end_in_counts_or_a_stream_error(model, data, fmt):
    """Any input at all: the run ends with its counts (one output row per counted row) or, for an
    unusable CSV header, a StreamError before anything is written; never another exception."""
    _, device = model
    out = io.StringIO()
    try:
        counts = score_stream(device, io.BytesIO(data), out, fmt=fmt)
    except StreamError:
        assert out.getvalue() == ""
        return
    text = out.getvalue()
    text.encode("utf-8")
    body = parse_csv(text) if text and not text.startswith("{") else parse_jsonl(text)
    assert len(body) == counts.rows
