"""Raw text on the box means what it means on the workstation.

Outside references (the oracle of every test here):
- pandas: ``pandas.read_csv(path)`` and ``pandas.read_json(path, lines=True)`` of the very
  file the box scores;
- scikit-learn: the fitted pipeline's own ``predict`` / ``decision_function`` on what pandas
  read (row by row, so a row the pipeline refuses is a refused row, not a refused file).

Every zoo pipeline (tests/zoo.py PIPELINE_CASES; ``pipe_hgbr_encoded`` is the string column ->
SimpleImputer + OrdinalEncoder(unknown_value=-1), numerics -> median imputer, then trees case)
scores a CSV and a JSON Lines file full of tricky cells through ``boxwood score``, through
``python box.py score`` in a bundle, and through the device API. Planted faults (the old
missing-token list; trimming switched back on by declaring the artefact format 1) must make
the same comparison fail.
"""
import csv
import io
import json
import os
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import zoo
from boxwood.cli import main
from boxwood_runtime import load
from boxwood_runtime.scorer import artefact_bytes
from boxwood_runtime.stream import StreamError, read_records, score_stream

ROOT = Path(__file__).resolve().parents[1]
TEXT_FIELDS = ("sex", "bmi_band")
N_ROWS = 80
OLD_TOKENS = ["", "NA", "NaN", "nan", "null"]  # what format 1 artefacts listed


def _pandas_tokens():
    from pandas._libs.parsers import STR_NA_VALUES  # the list read_csv uses by default

    return sorted(STR_NA_VALUES)


def _number_text(v, k):
    """A float written the ways a CSV may carry it (pandas reads each as the same number)."""
    forms = [repr(v), "%.17e" % v, "+" + repr(v) if v >= 0 else repr(v), '"%r"' % v, " %r " % v, "\t%r" % v,
             ("%.17E" % v)]
    return forms[k % len(forms)]


def _text_cell(s, k):
    """A category string as written, padded, re-cased or replaced by a missing-looking cell."""
    forms = [s, " %s " % s, s.upper(), "None", s, '"%s"' % s, s + " "]
    return forms[k % len(forms)]


def tricky_csv(case, n=N_ROWS):
    """CSV text over the case's raw fields: every pandas default missing token appears in
    every column, numbers in exponent/signed/quoted/padded form, strings padded/re-cased."""
    cols = list(case.X.columns)
    tokens = _pandas_tokens()
    lines = [",".join(["id"] + cols)]
    for i in range(n):
        rec = case.X.iloc[i % len(case.X)]
        cells = ["r%d" % i]
        for j, c in enumerate(cols):
            v = rec[c]
            k = i + j * 3
            if (i + j) % 4 == 0:
                t = tokens[(i + j) % len(tokens)]
                cells.append('"%s"' % t if t == "" and j % 2 else t)
            elif isinstance(v, str):
                cells.append(_text_cell(v, k))
            elif v != v:
                cells.append("")
            else:
                cells.append(_number_text(float(v), k))
        lines.append(",".join(cells))
    return "\n".join(lines) + "\n"


def tricky_jsonl(case, n=N_ROWS):
    """JSON Lines over the raw fields: null, padded/re-cased strings, the string "None"."""
    cols = list(case.X.columns)
    out = []
    for i in range(n):
        rec = case.X.iloc[i % len(case.X)]
        obj = {"id": "r%d" % i}
        for j, c in enumerate(cols):
            v = rec[c]
            if (i + j) % 5 == 0:
                obj[c] = None
            elif isinstance(v, str):
                obj[c] = _text_cell(v, i + j).strip('"')
            else:
                obj[c] = None if v != v else float(v)
        out.append(json.dumps(obj))
    return "\n".join(out) + "\n"


_EXPECTED = {}


def sklearn_per_row(model, frame):
    """Per row: (prediction, raw) from the pipeline, or None when it refuses the row
    (cached per model and frame: the tests read the same files several ways)."""
    key = (id(model), frame.to_json())
    if key not in _EXPECTED:
        _EXPECTED[key] = _sklearn_per_row(model, frame)
    return _EXPECTED[key]


def _sklearn_per_row(model, frame):
    out = []
    for i in range(len(frame)):
        row = frame.iloc[[i]]
        try:
            pred = model.predict(row)[0]
            raw = (model.decision_function(row).ravel().tolist() if hasattr(model, "decision_function")
                   else model.predict(row).ravel().tolist())
        except ValueError:
            out.append(None)
            continue
        out.append((pred, [float(r) for r in raw]))
    return out


def pandas_frame(path, kind, case):
    frame = pd.read_csv(path) if kind == "csv" else pd.read_json(path, lines=True)
    assert list(frame.columns) == ["id"] + list(case.X.columns)
    # the numeric columns stayed numeric in pandas, so the trick cells are numbers there
    for c in case.X.columns:
        if c not in TEXT_FIELDS:
            assert frame[c].dtype.kind == "f", (c, frame[c].dtype)
    return frame.drop(columns=["id"])


def compare(case, expected, rows, where, raw=True):
    """rows: the box's output rows (dicts of text or JSON values), in input order."""
    assert len(rows) == len(expected), where
    n_good = 0
    for i, (want, got) in enumerate(zip(expected, rows)):
        if want is None:
            assert got["error"], "%s row %d: scikit-learn refused it, the box scored it" % (where, i + 1)
            continue
        assert not got["error"], "%s row %d: %s" % (where, i + 1, got["error"])
        n_good += 1
        pred, sk_raw = want
        if case.task == "classification":
            assert str(got["label"]) == str(pred), (where, i + 1)
        else:
            assert float(got[next(k for k in got if k not in ("id", "error") and not k.startswith("raw_"))]) \
                == float(pred), (where, i + 1)
        if raw:
            mine = [float(got["raw_%d" % k]) for k in range(len(sk_raw))]
            assert np.array_equal(np.array(mine).view(np.uint64), np.array(sk_raw).view(np.uint64)), (where, i + 1)
    assert n_good >= 10, "%s: too few rows scored to mean anything" % where


@pytest.fixture(scope="module")
def artefacts(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("raw_text")
    out = {}
    for name in zoo.PIPELINE_CASES:
        case, _, data = zoo.exported(name)
        path = tmp / ("%s.json" % name)
        path.write_bytes(data)
        out[name] = (case, path)
    return out


def _files(tmp_path, case):
    csv_in, jsonl_in = tmp_path / "in.csv", tmp_path / "in.jsonl"
    csv_in.write_text(tricky_csv(case), encoding="utf-8")
    jsonl_in.write_text(tricky_jsonl(case), encoding="utf-8")
    return {"csv": csv_in, "jsonl": jsonl_in}


def _parse(text, kind):
    if kind == "csv":
        return list(csv.DictReader(io.StringIO(text)))
    return [json.loads(line) for line in text.splitlines() if line.strip()]


# --------------------------------------------------------------------- parity from raw text
@pytest.mark.parametrize("kind", ["csv", "jsonl"])
@pytest.mark.parametrize("name", zoo.PIPELINE_CASES)
def test_cli_and_device_api_read_text_as_pandas_does(artefacts, tmp_path, name, kind, capsys):
    case, artefact = artefacts[name]
    path = _files(tmp_path, case)[kind]
    expected = sklearn_per_row(case.model, pandas_frame(path, kind, case))
    # boxwood score (the CLI), with the exact raw-score columns
    out = tmp_path / ("out." + kind)
    code = main(["score", str(artefact), str(path), "-o", str(out), "--raw-scores"])
    assert code == (2 if None in expected else 0), capsys.readouterr().err
    compare(case, expected, _parse(out.read_text(encoding="utf-8"), kind), "boxwood score " + kind)
    # the device API: score_stream, and record by record through record_from_text/_json + predict
    model = load(str(artefact))
    buf = io.StringIO()
    with open(path, newline="", encoding="utf-8") as src:
        score_stream(model, src, buf, raw_scores=True)
    compare(case, expected, _parse(buf.getvalue(), kind), "score_stream " + kind)
    with open(path, newline="", encoding="utf-8") as src:
        _, _, rows, _ = read_records(model, src)
        for (n, where, ident, has_id, record, error), want in zip(rows, expected):
            assert error is None, error
            if want is None:
                with pytest.raises(ValueError):
                    model.predict(record)
                continue
            got = model.predict(record)
            assert (str(got) == str(want[0])) if case.task == "classification" else got == want[0], where


@pytest.fixture(scope="module")
def bundles(artefacts, tmp_path_factory):
    from boxwood.bundle import make_bundle

    tmp = tmp_path_factory.mktemp("raw_text_bundles")
    out = {}
    for name, (case, artefact) in artefacts.items():
        folder = tmp / name
        make_bundle(artefact, folder, measure="skip")
        out[name] = folder
    return out


@pytest.mark.parametrize("kind", ["csv", "jsonl"])
@pytest.mark.parametrize("name", zoo.PIPELINE_CASES)
def test_bundle_box_reads_text_as_pandas_does(artefacts, bundles, tmp_path, name, kind):
    case, _ = artefacts[name]
    path = _files(tmp_path, case)[kind]
    expected = sklearn_per_row(case.model, pandas_frame(path, kind, case))
    env = {"PATH": os.environ.get("PATH", "/usr/bin:/bin")}
    done = subprocess.run([sys.executable, "-I", "-S", str(bundles[name] / "box.py"), "score"],
                          stdin=open(path, encoding="utf-8"), capture_output=True, text=True, env=env, timeout=300)
    assert done.returncode == (2 if None in expected else 0), done.stderr
    compare(case, expected, _parse(done.stdout, kind), "box.py score " + kind, raw=False)


def test_the_tricky_files_do_hold_the_tricky_cells(artefacts):
    """The inputs exercise what they claim: every pandas token, padding, exponents, quotes."""
    case, _ = artefacts["pipe_hgbr_encoded"]
    text = tricky_csv(case)
    cells = [c for row in csv.reader(io.StringIO(text)) for c in row]
    assert set(_pandas_tokens()) <= set(cells)
    assert any(c.startswith(" ") and c.strip() in ("b0", "b1", "b2", "b3", "b4", "male", "female") for c in cells)
    assert any(c in ("B0", "MALE", "FEMALE") for c in cells)
    assert any(re.fullmatch(r"[-+]?[0-9.]+e[-+][0-9]+", c) for c in cells)
    assert any(c.startswith("+") for c in cells) and '"' in text
    assert "None" in cells and "N/A" in cells and "#N/A" in cells


# --------------------------------------------------------------------- planted faults
def _rewritten(artefact, tmp_path, change):
    doc = json.loads(Path(artefact).read_bytes())
    del doc["boxwood_digest"]
    change(doc)
    out = tmp_path / "planted.json"
    out.write_bytes(artefact_bytes(doc))
    return out


@pytest.mark.parametrize("fault,kind", [("old_tokens", "csv"), ("trimming", "csv"), ("exact_json_numbers", "jsonl")])
def test_planted_text_faults_break_parity(artefacts, tmp_path, fault, kind):
    case, artefact = artefacts["pipe_hgbr_encoded"]
    if fault == "old_tokens":
        planted = _rewritten(artefact, tmp_path, lambda d: d["inputs"].update(missing_tokens=OLD_TOKENS))
    elif fault == "trimming":  # format 1 meaning: cells trimmed, None and NaN alike
        planted = _rewritten(artefact, tmp_path, lambda d: d.update(format_version=1))
    else:  # JSON numbers read exactly, where pandas keeps 15 fraction digits
        planted = _rewritten(artefact, tmp_path, lambda d: d["inputs"].update(json_numbers="exact"))
    path = _files(tmp_path, case)[kind]
    expected = sklearn_per_row(case.model, pandas_frame(path, kind, case))
    # the faithful artefact passes ...
    buf = io.StringIO()
    with open(path, newline="", encoding="utf-8") as src:
        score_stream(load(str(artefact)), src, buf, raw_scores=True)
    compare(case, expected, _parse(buf.getvalue(), kind), "faithful")
    # ... the planted one does not
    buf = io.StringIO()
    with open(path, newline="", encoding="utf-8") as src:
        score_stream(load(str(planted)), src, buf, raw_scores=True)
    with pytest.raises(AssertionError):
        compare(case, expected, _parse(buf.getvalue(), kind), "planted " + fault)


# --------------------------------------------------------------------- None and NaN
def _none_and_nan_agree(case, model):
    base = case.X.iloc[:6].copy()
    for c in TEXT_FIELDS:
        base[c] = base[c].astype(object)
    for missing in (None, np.nan):
        frame = base.copy()
        frame["bmi_band"] = pd.Series([missing] * len(frame), dtype=object, index=frame.index)
        assert frame["bmi_band"].map(lambda v: v is None).all() == (missing is None)  # pandas kept None
        for i in range(len(frame)):
            row = frame.iloc[[i]]
            record = {c: (None if (v is None) else v) for c, v in row.iloc[0].items()}
            try:
                want = case.model.predict(row)[0]
            except ValueError:
                with pytest.raises(ValueError):
                    model.predict(record)
                continue
            got = model.predict(record)
            assert (str(got) == str(want)) if case.task == "classification" else got == want, (missing, i)


@pytest.mark.parametrize("name", zoo.PIPELINE_CASES)
def test_python_none_and_nan_follow_scikit_learn(artefacts, name):
    """Through the API, None in a text field is a None in an object column; scikit-learn's
    SimpleImputer(missing_values=NaN) passes it on and the encoder calls it unknown."""
    case, artefact = artefacts[name]
    _none_and_nan_agree(case, load(str(artefact)))


def test_planted_none_as_nan_is_caught(artefacts, tmp_path):
    """Format 1 meaning (None imputed like NaN), planted: the same comparison fails."""
    case, artefact = artefacts["pipe_hgbr_encoded"]
    planted = _rewritten(artefact, tmp_path, lambda d: d.update(format_version=1))
    with pytest.raises(AssertionError):
        _none_and_nan_agree(case, load(str(planted)))


def test_none_is_told_from_nan_where_scikit_learn_does(artefacts):
    """A planted check: the encoder fitted without None gives None the unknown code and NaN
    the imputed value, so the two differ somewhere on the zoo rows (else the test above
    could not catch a box that treats them alike)."""
    case, artefact = artefacts["pipe_hgbr_encoded"]
    frame = case.X.iloc[:40].copy()
    frame["bmi_band"] = frame["bmi_band"].astype(object)
    with_none, with_nan = frame.copy(), frame.copy()
    with_none["bmi_band"] = pd.Series([None] * len(frame), dtype=object, index=frame.index)
    with_nan["bmi_band"] = pd.Series([np.nan] * len(frame), dtype=object, index=frame.index)
    assert not np.array_equal(case.model.predict(with_none), case.model.predict(with_nan))
    steps = json.loads(Path(artefact).read_bytes())["inputs"]["features"]
    band = [f["source"]["steps"] for f in steps if f["source"]["field"] == "bmi_band"][0]
    assert band[0]["op"] == "impute" and band[0]["replaces"] == "nan" and "none" not in band[1]


# --------------------------------------------------------------------- stream options
def test_delimiter_option_matches_pandas_sep(artefacts, tmp_path, capsys):
    case, artefact = artefacts["pipe_rfr_constant_impute"]
    text = tricky_csv(case, 30)
    semi = "\n".join(";".join(r) for r in csv.reader(io.StringIO(text)))
    buf = io.StringIO()
    semi_csv = "\n".join(";".join('"%s"' % c if ";" in c or '"' in c else c for c in r)
                         for r in csv.reader(io.StringIO(text))) + "\n"
    path = tmp_path / "semi.csv"
    path.write_text(semi_csv, encoding="utf-8")
    frame = pd.read_csv(path, sep=";").drop(columns=["id"])  # pandas with the same separator
    expected = sklearn_per_row(case.model, frame)
    out = tmp_path / "out.csv"
    code = main(["score", str(artefact), str(path), "-o", str(out), "--delimiter", ";", "--raw-scores"])
    capsys.readouterr()
    assert code in (0, 2)
    got = list(csv.DictReader(io.StringIO(out.read_text(encoding="utf-8")), delimiter=";"))
    compare(case, expected, got, "--delimiter ;")
    # without the option the header is one unknown column: the stream is refused as a whole
    with pytest.raises(StreamError):
        score_stream(load(str(artefact)), io.StringIO(semi), buf)
    with pytest.raises(StreamError):
        score_stream(load(str(artefact)), io.StringIO(semi), buf, delimiter=";;")


def test_raw_score_columns_are_bit_identical_to_scikit_learn(tmp_path):
    """Non-pipeline models too: raw_<i> against decision_function (boosting) and
    predict_proba (a forest, whose exact values are the class probabilities)."""
    for name, source in (("gbc_multiclass", "decision_function"), ("rfc_multiclass", "predict_proba"),
                         ("hgbr_nan", "predict")):
        case, _, data = zoo.exported(name)
        model = load(data)
        rows = case.rows[:200]
        names = model.input_names
        text = ",".join(names) + "\n" + "\n".join(
            ",".join("" if v is None else repr(v) for v in r) for r in rows) + "\n"
        buf = io.StringIO()
        score_stream(model, io.StringIO(text), buf, raw_scores=True)
        got = list(csv.DictReader(io.StringIO(buf.getvalue())))
        X = np.array([[np.nan if v is None else v for v in r] for r in rows], dtype=np.float64)
        want = np.asarray(getattr(case.model, source)(X), dtype=np.float64).reshape(len(rows), -1)
        mine = np.array([[float(g["raw_%d" % k]) for k in range(want.shape[1])] for g in got])
        assert "raw_%d" % want.shape[1] not in got[0]
        assert np.array_equal(mine.view(np.uint64), want.view(np.uint64)), name
        # planted fault: one ulp off in one value is caught by the same comparison
        mine[3, 0] = np.nextafter(mine[3, 0], np.inf)
        assert not np.array_equal(mine.view(np.uint64), want.view(np.uint64))


def test_progress_is_called_every_n_rows(artefacts):
    case, artefact = artefacts["pipe_hgbr_encoded"]
    model = load(str(artefact))
    seen = []
    counts = score_stream(model, io.StringIO(tricky_csv(case, 25)), io.StringIO(), progress=seen.append,
                          progress_every=10)
    assert counts.rows == 25 and seen == [10, 20]
    with pytest.raises(StreamError):
        score_stream(model, io.StringIO(tricky_csv(case, 5)), io.StringIO(), progress=seen.append,
                     progress_every=0)


def test_summary_line_and_quiet_closed_pipe(artefacts, tmp_path):
    case, artefact = artefacts["pipe_hgbr_encoded"]
    rows = pd.concat([case.X] * 40)  # about 0.5 MB of output: more than a pipe holds
    n = len(rows)
    path = tmp_path / "many.csv"
    rows.to_csv(path, index=False)  # pandas writes it; plain cells only, so every row scores
    env = dict(os.environ)
    done = subprocess.run([sys.executable, "-m", "boxwood", "score", str(artefact), str(path)],
                          capture_output=True, text=True, env=env, timeout=300)
    assert done.returncode == 0, done.stderr
    assert re.fullmatch(r"boxwood: scored %d rows, 0 errors, [0-9]+ rows per second\n" % n, done.stderr)
    assert len(done.stdout.splitlines()) == n + 1
    # | head -1: the reader leaves after one line; the command ends quietly with exit 0
    piped = subprocess.run(["bash", "-o", "pipefail", "-c",
                            '"$0" -m boxwood score "$1" "$2" | head -1', sys.executable, str(artefact), str(path)],
                           capture_output=True, text=True, env=env, timeout=300)
    assert piped.returncode == 0, piped.stderr
    assert piped.stdout == done.stdout.splitlines(True)[0]
    assert len(done.stdout) > 1 << 17  # so the writer did meet the closed pipe
    assert "error" not in piped.stderr and "Traceback" not in piped.stderr, piped.stderr


def test_progress_line_only_on_a_terminal(artefacts, tmp_path):
    """On a terminal (a pseudo-terminal from the standard library's pty module stands in for
    one) stderr shows a progress count every 10,000 rows, then the summary; into a pipe or
    file it shows the summary alone (test above)."""
    pty = pytest.importorskip("pty")
    case, artefact = artefacts["pipe_hgbr_encoded"]
    rows = pd.concat([case.X] * 50)  # 22,100 rows: two progress updates
    path = tmp_path / "many.csv"
    rows.to_csv(path, index=False)
    master, slave = pty.openpty()
    try:
        done = subprocess.run([sys.executable, "-m", "boxwood", "score", str(artefact), str(path), "-o",
                               str(tmp_path / "out.csv")], stderr=slave, stdout=subprocess.DEVNULL, timeout=300)
        os.close(slave)
        slave = None
        seen = b""
        while True:
            try:
                chunk = os.read(master, 4096)
            except OSError:  # Linux: EIO once the other side is closed and drained
                break
            if not chunk:
                break
            seen += chunk
    finally:
        if slave is not None:
            os.close(slave)
        os.close(master)
    text = seen.decode()
    assert done.returncode == 0, text
    assert "boxwood: 10000 rows" in text and "boxwood: 20000 rows" in text, text
    assert re.search(r"boxwood: scored %d rows, 0 errors, [0-9]+ rows per second" % len(rows), text), text


# --------------------------------------------------------------------- decision_function
@pytest.mark.parametrize("name", ["rfr", "rfc_binary", "dtr_single", "dtc_multiclass", "etr_single_tree",
                                  "pipe_rfr_constant_impute"])
def test_trees_and_forests_refuse_decision_function(name):
    case, _, data = zoo.exported(name)
    model = load(data)
    assert not hasattr(case.model, "decision_function")  # scikit-learn has none either
    with pytest.raises(TypeError, match="decision_function"):
        model.decision_function(case.rows[0])


@pytest.mark.parametrize("name", ["gbc_binary", "hgbc_multiclass", "ada_binary", "iforest"])
def test_models_with_decision_function_keep_it(name):
    case, _, data = zoo.exported(name)
    model = load(data)
    assert hasattr(case.model, "decision_function")
    X = np.array([[np.nan if v is None else v for v in r] for r in case.rows[:20]], dtype=np.float64)
    want = np.asarray(case.model.decision_function(X), dtype=np.float64).reshape(20, -1)
    got = np.array(model.decision_function(case.rows[:20]), dtype=np.float64).reshape(20, -1)
    assert np.allclose(got, want, rtol=1e-12, atol=1e-12)
