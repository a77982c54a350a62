"""``boxwood bundle``: one folder to copy onto a box (boxwood.bundle.make_bundle), or with
``--target c`` a folder for a microcontroller project (boxwood.bundle.make_c_bundle)."""
from pathlib import Path

from ..sources import PICKLE_WARNING
from ..sources.loading import refuse_data_name
from .common import CheckFailed, UsageError, existing_file, footprint_text, kind_text, load_artefact, positive_int


def add(commands):
    p = commands.add_parser(
        "bundle", help="make one folder to copy onto a box (artefact, scorer, entry script, manifest, README), "
                       "or with --target c a folder for a microcontroller project",
        description="Make a folder holding the artefact, the standard-library scorer (scorer.py, "
                    "stream.py), the entry script box.py (check / score / info on the box, CPython 3.8+ "
                    "or MicroPython), a device README and manifest.json (sha256 and size of every file, "
                    "versions, footprint). With --target c: NAME.c and NAME.h (the C target), an example "
                    "main.c that checks the reference rows (PASS/FAIL), startup.c and link.ld for a "
                    "Cortex-M4, a Makefile (all, host, qemu, clean), README.txt and manifest.json with the "
                    "Cortex-M4 footprint (arm-none-eabi-size) when the ARM toolchain is here. SOURCE is a "
                    "boxwood artefact (.json) or a fitted model saved with joblib or pickle, exported on the "
                    "way. WARNING: " + PICKLE_WARNING)
    p.add_argument("source", metavar="SOURCE",
                   help="boxwood JSON artefact (.json), a joblib/pickle model file (trusted files only: "
                        "loading it runs code) or an ONNX tree-ensemble file (.onnx, read as data)")
    p.add_argument("-o", "--output", required=True, metavar="DIR", help="bundle folder to create (new or empty)")
    p.add_argument("--target", choices=("python", "c"), default="python",
                   help="python: the artefact and the Python scorer for a box (default); c: C99 source and "
                        "a Cortex-M4 example project for a microcontroller")
    p.add_argument("--c-prefix", metavar="NAME",
                   help="--target c: the C prefix and file name, NAME.c and NAME.h (default: model)")
    p.add_argument("--zip", action="store_true", help="also write DIR.zip (same bytes for the same bundle)")
    p.add_argument("--micropython-footprint", choices=("auto", "require", "skip"), default=None,
                   help="--target python: measure the scorer's heap under MicroPython for the manifest: auto = "
                        "when node and the MicroPython WebAssembly port are found (default), require = fail if "
                        "not, skip")
    p.add_argument("--micropython-port", metavar="DIR", help="folder of the port's micropython.mjs")
    p.add_argument("--sign", metavar="KEYFILE",
                   help="sign the manifest with this Ed25519 private key (NAME.key from 'boxwood keygen'): "
                        "writes manifest.sig; a box that trusts NAME.pub checks it (box.py check --trust NAME.pub)")
    p.add_argument("--reference-rows", type=positive_int, default=6, metavar="N",
                   help="self-check rows when SOURCE is a model file (default: %(default)s)")
    p.set_defaults(func=run)


def run(args):
    from ..bundle import C_PREFIX, BundleCheckFailed, make_bundle, make_c_bundle
    from .export import check_model_file

    if args.target == "c" and (args.micropython_footprint or args.micropython_port):
        raise UsageError("--micropython-footprint and --micropython-port apply to --target python only")
    if args.target == "python" and args.c_prefix is not None:
        raise UsageError("--c-prefix applies to --target c only")
    kind = existing_file(args.source, "source")
    if kind == "pickle":
        refuse_data_name(args.source)  # the name and the content must agree: never unpickle model.json
    if kind in ("json-artefact", "json"):
        load_artefact(args.source)  # a damaged artefact or a failed self-check: exit 1; not an artefact: 2
    elif kind in ("csv", "jsonl", "text", "zip"):
        raise UsageError("%r is %s; expected a boxwood JSON artefact (.json), a joblib/pickle model file or an "
                         "ONNX file" % (args.source, kind_text(kind)))
    else:
        check_model_file(args.source)
    try:
        if args.target == "c":
            manifest = make_c_bundle(args.source, args.output, prefix=args.c_prefix or C_PREFIX, zip_file=args.zip,
                                     reference_rows=args.reference_rows, sign=args.sign)
        else:
            manifest = make_bundle(args.source, args.output, zip_file=args.zip,
                                   measure=args.micropython_footprint or "auto", port=args.micropython_port,
                                   reference_rows=args.reference_rows, sign=args.sign)
    except BundleCheckFailed as exc:
        raise CheckFailed(str(exc))
    foot = manifest["footprint"]
    print("bundled %s into %s%s" % (args.source, args.output, " (and %s.zip)" % args.output if args.zip else ""))
    for name, entry in sorted(manifest["files"].items()):
        print("  %-12s %8d bytes  sha256 %s" % (name, entry["bytes"], entry["sha256"]))
    if args.sign:
        sig = (Path(args.output) / "manifest.sig").read_text(encoding="ascii").split()
        print("  %-12s signed by key %s (%s); the box checks it with the public key" % ("manifest.sig", sig[3],
                                                                                      args.sign))
    print("  %-12s %s trees, %s nodes, deepest path %s splits" % ("model", foot["trees"], foot["nodes"],
                                                                   foot["max_depth"]))
    if args.target == "c":
        print("  %-12s %s" % ("footprint", c_footprint_text(foot["cortex_m4"])))
        print("build:  make (Cortex-M4)   make host (this computer)   make qemu (emulated Cortex-M4); "
              "main.c prints PASS or FAIL")
        return 0
    print("  %-12s %s" % ("footprint", footprint_text(foot)))
    print("on the box:  python3 box.py check   (or: micropython box.py check)%s"
          % ("; signed: python3 box.py check --trust KEY.pub" if args.sign else ""))
    return 0


def c_footprint_text(m4):
    if not m4.get("measured"):
        return "Cortex-M4 %s" % m4.get("why")
    return ("Cortex-M4: the model flash %d bytes, RAM %d; the example program flash %d, RAM %d (%s)"
            % (m4["model"]["flash"], m4["model"]["ram"], m4["program"]["flash"], m4["program"]["ram"],
               m4["self_test"].split(":")[0]))
