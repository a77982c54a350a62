"""``boxwood inspect``: describe an artefact of any registered format and run its check."""
import json
import os
from pathlib import Path

from .. import formats
from .common import (ARTEFACT_TAKES, CheckFailed, UsageError, existing_file, footprint_text, load_artefact,
                     refuse_kind)

TAKES = "a boxwood JSON artefact (.json), an ONNX tree-ensemble file (.onnx) or a boxwood C file (.c)"


def add(commands):
    p = commands.add_parser(
        "inspect", help="describe an artefact and run its self-check",
        description="Describe an artefact (task, features, outputs, size of the ensemble, digest, "
                    "provenance), per-feature split counts, the input fields a record carries (kind, preprocessing steps), and run "
                    "its self-check. Exit 0 ok; 1 the self-check fails or a boxwood artefact is damaged; "
                    "2 bad usage, or a file that is not an artefact (or onnxruntime missing for an ONNX "
                    "file). An ONNX file (.onnx) is read with boxwood's ONNX reader and run with "
                    "onnxruntime on reference rows.")
    p.add_argument("artefact", metavar="ARTEFACT", help=TAKES)
    shown = p.add_mutually_exclusive_group()
    shown.add_argument("--json", action="store_true", help="print the description as JSON")
    shown.add_argument("--csv-header", action="store_true",
                       help="print only a CSV header line of the input fields, for 'boxwood score' (JSON "
                            "artefacts)")
    shown.add_argument("--example-jsonl", action="store_true",
                       help="print only one JSON Lines record that 'boxwood score' accepts, with values from "
                            "the artefact's self-check rows (JSON artefacts)")
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


def csv_header(names):
    """A CSV header line (RFC 4180 quoting where needed), as box.py's ``csv_header``."""
    return ",".join('"%s"' % n.replace('"', '""') if any(c in n for c in ',"\r\n') or n.strip() != n else n
                    for n in map(str, names))


def example_jsonl(names, row):
    return json.dumps(dict(zip(map(str, names), row)))


def run(args):
    kind = existing_file(args.artefact, "artefact")
    named = formats.registry.by_extension(args.artefact)
    if named is not None and named.name != "json" and kind not in formats.FORMATS:
        kind = named.name  # named .onnx (...): that format's reader says what is wrong with it
    if kind in ("json-artefact", "json"):
        from ..formats.json.check import describe, example_row

        model = load_artefact(args.artefact, self_check=False)
        if args.csv_header or args.example_jsonl:
            ok, message = model.self_check()
            if not ok:
                raise CheckFailed("%s: self-check failed: %s" % (args.artefact, message))
            names = list(model.input_names)
            print(csv_header(names) if args.csv_header else example_jsonl(names, example_row(model.doc)))
            return 0
        info = describe(args.artefact, model)
        info["footprint"] = _inspect_footprint(args, model)
    elif kind in formats.FORMATS:
        if args.csv_header or args.example_jsonl:
            raise UsageError("--csv-header and --example-jsonl describe the records 'boxwood score' takes, "
                             "and score takes %s; %r is %s" % (ARTEFACT_TAKES, args.artefact,
                                                                "an ONNX file" if kind == "onnx" else kind))
        info = formats.by_name(kind).needs("describe")(args.artefact)
    else:
        refuse_kind(args.artefact, kind, TAKES)
    info["split_counts"] = _split_counts(args.artefact, kind, model if kind in ("json-artefact", "json") else None)
    if args.json:
        print(json.dumps(info, indent=2))
    else:
        _print_table(info)
    return 0 if info["self_check"]["ok"] else 1


def _split_counts(path, kind, model=None):
    """{feature name: split nodes testing it, across all trees}, from the file read into the hub
    (a JSON artefact from the document the device loader verified; other formats by their reader)."""
    from ..ir import split_counts

    if model is not None:
        from ..formats.json.reader import from_document

        ensemble = from_document(model.doc)
    else:
        ensemble = formats.by_name(kind).needs("read")(Path(path))
    return dict(zip((f.name for f in ensemble.features), split_counts(ensemble)))


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
    counts = info.get("split_counts") or {}
    print("splits per feature (split nodes testing it, all trees; most first):")
    for name, n in sorted(counts.items(), key=lambda kv: -kv[1])[:shown]:
        print("  %-30s %d" % (name, n))
    if len(counts) > shown:
        print("  ... and %d more (see --json)" % (len(counts) - shown))
    inputs = info.get("inputs") or []
    print("input fields (what a record carries%s):" % (", as the trees' features" if not any(
        i["steps"] for i in inputs) else "; steps to the trees' features"))
    for i in inputs[:shown]:
        kind = i["kind"] if i["categories"] is None else "%s, %d categories" % (i["kind"], i["categories"])
        print("  %-30s %s%s" % (i["name"], kind, ("; " + ", ".join(i["steps"])) if i["steps"] else ""))
    if len(inputs) > shown:
        print("  ... and %d more (see --json)" % (len(inputs) - shown))
