"""``boxwood export``: a fitted model file (or an artefact file read as data) -> an artefact
in any registered format, checked after writing (boxwood.export.export)."""
from .. import formats
from ..sources import PICKLE_WARNING, SUPPORTED, UnsupportedModel
from ..sources.loading import refuse_data_name
from .common import CheckFailed, UsageError, existing_file, kind_text, output_path, positive_int, write_error

MODEL_TAKES = ("a fitted model saved with joblib or pickle, an ONNX tree-ensemble file (.onnx) or a boxwood "
               "JSON artefact (.json)")


def check_model_file(path):
    """UsageError for a missing file, a folder or a data file given where a model is expected."""
    kind = existing_file(path, "model")
    if kind == "pickle":
        refuse_data_name(path)  # a pickle named model.json or model.onnx: refused, never unpickled
    if formats.registry.by_extension(path) is not None:
        return kind  # named as an artefact format (.onnx, .json): that format's reader says what is wrong
    if kind in ("csv", "jsonl", "text", "zip", "json"):
        if kind in ("csv", "jsonl"):
            raise UsageError("%r: this is %s, not a model; expected %s" % (path, kind_text(kind), MODEL_TAKES))
        raise UsageError("%r is %s; expected %s" % (path, kind_text(kind), MODEL_TAKES))
    return kind


def add(commands):
    p = commands.add_parser(
        "export", help="turn a fitted scikit-learn model file into a boxwood artefact "
                       "(loading a pickle runs code: trusted files only)",
        description="Read a fitted model saved with joblib or pickle (or an ONNX tree-ensemble file, read "
                    "as data), export it to an artefact, and check the written file: a JSON artefact is "
                    "loaded as a box would and reproduces the model's own scores on the embedded reference "
                    "rows; an ONNX file is run with onnxruntime on them. WARNING: " + PICKLE_WARNING)
    p.add_argument("model", metavar="MODEL",
                   help="joblib or pickle file of a fitted estimator (trusted files only: "
                        "loading it runs code), or an ONNX tree-ensemble file (.onnx: read as data, "
                        "never executed)")
    p.add_argument("-o", "--output", required=True, metavar="OUT.json|OUT.onnx|OUT.c",
                   help="artefact file to write: .json (boxwood JSON artefact, what 'boxwood score' and a "
                        "bundle take), .onnx, or .c (C99 source; OUT.h is written beside it, "
                        "docs/c-target.md)")
    p.add_argument("--reference-rows", type=positive_int, default=6, metavar="N",
                   help="number of self-check rows scored by the source model and stored in the "
                        "artefact (default: %(default)s; one all-missing row is added when the "
                        "model routes missing values)")
    p.add_argument("--format", choices=sorted(formats.FORMATS), dest="artefact_format",
                   help="artefact format (default: from the extension of --output)")
    p.add_argument("--input-type", choices=("float64", "float32"), default=None,
                   help="ONNX only: element type of the graph input (default: float64; float32 "
                        "with --legacy-float32). Decisions match the source exactly either way "
                        "(docs/onnx.md)")
    p.add_argument("--legacy-float32", action="store_true",
                   help="ONNX only: write the float32 graph for older runtimes (ai.onnx.ml opset 3 "
                        "TreeEnsembleRegressor, float32 input): decisions unchanged, raw scores within "
                        "a stated bound instead of bit-identical")
    p.add_argument("--c-prefix", metavar="NAME",
                   help="C only: the identifier prefix of the generated functions and macros "
                        "(default: the output's file stem made an identifier: pump-2.c gives pump_2_raw, "
                        "PUMP_2_N_FEATURES)")
    p.set_defaults(func=run)


def _options(args, fmt):
    """The writer options the user asked for, refused where the format takes none."""
    given = {}
    if args.input_type:
        given["input_type"] = args.input_type
    if args.legacy_float32:
        given["legacy"] = True
    if given and not set(given) <= set(fmt.write_options):
        raise UsageError("--input-type and --legacy-float32 apply to ONNX output only")
    if args.c_prefix is not None:
        if "c_prefix" not in fmt.write_options:
            raise UsageError("--c-prefix applies to C output (.c) only")
        given["c_prefix"] = args.c_prefix
    if args.legacy_float32 and args.input_type == "float64":
        raise UsageError("--legacy-float32 graphs take float32 input; drop --input-type float64")
    return given


def run(args):
    from ..export import export

    check_model_file(args.model)
    output_path(args.output, "output")
    fmt = formats.for_output(args.output, args.artefact_format)
    options = _options(args, fmt)
    try:
        result = export(args.model, args.output, fmt=fmt.name, reference_rows=args.reference_rows, **options)
    except UnsupportedModel as exc:
        message = str(exc)
        if "supported models" not in message:
            message += "\nsupported models:\n  - " + "\n  - ".join(SUPPORTED)
        raise UsageError(message)
    except OSError as exc:
        if exc.filename and str(exc.filename).startswith(str(args.output)):
            raise write_error(args.output, exc)
        raise
    info = fmt.describe(result.path) if fmt.describe is not None else {}
    ensemble = result.ensemble
    print("exported %s to %s" % (result.source, result.path))
    out = info.get("outputs") or {}
    rows = [("format", "%s, version %s" % (info.get("format"), info.get("format_version")))]
    if fmt.name == "c":
        rows[0] = ("files", "%s and %s (C99)" % (result.path, str(result.path)[:-2] + ".h"))
    if fmt.name == "onnx":
        rows[0] = ("graph", "ai.onnx.ml opset %s, %s input" % ((3, "float32") if args.legacy_float32 else
                                                               (5, args.input_type or "float64")))
    rows += [
        ("task", "%s (%s: %s)" % (ensemble.task, "classes" if ensemble.classes is not None else "outputs",
                                  ", ".join(str(o) for o in (ensemble.classes if ensemble.classes is not None
                                                             else out.get("names", ensemble.output_names))))),
        ("features", "%d (%d categorical)" % (len(ensemble.features),
                                              sum(f.is_categorical for f in ensemble.features))),
        ("trees", len(ensemble.trees)),
        ("nodes", ensemble.n_nodes),
        ("bytes", result.bytes),
        ("digest", info.get("digest")),
        ("self-check" if fmt.name == "json" else "check", result.check[1]),
    ]
    if result.source_format is not None:
        rows.append(("reference", ensemble.provenance.get(
            "reference_rows", "the source model's, from the %s metadata" % result.source_format.upper())))
    for key, value in rows:
        print("  %-11s %s" % (key, value))
    if fmt.name == "onnx" and ensemble.fields is not None:
        print("  %-11s %s" % ("input", "NOT raw records: the graph holds the tree part only; its input is the "
                              "preprocessed feature vector (after imputation/encoding); metadata "
                              "boxwood.preprocessing lists each feature's field and steps (docs/onnx.md)"))
    if fmt.name == "c":
        print("  %-11s %s" % ("use", "#include the .h; %s_raw(x, raw) / %s_predict(x, out) return 0 or an error "
                              "code (docs/c-target.md); 'boxwood verify MODEL %s' proves it"
                              % (_prefix(result.path, args.c_prefix), _prefix(result.path, args.c_prefix),
                                 result.path)))
    if not result.ok:
        raise CheckFailed("%s: the written file does not reproduce the model: %s" % (result.path, result.check[1]))
    return 0


def _prefix(path, given):
    from pathlib import Path

    from boxwood_runtime.csource import prefix_from

    return prefix_from(Path(path).stem, given)
