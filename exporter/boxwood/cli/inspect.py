"""``boxwood inspect``: describe an artefact of any registered format and run its check."""
import json
import os
from pathlib import Path

from .. import formats
from .common import footprint_text


def add(commands):
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
    p.set_defaults(func=run)


def _inspect_footprint(args, model):
    """Footprint for ``inspect``: measured (--micropython), else from a bundle manifest
    beside the artefact that names the same digest, else marked not measured."""
    from ..bundle import MANIFEST, footprint

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


def run(args):
    fmt = formats.for_file(args.artefact)
    if fmt.name == "json":
        from ..formats.json.check import describe, load_device

        model = load_device(args.artefact)
        info = describe(args.artefact, model)
        info["footprint"] = _inspect_footprint(args, model)
    else:
        info = fmt.needs("describe")(args.artefact)
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
        rows.append(("footprint", footprint_text(info["footprint"])))
    for key, value in rows:
        print("%-11s %s" % (key, value))
    print("features:")
    for f in info["features"][:shown]:
        kind = f["kind"] if f["categories"] is None else "categorical, %d categories" % f["categories"]
        print("  %-30s %s" % (f["name"], kind))
    if len(info["features"]) > shown:
        print("  ... and %d more (see --json)" % (len(info["features"]) - shown))
