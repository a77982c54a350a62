"""``boxwood diff``: what NEW does differently from OLD (boxwood.diff)."""
import sys

from ..formats import DamagedArtefact
from ..formats.registry import file_kind
from ..sources import PICKLE_WARNING
from .common import PROG, CheckFailed, UsageError, output_path


def add(commands):
    p = commands.add_parser(
        "diff", help="what a retrained model does differently: structure and behaviour (loading a pickle runs "
                     "code: trusted files only)",
        description="Compare NEW with OLD: structure (trees added, removed or changed, per-feature split counts, "
                    "thresholds moved, leaves changed, base values, settings, features, classes) and behaviour "
                    "(both models scored by the device scorer on probes built from both models' splits and on "
                    "--data rows: rows whose label, decision or outputs change, the distribution of the changes, "
                    "the rows that change most). Exit 0 only when the two are PROVEN to behave identically on every "
                    "input (bit-identical ensembles, or the verifier's structural proof); 1 when a row changes, or "
                    "when the structure differs and no row changes (no difference observed is not a proof); 1 for a "
                    "damaged boxwood artefact; 2 on bad usage or input (a missing file, a file of another kind, "
                    "models that take different inputs so that no row can be compared). WARNING: " + PICKLE_WARNING)
    p.add_argument("old", metavar="OLD", help="the model in service: an artefact (.json, .onnx, .c; read as data) "
                                              "or a joblib/pickle model file (trusted files only: loading runs code)")
    p.add_argument("new", metavar="NEW", help="the candidate, in any of the same forms")
    p.add_argument("--data", metavar="FILE",
                   help="rows to compare on besides the probes: CSV with a header row or JSON Lines, read as "
                        "'boxwood score' reads them")
    p.add_argument("--json", metavar="FILE", dest="json_report",
                   help="write the JSON report (schemas/diff-report.schema.json)")
    p.add_argument("--report-html", metavar="FILE",
                   help="write one self-contained HTML page (needs matplotlib: pip install \"boxwood[report]\")")
    p.add_argument("--probes", type=int, default=None, metavar="N",
                   help="most generated probe rows per model, 0 for none (default: enough for every split of "
                        "both models)")
    p.add_argument("--seed", type=int, default=0, metavar="S", help="seed of the random rows (default: 0)")
    p.add_argument("--top", type=int, default=20, metavar="N",
                   help="how many of the most changed rows to list (default: %(default)s)")
    p.set_defaults(func=run)


def run(args):
    from ..diff import diff

    for path, what in ((args.old, "OLD model"), (args.new, "NEW model")) + (
            ((args.data, "data"),) if args.data else ()):
        kind = file_kind(path)
        if kind == "folder":
            raise UsageError("%s %r is a folder; expected a file" % (what, path))
        if kind == "missing":
            raise UsageError("%s file %r not found" % (what, path))
    if args.probes is not None and args.probes < 0:
        raise UsageError("--probes must be 0 or more, got %d" % args.probes)
    if args.top < 0:
        raise UsageError("--top must be 0 or more, got %d" % args.top)
    for out, what in ((args.json_report, "JSON report"), (args.report_html, "HTML report")):
        if out:
            output_path(out, what)
    if args.report_html:
        from ..pages import pyplot

        try:
            pyplot()
        except ImportError as exc:
            raise UsageError(str(exc))
    # a pickle's warning is written by sources.load_model_file, once per file it loads
    try:
        result = diff(args.old, args.new, data=args.data, probes=args.probes, seed=args.seed, most=args.top)
    except DamagedArtefact as exc:
        raise CheckFailed(str(exc))
    if args.json_report:
        result.write_json(args.json_report)
    if args.report_html:
        from ..diff.html import write_page

        write_page(result, args.report_html)
    print(result.summary())
    if result.exit_code == 2:
        print("%s: error: %s" % (PROG, result.headline()), file=sys.stderr)
    return result.exit_code
