"""boxwood bundle: check, score and describe the model in this folder, with nothing but Python.

    python3 box.py check                      # is the folder whole, and does it compute right?
    python3 box.py score readings.csv -o scored.csv
    python3 box.py score < readings.jsonl > scored.jsonl
    python3 box.py info [--json]              # what the model is, and its footprint
    python3 box.py --version

Made by ``boxwood bundle``; see README.txt in this folder. Runs on CPython 3.8 or newer
and on MicroPython 1.2x double-precision builds (``micropython box.py check``), with
only the files of this folder: scorer.py (the scoring core), stream.py (streaming),
the artefact and manifest.json. On MicroPython, ``score`` reads and writes JSON Lines
only (MicroPython has no csv module).

``check`` verifies every file listed in manifest.json (present, size, sha256), that
scorer.py is the version the bundle was made with, the artefact's own digest, format
version and structure, and then scores the artefact's reference rows and compares
them with the numbers the source model gave on the workstation. It prints one line and
exits 0 when all of that holds, else 1 with the first reason. ``score`` and ``info``
run the same check first and refuse to go on (exit 1) when it fails.

Exit codes (the same table as the workstation's ``boxwood`` command):

    0  success
    1  a check failed: anything wrong inside the bundle (a file missing, changed or
       cut short, a damaged manifest or artefact, another scorer version, a failed
       self-check)
    2  bad usage or bad input: an unknown command or option, a --bundle folder that
       is not there, an input file that is not there, a ``score`` run in which any
       row could not be scored (those rows are error rows), Python 2

Model outputs are advisory. Where they drive equipment, keep the equipment's own
protections in charge; safety functions need their own engineering under the
standards and local codes that apply.
"""
import hashlib
import json
import sys

BOX_VERSION = "0.1.0"
BUNDLE_FORMAT = "boxwood.bundle"
BUNDLE_FORMAT_VERSIONS = (1,)
MANIFEST = "manifest.json"
PROG = "box.py"
COMMANDS = ("check", "score", "info")
USAGE = """usage: box.py [--bundle DIR] COMMAND [options]

commands:
  check                        verify the folder against manifest.json, the artefact's
                               digest and its self-check rows (exit 0 ok, 1 failed)
  score [INPUT] [-o OUTPUT] [--format auto|csv|jsonl] [--id-column NAME]
        [--unknown-category error|as_missing]
                               score CSV (with a header) or JSON Lines from INPUT
                               (default: stdin) to OUTPUT (default: stdout), one output
                               row per input row, in order; bad rows become error rows
  info [--json | --csv-header | --example-jsonl]
                               describe the model: its input fields (kind and
                               preprocessing steps), outputs and footprint;
                               --csv-header prints a CSV header line for score,
                               --example-jsonl one JSON Lines record score accepts

options:
  --bundle DIR                 the bundle folder (default: the folder of box.py)
  --version                    print the versions and exit
  -h, --help                   print this help and exit

exit codes:
  0  success
  1  a check failed (anything wrong inside the bundle: missing, changed or damaged
     files, another scorer version, a failed self-check)
  2  bad usage or bad input (unknown command or option, missing --bundle folder or
     input file, a score run with error rows, Python 2)
"""


class CheckFailed(Exception):
    """The bundle failed a check (exit 1); the message is the one-line reason."""


class Usage(Exception):
    """Bad usage or bad input (exit 2)."""


# ----------------------------------------------------------------------------- files
def _join(folder, name):
    return name if folder in ("", ".") else folder.rstrip("/\\") + "/" + name


def _here():
    path = globals().get("__file__") or ""
    cut = max(path.rfind("/"), path.rfind("\\"))
    return path[:cut] if cut > 0 else ("/" if cut == 0 else ".")


def _size(path):
    """The file's size in bytes, or None when it is not there."""
    import os

    try:
        return os.stat(path)[6]
    except OSError:
        return None


def _is_folder(path):
    import os

    try:
        return os.stat(path)[0] & 0o170000 == 0o040000  # S_IFDIR (MicroPython has no stat module)
    except OSError:
        return False


def _sha256_file(path):
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while True:
            chunk = fh.read(16384)
            if not chunk:
                break
            h.update(chunk)
    return "%02x" * 32 % tuple(h.digest())  # MicroPython's sha256 has no hexdigest()


def _read_json(path):
    with open(path, "rb") as fh:
        return json.loads(fh.read())


def _platform():
    impl = getattr(sys, "implementation", None)
    name = getattr(impl, "name", "python")
    version = ".".join(str(v) for v in getattr(impl, "version", ())[:3])
    return "%s %s" % ("CPython" if name == "cpython" else ("MicroPython" if name == "micropython" else name),
                      version)


# ----------------------------------------------------------------------------- check
def read_manifest(folder):
    """The parsed manifest.json of ``folder``; CheckFailed with the reason otherwise."""
    path = _join(folder, MANIFEST)
    if _size(path) is None:
        raise CheckFailed("missing file: %s (is %s a bundle folder?)" % (MANIFEST, folder))
    try:
        manifest = _read_json(path)
    except (ValueError, UnicodeError) as exc:
        raise CheckFailed("%s is not valid JSON (damaged?): %s" % (MANIFEST, exc))
    if not isinstance(manifest, dict) or manifest.get("bundle_format") != BUNDLE_FORMAT:
        raise CheckFailed("%s is not a boxwood bundle manifest" % MANIFEST)
    version = manifest.get("bundle_format_version")
    if version not in BUNDLE_FORMAT_VERSIONS:
        raise CheckFailed("%s has bundle format version %r; this box.py (%s) reads %s"
                          % (MANIFEST, version, BOX_VERSION, ", ".join(str(v) for v in BUNDLE_FORMAT_VERSIONS)))
    files = manifest.get("files")
    artefact = manifest.get("artefact")
    if not isinstance(files, dict) or not isinstance(artefact, dict) or artefact.get("file") not in files:
        raise CheckFailed("%s lacks its file list or does not list the artefact" % MANIFEST)
    for name, entry in files.items():
        bad_name = not name or "/" in name or "\\" in name or name in (".", "..", MANIFEST)
        if bad_name or not isinstance(entry, dict) or not isinstance(entry.get("sha256"), str) \
                or not isinstance(entry.get("bytes"), int):
            raise CheckFailed("%s has a bad entry for %r" % (MANIFEST, name))
    for needed in ("scorer.py", PROG):
        if needed not in files:
            raise CheckFailed("%s does not list %s" % (MANIFEST, needed))
    return manifest


def verify_files(folder, manifest):
    """Every listed file is there with its size and sha256; CheckFailed naming the first that is not."""
    files = manifest["files"]
    for name in sorted(files):
        entry = files[name]
        path = _join(folder, name)
        size = _size(path)
        if size is None:
            raise CheckFailed("missing file: %s (listed in %s)" % (name, MANIFEST))
        if size != entry["bytes"]:
            raise CheckFailed("%s has %d bytes, %s says %d (changed, truncated or damaged)"
                              % (name, size, MANIFEST, entry["bytes"]))
        digest = _sha256_file(path)
        if digest != entry["sha256"]:
            raise CheckFailed("%s: sha256 %s, %s says %s (changed or damaged)"
                              % (name, digest, MANIFEST, entry["sha256"]))
    return len(files)


def import_scorer(folder):
    """scorer.py from ``folder`` (imported by name, as on a box)."""
    if folder not in sys.path:
        sys.path.insert(0, folder)
    try:
        import scorer
    except Exception as exc:  # a damaged core must not crash the check with a traceback
        raise CheckFailed("scorer.py cannot be imported: %s: %s" % (type(exc).__name__, exc))
    return scorer


def load_model(folder, manifest, unknown_category="error"):
    """Check the files, the scorer's version, the artefact; return the loaded model and
    the self-check message. CheckFailed with the first reason otherwise."""
    n_files = verify_files(folder, manifest)
    scorer = import_scorer(folder)
    wanted = manifest.get("scorer_version")
    if scorer.SCORER_VERSION != wanted:
        raise CheckFailed("scorer.py is version %s; the bundle was made for %s" % (scorer.SCORER_VERSION, wanted))
    artefact = manifest["artefact"]
    name = artefact["file"]
    try:
        model = scorer.load(_join(folder, name), unknown_category=unknown_category, self_check=False)
    except scorer.ArtefactError as exc:  # digest, structure, format version, platform
        raise CheckFailed("%s: %s" % (name, exc))
    except MemoryError:
        raise CheckFailed("%s: not enough memory to load it here (see the footprint in %s)" % (name, MANIFEST))
    digest = model.doc.get(scorer.DIGEST_KEY)
    if digest != artefact.get("digest"):
        raise CheckFailed("%s carries the digest %s, %s says %s" % (name, digest, MANIFEST, artefact.get("digest")))
    ok, message = model.self_check()
    if not ok:
        raise CheckFailed("%s: self-check failed: %s" % (name, message))
    return model, "%d files match %s; %s (%s, format version %s): %s; scorer %s on %s" % (
        n_files, MANIFEST, name, digest, model.doc.get("format_version"), message, scorer.SCORER_VERSION,
        _platform())


# ----------------------------------------------------------------------------- commands
def cmd_check(folder, args):
    _no_more(args)
    manifest = read_manifest(folder)
    model, message = load_model(folder, manifest)
    print("ok: " + message)
    return 0


def input_fields(doc):
    """What a record carries, from the artefact document: a list of (name, kind, steps)
    with kind "numeric", "categorical (N categories)" or "unused", and steps a list of
    texts ("impute 0.5", "encode 3 categories (unknown: error)") feeding the features
    named. Without preprocessing the record fields are the trees' features."""
    inputs = doc.get("inputs") or {}
    feats = inputs.get("features") or []
    fields = inputs.get("fields")
    out = []
    if fields is None:
        for f in feats:
            cats = f.get("categories")
            kind = "numeric" if cats is None else "categorical (%d categories)" % len(cats)
            out.append((f.get("name"), kind, []))
        return out
    for name in fields:
        kind, steps = "unused", []
        for f in feats:
            src = f.get("source") or {}
            if src.get("field") != name:
                continue
            if kind == "unused":
                kind = "numeric"
            for step in src.get("steps") or []:
                if step.get("op") == "impute":
                    steps.append("impute %s" % (json.dumps(step.get("value")),))
                elif step.get("op") == "encode":
                    cats = step.get("categories") or []
                    kind = "categorical (%d categories)" % len(cats)
                    unknown = step.get("unknown")
                    steps.append("encode %d categories (unknown: %s)" % (
                        len(cats), "missing" if unknown is None else unknown))
                elif step.get("op") == "lookup":
                    cats = step.get("categories") or []
                    kind = "categorical (%d categories)" % len(cats)
                    steps.append("lookup %d categories (unknown: %s)" % (len(cats), step.get("unknown")))
                elif step.get("op") == "arithmetic":
                    steps.append("scale: " + ", ".join(" ".join(str(v) for v in op)
                                                       for op in step.get("sequence") or []))
            steps.append("-> feature %s" % f.get("name"))
        out.append((name, kind, steps))
    return out


def _csv_cell(text):
    # MicroPython has no csv module: quote as RFC 4180 does where needed
    if "," in text or '"' in text or "\n" in text or "\r" in text or text.strip() != text:
        return '"' + text.replace('"', '""') + '"'
    return text


def csv_header(names):
    """A CSV header line for records with these fields."""
    return ",".join(_csv_cell(str(n)) for n in names)


def example_record(doc, names):
    """One JSON Lines record (a line of text) with values from the artefact's self-check
    rows: the first row with no missing or non-finite value, else the first row."""
    rows = (doc.get("self_check") or {}).get("rows") or []
    chosen = rows[0] if rows else [None] * len(names)
    for row in rows:
        if all(v is not None and v not in ("inf", "-inf", "nan") for v in row):
            chosen = row
            break
    # built by hand: MicroPython's json.dumps takes no options, and dict order is not kept
    return "{" + ", ".join(json.dumps(str(n)) + ": " + json.dumps(v) for n, v in zip(names, chosen)) + "}"


def cmd_info(folder, args):
    as_json = _flag(args, "--json")
    header = _flag(args, "--csv-header")
    example = _flag(args, "--example-jsonl")
    _no_more(args)
    if as_json + header + example > 1:
        raise Usage("give one of --json, --csv-header, --example-jsonl")
    manifest = read_manifest(folder)
    model, message = load_model(folder, manifest)
    names = list(getattr(model, "input_names", model.feature_names))
    if header:
        print(csv_header(names))
        return 0
    if example:
        print(example_record(model.doc, names))
        return 0
    summary = model.summary()
    fields = input_fields(model.doc)
    info = {
        "bundle": folder,
        "check": "ok: " + message,
        "model": summary,
        "inputs": [{"name": n, "kind": k, "steps": st} for n, k, st in fields],
        "footprint": manifest.get("footprint"),
        "made_by": manifest.get("made_by"),
        "python": _platform(),
    }
    if as_json:
        print(json.dumps(info))
        return 0
    print("check      ok: %s" % message)
    for key in ("task", "n_features", "n_outputs", "classes", "n_trees", "n_nodes", "max_depth",
                "post_transform", "compare_precision", "missing_values", "digest"):
        if key in summary and summary[key] is not None:
            print("%-10s %s" % (key.replace("n_", ""), summary[key]))
    print("features   %s" % ", ".join(str(f) for f in summary.get("features", [])))
    print("inputs     %d field%s per record (CSV header: python3 box.py info --csv-header)"
          % (len(fields), "" if len(fields) == 1 else "s"))
    for name, kind, steps in fields:
        print("  %-28s %s%s" % (name, kind, ("; " + ", ".join(steps)) if steps else ""))
    foot = manifest.get("footprint") or {}
    mpy = foot.get("micropython") or {}
    if mpy.get("measured"):
        print("memory     MicroPython heap: at most %d bytes to score a record once loaded; %d to %d bytes "
              "while loading (measured on MicroPython %s)" % (mpy["peak_bytes"], mpy.get("load_live_bytes", 0),
                                                              mpy["load_peak_bytes"], mpy.get("micropython")))
    else:
        print("memory     not measured under MicroPython (%s)" % mpy.get("why", "no footprint in the manifest"))
    print("made by    %s" % manifest.get("made_by"))
    return 0


def cmd_score(folder, args):
    out_name = _option(args, ("-o", "--output"), "-")
    fmt = _option(args, ("--format",), "auto")
    id_column = _option(args, ("--id-column",), None)
    unknown = _option(args, ("--unknown-category",), "error")
    if fmt not in ("auto", "csv", "jsonl"):
        raise Usage("--format must be auto, csv or jsonl, not %r" % fmt)
    if unknown not in ("error", "as_missing"):
        raise Usage("--unknown-category must be error or as_missing, not %r" % unknown)
    if len(args) > 1 or (args and args[0].startswith("-") and args[0] != "-"):
        raise Usage("unexpected argument %r" % args[-1])
    in_name = args[0] if args else "-"
    manifest = read_manifest(folder)
    model, _ = load_model(folder, manifest, unknown_category=unknown)
    try:
        import stream
    except ImportError as exc:
        raise CheckFailed("stream.py cannot be imported: %s" % (exc,))
    if in_name != "-" and _size(in_name) is None:
        raise Usage("input file %r not found" % in_name)
    src = _open_text(in_name, "r")
    try:
        dst = _open_text(out_name, "w")
        try:
            counts = stream.score_stream(model, src, dst, fmt=fmt, id_column=id_column)
        finally:
            _done(dst, out_name)
    except stream.StreamError as exc:
        raise Usage(str(exc))
    except UnicodeError as exc:
        raise Usage("the input is not UTF-8 text: %s" % (exc,))
    finally:
        _done(src, in_name)
    if counts.errors:
        sys.stderr.write("%s: scored %d rows, %d errors (first: %s)\n"
                         % (PROG, counts.rows, counts.errors, counts.first_error))
        return 2
    return 0


def _done(fh, name):
    """Close a file we opened; flush and let go of a wrapper around stdin/stdout."""
    if name != "-":
        fh.close()
    elif fh is not sys.stdin and fh is not sys.stdout:
        fh.flush()
        fh.detach()  # closing the wrapper would close stdin/stdout under it
    else:
        getattr(fh, "flush", lambda: None)()


def _open_text(name, mode):
    """A file (or stdin/stdout for "-") as UTF-8 text with line ends kept as they are."""
    if name == "-":
        import io

        std = sys.stdin if mode == "r" else sys.stdout
        buffer = getattr(std, "buffer", None)
        if buffer is None or not hasattr(io, "TextIOWrapper"):  # MicroPython
            return std
        if mode == "w":
            std.flush()
        return io.TextIOWrapper(buffer, encoding="utf-8", newline="")
    try:
        return open(name, mode, encoding="utf-8", newline="")
    except TypeError:  # MicroPython's open() takes no encoding / newline
        return open(name, mode)


# ----------------------------------------------------------------------------- arguments
def _flag(args, name):
    if name in args:
        args.remove(name)
        return True
    return False


def _option(args, names, default):
    for i, a in enumerate(args):
        for name in names:
            if a == name:
                if i + 1 >= len(args):
                    raise Usage("%s needs a value" % name)
                value = args[i + 1]
                del args[i:i + 2]
                return value
            if name.startswith("--") and a.startswith(name + "="):
                del args[i]
                return a[len(name) + 1:]
    return default


def _no_more(args):
    if args:
        raise Usage("unexpected argument %r" % args[0])


def versions():
    text = "%s %s (boxwood bundle format %s)" % (PROG, BOX_VERSION, ", ".join(str(v) for v in BUNDLE_FORMAT_VERSIONS))
    try:
        import scorer

        text += "; scorer %s, reads artefact format version %s" % (
            scorer.SCORER_VERSION, ", ".join(str(v) for v in scorer.FORMAT_VERSIONS))
    except Exception:
        text += "; scorer.py cannot be imported"
    return text + "; on " + _platform()


def python_problem(version_info):
    """Why this Python cannot run box.py, or None. Python 2 must get this far: keep
    the whole file parseable by Python 2 (tests/test_bundle.py checks it)."""
    if version_info[0] < 3:
        return ("needs Python 3 (CPython 3.8 or newer, or MicroPython); this is Python %s. "
                "Run: python3 box.py ..." % ".".join(str(v) for v in version_info[:3]))
    return None


def main(argv=None, version_info=None):
    """Run a command; return the exit code."""
    problem = python_problem(sys.version_info if version_info is None else version_info)
    if problem:
        sys.stderr.write("%s: error: %s\n" % (PROG, problem))
        return 2
    args = list(sys.argv[1:] if argv is None else argv)
    try:
        given = _option(args, ("--bundle",), None)
        if given is not None and not _is_folder(given):
            raise Usage("--bundle %r: %s" % (given, "no such folder" if _size(given) is None
                                              else "a file, expected the bundle folder"))
        folder = given or _here()
        if "-h" in args or "--help" in args:
            sys.stdout.write(USAGE)
            return 0
        if "--version" in args:
            if folder not in sys.path:
                sys.path.insert(0, folder)
            print(versions())
            return 0
        if not args or args[0] not in COMMANDS:
            raise Usage("expected a command: %s" % ", ".join(COMMANDS) if not args
                        else "unknown command %r; expected one of %s" % (args[0], ", ".join(COMMANDS)))
        command = args.pop(0)
        return {"check": cmd_check, "score": cmd_score, "info": cmd_info}[command](folder, args)
    except CheckFailed as exc:
        sys.stderr.write("%s: check failed: %s\n" % (PROG, exc))
        return 1
    except Usage as exc:
        sys.stderr.write("%s: error: %s\n%s" % (PROG, exc, USAGE.split("\n\n")[0] + "\n"))
        return 2
    except OSError as exc:
        sys.stderr.write("%s: error: %s\n" % (PROG, exc))
        return 2
    except KeyboardInterrupt:
        sys.stderr.write("%s: interrupted\n" % PROG)
        return 130


if __name__ == "__main__":
    sys.exit(main())
