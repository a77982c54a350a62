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
INCOMPLETE = "incomplete:"  # the error text of the last line of an output whose run stopped early

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
    try:
        fmt, id_name, rows, first = read_records(model, infile, fmt, id_column, delimiter)
    except UnicodeError as exc:  # a text-mode input that is not UTF-8, before any row
        raise StreamError("the input is not UTF-8 text (%s); nothing was written (open the input in binary mode "
                          "to get error rows instead)" % (exc,))
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
    try:
        for n, where, ident, has_id, record, error in rows:
            result = None
            if error is None:
                result, error = _score(model, record, n, where, raw_scores)
            if n_rows == 0:
                writer.start()
            n_rows += 1
            error = writer.row(ident, has_id, result, error, where)
            if error is None:
                n_scored += 1
            else:
                n_errors += 1
                if first_error is None:
                    first_error = error
            if progress is not None and n_rows % progress_every == 0:
                progress(n_rows)
    except BaseException as exc:  # the run stops here: say so in the output's last line
        reason = "%s: %s" % (type(exc).__name__, exc) if str(exc) else type(exc).__name__
        writer.stopped(n_rows, reason)
        if isinstance(exc, UnicodeError):  # a text-mode input that is not UTF-8
            raise StreamError("the input is not UTF-8 text after row %d (%s); the output ends with a line saying "
                              "the run is incomplete (open the input in binary mode to get error rows instead)"
                              % (n_rows, exc))
        raise
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
    CSV cell separator (one character). ``infile`` yields text lines or bytes lines
    (bytes are decoded here as UTF-8, line by line: a line that is not UTF-8 is an error row).
    """
    if not (isinstance(delimiter, str) and len(delimiter) == 1 and delimiter not in "\r\n\"{["):
        raise StreamError("the delimiter must be one character other than a quote, a bracket, a brace or a line "
                          "break, got %r" % (delimiter,))
    if fmt not in FORMATS:
        raise StreamError("unknown input format %r; expected one of %s" % (fmt, ", ".join(FORMATS)))
    lines = _Lines(infile)
    head = []  # lines read while looking for the first non-blank one
    first = None
    for item in lines:  # the first non-blank line that is text (an undecodable one is a row of its own)
        head.append(item)
        if item[1] is not None and item[1].strip():
            first = item[1]
            break
    lines.push(head)
    if fmt == "auto":
        fmt = "jsonl" if first is not None and first.lstrip()[:1] in ("{", "[") else "csv"
    if csv is None and fmt == "csv":
        raise StreamError("CSV needs Python's csv module, which this Python (MicroPython?) lacks; "
                          "use JSON Lines")
    if fmt == "csv":
        id_name, rows = _csv_rows(model, lines, id_column, delimiter)
    else:
        id_name, rows = _jsonl_rows(model, lines, id_column, first)
    return fmt, id_name, rows, first


# ----------------------------------------------------------------------------- lines
MAX_LINE = 1 << 24  # a physical line longer than 16 MiB is an error row (not read whole)
MAX_RECORD_LINES = 100  # a quoted CSV cell may span at most this many lines ...
MAX_RECORD_CHARS = 1 << 20  # ... and this many characters; else its quote is a stray one
MAX_JSON_DEPTH = 64  # a JSON record nested deeper is an error row (checked before parsing)


def _split_cr(raw):
    """A physical line split at lone carriage returns too (as text files opened with newline=""
    split them), ends kept."""
    cr = "\r" if isinstance(raw, str) else b"\r"
    if cr not in raw:
        return [raw]
    out = []
    i = 0
    n = len(raw)
    while i < n:
        j = raw.find(cr, i)
        if j < 0:
            out.append(raw[i:])
            break
        end = j + 2 if raw[j + 1:j + 2] in ("\n", b"\n") else j + 1
        out.append(raw[i:end])
        i = end
    return out


def _raw_lines(infile):
    """Physical lines of ``infile`` (text or bytes), each at most MAX_LINE long; an over-long
    line is skipped to its end and given as None."""
    readline = getattr(infile, "readline", None)
    if readline is not None:
        try:
            raw = readline(MAX_LINE + 1)
        except TypeError:  # a readline without a size: iterate instead
            readline = None
    if readline is None:
        for raw in infile:
            for part in _split_cr(raw):
                yield part
        return
    while raw:
        if len(raw) > MAX_LINE and raw[-1:] not in ("\n", b"\n"):
            while True:  # skip the rest of this line without holding it
                more = readline(MAX_LINE + 1)
                if not more or more[-1:] in ("\n", b"\n"):
                    break
            yield None
        else:
            for part in _split_cr(raw):
                yield part
        raw = readline(MAX_LINE + 1)


class _Lines:
    """The input as ``(line number, text or None, raw bytes or None, problem or None)`` per
    physical line, decoded line by line; lines can be pushed back to be read again."""

    def __init__(self, infile):
        self._source = self._decoded(infile)
        self._back = []

    @staticmethod
    def _decoded(infile):
        no = 0
        for raw in _raw_lines(infile):
            no += 1
            if raw is None:
                yield no, None, b"", "the line is longer than %d bytes" % MAX_LINE
                continue
            if isinstance(raw, str):
                text = raw
            else:
                try:
                    text = bytes(raw).decode("utf-8")
                except UnicodeError as exc:
                    yield no, None, bytes(raw), "not UTF-8 text (%s)" % (_decode_problem(raw, exc),)
                    continue
            if no == 1 and text.startswith("\ufeff"):
                text = text[1:]  # a byte-order mark is not part of the data
            yield no, text, None, None

    def __iter__(self):
        return self

    def __next__(self):
        if self._back:
            return self._back.pop()
        return next(self._source)

    def push(self, items):
        """Read ``items`` (in their order) before the rest of the input."""
        self._back.extend(reversed(list(items)))


def _decode_problem(raw, exc):
    start = getattr(exc, "start", None)
    if isinstance(start, int) and 0 <= start < len(raw):
        return "byte 0x%02x at byte %d of the line" % (bytearray(raw[start:start + 1])[0], start + 1)
    return str(exc)


def _json_depth_over(text, limit):
    """True when JSON ``text`` nests [ and { deeper than ``limit`` (outside strings)."""
    if text.count("[") + text.count("{") <= limit:
        return False  # cannot be deeper: no scan needed
    depth = 0
    in_string = escaped = False
    for c in text:
        if in_string:
            if escaped:
                escaped = False
            elif c == "\\":
                escaped = True
            elif c == '"':
                in_string = False
        elif c == '"':
            in_string = True
        elif c in "[{":
            depth += 1
            if depth > limit:
                return True
        elif c in "]}":
            depth -= 1
    return False


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


def _quote_state(text, delimiter, quoted):
    """Where a line leaves csv's reader (default dialect: doublequote, no escape character, not
    strict): (inside a quoted cell at the end of the line, index of the cell where the last quoted
    cell opened). ``quoted``: the line starts inside a quoted cell (the previous one ended so)."""
    state = 2 if quoted else 0  # 0 start of a cell, 1 in an unquoted cell, 2 in quotes, 3 quote in quotes
    cell = opened = 0
    for c in text:
        if state == 2:
            if c == '"':
                state = 3
        elif c == delimiter and state != 2:
            state = 0
            cell += 1
        elif c in "\r\n":
            state = 0
        elif state == 0:
            if c == '"':
                state = 2
                opened = cell
            else:
                state = 1
        elif state == 3:
            state = 2 if c == '"' else 1
    return state == 2, opened


def _parse_csv(texts, delimiter):
    """(cells, None) for the lines of one record, or (None, reason)."""
    try:
        rows = list(csv.reader(texts, delimiter=delimiter))
    except csv.Error as exc:  # e.g. a cell over csv.field_size_limit()
        return None, "unreadable CSV: %s" % (exc,)
    if len(rows) != 1:
        return None, "unreadable CSV: the line gives %d records" % len(rows)
    return rows[0], None


def _csv_records(lines, delimiter, width=None):
    """Yield ``(first line, cells, problem, cell index)`` per CSV record of ``lines`` (blank lines
    are not records). A record is what csv's reader reads from a well-formed file: one line, or
    several when a quoted cell holds line breaks. A quote that opens a cell and is not closed
    within MAX_RECORD_LINES lines / MAX_RECORD_CHARS characters or by the end of the input, or
    whose record (when ``width`` is given) has another number of cells than the header, is read as
    a stray quote: its line alone is an error record and reading goes on at the next line (so one
    stray quote costs one row, not every row after it). A line that is not UTF-8 is an error record."""
    for item in lines:
        no, text, raw, problem = item
        if problem is not None:
            yield no, None, problem, _bad_byte_cell(raw, delimiter) if raw else None
            continue
        if text in ("\n", "\r\n", "\r", ""):
            continue  # a blank line is not a record (as csv's reader and pandas skip it)
        if '"' not in text:  # the common case: no quote, one line
            cells, reason = _parse_csv([text], delimiter)
            yield no, cells, reason, None
            continue
        inside, opened = _quote_state(text, delimiter, False)
        pending = [item]
        reason = None
        size = len(text)
        while inside:
            try:
                nxt = next(lines)
            except StopIteration:
                reason = "is not closed by the end of the input"
                break
            pending.append(nxt)
            if nxt[3] is not None:
                reason = "is cut by line %d, which is %s" % (nxt[0], nxt[3])
                break
            size += len(nxt[1])
            inside = _quote_state(nxt[1], delimiter, True)[0]
            if inside and (len(pending) >= MAX_RECORD_LINES or size > MAX_RECORD_CHARS):
                reason = "is not closed within %d lines and %d characters" % (MAX_RECORD_LINES, MAX_RECORD_CHARS)
                break
        if reason is None:
            cells, problem = _parse_csv([p[1] for p in pending], delimiter)
            if problem is not None:
                if len(pending) == 1:
                    yield no, None, problem, None
                    continue
                reason = "gives %s" % problem
            elif len(pending) == 1 or width is None or len(cells) == width:
                yield no, cells, None, None
                continue
            else:
                reason = "joins lines %d-%d into one record of %d cells, the header has %d" % (
                    no, pending[-1][0], len(cells), width)
        lines.push(pending[1:])  # read again, each on its own
        yield no, None, ("a quote opens a quoted cell here that %s; read as a stray quote: this line is an "
                         "error row and reading goes on at line %d" % (reason, no + 1)), opened


def _bad_byte_cell(raw, delimiter):
    """The index of the cell holding the first byte that is not UTF-8 (counting delimiters before it)."""
    try:
        raw.decode("utf-8")
        return None
    except UnicodeError as exc:
        start = getattr(exc, "start", None)
    if not isinstance(start, int):
        return None
    return raw[:start].count(delimiter.encode("utf-8"))


def _csv_rows(model, lines, id_column, delimiter=","):
    """Read the header now; return (id column name or None, generator of row results)."""
    records = _csv_records(lines, delimiter)
    header = None
    for no, cells, problem, _ in records:
        where_header = "the CSV header (line %d)" % no
        if problem is not None:
            raise StreamError("%s cannot be read: %s" % (where_header, problem))
        header = [c.strip() for c in cells]
        break
    if header is None:
        return (id_column, iter(()))
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
        for no, cells, problem, cell in _csv_records(lines, delimiter, width):
            n += 1
            where = _where(n, no)
            if problem is not None:
                field = header[cell] if cell is not None and 0 <= cell < width else None
                yield n, where, None, False, None, _message(where, field, problem)
                continue
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


def _jsonl_rows(model, lines, id_column, first):
    """Return (id field name or None, generator of row results) for JSON Lines."""
    id_name = id_column
    if id_name is None and first is not None and not _json_depth_over(first, MAX_JSON_DEPTH):
        try:
            peek = json.loads(first)
        except (ValueError, RecursionError):
            peek = None
        if isinstance(peek, dict) and DEFAULT_ID in peek:
            id_name = DEFAULT_ID
    key = id_column if id_column is not None else DEFAULT_ID

    def rows():
        n = 0
        for line_no, line, _, problem in lines:
            if problem is None and not line.strip():
                continue
            n += 1
            where = _where(n, line_no)
            if problem is not None:
                yield n, where, None, False, None, _message(where, None, problem)
                continue
            if _json_depth_over(line, MAX_JSON_DEPTH):
                yield n, where, None, False, None, _message(
                    where, None, "nested deeper than %d levels (not read)" % MAX_JSON_DEPTH)
                continue
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

    def row(self, ident, has_id, result, error, where=""):
        """Write one output row; return its error (a row whose id cannot be written becomes an
        error row, written with an empty id)."""
        if self.csv is not None:
            try:
                id_cell = [_cell_text(_text(ident))] if self.id_name is not None else []
            except (ValueError, TypeError, RecursionError) as exc:
                id_cell = [""]
                result, error = None, _message(where, self.id_name, "the id cannot be written back: %s" % (exc,))
            cells = id_cell
            if result is None:
                cells.extend([""] * len(self.values))
            else:
                cells.extend(_text(v) for v in result)
            cells.append(_cell_text(error or ""))
            self.csv.writerow(cells)
            return error
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
            try:
                obj[self.id_name] = json.dumps(ident)
                text = _dumps(obj)
            except (ValueError, TypeError, RecursionError) as exc:
                text = None
                reason = exc
        except (TypeError, RecursionError) as exc:
            text = None
            reason = exc
        if text is None:
            error = _message(where, self.id_name, "the id cannot be written back: %s" % (reason,))
            obj = dict((name, None) for name in self.values)
            if self.id_name is not None and (has_id or not self.per_row):
                obj[self.id_name] = None
            obj[ERROR_COLUMN] = error
            text = _dumps(obj)
        self.out.write(text + "\n")
        return error

    def stopped(self, rows, reason):
        """The last line of an output whose run stopped early: it says so (best effort)."""
        message = "%s the run stopped after %d rows (%s); the rows after those were not scored" % (
            INCOMPLETE, rows, reason)
        try:
            self.start()
            if self.csv is not None:
                self.csv.writerow(([""] if self.id_name is not None else []) + [""] * len(self.values)
                                  + [_cell_text(message)])
            else:
                obj = dict((name, None) for name in self.values)
                obj[ERROR_COLUMN] = message
                self.out.write(_dumps(obj) + "\n")
            if hasattr(self.out, "flush"):
                self.out.flush()
        except Exception:  # the output itself may be what failed
            pass


def _cell_text(text):
    """CSV cell text that UTF-8 can encode (a lone surrogate from a JSON id is escaped)."""
    try:
        text.encode("utf-8")
        return text
    except UnicodeError:
        return text.encode("utf-8", "backslashreplace").decode("utf-8")


def _dumps(obj):
    try:
        text = json.dumps(obj, ensure_ascii=False, allow_nan=False)
    except TypeError:  # MicroPython's json.dumps takes no options
        return json.dumps(obj)
    try:
        text.encode("utf-8")
    except UnicodeError:  # a lone surrogate (from a JSON \ud800 escape): keep it escaped
        text = json.dumps(obj, allow_nan=False)
    return text


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
