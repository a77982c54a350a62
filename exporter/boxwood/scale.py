"""Scoring and verifying at scale on Dask (``pip install "boxwood[scale]"``; docs/scale.md).

    from boxwood.scale import score_files, score_dataframe
    summary = score_files("model.json", "readings/*.csv", "scored/", client=None)
    scored = score_dataframe("model.json", ddf, raw_scores=True)   # a lazy Dask dataframe

Dask is the engine: it reads the files as a Dask dataframe and runs one task per
partition on the workers. Every partition is scored by the device scorer
(``boxwood_runtime.load`` of the artefact's bytes, shipped to the workers, so a remote
worker needs no access to the client's files) through the record conversion
``boxwood score`` uses on one process:

* CSV: ``dask.dataframe.read_csv`` with every cell read as its text (``dtype=object``,
  no NaN filtering), then :meth:`Model.record_from_text` on each row, as
  ``boxwood_runtime.stream`` does with the cells of its CSV reader;
* JSON Lines: ``dask.dataframe.read_json(lines=True)`` with an engine that keeps each line's
  text, then the device stream reader (``json.loads`` with the artefact's number reading
  and :meth:`Model.record_from_json`, defined as what ``pandas.read_json(lines=True)`` gives):
  a null, an absent field, a malformed line mean exactly what they mean to one process;
* Parquet: ``dask.dataframe.read_parquet``; the typed values (numbers, strings, nulls) go
  through :meth:`Model.record_from_json` as JSON values would.

Partitions split rows, never trees: each row is scored whole by the same code as on one
process, so the outputs are bit-identical. One partition is one input file here, so a
partition's output file is what ``boxwood score`` writes for that file (row numbers in
error messages count from the file's first row).
"""
import glob as _glob
import hashlib
import io
import math
import os
from collections import namedtuple
from typing import Any, Dict, List, Optional

INSTALL_HINT = 'pip install "boxwood[scale]"'
TEXT_KINDS = {".csv": "csv", ".tsv": "csv", ".txt": "csv", ".jsonl": "jsonl", ".ndjson": "jsonl",
              ".json": "jsonl", ".parquet": "parquet", ".parq": "parquet", ".pq": "parquet"}
OUT_EXTENSION = {"csv": ".csv", "jsonl": ".jsonl", "parquet": ".jsonl"}
LINE_COLUMN = "__boxwood_line__"
NO_CELL = "\x00boxwood:no-cell"  # a missing-value marker no file holds: a short row's absent cells become None
LONG_ROW = "\x00boxwood:cells:"  # first cell of a row with too many cells, then its cells as JSON

Summary = namedtuple("Summary", ["rows", "scored", "errors", "partitions", "files", "first_error"])


class MissingScale(ImportError):
    """Dask, distributed or pyarrow is not installed."""


def require() -> None:
    """Raise :class:`MissingScale` (with the install hint) unless Dask's dataframe is importable."""
    try:
        import dask.dataframe  # noqa: F401
    except ImportError as exc:
        raise MissingScale("scoring on Dask needs dask[dataframe], distributed and pyarrow: %s (%s)"
                           % (INSTALL_HINT, exc))


def artefact_bytes(artefact: Any) -> bytes:
    """The artefact's bytes: from a path, or bytes as given."""
    if isinstance(artefact, (bytes, bytearray)):
        return bytes(artefact)
    with open(os.fspath(artefact), "rb") as fh:
        return fh.read()


_MODELS: Dict[Any, Any] = {}


def _model(blob: bytes, unknown_category: str = "error"):
    """The device model for ``blob``, loaded once per worker process (keyed by digest)."""
    import boxwood_runtime

    key = (hashlib.sha256(blob).hexdigest(), unknown_category)
    model = _MODELS.get(key)
    if model is None:
        model = boxwood_runtime.load(blob, unknown_category=unknown_category, self_check=False)
        _MODELS[key] = model
    return model


def file_kind(path: str) -> str:
    """"csv", "jsonl" or "parquet" from the extension; ValueError otherwise."""
    ext = os.path.splitext(path)[1].lower()
    if ext not in TEXT_KINDS:
        raise ValueError("%r: cannot tell the format from the extension %r; use .csv, .jsonl (.ndjson, .json) "
                         "or .parquet" % (path, ext or "(none)"))
    return TEXT_KINDS[ext]


def expand(pattern: str) -> List[str]:
    """The files matching ``pattern`` (sorted), all of one format; ValueError when none or mixed."""
    files = sorted(p for p in _glob.glob(os.path.expanduser(pattern)) if os.path.isfile(p))
    if not files:
        raise ValueError("no file matches %r" % pattern)
    kinds = sorted(set(file_kind(p) for p in files))
    if len(kinds) > 1:
        raise ValueError("%r matches files of several formats (%s); score one format per run"
                         % (pattern, ", ".join(kinds)))
    return files


# ----------------------------------------------------------------------------- reading
def _raw_lines(f, orient=None, lines=None, **kwargs):
    """A read_json engine that keeps each line's text (blank lines too, for line numbers)."""
    import pandas as pd

    text = f.read() if hasattr(f, "read") else open(f, encoding="utf-8").read()
    if text.startswith("\ufeff"):
        text = text[1:]
    parts = text.split("\n")
    if parts and parts[-1] == "":
        parts.pop()
    return pd.DataFrame({LINE_COLUMN: pd.Series([p + "\n" for p in parts], dtype=object)})


def read_files(files: List[str], kind: str, delimiter: str = ","):
    """The files as a Dask dataframe, one partition per file (see the module docstring)."""
    require()
    import dask.dataframe as dd
    import pandas as pd

    if kind == "csv":
        # Every cell as its text (no NaN filtering but for a marker no cell holds, so the cells a short
        # row lacks are the only None); pandas' Python engine (the csv module, as one process uses)
        # hands a row with too many cells to _long_row instead of refusing the file.
        return dd.read_csv(files, dtype=object, keep_default_na=False, na_values=[NO_CELL], blocksize=None,
                           sep=delimiter, skipinitialspace=False, encoding="utf-8", engine="python",
                           on_bad_lines=_long_row)
    if kind == "jsonl":
        meta = pd.DataFrame({LINE_COLUMN: pd.Series([], dtype=object)})
        return dd.read_json(files, lines=True, blocksize=None, engine=_raw_lines, meta=meta)
    return dd.read_parquet(files, split_row_groups=False)


def _long_row(cells):
    """pandas' on_bad_lines hook: keep a row with too many cells, marked, with all its cells."""
    import json

    return [LONG_ROW + json.dumps(cells)]


# ----------------------------------------------------------------------------- scoring one partition
def _plain(value: Any) -> Any:
    """A dataframe cell as a plain Python value: numpy numbers as Python numbers, pandas' NA
    and NaT as None; None stays None and NaN stays NaN (a text field tells them apart, as
    the fitted pipeline does)."""
    if value is None:
        return None
    if value.__class__.__name__ in ("NAType", "NaTType"):
        return None
    if hasattr(value, "item") and not isinstance(value, (str, bytes)):
        value = value.item()
    return value


def _rows_from_cells(model, pdf, id_column):
    """(id name, rows) for a partition of CSV cell texts, as stream._csv_rows gives them."""
    import json

    from boxwood_runtime.scorer import RecordError
    from boxwood_runtime.stream import DEFAULT_ID, StreamError, _message, _where

    header = [str(c) for c in pdf.columns]
    if id_column is not None and id_column not in header:
        raise StreamError("the id column %r is not in the CSV header; its columns are: %s"
                          % (id_column, ", ".join(header)))
    id_name = id_column if id_column is not None else (DEFAULT_ID if DEFAULT_ID in header else None)
    missing = [f for i, f in enumerate(model.input_names) if f not in header and model._used[i]]
    if missing:
        raise StreamError("the CSV header lacks the model's input column(s) %s; it has: %s"
                          % (", ".join(repr(m) for m in missing), ", ".join(header)))
    features = [name for name in model.input_names if name in header]
    width = len(header)

    def rows():
        for n, cells in enumerate(pdf.itertuples(index=False, name=None), 1):
            where = _where(n, n + 1)  # one line per row after the header line
            if isinstance(cells[0], str) and cells[0].startswith(LONG_ROW):
                cells = json.loads(cells[0][len(LONG_ROW):])
            row = dict(zip(header, cells))
            ident = row.get(id_name) if id_name is not None else None
            ident = None if not isinstance(ident, str) else ident
            present = sum(1 for c in cells if isinstance(c, str))
            if present != width:  # a short row (pandas fills its absent cells) or a long one
                yield n, where, ident, ident is not None, None, _message(
                    where, None, "has %d cells, the header has %d" % (present, width))
                continue
            try:
                record = model.record_from_text(dict((f, row[f]) for f in features), n)
            except RecordError as exc:
                yield n, where, ident, ident is not None, None, _message(where, exc.field, exc.reason)
                continue
            yield n, where, ident, ident is not None, record, None

    return id_name, rows()


def _rows_from_values(model, pdf, id_column):
    """(id name, rows) for a partition of typed values (Parquet, a user's dataframe)."""
    from boxwood_runtime.stream import DEFAULT_ID, StreamError

    header = [str(c) for c in pdf.columns]
    if id_column is not None and id_column not in header:
        raise StreamError("the id column %r is not a column; the columns are: %s" % (id_column, ", ".join(header)))
    id_name = id_column if id_column is not None else (DEFAULT_ID if DEFAULT_ID in header else None)

    def rows():
        for n, cells in enumerate(pdf.itertuples(index=False, name=None), 1):
            obj = dict(zip(header, (_plain(c) for c in cells)))
            ident = obj.get(id_name) if id_name is not None else None
            yield n, "row %d" % n, ident, id_name is not None, model.record_from_json(obj, n), None

    return id_name, rows()


def _write(model, fmt, id_name, rows, raw_scores, delimiter, per_row=False):
    """Score ``rows`` and write them as ``stream.score_stream`` does; return (text, counts)."""
    from boxwood_runtime.stream import ERROR_COLUMN, StreamError, _score, _Writer, output_columns

    values = output_columns(model, raw_scores)
    if id_name is not None and (id_name in values or id_name == ERROR_COLUMN):
        raise StreamError("the id column %r has the name of an output column" % (id_name,))
    out = io.StringIO()
    writer = _Writer(fmt, out, id_name, values, per_row, delimiter)
    writer.start()
    n_rows = n_errors = 0
    first_error = None
    for n, where, ident, has_id, record, error in rows:
        result = None
        if error is None:
            result, error = _score(model, record, n, where, raw_scores)
        n_rows += 1
        if error is not None:
            n_errors += 1
            first_error = first_error or error
        writer.row(ident, has_id, result, error)
    return out.getvalue(), (n_rows, n_errors, first_error)


def score_partition(pdf, blob: bytes, kind: str, raw_scores: bool = False, id_column: Optional[str] = None,
                    delimiter: str = ",", unknown_category: str = "error"):
    """Score one partition on a worker; return ``(output text, (rows, errors, first error))``.

    ``kind``: "csv" (cells are texts), "jsonl" (one column of line texts) or "parquet"
    (typed values). The output text is what ``boxwood score`` writes for the same input."""
    from boxwood_runtime.stream import score_stream

    model = _model(blob, unknown_category)
    if kind == "jsonl":
        out = io.StringIO()
        counts = score_stream(model, list(pdf[LINE_COLUMN]), out, fmt="jsonl", id_column=id_column,
                              raw_scores=raw_scores)
        return out.getvalue(), (counts.rows, counts.errors, counts.first_error)
    if kind == "csv":
        id_name, rows = _rows_from_cells(model, pdf, id_column)
        return _write(model, "csv", id_name, rows, raw_scores, delimiter)
    id_name, rows = _rows_from_values(model, pdf, id_column)
    return _write(model, "jsonl", id_name, rows, raw_scores, ",", per_row=False)


# ----------------------------------------------------------------------------- the API
def _frame_partition(pdf, blob, reading, raw_scores, id_column, unknown_category, columns):
    import pandas as pd

    model = _model(blob, unknown_category)
    from boxwood_runtime.stream import _score

    if reading == "text":
        id_name, rows = _rows_from_cells(model, pdf, id_column)
    else:
        id_name, rows = _rows_from_values(model, pdf, id_column)
    n_values = len(columns) - 1 - (1 if id_name is not None else 0)
    out = []
    for n, where, ident, _has_id, record, error in rows:
        result = None
        if error is None:
            result, error = _score(model, record, n, where, raw_scores)
        cells = ([ident] if id_name is not None else []) + (list(result) if result else [None] * n_values)
        out.append(cells + [error])
    frame = pd.DataFrame(out, columns=columns, dtype=object)
    frame.index = pdf.index
    return frame


def score_dataframe(artefact: Any, ddf: Any, raw_scores: bool = False, reading: str = "typed",
                    id_column: Optional[str] = None, unknown_category: str = "error"):
    """A lazy Dask dataframe of outputs, one row per row of ``ddf`` (same index, same order).

    ``artefact``: a path or the artefact's bytes (they travel to the workers with the
    graph). ``reading``: "typed" (values as pandas holds them: numbers, strings, missing;
    through :meth:`Model.record_from_json`) or "text" (every cell is a CSV cell's text, as
    ``read_csv(dtype=object, keep_default_na=False)`` gives it; through
    :meth:`Model.record_from_text`). Columns: the id (``id_column``, or ``id`` when present),
    the outputs as ``boxwood score`` names them, ``error`` (None on a good row); object dtype."""
    require()
    from boxwood_runtime.stream import DEFAULT_ID, output_columns

    if reading not in ("typed", "text"):
        raise ValueError("reading must be 'typed' or 'text', got %r" % (reading,))
    blob = artefact_bytes(artefact)
    model = _model(blob, unknown_category)
    id_name = id_column if id_column is not None else (DEFAULT_ID if DEFAULT_ID in ddf.columns else None)
    columns = ([id_name] if id_name is not None else []) + output_columns(model, raw_scores) + ["error"]
    import pandas as pd

    meta = pd.DataFrame({c: pd.Series([], dtype=object) for c in columns})
    return ddf.map_partitions(_frame_partition, blob, reading, raw_scores, id_column, unknown_category, columns,
                              meta=meta, align_dataframes=False)


def out_name(index: int, path: str, kind: str) -> str:
    """The output file name of partition ``index`` read from ``path``."""
    stem = os.path.splitext(os.path.basename(path))[0]
    return "part-%05d-%s%s" % (index, stem, OUT_EXTENSION[kind])


def score_files(artefact: Any, pattern: str, out_dir: str, client: Any = None, raw_scores: bool = False,
                id_column: Optional[str] = None, delimiter: str = ",", unknown_category: str = "error",
                progress: Any = None) -> Summary:
    """Score every file matching ``pattern`` on Dask; write one output file per partition into
    ``out_dir``; return a :data:`Summary`.

    ``client``: a ``distributed.Client`` (None: Dask's current scheduler). The workers return
    each partition's output text and this process writes it, as soon as it is done, so the
    workers need no access to ``out_dir``. ``progress(done, total)`` is called per partition."""
    require()
    import dask

    files = expand(pattern)
    kind = file_kind(files[0])
    blob = artefact_bytes(artefact)
    _model(blob, unknown_category)  # a damaged artefact fails here, before any work is sent
    ddf = read_files(files, kind, delimiter)
    parts = ddf.to_delayed()
    if len(parts) != len(files):
        raise RuntimeError("Dask made %d partitions of %d files" % (len(parts), len(files)))
    os.makedirs(out_dir, exist_ok=True)
    shared = client.scatter(blob, broadcast=True) if client is not None else blob
    task = dask.delayed(score_partition, pure=True)
    jobs = [task(p, shared, kind, raw_scores, id_column, delimiter, unknown_category) for p in parts]
    totals = [0, 0, None]
    written = []

    def done(i, result):
        text, (rows, errors, first) = result
        name = os.path.join(out_dir, out_name(i, files[i], kind))
        with open(name, "w", encoding="utf-8", newline="") as fh:
            fh.write(text)
        written.append(name)
        totals[0] += rows
        totals[1] += errors
        totals[2] = totals[2] or (first and "%s: %s" % (os.path.basename(files[i]), first))
        if progress is not None:
            progress(len(written), len(jobs))

    if client is None:
        for i, result in enumerate(dask.compute(*jobs)):
            done(i, result)
    else:
        from distributed import as_completed

        futures = client.compute(jobs)
        index = {f.key: i for i, f in enumerate(futures)}
        for future, result in as_completed(futures, with_results=True):
            done(index[future.key], result)
            future.release()
    return Summary(totals[0], totals[0] - totals[1], totals[1], len(jobs), len(written), totals[2])


# ----------------------------------------------------------------------------- verify
def _records_partition(pdf, blob, kind, delimiter, label):
    """``(records, None)``: the device records of one partition (dicts by input name), or
    ``(None, message)`` naming the file and the first row that cannot be read."""
    from boxwood_runtime.stream import read_records

    model = _model(blob, "as_missing")
    if kind == "jsonl":
        _, _, rows, _ = read_records(model, list(pdf[LINE_COLUMN]), "jsonl")
    elif kind == "csv":
        _, rows = _rows_from_cells(model, pdf, None)
    else:
        _, rows = _rows_from_values(model, pdf, None)
    names = list(model.input_names)
    out = []
    for _n, _where, _ident, _has_id, record, error in rows:
        if error is not None:
            return None, "data file %r: %s" % (label, error)
        out.append({name: record.get(name) for name in names})
    return out, None


def read_records_dask(model: Any, pattern: str, client: Any = None, delimiter: str = ",") -> List[Dict[str, Any]]:
    """The data rows of every file matching ``pattern``, read on the workers with the device
    reading (as ``boxwood score`` reads them) for the fitted ``model``'s exported trees, in
    file order; ValueError names the file and row of the first row that cannot be read."""
    require()
    import dask

    from .export import build
    from .formats.json.writer import to_bytes

    files = expand(pattern)
    kind = file_kind(files[0])
    blob = to_bytes(build(model))
    parts = read_files(files, kind, delimiter).to_delayed()
    shared = client.scatter(blob, broadcast=True) if client is not None else blob
    task = dask.delayed(_records_partition, pure=True)
    jobs = [task(p, shared, kind, delimiter, os.path.basename(f)) for p, f in zip(parts, files)]
    results = client.gather(client.compute(jobs)) if client is not None else dask.compute(*jobs)
    for _records, error in results:  # the first bad file in file order, whichever finished first
        if error is not None:
            raise ValueError(error)
    return [r for records, _error in results for r in records]
