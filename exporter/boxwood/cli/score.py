"""``boxwood score``: stream a CSV or JSON Lines file through an artefact with the device scorer."""
import contextlib
import os
import sys
import time

from .common import (PROG, UsageError, existing_file, load_artefact, positive_int, refuse_kind,
                     text_output)


def add(commands):
    p = commands.add_parser(
        "score", help="score a CSV or JSON Lines stream with an artefact (one output row per input row)",
        description="Score every row of INPUT with the artefact and write one output row per input "
                    "row, in order: the id (if any), the outputs (regression: one column per output; "
                    "classification: label and proba_<class> per class), and an error column. "
                    "Rows that cannot be scored are written with the error; the exit code is then 2.")
    p.add_argument("artefact", metavar="ARTEFACT", help="boxwood artefact (.json)")
    p.add_argument("input", metavar="INPUT", nargs="?", default="-",
                   help="CSV with a header row, or JSON Lines (default: stdin, also '-')")
    p.add_argument("-o", "--output", metavar="OUTPUT", default="-", help="output file (default: stdout)")
    p.add_argument("--format", choices=("auto", "csv", "jsonl"), default="auto",
                   help="input format; auto: JSON Lines if the first non-blank character is '{', "
                        "else CSV (default: %(default)s); the output has the same format")
    p.add_argument("--id-column", metavar="NAME",
                   help="column (JSON field) copied to the output to identify rows "
                        "(default: a column named 'id' when present)")
    p.add_argument("--unknown-category", choices=("error", "as_missing"), default="error",
                   help="a category the model never saw: an error row, or treated as missing "
                        "as scikit-learn does (default: %(default)s)")
    p.add_argument("--delimiter", metavar="CHAR", default=",",
                   help="CSV cell separator, one character (default: ','; use $'\\t' for tabs)")
    p.add_argument("--raw-scores", action="store_true",
                   help="add the exact values (raw_0, raw_1, ...: what must match the source bit for bit) "
                        "as columns, for diffs in CI")
    p.add_argument("--dask", metavar="local|ADDRESS",
                   help="score on Dask: INPUT is a quoted glob of CSV, JSON Lines or Parquet files (format by "
                        "extension), -o a folder that gets one output file per input partition; 'local' starts "
                        "a local cluster, an address (tcp://host:8786) joins a running scheduler; needs "
                        "pip install \"boxwood[scale]\" (docs/scale.md)")
    p.add_argument("--workers", type=positive_int, metavar="N",
                   help="with --dask local: the number of worker processes (default: Dask's choice)")
    p.set_defaults(func=run)


def connect(address, workers=None):
    """A distributed.Client: on a new LocalCluster for 'local', else joined to ``address``;
    UsageError (exit 2) with the install hint when Dask is missing."""
    from .. import scale

    try:
        scale.require()
        import distributed
    except ImportError as exc:
        raise UsageError("--dask needs Dask: %s (%s)" % (scale.INSTALL_HINT, exc))
    if address == "local":
        cluster = distributed.LocalCluster(n_workers=workers, threads_per_worker=1, dashboard_address=":0")
        return distributed.Client(cluster)
    try:
        return distributed.Client(address, timeout="20s")
    except (OSError, TimeoutError) as exc:
        raise UsageError("cannot reach the Dask scheduler at %r: %s" % (address, exc))


def run_dask(args):
    from boxwood_runtime.stream import StreamError

    from .. import scale

    if args.input == "-":
        raise UsageError("--dask needs INPUT: a quoted glob of files, e.g. 'readings/*.csv'")
    if args.output == "-":
        raise UsageError("--dask needs -o OUTDIR: the folder for the output files")
    if os.path.exists(args.output) and not os.path.isdir(args.output):
        raise UsageError("-o %r is a file; --dask writes a folder of output files" % args.output)
    if os.path.isdir(args.output) and any(n.startswith("part-") for n in os.listdir(args.output)):
        raise UsageError("-o %r already holds part-* files (an earlier run?); remove them or choose another "
                         "folder, so that the folder holds one run's outputs" % args.output)
    if args.format != "auto":
        raise UsageError("--dask tells the format from each file's extension; drop --format")
    load_artefact(args.artefact, unknown_category=args.unknown_category)  # exit codes as without --dask
    try:
        scale.expand(args.input)
    except ValueError as exc:
        raise UsageError(str(exc))
    def show_partitions(done, total):
        sys.stderr.write("\r%s: %d/%d partitions" % (PROG, done, total))
        sys.stderr.flush()

    progress = show_partitions if sys.stderr.isatty() else None
    start = time.perf_counter()
    client = connect(args.dask, args.workers)
    try:
        summary = scale.score_files(args.artefact, args.input, args.output, client=client,
                                    raw_scores=args.raw_scores, id_column=args.id_column,
                                    delimiter=args.delimiter, unknown_category=args.unknown_category,
                                    progress=progress)
    except (StreamError, ValueError, UnicodeDecodeError) as exc:
        raise UsageError(str(exc))
    finally:
        cluster = client.cluster if args.dask == "local" else None
        client.close()
        if cluster is not None:
            cluster.close()
    seconds = time.perf_counter() - start
    if progress is not None:
        sys.stderr.write("\r")
    print("%s: scored %d rows, %d errors, %d partitions, %d files written to %s (%.1f s)%s" % (
        PROG, summary.rows, summary.errors, summary.partitions, summary.files, args.output, seconds,
        "" if not summary.errors else " (first: %s)" % summary.first_error), file=sys.stderr)
    return 2 if summary.errors else 0


@contextlib.contextmanager
def binary_input(name):
    """``name`` (or stdin for "-") as bytes: the stream decodes each line itself, so a line that is
    not UTF-8 is an error row for that line, not the end of the run."""
    if name == "-":
        yield getattr(sys.stdin, "buffer", None) or sys.stdin
        return
    with open(name, "rb") as fh:
        yield fh


def run(args):
    from boxwood_runtime.stream import score_stream

    if args.dask is not None:
        return run_dask(args)
    if args.workers is not None:
        raise UsageError("--workers goes with --dask local")
    model = load_artefact(args.artefact, unknown_category=args.unknown_category)
    if args.input != "-":
        kind = existing_file(args.input, "input")  # a missing file or a folder: bad input
        if kind not in ("csv", "jsonl", "json", "text", "unknown"):  # a model, an artefact, a zip, ... is no data
            refuse_kind(args.input, kind, "CSV with a header row or JSON Lines records to score")
    if ("-" not in (args.input, args.output) and os.path.exists(args.output)
            and os.path.samefile(args.input, args.output)):
        raise UsageError("the output %r is the input file; write to another file" % args.output)
    def show_rows(rows):
        sys.stderr.write("\r%s: %d rows" % (PROG, rows))
        sys.stderr.flush()

    progress = show_rows if sys.stderr.isatty() else None
    start = time.perf_counter()
    try:
        with binary_input(args.input) as src, text_output(args.output) as dst:
            counts = score_stream(model, src, dst, fmt=args.format, id_column=args.id_column,
                                  delimiter=args.delimiter, raw_scores=args.raw_scores, progress=progress)
    except UnicodeDecodeError as exc:
        raise UsageError("the input is not UTF-8 text: %s" % exc)
    seconds = time.perf_counter() - start
    if progress is not None and counts.rows >= 10000:
        sys.stderr.write("\r")
    rate = counts.rows / seconds if seconds > 0 else float("inf")
    if counts.errors:
        print("%s: scored %d rows, %d errors (first: %s)" % (PROG, counts.rows, counts.errors,
                                                              counts.first_error), file=sys.stderr)
        return 2
    print("%s: scored %d rows, 0 errors, %.0f rows per second" % (PROG, counts.rows, rate), file=sys.stderr)
    return 0
