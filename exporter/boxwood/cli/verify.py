"""``boxwood verify``: prove that artefacts compute what the source model computes (boxwood.verify)."""
import os
import sys

from ..sources import PICKLE_WARNING
from .common import PROG, UsageError, tolerance


def add(commands):
    from ..verify.probes import DEFAULT_PROBE_ROWS

    p = commands.add_parser(
        "verify", help="prove that artefacts compute what the source model computes (CI-ready reports; "
                       "loading a pickle runs code: trusted files only)",
        description="Compare the fitted source model with each ARTEFACT: an exact structural proof over "
                    "every input (tree by tree, node by node, with a certified bound on the difference of "
                    "raw scores and outputs) and an empirical check on the --data rows and generated "
                    "probes (split thresholds and their neighbouring floats, NaN, unseen categories, "
                    "extremes, random rows), for every evaluator of the artefact. Exit 0 when every check "
                    "passes, 1 when one fails, 2 on bad usage or input. WARNING: " + PICKLE_WARNING)
    p.add_argument("model", metavar="MODEL",
                   help="joblib or pickle file of the fitted source model (trusted files only: loading it "
                        "runs code)")
    p.add_argument("artefacts", metavar="ARTEFACT", nargs="+", help="artefact file(s) to verify: boxwood JSON artefacts (.json) or ONNX files (.onnx)")
    p.add_argument("--data", metavar="FILE",
                   help="rows to compare on besides the generated probes: CSV with a header row or JSON "
                        "Lines, read as 'boxwood score' reads them")
    p.add_argument("--dask", metavar="local|ADDRESS",
                   help="read --data on Dask: --data is then a quoted glob of CSV, JSON Lines or Parquet files "
                        "(format by extension), read as 'score --dask' reads them on the workers; the "
                        "comparison runs here on all their rows; 'local' starts a local cluster, an address "
                        "joins a running scheduler; needs pip install \"boxwood[scale]\" (docs/scale.md)")
    p.add_argument("--abs-tol", type=tolerance, metavar="A",
                   help="absolute tolerance for every output kind (default: per kind, 0 for raw scores)")
    p.add_argument("--rel-tol", type=tolerance, metavar="R",
                   help="relative tolerance for every output kind (default: per kind, 0 for raw scores, "
                        "a few ulps for probabilities and exp outputs); a difference passes when "
                        "|a - s| <= max(A, R |s|)")
    p.add_argument("--report-json", metavar="F", help="write the JSON report (schemas/verify-report.schema.json)")
    p.add_argument("--junit", metavar="F", help="write JUnit XML (one test case per check and evaluator)")
    p.add_argument("--report-html", metavar="F",
                   help="write one self-contained HTML page: the verdict, the checks and plots (ulps, probe coverage, "
                        "decision flips, certified bound against observed difference, memory against board sizes); "
                        "needs matplotlib: pip install \"boxwood[report]\" (docs/reports.md)")
    p.add_argument("--probes", type=int, default=DEFAULT_PROBE_ROWS, metavar="N",
                   help="most generated probe rows, 0 for none (default: %(default)s)")
    p.add_argument("--seed", type=int, default=0, metavar="S", help="seed of the random rows (default: 0)")
    p.add_argument("--quiet", action="store_true", help="no progress bar; print only the verdict line")
    p.set_defaults(func=run)


def _found(path, what):
    """None when ``path`` is a readable file, else the reason (a missing file, a folder)."""
    if os.path.isdir(path):
        return "%s %r is a folder, not a file" % (what, path)
    if not os.path.isfile(path):
        return "%s %r not found" % (what, path)
    return None


def _write_reports(args, result):
    if args.report_json:
        result.write_json(args.report_json)
    if args.junit:
        result.write_junit(args.junit)
    if args.report_html:
        from ..verify.html import verify_page

        verify_page(result).write(args.report_html)


def _dask_rows(args):
    """The rows of every --data file, read on the Dask cluster with the device reading."""
    from .. import scale
    from ..sources import load_model_file
    from .score import connect

    scale.expand(args.data)  # no file, or mixed formats: ValueError (exit 2) before a cluster starts
    model = load_model_file(args.model)
    client = connect(args.dask)
    try:
        return scale.read_records_dask(model, args.data, client=client)
    finally:
        cluster = client.cluster if args.dask == "local" else None
        client.close()
        if cluster is not None:
            cluster.close()


def run(args):
    """Verify; the JSON, JUnit and HTML reports are written whenever asked, also when the run
    stops on bad input (exit 2: every artefact is then a failing case with the reason). A
    missing matplotlib with --report-html is bad usage (exit 2, the JSON and JUnit reports say so)."""
    from ..verify import VerifyResult, verify

    settings = {"probes": args.probes, "seed": args.seed, "data": args.data}
    if args.dask is not None and args.data is None:
        raise UsageError("--dask reads --data on Dask: give --data 'GLOB'")
    if args.report_html:
        from .. import pages

        try:  # before the run: a missing matplotlib is bad usage (exit 2), told with the install hint
            pages.pyplot()
        except pages.MissingPlotting as exc:
            message = str(exc)
            args.report_html = None
            _write_reports(args, VerifyResult.bad_input(os.path.basename(args.model), args.model, args.artefacts,
                                                        message, settings))
            raise UsageError(message)
    try:
        problem = (_found(args.model, "model file")
                   or (None if args.data is None or args.dask is not None else _found(args.data, "data file"))
                   or ("--probes must be 0 or more, got %d" % args.probes if args.probes < 0 else None))
        if problem:
            raise UsageError(problem)
        data = args.data if args.dask is None else _dask_rows(args)
        result = verify(args.model, args.artefacts, data=data, abs_tol=args.abs_tol, rel_tol=args.rel_tol,
                        probes=args.probes, seed=args.seed, progress=False if args.quiet else None,
                        bad_artefacts="report")
    except ImportError as exc:  # an optional dependency (onnxruntime for .onnx files)
        message = "%s is needed to run these artefacts: pip install \"boxwood[onnx]\" (%s)" % (
            getattr(exc, "name", None) or "a package", exc)
        _write_reports(args, VerifyResult.bad_input(os.path.basename(args.model), args.model, args.artefacts,
                                                    message, settings))
        raise UsageError(message)
    except (ValueError, OSError) as exc:
        message = str(exc) or type(exc).__name__
        _write_reports(args, VerifyResult.bad_input(os.path.basename(args.model), args.model, args.artefacts,
                                                    message, settings))
        raise
    _write_reports(args, result)
    text = result.summary()
    print(text.splitlines()[0] if args.quiet else text)
    if result.error is not None:
        print("%s: error: %s" % (PROG, result.error["message"]), file=sys.stderr)
        return 2
    return 0 if result.passed else 1
