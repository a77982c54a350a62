"""boxwood bundle: check, score and describe the model in this folder, with nothing but Python.

    python3 box.py check                      # is the folder whole, and does it compute right?
    python3 box.py score readings.csv -o scored.csv
    python3 box.py score < readings.jsonl > scored.jsonl
    python3 box.py info [--json]              # what the model is, and its footprint
    python3 box.py --version

Made by ``boxwood bundle``; see README.txt in this folder. Runs on CPython 3.8 or newer
and on MicroPython 1.2x double-precision builds (``micropython box.py check``), with
only the files of this folder: scorer.py (the scoring core), stream.py (streaming),
signature.py (the Ed25519 verifier), the artefact and manifest.json. On MicroPython, ``score`` reads and writes JSON Lines
only (MicroPython has no csv module).

``check`` reads the manifest (a regular file, at most 1 MiB, nesting checked before
parsing), verifies every file listed in it (a regular file, its size, its sha256; an
extra file in the folder fails too), with ``--trust FILE`` (or /etc/boxwood/trusted.pub)
the Ed25519 signature manifest.sig over manifest.json's bytes, that
scorer.py is the version the bundle was made with, the artefact's own digest, format
version and structure, and then scores the artefact's reference rows and compares
them with the numbers the source model gave on the workstation. It prints one line and
exits 0 when all of that holds, else 1 with the first reason. ``score`` and ``info``
run the same check first and refuse to go on (exit 1) when it fails.

Before anything else box.py takes its own folder off the import path, and it runs the
bundle's scorer.py and stream.py from the very bytes it has just checked against the
manifest (never through ``import``), so a json.py or hashlib.py dropped into the folder
never runs. See docs/bundle-signing.md for what a signature protects and what it does not.

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
import sys  # built into the interpreter: never read from a file, so it cannot come from this folder


def _forget_own_folder():
    """Take this script's folder (and the current folder) off the import path before anything
    else is imported, so that a json.py, hashlib.py or scorer.py dropped beside box.py never
    runs: the standard library comes from the standard library, and the bundle's own modules
    are loaded by path only after their bytes match the manifest (``_load_module``)."""
    path = sys.path
    flags = getattr(sys, "flags", None)  # MicroPython has none
    if path and not (getattr(flags, "isolated", 0) or getattr(flags, "safe_path", 0)):
        del path[0]  # python box.py: CPython (and MicroPython) put the script's folder first
    here = globals().get("__file__") or ""
    cut = max(here.rfind("/"), here.rfind("\\"))
    own = (here[:cut] if cut > 0 else ("/" if cut == 0 else "."), "", ".")
    for entry in list(path):
        if entry in own or entry.rstrip("/\\") == own[0].rstrip("/\\"):
            path.remove(entry)


if __name__ == "__main__":
    _forget_own_folder()

import hashlib  # noqa: E402 (after the import path is safe)
import json  # noqa: E402

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
  --trust FILE                 require manifest.sig to be a valid Ed25519 signature of
                               manifest.json by a key in FILE (PEM public keys; keep it
                               outside the bundle folder); default: /etc/boxwood/trusted.pub
                               when the device has one
  --require-signature          fail unless a trusted key is set and the bundle is signed
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
SIGNATURE = "manifest.sig"  # the Ed25519 signature of manifest.json's bytes (boxwood bundle --sign)
TRUST_FILE = "/etc/boxwood/trusted.pub"  # keys the device owner trusts; when present, signatures are required
HARD_CAP = 1 << 28  # no bundle file is read beyond 256 MiB, whatever the manifest says (scorer's max_bytes)
MANIFEST_CAP = 1 << 20  # manifest.json: 1 MiB
SMALL_CAP = 1 << 16  # manifest.sig and trust files: 64 KiB
MAX_DEPTH = 16  # nesting allowed in manifest.json (it needs 4)
NEEDED = ("scorer.py", "stream.py", PROG)  # the code the manifest must list (besides the artefact)
_KINDS = {0o010000: "a FIFO (named pipe)", 0o020000: "a character device", 0o040000: "a folder",
          0o060000: "a block device", 0o120000: "a symbolic link", 0o140000: "a socket"}


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


def _not_regular(mode):
    """None for a regular file's st_mode, else what the file is."""
    kind = mode & 0o170000
    return None if kind == 0o100000 else _KINDS.get(kind, "not a regular file")


def _read_file(path, name, limit, fail=None, hasher=None):
    """The bytes of ``path`` (shown as ``name``), read only if it is a regular file and at
    most ``limit`` bytes; None when it is not there. With ``hasher``, the bytes go into it as
    they are read and only their number is returned. Anything else raises ``fail`` (CheckFailed)
    with the reason: a FIFO, device or folder is never opened for reading (it could block or
    never end), and a file that grows past ``limit`` is not read to its end."""
    import os

    fail = fail or CheckFailed
    try:
        st = os.stat(path)  # follows links: a link to /dev/zero is a character device here
    except OSError:
        return None
    what = _not_regular(st[0])
    if what is not None:
        raise fail("%s is %s, not a regular file" % (name, what))
    if st[6] > limit:
        raise fail("%s has %d bytes, more than the %d allowed" % (name, st[6], limit))
    if hasattr(os, "open") and hasattr(os, "fdopen") and hasattr(os, "O_NONBLOCK"):
        # CPython: open without blocking and look again at what was opened (it may have been swapped)
        fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK | getattr(os, "O_NOCTTY", 0))
        what = _not_regular(os.fstat(fd).st_mode)
        if what is not None:
            os.close(fd)
            raise fail("%s is %s, not a regular file" % (name, what))
        fh = os.fdopen(fd, "rb")
    else:  # MicroPython: no os.open
        fh = open(path, "rb")
    try:
        if hasher is not None:  # hash as it is read, keep nothing (MicroPython: little memory)
            got = 0
            while got <= limit:
                chunk = fh.read(min(16384, limit + 1 - got))
                if not chunk:
                    break
                hasher.update(chunk)
                got += len(chunk)
            data = got
        else:  # one read of the size stat gave (one allocation), then make sure that was all
            want = min(st[6], limit) + 1
            data = fh.read(want) or b""
            got = len(data)
            if got == want and got <= limit:  # it grew while being read: read on, bounded
                parts = [data]
                while got <= limit:
                    chunk = fh.read(min(65536, limit + 1 - got))
                    if not chunk:
                        break
                    parts.append(chunk)
                    got += len(chunk)
                data = b"".join(parts)
    finally:
        fh.close()
    if got > limit:
        raise fail("%s grew past the %d bytes allowed while it was read" % (name, limit))
    return data


def _hex(digest):
    return "%02x" * len(digest) % tuple(digest)  # MicroPython's sha256 has no hexdigest()


def _platform():
    impl = getattr(sys, "implementation", None)
    name = getattr(impl, "name", "python")
    version = ".".join(str(v) for v in getattr(impl, "version", ())[:3])
    return "%s %s" % ("CPython" if name == "cpython" else ("MicroPython" if name == "micropython" else name),
                      version)


def _depth(data, limit):
    """The deepest nesting of [ and { in JSON bytes (outside strings), stopping past ``limit``:
    checked before parsing, so that a deeply nested manifest cannot exhaust the parser's stack."""
    depth = deepest = 0
    in_string = escaped = False
    for c in bytearray(data):
        if in_string:
            if escaped:
                escaped = False
            elif c == 92:  # backslash
                escaped = True
            elif c == 34:  # quote
                in_string = False
        elif c == 34:
            in_string = True
        elif c in (91, 123):
            depth += 1
            if depth > deepest:
                deepest = depth
                if deepest > limit:
                    return deepest
        elif c in (93, 125):
            depth -= 1
    return deepest


def _kind(value):
    for t, text in ((bool, "true/false"), (str, "a text"), (int, "a number"), (float, "a number"),
                    (list, "a list"), (dict, "an object")):
        if isinstance(value, t):
            return text
    return "null" if value is None else type(value).__name__


def _expect(value, types, where, what):
    if not isinstance(value, types) or (isinstance(value, bool) and bool not in types):
        raise CheckFailed("%s: %s must be %s, got %s" % (MANIFEST, where, what, _kind(value)))
    return value


def _is_hex64(text):
    return len(text) == 64 and all(c in "0123456789abcdef" for c in text)


# ----------------------------------------------------------------------------- signatures
def trusted_keys(path, folder):
    """The Ed25519 public keys in the trust file ``path`` (PEM, one or more keys), read with the
    bundle's own verifier module only after that module's bytes matched the manifest; Usage
    when the file is missing or unreadable, or lies in the bundle folder (a key shipped with the
    bundle proves nothing: whoever changes the bundle changes that key too)."""
    cut = max(path.rfind("/"), path.rfind("\\"))
    where = path[:cut] if cut > 0 else ("/" if cut == 0 else ".")
    inside = _same_folder(where, folder)
    try:
        import os.path  # CPython: compare real paths (MicroPython: names only)

        real = getattr(os.path, "realpath", None)  # MicroPython's os.path, where there is one, lacks it
    except ImportError:
        real = None
    if real is not None:
        inside = inside or real(where) == real(folder)
    if inside:
        raise Usage("the trusted key %r is in the bundle folder: a key that comes with the bundle proves "
                    "nothing; install it outside the folder (e.g. %s)" % (path, TRUST_FILE))
    data = _read_file(path, "trusted key file %r" % path, SMALL_CAP, fail=Usage)
    if data is None:
        raise Usage("trusted key file %r not found" % path)
    return data


def check_signature(manifest_bytes, signature_bytes, trust_text, verifier):
    """The key id that signed ``manifest_bytes``; CheckFailed with the reason when
    ``signature_bytes`` (manifest.sig, or None when absent) is not a valid Ed25519 signature of
    them by one of the keys in ``trust_text``."""
    try:
        keys = verifier.public_key_from_pem(trust_text)
    except verifier.SignatureError as exc:
        raise Usage("the trusted key file cannot be read: %s" % (exc,))
    ids = [verifier.key_id(k) for k in keys]
    if signature_bytes is None:
        raise CheckFailed("the bundle is not signed (no %s) and this box requires a signature by key %s"
                          % (SIGNATURE, " or ".join(ids)))
    try:
        fields = signature_bytes.decode("ascii").split()
    except UnicodeError:
        fields = []
    if len(fields) != 5 or fields[:3] != ["boxwood-signature", "1", "ed25519"] or len(fields[4]) != 128:
        raise CheckFailed("%s is not a boxwood signature (expected: boxwood-signature 1 ed25519 KEYID "
                          "SIGNATURE)" % SIGNATURE)
    try:
        sig = bytes(int(fields[4][i:i + 2], 16) for i in range(0, 128, 2))
    except ValueError:
        raise CheckFailed("%s: the signature is not hexadecimal" % SIGNATURE)
    for key, kid in zip(keys, ids):
        if verifier.verify(key, manifest_bytes, sig):
            return kid
    if fields[3] not in ids:
        raise CheckFailed("%s was made with key %s, which this box does not trust (trusted: %s)"
                          % (SIGNATURE, fields[3], ", ".join(ids)))
    raise CheckFailed("%s does not verify with the trusted key %s: %s was changed after signing, or the "
                      "signature was" % (SIGNATURE, fields[3], MANIFEST))


# ----------------------------------------------------------------------------- check
def read_manifest(folder):
    """The parsed manifest.json of ``folder``; CheckFailed with the reason otherwise."""
    manifest, _ = _read_manifest(folder)
    return manifest


def _read_manifest(folder):
    """(parsed manifest, its bytes); CheckFailed with the reason otherwise."""
    data = _read_file(_join(folder, MANIFEST), MANIFEST, MANIFEST_CAP)
    if data is None:
        raise CheckFailed("missing file: %s (is %s a bundle folder?)" % (MANIFEST, folder))
    if _depth(data, MAX_DEPTH) > MAX_DEPTH:
        raise CheckFailed("%s nests deeper than %d levels (damaged?)" % (MANIFEST, MAX_DEPTH))
    try:
        manifest = json.loads(data)
    except (ValueError, UnicodeError, RuntimeError) as exc:  # RuntimeError: MicroPython's too deep
        raise CheckFailed("%s is not valid JSON (damaged?): %s" % (MANIFEST, exc))
    if not isinstance(manifest, dict) or manifest.get("bundle_format") != BUNDLE_FORMAT:
        raise CheckFailed("%s is not a boxwood bundle manifest" % MANIFEST)
    version = manifest.get("bundle_format_version")
    if isinstance(version, bool) or version not in BUNDLE_FORMAT_VERSIONS:
        raise CheckFailed("%s has bundle format version %r; this box.py (%s) reads %s"
                          % (MANIFEST, version, BOX_VERSION, ", ".join(str(v) for v in BUNDLE_FORMAT_VERSIONS)))
    files = manifest.get("files")
    artefact = manifest.get("artefact")
    if not isinstance(files, dict) or not isinstance(artefact, dict):
        raise CheckFailed("%s lacks its file list or does not list the artefact" % MANIFEST)
    name = _expect(artefact.get("file"), (str,), "artefact.file", "a file name")
    _expect(artefact.get("digest"), (str,), "artefact.digest", "a text")
    _expect(manifest.get("scorer_version"), (str,), "scorer_version", "a text")
    if name not in files:
        raise CheckFailed("%s lacks its file list or does not list the artefact" % MANIFEST)
    for entry_name in sorted(files):
        entry = files[entry_name]
        bad_name = not entry_name or "/" in entry_name or "\\" in entry_name or entry_name in (".", "..", MANIFEST,
                                                                                            SIGNATURE)
        if bad_name or not isinstance(entry, dict) or not isinstance(entry.get("sha256"), str) \
                or not _is_hex64(entry["sha256"]) or not isinstance(entry.get("bytes"), int) \
                or isinstance(entry["bytes"], bool) or not 0 <= entry["bytes"] <= HARD_CAP:
            raise CheckFailed("%s has a bad entry for %r" % (MANIFEST, entry_name))
    for needed in NEEDED:
        if needed not in files:
            raise CheckFailed("%s does not list %s" % (MANIFEST, needed))
    return manifest, data


def verify_files(folder, manifest, keep=()):
    """Every listed file is a regular file with its size and sha256, and the folder holds
    nothing else (but manifest.json and manifest.sig); CheckFailed naming the first problem.
    Returns (number of files, {name: bytes} for the names in ``keep``): the bytes that were
    hashed are the bytes that are used, never read again."""
    import os

    files = manifest["files"]
    try:
        present = os.listdir(folder)
    except OSError as exc:
        raise CheckFailed("cannot list the bundle folder %s: %s" % (folder, exc))
    extra = sorted(n for n in present if n not in files and n not in (MANIFEST, SIGNATURE))
    if extra:
        raise CheckFailed("%s is in the folder but not listed in %s (an extra file: remove it, or make the "
                          "bundle again)" % (", ".join(extra), MANIFEST))
    kept = {}
    for name in sorted(files):
        entry = files[name]
        hasher = None if name in keep else hashlib.sha256()
        data = _read_file(_join(folder, name), name, entry["bytes"], fail=_SizeOrKind(name, entry["bytes"]),
                          hasher=hasher)
        if data is None:
            raise CheckFailed("missing file: %s (listed in %s)" % (name, MANIFEST))
        size = data if hasher is not None else len(data)
        if size != entry["bytes"]:
            raise CheckFailed("%s has %d bytes, %s says %d (changed, truncated or damaged)"
                              % (name, size, MANIFEST, entry["bytes"]))
        digest = _hex((hasher or hashlib.sha256(data)).digest())
        if digest != entry["sha256"]:
            raise CheckFailed("%s: sha256 %s, %s says %s (changed or damaged)"
                              % (name, digest, MANIFEST, entry["sha256"]))
        if name in keep:
            kept[name] = data
        data = None
    return len(files), kept


def _SizeOrKind(name, expected):
    """The failure for _read_file on a listed file: the manifest's size in the message."""
    def fail(reason):
        if " more than " in reason or " grew past " in reason:
            return CheckFailed("%s is larger than the %d bytes %s says (changed or damaged)"
                               % (name, expected, MANIFEST))
        return CheckFailed(reason)
    return fail


class _Module(object):
    """A module made from verified source (MicroPython cannot make module objects)."""


def _load_module(name, source, path):
    """Run ``source`` (bytes already checked against the manifest) as the module ``name``;
    the file is never looked up on the import path."""
    namespace = {"__name__": name, "__file__": path}
    try:
        code = compile(source.decode("utf-8"), path, "exec")
    except NameError:  # a Python without compile()
        code = source.decode("utf-8")
    exec(code, namespace)
    module = _Module()
    for key in namespace:
        setattr(module, key, namespace[key])
    return module


def import_scorer(folder, source=None):
    """scorer.py from ``folder``, run from ``source`` (its verified bytes); CheckFailed when it fails."""
    path = _join(folder, "scorer.py")
    if source is None:
        source = _read_file(path, "scorer.py", HARD_CAP) or b""
    try:
        return _load_module("scorer", source, path)
    except Exception as exc:  # a damaged core must not crash the check with a traceback
        raise CheckFailed("scorer.py cannot be imported: %s: %s" % (type(exc).__name__, exc))


def import_local(folder, name, source, scorer):
    """A verified module of the bundle that imports ``scorer`` (stream.py, signature.py)."""
    saved = sys.modules.get("scorer")
    if scorer is not None:
        sys.modules["scorer"] = scorer  # stream.py's "from scorer import RecordError" finds the verified one
    try:
        return _load_module(name[:-3], source, _join(folder, name))
    except Exception as exc:
        raise CheckFailed("%s cannot be imported: %s: %s" % (name, type(exc).__name__, exc))
    finally:
        if scorer is not None:
            if saved is None:
                del sys.modules["scorer"]
            else:
                sys.modules["scorer"] = saved


def _trust_options(trust):
    """(trust file path or None, required): --trust FILE, else TRUST_FILE when the device has one."""
    path, required = trust if trust else (None, False)
    if path is None and _size(TRUST_FILE) is not None:
        path = TRUST_FILE
    if required and path is None:
        raise Usage("--require-signature needs a trusted key: --trust FILE, or a key file at %s" % TRUST_FILE)
    return path


def _same_folder(a, b):
    a, b = a.rstrip("/\\") or "/", b.rstrip("/\\") or "/"
    return a == b or (a in ("", ".") and b in ("", "."))


def _verifier(folder, kept, scorer):
    """signature.py from box.py's own folder: the verifier is exactly as trusted as the box.py
    running it (install both outside the bundle to guard against someone who can rewrite the
    bundle folder; docs/bundle-signing.md). When box.py runs from the bundle, the bytes used are
    the ones just checked against the manifest."""
    here = _here()
    if _same_folder(here, folder) and "signature.py" in kept:
        source = kept.pop("signature.py")
    else:
        source = _read_file(_join(here, "signature.py"), "signature.py (beside box.py)", SMALL_CAP * 4)
        if source is None:
            raise CheckFailed("signature.py (the signature verifier) is not beside %s in %s" % (PROG, here))
    return import_local(here, "signature.py", source, scorer)


def load_model(folder, manifest, unknown_category="error", trust=None, manifest_bytes=None, keep=()):
    """Check the files, the signature (when a trusted key is set: before any code of the bundle
    runs), the scorer's version, the artefact; return the loaded model, the self-check message
    and the verified modules named in ``keep``. CheckFailed with the first reason otherwise."""
    trust_path = _trust_options(trust)
    trust_text = trusted_keys(trust_path, folder) if trust_path is not None else None
    name = manifest["artefact"]["file"]
    wanted = ["scorer.py", name] + (["signature.py"] if trust_text is not None else []) + list(keep)
    n_files, kept = verify_files(folder, manifest, keep=wanted)  # hashes only: nothing runs yet
    signed = ""
    if trust_text is not None:
        verifier = _verifier(folder, kept, None)
        if manifest_bytes is None:
            manifest_bytes = _read_file(_join(folder, MANIFEST), MANIFEST, MANIFEST_CAP)
        sig = _read_file(_join(folder, SIGNATURE), SIGNATURE, SMALL_CAP)
        signed = "; signed by trusted key %s" % check_signature(manifest_bytes, sig, trust_text, verifier)
    elif _size(_join(folder, SIGNATURE)) is not None:
        signed = "; %s not checked (no trusted key: --trust FILE)" % SIGNATURE
    kept.pop("signature.py", None)
    scorer = import_scorer(folder, kept.pop("scorer.py"))
    wanted_version = manifest.get("scorer_version")
    if getattr(scorer, "SCORER_VERSION", None) != wanted_version:
        raise CheckFailed("scorer.py is version %s; the bundle was made for %s"
                          % (getattr(scorer, "SCORER_VERSION", None), wanted_version))
    artefact = manifest["artefact"]
    holder = [kept.pop(name)]
    try:
        model = scorer.load(holder.pop(), unknown_category=unknown_category, self_check=False)
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
    modules = dict((k, import_local(folder, k, v, scorer)) for k, v in kept.items())
    return model, "%d files match %s; %s (%s, format version %s): %s; scorer %s on %s%s" % (
        n_files, MANIFEST, name, digest, model.doc.get("format_version"), message, scorer.SCORER_VERSION,
        _platform(), signed), modules


# ----------------------------------------------------------------------------- commands
def _checked(folder, trust, unknown_category="error", keep=()):
    manifest, data = _read_manifest(folder)
    model, message, modules = load_model(folder, manifest, unknown_category=unknown_category, trust=trust,
                                         manifest_bytes=data, keep=keep)
    return manifest, model, message, modules


def cmd_check(folder, args, trust=None):
    _no_more(args)
    manifest, model, message, _ = _checked(folder, trust)
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


def cmd_info(folder, args, trust=None):
    as_json = _flag(args, "--json")
    header = _flag(args, "--csv-header")
    example = _flag(args, "--example-jsonl")
    _no_more(args)
    if as_json + header + example > 1:
        raise Usage("give one of --json, --csv-header, --example-jsonl")
    manifest, model, message, _ = _checked(folder, trust)
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


def cmd_score(folder, args, trust=None):
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
    manifest, model, _, modules = _checked(folder, trust, unknown_category=unknown, keep=("stream.py",))
    stream = modules["stream.py"]
    if in_name != "-" and _size(in_name) is None:
        raise Usage("input file %r not found" % in_name)
    src = _open_input(in_name)  # bytes: stream.py decodes each line (bad bytes: an error row for that line)
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
    elif fh is getattr(sys.stdin, "buffer", None):
        pass
    elif fh is not sys.stdin and fh is not sys.stdout:
        fh.flush()
        fh.detach()  # closing the wrapper would close stdin/stdout under it
    else:
        getattr(fh, "flush", lambda: None)()


def _open_input(name):
    """A file (or stdin for "-") to read bytes from, or stdin's text where it has no bytes."""
    if name == "-":
        return getattr(sys.stdin, "buffer", None) or sys.stdin
    return open(name, "rb")


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


def versions(folder="."):
    """The versions, read from scorer.py's text without running it (nothing is verified yet)."""
    text = "%s %s (boxwood bundle format %s)" % (PROG, BOX_VERSION, ", ".join(str(v) for v in BUNDLE_FORMAT_VERSIONS))
    try:
        source = _read_file(_join(folder, "scorer.py"), "scorer.py", HARD_CAP)
    except CheckFailed:
        source = None
    found = {}
    for line in (source or b"").decode("utf-8", "replace").split("\n"):
        for key in ("SCORER_VERSION", "FORMAT_VERSIONS"):
            if line.startswith(key + " = ") and key not in found:
                found[key] = line[len(key) + 3:].split("#")[0].strip().strip("\"'()").rstrip(",")
    if "SCORER_VERSION" in found:
        text += "; scorer %s, reads artefact format version %s" % (found["SCORER_VERSION"],
                                                                   found.get("FORMAT_VERSIONS", "?"))
    else:
        text += "; scorer.py is not there or gives no version"
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
            print(versions(folder))
            return 0
        trust = (_option(args, ("--trust",), None), _flag(args, "--require-signature"))
        if not args or args[0] not in COMMANDS:
            raise Usage("expected a command: %s" % ", ".join(COMMANDS) if not args
                        else "unknown command %r; expected one of %s" % (args[0], ", ".join(COMMANDS)))
        command = args.pop(0)
        return {"check": cmd_check, "score": cmd_score, "info": cmd_info}[command](folder, args, trust)
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
