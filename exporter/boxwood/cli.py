"""The ``boxwood`` command line.

    boxwood export MODEL.joblib -o model.json     # fitted scikit-learn model -> artefact
    boxwood export MODEL.joblib -o model.onnx     # ... -> exact ONNX graph (docs/onnx.md)
    boxwood export model.onnx -o model.json       # ONNX tree-ensemble file -> artefact
    boxwood score model.json readings.csv -o scored.csv
    boxwood inspect model.json [--json] [--micropython]
    boxwood bundle MODEL.joblib|model.json -o DIR [--zip]   # one folder to copy onto a box
    boxwood verify MODEL.joblib model.json [--data FILE] [--report-json F] [--junit F]
    boxwood demo [--out DIR] [--rows N]

``export`` loads a joblib or pickle file. Loading a pickle runs code stored in it:
only export model files that you or someone you trust made.

Exit codes: 0 success; 1 a check failed (an artefact's self-check, a demo
comparison); 2 bad usage or bad input (including argparse's own usage errors and
``score`` runs in which any row could not be scored). User errors are reported as
one ``boxwood: error: ...`` line on stderr, never as a traceback.

Adding a command: write ``_add_<name>(commands)``, which adds the subparser and
sets ``func`` to ``_run_<name>(args) -> exit code``, and list the adder in
``COMMANDS``. Raise :class:`CheckFailed` for exit 1 and any ``ValueError`` or
``OSError`` for exit 2.
"""
import argparse
import contextlib
import io
import json
import os
import sys
from pathlib import Path

from . import __version__
from .export import PICKLE_WARNING

PROG = "boxwood"


class CheckFailed(Exception):
    """A check failed (exit code 1)."""


class UsageError(ValueError):
    """Bad usage or bad input found after argument parsing (exit code 2)."""


# ----------------------------------------------------------------------------- helpers
def _positive_int(text):
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError("expected a whole number, got %r" % text)
    if value < 1:
        raise argparse.ArgumentTypeError("must be at least 1, got %d" % value)
    return value


def _error(message):
    print("%s: error: %s" % (PROG, message), file=sys.stderr)


def _load_artefact(path, unknown_category="error", self_check=True):
    """Load an artefact with the device scorer; a failed self-check raises CheckFailed."""
    import boxwood_runtime

    model = boxwood_runtime.load(path, unknown_category=unknown_category, self_check=False)
    if self_check:
        ok, message = model.self_check()
        if not ok:
            raise CheckFailed("%s: self-check failed: %s" % (path, message))
    return model


@contextlib.contextmanager
def _text_input(name):
    """``name`` (or stdin for "-") as UTF-8 text with newlines kept as they are."""
    if name == "-":
        buffer = getattr(sys.stdin, "buffer", None)
        if buffer is None:
            yield sys.stdin
            return
        wrapper = io.TextIOWrapper(buffer, encoding="utf-8", newline="")
        try:
            yield wrapper
        finally:
            wrapper.detach()
        return
    with open(name, "r", encoding="utf-8", newline="") as fh:
        yield fh


class _LazyFile:
    """A text file opened on the first write, so that a run that fails before writing
    anything leaves no empty or truncated output file behind."""

    def __init__(self, path):
        self.path = path
        self.fh = None

    def write(self, text):
        if self.fh is None:
            self.fh = open(self.path, "w", encoding="utf-8", newline="")
        return self.fh.write(text)

    def flush(self):
        if self.fh is not None:
            self.fh.flush()


@contextlib.contextmanager
def _text_output(name):
    """``name`` (or stdout for "-") as UTF-8 text; "\\n" line ends on every platform."""
    if name == "-":
        buffer = getattr(sys.stdout, "buffer", None)
        if buffer is None:
            yield sys.stdout
            return
        sys.stdout.flush()
        wrapper = io.TextIOWrapper(buffer, encoding="utf-8", newline="")
        try:
            yield wrapper
        finally:
            wrapper.flush()
            wrapper.detach()
        return
    lazy = _LazyFile(name)
    try:
        yield lazy
        lazy.write("")  # an empty result is still a (created, empty) file
    finally:
        if lazy.fh is not None:
            lazy.fh.close()


# ----------------------------------------------------------------------------- export
def _add_export(commands):
    p = commands.add_parser(
        "export", help="turn a fitted scikit-learn model file into a boxwood artefact "
                       "(loading a pickle runs code: trusted files only)",
        description="Read a fitted model saved with joblib or pickle, export it to a boxwood "
                    "artefact, and check that the device scorer reproduces the model's own "
                    "scores on the embedded reference rows. WARNING: " + PICKLE_WARNING)
    p.add_argument("model", metavar="MODEL",
                   help="joblib or pickle file of a fitted estimator (trusted files only: "
                        "loading it runs code), or an ONNX tree-ensemble file (.onnx: read as data, "
                        "never executed)")
    p.add_argument("-o", "--output", required=True, metavar="OUT.json|OUT.onnx", help="artefact file to write")
    p.add_argument("--reference-rows", type=_positive_int, default=6, metavar="N",
                   help="number of self-check rows scored by the source model and stored in the "
                        "artefact (default: %(default)s; one all-missing row is added when the "
                        "model routes missing values)")
    p.add_argument("--format", choices=("json", "onnx"), dest="artefact_format",
                   help="artefact format (default: from the extension of --output)")
    p.add_argument("--input-type", choices=("float64", "float32"), default=None,
                   help="ONNX only: element type of the graph input (default: float64; float32 "
                        "with --legacy-float32). Decisions match the source exactly either way "
                        "(docs/onnx.md)")
    p.add_argument("--legacy-float32", action="store_true",
                   help="ONNX only: write the float32 graph for older runtimes (ai.onnx.ml opset 3 "
                        "TreeEnsembleRegressor, float32 input): decisions unchanged, raw scores within "
                        "a stated bound instead of bit-identical")
    p.set_defaults(func=_run_export)


def _run_export(args):
    from .export import build, load_model_file
    from .readers import SUPPORTED, UnsupportedModel
    from .writers import WRITERS

    from .readers.onnx_reader import looks_like_onnx

    ext = "." + args.artefact_format if args.artefact_format else Path(args.output).suffix.lower()
    if ext not in WRITERS:
        raise UsageError("cannot tell the artefact format from %r; use one of the extensions %s "
                         "or --format" % (args.output, ", ".join(sorted(WRITERS))))
    if ext != ".onnx" and (args.input_type or args.legacy_float32):
        raise UsageError("--input-type and --legacy-float32 apply to ONNX output only")
    if args.legacy_float32 and args.input_type == "float64":
        raise UsageError("--legacy-float32 graphs take float32 input; drop --input-type float64")
    if not os.path.isfile(args.model):
        raise UsageError("model file %r not found" % args.model)
    if looks_like_onnx(args.model):
        return _export_from_onnx(args, ext)
    try:
        model = load_model_file(args.model)
    except (OSError, MemoryError):
        raise
    except Exception as exc:  # unpickling can raise anything; it is the user's file
        raise UsageError("cannot load %r as a joblib or pickle file: %s: %s"
                         % (args.model, type(exc).__name__, exc))
    try:
        ensemble = build(model, reference_rows=args.reference_rows)
    except UnsupportedModel as exc:
        message = str(exc)
        if "supported models" not in message:
            message += "\nsupported models:\n  - " + "\n  - ".join(SUPPORTED)
        raise UsageError(message)
    if ext == ".onnx":
        return _write_onnx(args, ensemble, ensemble.provenance.get("estimator", type(model).__name__))
    size = WRITERS[ext](ensemble, args.output)
    device = _load_artefact(args.output)  # digest and self-check, as a box would
    ok, check = device.self_check()
    outputs = device.classes if device.task == "classification" else device.output_names
    print("exported %s to %s" % (ensemble.provenance.get("estimator", type(model).__name__), args.output))
    for key, value in (
            ("task", "%s (%s: %s)" % (device.task, "classes" if device.task == "classification" else "outputs",
                                      ", ".join(str(o) for o in outputs))),
            ("features", "%d (%d categorical)" % (device.n_features,
                                                 sum(c is not None for c in device.categories))),
            ("trees", device.n_trees),
            ("nodes", device.n_nodes),
            ("bytes", size),
            ("digest", device.doc.get("boxwood_digest")),
            ("self-check", check)):
        print("  %-11s %s" % (key, value))
    return 0


def _export_from_onnx(args, ext):
    """``boxwood export model.onnx -o out.json|out.onnx``: the ONNX file is read as data."""
    from .readers.onnx_reader import read_file

    ensemble = read_file(args.model, reference_rows=args.reference_rows)
    if ext == ".onnx":
        return _write_onnx(args, ensemble, "ONNX file %s" % args.model)
    from .writers import WRITERS

    size = WRITERS[ext](ensemble, args.output)
    device = _load_artefact(args.output)
    print("exported ONNX file %s (%s) to %s" % (args.model, ensemble.provenance.get("estimator"), args.output))
    for key, value in (("task", device.task), ("trees", device.n_trees), ("nodes", device.n_nodes),
                       ("bytes", size), ("digest", device.doc.get("boxwood_digest")),
                       ("self-check", device.self_check()[1]),
                       ("reference", ensemble.provenance.get("reference_rows", "the source model's, from the "
                                                                                "ONNX metadata"))):
        print("  %-11s %s" % (key, value))
    return 0


def _write_onnx(args, ensemble, what):
    """Write an ONNX graph, run it with onnxruntime on the reference rows, print a summary."""
    from .onnx_check import check_onnx
    from .writers.onnx_writer import write

    size = write(ensemble, args.output, input_type=args.input_type, legacy=args.legacy_float32)
    ok, check = check_onnx(args.output, expected=ensemble)
    print("exported %s to %s" % (what, args.output))
    for key, value in (
            ("graph", "ai.onnx.ml opset %s, %s input" % ((3, "float32") if args.legacy_float32 else
                                                         (5, args.input_type or "float64"))),
            ("task", ensemble.task),
            ("features", "%d (%d categorical; categorical columns take category codes)"
             % (len(ensemble.features), sum(f.is_categorical for f in ensemble.features))),
            ("trees", len(ensemble.trees)),
            ("nodes", ensemble.n_nodes),
            ("bytes", size),
            ("check", check)):
        print("  %-11s %s" % (key, value))
    if ensemble.fields is not None:
        print("  %-11s %s" % ("input", "NOT raw records: the graph holds the tree part only; its input is the "
                              "preprocessed feature vector (after imputation/encoding); metadata "
                              "boxwood.preprocessing lists each feature's field and steps (docs/onnx.md)"))
    if not ok:
        raise CheckFailed("%s: onnxruntime does not reproduce the model: %s" % (args.output, check))
    return 0


# ----------------------------------------------------------------------------- score
def _add_score(commands):
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
    p.set_defaults(func=_run_score)


def _run_score(args):
    from boxwood_runtime.stream import score_stream

    model = _load_artefact(args.artefact, unknown_category=args.unknown_category)
    if args.input != "-" and not os.path.isfile(args.input):
        raise UsageError("input file %r not found (or not a file)" % args.input)
    if ("-" not in (args.input, args.output) and os.path.exists(args.output)
            and os.path.samefile(args.input, args.output)):
        raise UsageError("the output %r is the input file; write to another file" % args.output)
    try:
        with _text_input(args.input) as src, _text_output(args.output) as dst:
            counts = score_stream(model, src, dst, fmt=args.format, id_column=args.id_column)
    except UnicodeDecodeError as exc:
        raise UsageError("the input is not UTF-8 text: %s" % exc)
    if counts.errors:
        print("%s: scored %d rows, %d errors (first: %s)" % (PROG, counts.rows, counts.errors,
                                                              counts.first_error), file=sys.stderr)
        return 2
    return 0


# ----------------------------------------------------------------------------- inspect
def _add_inspect(commands):
    p = commands.add_parser(
        "inspect", help="describe an artefact and run its self-check",
        description="Describe an artefact (task, features, outputs, size of the ensemble, digest, "
                    "provenance) and run its self-check. Exit 1 if the self-check fails, 2 if the "
                    "file cannot be read as an artefact. An ONNX file (.onnx) is read with boxwood's "
                    "ONNX reader and run with onnxruntime on reference rows.")
    p.add_argument("artefact", metavar="ARTEFACT", help="boxwood artefact (.json)")
    p.add_argument("--json", action="store_true", help="print the description as JSON")
    p.add_argument("--micropython", action="store_true",
                   help="measure the scorer's heap for one record under MicroPython (needs node and the "
                        "MicroPython WebAssembly port, see docs/device.md); without it, the numbers of a "
                        "bundle's manifest.json beside the artefact are shown when there is one")
    p.add_argument("--micropython-port", metavar="DIR", help="folder of the port's micropython.mjs")
    p.set_defaults(func=_run_inspect)


def _inspect_footprint(args, model):
    """Footprint for ``inspect``: measured (--micropython), else from a bundle manifest
    beside the artefact that names the same digest, else marked not measured."""
    from .bundle import MANIFEST, footprint

    if args.micropython:
        return footprint(_read_bytes(args.artefact), measure="require", port=args.micropython_port)
    foot = {"artefact_bytes": os.path.getsize(args.artefact), "trees": model.n_trees, "nodes": model.n_nodes,
            "max_depth": model.max_depth,
            "micropython": {"measured": False, "why": "not measured (use --micropython)"}}
    manifest = Path(args.artefact).resolve().parent / MANIFEST
    try:
        doc = json.loads(manifest.read_bytes())
        if doc["artefact"]["digest"] == model.doc.get("boxwood_digest") and doc["footprint"]["micropython"]:
            foot["micropython"] = dict(doc["footprint"]["micropython"], source=str(manifest))
    except (OSError, ValueError, KeyError, TypeError):
        pass
    return foot


def _read_bytes(path):
    with open(path, "rb") as fh:
        return fh.read()


def _footprint_text(foot):
    mpy = foot.get("micropython") or {}
    if not mpy.get("measured"):
        return "MicroPython heap %s" % mpy.get("why", "not measured")
    return ("MicroPython heap for one record %d bytes (model %d, scorer module %d, record %d); loading "
            "%d to %d; MicroPython %s%s" % (mpy["peak_bytes"], mpy["model_bytes"], mpy["module_bytes"],
                                            mpy["record_bytes"], mpy.get("load_live_bytes", 0),
                                            mpy["load_peak_bytes"], mpy.get("micropython"),
                                            ", from " + mpy["source"] if mpy.get("source") else ""))


def describe(model, path):
    """A JSON-friendly description of a loaded artefact (what ``inspect --json`` prints)."""
    doc = model.doc
    prov = doc.get("provenance") if isinstance(doc.get("provenance"), dict) else {}
    ok, message = model.self_check()
    ref = doc.get("self_check") if isinstance(doc.get("self_check"), dict) else {}
    rows = ref.get("rows")
    return {
        "file": str(path),
        "bytes": os.path.getsize(path),
        "digest": doc.get("boxwood_digest"),
        "format": doc.get("format"),
        "format_version": doc.get("format_version"),
        "task": model.task,
        "features": [{"name": n, "kind": "numeric" if c is None else "categorical",
                      "categories": None if c is None else len(c)}
                     for n, c in zip(model.feature_names, model.categories)],
        "compare_precision": model.compare_precision,
        "missing_values": model.missing_values,
        "accepts_infinity": model.accepts_infinity,
        "outputs": {"names": list(model.output_names), "post_transform": model.post_transform,
                    "classes": model.classes, "binary_rule": model.binary_rule},
        "combine": model.combine,
        "trees": model.n_trees,
        "nodes": model.n_nodes,
        "max_depth": model.max_depth,
        "provenance": {"estimator": prov.get("estimator"), "versions": prov.get("versions"),
                       "parameters": prov.get("parameters")},
        "self_check": {"ok": ok, "message": message,
                       "rows": len(rows) if isinstance(rows, list) else 0},
    }


def _run_inspect(args):
    if not os.path.isfile(args.artefact):
        raise UsageError("artefact file %r not found" % args.artefact)
    from .readers.onnx_reader import looks_like_onnx

    if looks_like_onnx(args.artefact):
        from .onnx_check import describe_onnx

        info = describe_onnx(args.artefact)
    else:
        model = _load_artefact(args.artefact, self_check=False)
        info = describe(model, args.artefact)
        info["footprint"] = _inspect_footprint(args, model)
    if args.json:
        print(json.dumps(info, indent=2))
    else:
        _print_table(info)
    return 0 if info["self_check"]["ok"] else 1


def _print_table(info, shown=40):
    out = info["outputs"]
    versions = info["provenance"]["versions"] or {}
    rows = [
        ("file", info["file"]),
        ("bytes", info["bytes"]),
        ("digest", info["digest"]),
        ("format", "%s, version %s" % (info["format"], info["format_version"])),
        ("task", info["task"]),
        ("outputs", "%s (post-transform %s)" % (", ".join(map(str, out["names"])), out["post_transform"])),
    ]
    if out["classes"] is not None:
        rows.append(("classes", ", ".join(map(str, out["classes"]))))
    rows += [
        ("trees", "%d (%s)" % (info["trees"], info["combine"])),
        ("nodes", info["nodes"]),
        ("max depth", info["max_depth"]),
        ("inputs", "%d features; compared as %s; missing values: %s; infinity %s" % (
            len(info["features"]), info["compare_precision"], info["missing_values"],
            "accepted" if info["accepts_infinity"] else "refused")),
        ("estimator", info["provenance"]["estimator"]),
        ("versions", ", ".join("%s %s" % kv for kv in sorted(versions.items()))),
        ("self-check", ("ok: " if info["self_check"]["ok"] else "FAILED: ") + info["self_check"]["message"]),
    ]
    if info.get("footprint"):
        rows.append(("footprint", _footprint_text(info["footprint"])))
    for key, value in rows:
        print("%-11s %s" % (key, value))
    print("features:")
    for f in info["features"][:shown]:
        kind = f["kind"] if f["categories"] is None else "categorical, %d categories" % f["categories"]
        print("  %-30s %s" % (f["name"], kind))
    if len(info["features"]) > shown:
        print("  ... and %d more (see --json)" % (len(info["features"]) - shown))


# ----------------------------------------------------------------------------- bundle
def _add_bundle(commands):
    p = commands.add_parser(
        "bundle", help="make one folder to copy onto a box: artefact, scorer, entry script, manifest, README",
        description="Make a folder holding the artefact, the standard-library scorer (scorer.py, "
                    "stream.py), the entry script box.py (check / score / info on the box, CPython 3.8+ "
                    "or MicroPython), a device README and manifest.json (sha256 and size of every file, "
                    "versions, footprint). SOURCE is a boxwood artefact (.json) or a fitted model saved "
                    "with joblib or pickle, exported on the way. WARNING: " + PICKLE_WARNING)
    p.add_argument("source", metavar="SOURCE",
                   help="boxwood artefact (.json), or a joblib/pickle model file (trusted files only: "
                        "loading it runs code)")
    p.add_argument("-o", "--output", required=True, metavar="DIR", help="bundle folder to create (new or empty)")
    p.add_argument("--zip", action="store_true", help="also write DIR.zip (same bytes for the same bundle)")
    p.add_argument("--micropython-footprint", choices=("auto", "require", "skip"), default="auto",
                   help="measure the scorer's heap under MicroPython for the manifest: auto = when node and "
                        "the MicroPython WebAssembly port are found (default), require = fail if not, skip")
    p.add_argument("--micropython-port", metavar="DIR", help="folder of the port's micropython.mjs")
    p.add_argument("--reference-rows", type=_positive_int, default=6, metavar="N",
                   help="self-check rows when SOURCE is a model file (default: %(default)s)")
    p.set_defaults(func=_run_bundle)


def _run_bundle(args):
    from .bundle import make_bundle

    manifest = make_bundle(args.source, args.output, zip_file=args.zip, measure=args.micropython_footprint,
                           port=args.micropython_port, reference_rows=args.reference_rows)
    foot = manifest["footprint"]
    print("bundled %s into %s%s" % (args.source, args.output, " (and %s.zip)" % args.output if args.zip else ""))
    for name, entry in sorted(manifest["files"].items()):
        print("  %-12s %8d bytes  sha256 %s" % (name, entry["bytes"], entry["sha256"]))
    print("  %-12s %s trees, %s nodes, deepest path %s splits" % ("model", foot["trees"], foot["nodes"],
                                                                   foot["max_depth"]))
    print("  %-12s %s" % ("footprint", _footprint_text(foot)))
    print("on the box:  python3 box.py check   (or: micropython box.py check)")
    return 0


# ----------------------------------------------------------------------------- demo
def _add_demo(commands):
    p = commands.add_parser(
        "demo", help="run the whole job on invented cold-room data: train, export, compare, score",
        description="Generate the invented cold-room data set (samples/generate.py; needs a source "
                    "checkout), train three scikit-learn models, export them, load them with the "
                    "device scorer, compare its raw scores with scikit-learn's on every row, and "
                    "score a sample CSV. Exit 1 if any comparison is not bit-identical.")
    p.add_argument("--out", metavar="DIR", help="directory for the files (default: a new temporary directory)")
    p.add_argument("--rows", type=_demo_rows, default=4000, metavar="N",
                   help="number of generated rows, at least 100 (default: %(default)s)")
    from .demo import DEFAULT_MODELS, MODEL_KINDS

    p.add_argument("--models", default=",".join(DEFAULT_MODELS), metavar="KINDS",
                   help="comma-separated model kinds to train, or 'all' (default: %(default)s): "
                        + "; ".join("%s: %s" % kv for kv in MODEL_KINDS.items()))
    p.set_defaults(func=_run_demo)


def _demo_rows(text):
    value = _positive_int(text)
    if value < 100:
        raise argparse.ArgumentTypeError("must be at least 100, got %d" % value)
    return value


def _run_demo(args):
    from .demo import run

    return run(args.out, args.rows, models=[m.strip() for m in args.models.split(",") if m.strip()])


# ----------------------------------------------------------------------------- verify
def _tolerance(text):
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError("expected a number, got %r" % text)
    if not value >= 0 or value == float("inf"):
        raise argparse.ArgumentTypeError("must be a finite number >= 0, got %r" % text)
    return value


def _add_verify(commands):
    from .verify.probes import DEFAULT_PROBE_ROWS

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
    p.add_argument("artefacts", metavar="ARTEFACT", nargs="+", help="artefact file(s) to verify (.json)")
    p.add_argument("--data", metavar="FILE",
                   help="rows to compare on besides the generated probes: CSV with a header row or JSON "
                        "Lines, read as 'boxwood score' reads them")
    p.add_argument("--abs-tol", type=_tolerance, metavar="A",
                   help="absolute tolerance for every output kind (default: per kind, 0 for raw scores)")
    p.add_argument("--rel-tol", type=_tolerance, metavar="R",
                   help="relative tolerance for every output kind (default: per kind, 0 for raw scores, "
                        "a few ulps for probabilities and exp outputs); a difference passes when "
                        "|a - s| <= max(A, R |s|)")
    p.add_argument("--report-json", metavar="F", help="write the JSON report (schemas/verify-report.schema.json)")
    p.add_argument("--junit", metavar="F", help="write JUnit XML (one test case per check and evaluator)")
    p.add_argument("--probes", type=int, default=DEFAULT_PROBE_ROWS, metavar="N",
                   help="most generated probe rows, 0 for none (default: %(default)s)")
    p.add_argument("--seed", type=int, default=0, metavar="S", help="seed of the random rows (default: 0)")
    p.add_argument("--quiet", action="store_true", help="no progress bar; print only the verdict line")
    p.set_defaults(func=_run_verify)


def _run_verify(args):
    from .verify import verify

    if not os.path.isfile(args.model):
        raise UsageError("model file %r not found" % args.model)
    for path in args.artefacts:
        if not os.path.isfile(path):
            raise UsageError("artefact file %r not found" % path)
    if args.data is not None and not os.path.isfile(args.data):
        raise UsageError("data file %r not found" % args.data)
    if args.probes < 0:
        raise UsageError("--probes must be 0 or more, got %d" % args.probes)
    result = verify(args.model, args.artefacts, data=args.data, abs_tol=args.abs_tol, rel_tol=args.rel_tol,
                    probes=args.probes, seed=args.seed, progress=False if args.quiet else None)
    if args.report_json:
        result.write_json(args.report_json)
    if args.junit:
        result.write_junit(args.junit)
    text = result.summary()
    print(text.splitlines()[0] if args.quiet else text)
    return 0 if result.passed else 1


# ----------------------------------------------------------------------------- main
COMMANDS = (_add_export, _add_score, _add_inspect, _add_bundle, _add_verify, _add_demo)


def build_parser():
    import boxwood_runtime

    parser = argparse.ArgumentParser(
        prog=PROG,
        description="Export fitted scikit-learn tree ensembles to a documented artefact, score it "
                    "with a standard-library scorer, and check that both agree.",
        epilog="Exit codes: 0 success, 1 a check failed, 2 bad usage or bad input. "
               "'%s COMMAND --help' describes a command." % PROG)
    parser.add_argument("--version", action="version",
                        version="%s %s (device scorer %s)" % (PROG, __version__, boxwood_runtime.__version__))
    commands = parser.add_subparsers(title="commands", metavar="COMMAND", dest="command")
    for add in COMMANDS:
        add(commands)
    return parser


def main(argv=None):
    """Run the command line; return the exit code."""
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # --help, --version, usage errors
        code = exc.code
        return code if isinstance(code, int) else (0 if code is None else 2)
    if getattr(args, "func", None) is None:
        parser.print_help(sys.stderr)
        return 2
    try:
        return args.func(args)
    except CheckFailed as exc:
        _error(str(exc))
        return 1
    except BrokenPipeError:
        # The reader of our output went away (e.g. piped into head): stop quietly.
        try:
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())
        except (OSError, ValueError, AttributeError, io.UnsupportedOperation):
            pass
        _error("the output was closed before all rows were written")
        return 2
    except (ValueError, OSError) as exc:
        # ArtefactError, RecordError, UnsupportedModel, StreamError and UsageError are
        # ValueErrors; a missing or unreadable file is an OSError.
        _error(str(exc) or type(exc).__name__)
        return 2
    except KeyboardInterrupt:
        _error("interrupted")
        return 130


if __name__ == "__main__":
    sys.exit(main())
