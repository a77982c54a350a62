"""Score a CSV or JSON Lines stream row by row, in constant memory.

Standard library only, Python 3.8 syntax; it needs the scoring core
(:mod:`boxwood_runtime.scorer`, or ``scorer.py`` copied beside this file).

    from boxwood_runtime import load
    from boxwood_runtime.stream import score_stream
    model = load("model.json")
    with open("readings.csv", newline="") as src, open("scored.csv", "w", newline="") as dst:
        counts = score_stream(model, src, dst)

What it promises:

* One output row per input row, in input order, written as soon as the input row
  is read (nothing is collected first). Blank lines are not rows and are skipped.
* Input formats: CSV with a header row, or JSON Lines (one JSON object per line).
  With ``fmt="auto"`` the first non-blank character decides: ``{`` means JSON Lines,
  anything else CSV. The output format is the input format unless ``out_fmt`` says.
* CSV cells are read with :meth:`Model.record_from_text`, as ``pandas.read_csv``
  reads them (the artefact lists the exact cell texts that mean "missing"; no
  trimming; numbers in pandas' grammar; text fields keep their strings). The
  separator is ``delimiter`` (default ``,``). JSON objects go through
  :meth:`Model.record_from_json`, as ``pandas.read_json(..., lines=True)`` gives them
  (``null`` is missing as pandas makes it; other keys are ignored).
* Output columns: the id (see below), then the outputs, then ``error``.
  Regression: one column per output name (``model.output_names``) holding the
  prediction. Classification: ``label`` (the predicted class), then
  ``proba_<class>`` for each class in the artefact's class order. Outlier detection
  (isolation forests): ``label`` (-1 outlier, 1 inlier), ``score`` (score_samples)
  and ``decision`` (decision_function).
  With ``raw_scores=True`` the exact values (:meth:`Model.exact_values`, what must
  match the source bit for bit) follow, one column ``raw_<i>`` per value.
  Floats are written with ``repr`` (JSON Lines: as JSON numbers, which Python also
  writes with ``repr``), so they read back to the same bits. A non-finite output
  is written as the string ``inf`` / ``-inf`` / ``nan`` (JSON has no infinity).
* The id: ``id_column`` names a CSV column or JSON field whose value is copied to
  the output unchanged. For CSV it must be in the header (else :class:`StreamError`).
  For JSON Lines a record without it is an error row. Without ``id_column``, a
  column (field) named ``id`` is passed through when present: for CSV when the
  header has it; for JSON Lines on each row that has it (into CSV output: when the
  first record has it).
* A row that cannot be scored is still written: its outputs are empty (JSON:
  ``null``) and ``error`` says why, naming the 1-based data row number, the file
  line number, and the field, e.g.
  ``row 3 (line 4), field 'ambient_c': expected a number, got 'warm'``.
  On a good row ``error`` is empty (JSON: ``null``). Bad cells, absent fields,
  unknown categories, malformed JSON lines, non-object JSON values and CSV rows
  with the wrong number of cells are all error rows, never a crash.
* Problems with the stream as a whole raise :class:`StreamError` before any row
  is written: an unknown format name, a CSV header that lacks a feature column or
  the requested id column, or that repeats a column that is used.

``progress``, when given, is called with the number of rows done after every
``progress_every`` rows (default 10000).

The result is ``Counts(rows, scored, errors, first_error)``: rows read, rows
scored, error rows, and the message of the first error row (or None).
"""
import json
from collections import namedtuple
from itertools import chain

try:
    import csv
except ImportError:  # MicroPython has no csv module: JSON Lines only there
    csv = None
try:
    RecursionError
except NameError:  # MicroPython raises RuntimeError for too deep nesting
    RecursionError = RuntimeError

try:
    from .scorer import RecordError
except ImportError:  # copied onto a box as plain modules: stream.py next to scorer.py
    from scorer import RecordError

FORMATS = ("auto", "csv", "jsonl")
OUTPUT_FORMATS = ("csv", "jsonl")
DEFAULT_ID = "id"
ERROR_COLUMN = "error"
LABEL_COLUMN = "label"
PROBA_PREFIX = "proba_"
RAW_PREFIX = "raw_"
PROGRESS_EVERY = 10000

Counts = namedtuple("Counts", ["rows", "scored", "errors", "first_error"])


class StreamError(ValueError):
    """The stream as a whole cannot be scored (bad format name, unusable CSV header)."""


def output_columns(model, raw_scores=False):
    """The output column names for ``model`` (without the id and error columns)."""
    if raw_scores:
        return output_columns(model) + [RAW_PREFIX + str(i) for i in range(model.n_exact_values)]
    if model.task == "classification":
        return [LABEL_COLUMN] + [PROBA_PREFIX + str(c) for c in model.classes]
    if model.task == "outlier_detection":
        return [LABEL_COLUMN, "score", "decision"]
    return [str(n) for n in model.output_names]


def score_stream(model, infile, outfile, fmt="auto", id_column=None, out_fmt=None, delimiter=",",
                 raw_scores=False, progress=None, progress_every=PROGRESS_EVERY):
    """Score every row of ``infile`` and write one output row per input row to ``outfile``.

    ``infile`` is any iterable of text lines (an open text file, ``sys.stdin``, a
    generator); open files with ``newline=""`` so that CSV cells keep their line
    breaks. ``outfile`` needs a ``write`` method. ``delimiter`` separates CSV cells
    (input and CSV output); ``raw_scores`` adds the exact values; ``progress(rows)``
    is called every ``progress_every`` rows. Returns :data:`Counts`.
    """
    if progress is not None and not (isinstance(progress_every, int) and progress_every > 0):
        raise StreamError("progress_every must be a positive whole number, got %r" % (progress_every,))
    if out_fmt is not None and out_fmt not in OUTPUT_FORMATS:
        raise StreamError("unknown output format %r; expected one of %s"
                          % (out_fmt, ", ".join(OUTPUT_FORMATS)))
    if csv is None and out_fmt == "csv":
        raise StreamError("CSV needs Python's csv module, which this Python (MicroPython?) lacks; "
                          "use JSON Lines")
    fmt, id_name, rows, first = read_records(model, infile, fmt, id_column, delimiter)
    values = output_columns(model, raw_scores)
    if id_name is not None and (id_name in values or id_name == ERROR_COLUMN):
        raise StreamError("the id column %r has the name of an output column (%s)"
                          % (id_name, ", ".join(values + [ERROR_COLUMN])))
    out_fmt = out_fmt or fmt
    # JSON Lines into JSON Lines without id_column: copy "id" on each row that has one.
    per_row = fmt == "jsonl" and out_fmt == "jsonl" and id_column is None
    writer = _Writer(out_fmt, outfile, DEFAULT_ID if per_row else id_name, values, per_row, delimiter)
    n_rows = n_scored = n_errors = 0
    first_error = None
    for n, where, ident, has_id, record, error in rows:
        result = None
        if error is None:
            result, error = _score(model, record, n, where, raw_scores)
        if n_rows == 0:
            writer.start()
        n_rows += 1
        if error is None:
            n_scored += 1
        else:
            n_errors += 1
            if first_error is None:
                first_error = error
        writer.row(ident, has_id, result, error)
        if progress is not None and n_rows % progress_every == 0:
            progress(n_rows)
    if n_rows == 0 and first is not None and fmt == "csv":
        writer.start()  # a header and no data rows: still write the output header
    if hasattr(outfile, "flush"):
        outfile.flush()
    return Counts(n_rows, n_scored, n_errors, first_error)


def read_records(model, infile, fmt="auto", id_column=None, delimiter=","):
    """Read records from CSV (with a header) or JSON Lines, lazily, for ``model``.

    Returns ``(fmt, id_name, rows, first)``: the format read, the id column in use (or
    None), a generator of ``(n, where, ident, has_id, record, error)`` per data row
    (``n`` counts data rows from 1, ``where`` says "row n (line l)", ``record`` is a
    dict ready for :meth:`Model.prepare`, or None when ``error`` says why the row could
    not be read), and the first non-blank input line (None for empty input). Raises
    :class:`StreamError` when the stream as a whole is unusable. ``delimiter`` is the
    CSV cell separator (one character).
    """
    if not (isinstance(delimiter, str) and len(delimiter) == 1 and delimiter not in "\r\n\"{"):
        raise StreamError("the delimiter must be one character other than a quote, a brace or a line break, "
                          "got %r" % (delimiter,))
    if fmt not in FORMATS:
        raise StreamError("unknown input format %r; expected one of %s" % (fmt, ", ".join(FORMATS)))
    lines = iter(infile)
    head = []  # lines read while looking for the first non-blank one
    first = None
    for line in lines:
        if not head and line.startswith("\ufeff"):
            line = line[1:]  # a byte-order mark is not part of the data
        head.append(line)
        if line.strip():
            first = line
            break
    if fmt == "auto":
        fmt = "jsonl" if first is not None and first.lstrip().startswith("{") else "csv"
    if csv is None and fmt == "csv":
        raise StreamError("CSV needs Python's csv module, which this Python (MicroPython?) lacks; "
                          "use JSON Lines")
    source = chain(head, lines)
    if fmt == "csv":
        id_name, rows = _csv_rows(model, source, id_column, delimiter)
    else:
        id_name, rows = _jsonl_rows(model, source, id_column, first)
    return fmt, id_name, rows, first


# ----------------------------------------------------------------------------- scoring
def _score(model, record, n, where, raw_scores=False):
    """Score one record; return (outputs, None) or (None, error message)."""
    try:
        raw = model.raw_scores(model.prepare(record, n))
    except RecordError as exc:
        return None, _message(where, exc.field, exc.reason)
    except OverflowError as exc:  # e.g. a JSON integer too large for a float
        return None, _message(where, None, "a number is out of range: %s" % (exc,))
    if raw_scores:
        result, error = _score_values(model, raw)
        return result + list(model.exact_values(raw)), error
    return _score_values(model, raw)


def _score_values(model, raw):
    if model.task == "classification":
        return [model.classes[model.class_index(raw)]] + list(model.proba_from_raw(raw)), None
    if model.task == "outlier_detection":
        return [model.classes[model.class_index(raw)], model.transform_raw(raw)[0],
                model.decision_values(raw)[0]], None
    return list(model.transform_raw(raw)), None


def _message(where, field, reason):
    if field is not None:
        where += ", field %r" % (field,)
    return "%s: %s" % (where, reason)


def _where(n, line):
    return "row %d (line %d)" % (n, line)


def _csv_rows(model, source, id_column, delimiter=","):
    """Read the header now; return (id column name or None, generator of row results)."""
    reader = csv.reader(source, delimiter=delimiter)
    header = None
    for cells in reader:
        if cells:
            header = [c.strip() for c in cells]
            break
    if header is None:
        return (id_column, iter(()))
    where_header = "the CSV header (line %d)" % reader.line_num
    if id_column is not None and id_column not in header:
        raise StreamError("the id column %r is not in %s; its columns are: %s"
                          % (id_column, where_header, ", ".join(header)))
    id_name = id_column if id_column is not None else (DEFAULT_ID if DEFAULT_ID in header else None)
    missing = [f for i, f in enumerate(model.input_names) if f not in header and model._used[i]]
    if missing:
        raise StreamError("%s lacks the model's input column(s) %s; it has: %s"
                          % (where_header, ", ".join(repr(m) for m in missing), ", ".join(header)))
    used = [n for n in model.input_names if n in header] + ([id_name] if id_name is not None else [])
    repeated = sorted(set(u for u in used if header.count(u) > 1))
    if repeated:
        raise StreamError("%s repeats the column(s) %s" % (where_header, ", ".join(repr(r) for r in repeated)))
    index = dict((name, header.index(name)) for name in used)
    id_index = index.get(id_name) if id_name is not None else None
    features = [(name, index[name]) for name in model.input_names if name in index]
    width = len(header)

    def rows():
        n = 0
        done = reader.line_num
        while True:
            try:
                cells = next(reader)
            except StopIteration:
                return
            except csv.Error as exc:
                n += 1
                where = _where(n, done + 1)
                done = reader.line_num
                yield n, where, None, False, None, _message(where, None, "unreadable CSV: %s" % (exc,))
                continue
            start, done = done + 1, reader.line_num
            if not cells:
                continue  # a blank line is not a row
            n += 1
            where = _where(n, start)
            ident = cells[id_index] if id_index is not None and id_index < len(cells) else None
            if len(cells) != width:
                yield n, where, ident, ident is not None, None, _message(
                    where, None, "has %d cells, the header has %d" % (len(cells), width))
                continue
            try:
                record = model.record_from_text(dict((name, cells[i]) for name, i in features), n)
            except RecordError as exc:
                yield n, where, ident, ident is not None, None, _message(where, exc.field, exc.reason)
                continue
            yield n, where, ident, ident is not None, record, None

    return id_name, rows()


def _jsonl_rows(model, source, id_column, first):
    """Return (id field name or None, generator of row results) for JSON Lines."""
    id_name = id_column
    if id_name is None and first is not None:
        try:
            peek = json.loads(first)
        except (ValueError, RecursionError):
            peek = None
        if isinstance(peek, dict) and DEFAULT_ID in peek:
            id_name = DEFAULT_ID
    key = id_column if id_column is not None else DEFAULT_ID

    def rows():
        n = 0
        for line_no, line in enumerate(source, 1):
            if not line.strip():
                continue
            n += 1
            where = _where(n, line_no)
            try:
                obj = _loads(line, model.json_float)
            except (ValueError, RecursionError) as exc:
                yield n, where, None, False, None, _message(where, None, "not valid JSON: %s" % (exc,))
                continue
            if not isinstance(obj, dict):
                yield n, where, None, False, None, _message(
                    where, None, "expected a JSON object, got %s" % _json_kind(obj))
                continue
            has_id = key in obj
            ident = obj.get(key)
            if id_column is not None and not has_id:
                yield n, where, None, False, None, _message(where, id_column, "the id field is absent")
                continue
            yield n, where, ident, has_id, model.record_from_json(obj, n), None

    return id_name, rows()


def _loads(line, parse_float):
    """One JSON value, its non-integer numbers read with ``parse_float`` (the artefact's
    ``json_numbers``: as pandas.read_json reads them)."""
    if parse_float is float:
        return json.loads(line)
    try:
        return json.loads(line, parse_float=parse_float)
    except TypeError:  # MicroPython's json.loads takes no options: numbers read exactly there
        return json.loads(line)


def _json_kind(value):
    if isinstance(value, list):
        return "an array"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, bool):
        return "true/false"
    if value is None:
        return "null"
    return "a number"


# ----------------------------------------------------------------------------- writing
class _Writer:
    """Writes the output rows in CSV or JSON Lines."""

    def __init__(self, fmt, outfile, id_name, values, per_row, delimiter=","):
        self.out = outfile
        self.id_name = id_name  # None: no id column
        self.values = values
        self.per_row = per_row  # JSON output: write the id only on rows whose input had it
        self.started = False
        self.csv = csv.writer(outfile, lineterminator="\n", delimiter=delimiter) if fmt == "csv" else None

    def start(self):
        if self.started:
            return
        self.started = True
        if self.csv is not None:
            head = ([self.id_name] if self.id_name is not None else []) + self.values + [ERROR_COLUMN]
            self.csv.writerow(head)

    def row(self, ident, has_id, result, error):
        if self.csv is not None:
            cells = [_text(ident)] if self.id_name is not None else []
            if result is None:
                cells.extend([""] * len(self.values))
            else:
                cells.extend(_text(v) for v in result)
            cells.append(error or "")
            self.csv.writerow(cells)
            return
        obj = {}
        if self.id_name is not None and (has_id or not self.per_row):
            obj[self.id_name] = ident
        if result is None:
            for name in self.values:
                obj[name] = None
        else:
            for name, v in zip(self.values, result):
                obj[name] = _json_value(v)
        obj[ERROR_COLUMN] = error
        try:
            text = _dumps(obj)
        except ValueError:  # an id holding NaN or infinity (Python's json reads those)
            obj[self.id_name] = json.dumps(ident)
            text = _dumps(obj)
        self.out.write(text + "\n")


def _dumps(obj):
    try:
        return json.dumps(obj, ensure_ascii=False, allow_nan=False)
    except TypeError:  # MicroPython's json.dumps takes no options
        return json.dumps(obj)


def _text(value):
    """A value as CSV cell text: floats with repr (exact), None as empty."""
    if value is None:
        return ""
    if isinstance(value, str):
        return value
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return repr(value)
    if isinstance(value, int):
        return str(value)
    return json.dumps(value, ensure_ascii=False)


def _json_value(value):
    if isinstance(value, float) and (value != value or value in (float("inf"), float("-inf"))):
        return repr(value)
    return value
