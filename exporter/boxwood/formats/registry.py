"""The format registry: every artefact format is one :class:`Format`, and the CLI, the export
pipeline, ``bundle`` and the verifier reach formats only through the functions here.

A format states what it can do; a capability it lacks is None and the registry says so
in its error. Picking a format:

* for writing, by the name the user gave (``--format onnx``) or the output's extension;
* for reading, by its extension when the content agrees (each format's ``sniff`` looks
  at the first bytes), else by the content; a file that no format recognises is refused
  with the list of known formats, never guessed at.
"""
from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Dict, List, Optional, Tuple, Union

from boxwood_runtime.scorer import DIGEST_KEY

from ..ir import Ensemble

PathLike = Union[str, Path]
SNIFF_BYTES = 64


class FormatError(ValueError):
    """A file is not a readable artefact of the format it claims or seems to be, or no format fits."""


class DamagedArtefact(FormatError):
    """A file that carries a boxwood format's own marker but fails that format's integrity
    checks (changed code or tables): a failed check, exit 1, not bad input."""


class MissingDependency(FormatError):
    """An optional package that this format needs is not installed (the message says how to get it)."""


@dataclass
class Artefact:
    """An opened artefact: the ensemble read back from it and the evaluators that run it.

    ``digest`` (a string such as "sha256:...") and ``self_check`` ((ok, message): the
    artefact's own embedded check, where the format has one) appear in reports.
    """

    path: str
    ensemble: Ensemble
    evaluators: List[Any]
    format: str = ""
    digest: Optional[str] = None
    self_check: Optional[Tuple[bool, str]] = None
    notes: List[str] = field(default_factory=list)
    # Per output, the bound on |raw score - the source's| that the file itself states (a
    # float32 graph's): the verifier holds the file to it instead of the default tolerance.
    stated_raw_bound: Optional[List[float]] = None


@dataclass(frozen=True)
class Format:
    """One artefact format and what it can do.

    * ``write(ensemble, path, **options) -> bytes written``; ``write_options`` names the
      options it takes (the CLI passes only those);
    * ``read(path) -> Ensemble`` - the file read back into the hub by the format's own
      reader (never trusting its writer: this is what the structural proof compares);
    * ``open(path) -> Artefact`` - the read-back ensemble, the evaluators that run the
      file, its digest and self-check (what ``verify`` needs);
    * ``check(path, ensemble) -> (ok, message)`` - the check run right after writing;
    * ``describe(path) -> dict`` - what ``inspect`` shows (keys as for a JSON artefact);
    * ``sniff(first_bytes) -> bool`` - whether a file's first bytes are this format;
    * ``check_ready() -> None`` - raises :class:`MissingDependency` (saying how to install
      it) when an optional package that ``check``, ``describe`` or ``open`` runs is
      missing; ``export`` calls it before writing, so that no file is left unchecked.
    """

    name: str
    extensions: Tuple[str, ...]
    title: str
    sniff: Optional[Callable[[bytes], bool]] = None
    write: Optional[Callable[..., int]] = None
    write_options: Tuple[str, ...] = ()
    read: Optional[Callable[[Path], Ensemble]] = None
    open: Optional[Callable[[Path], Artefact]] = None
    check: Optional[Callable[[Path, Optional[Ensemble]], Tuple[bool, str]]] = None
    describe: Optional[Callable[[Path], Dict[str, Any]]] = None
    check_ready: Optional[Callable[[], None]] = None

    def needs(self, capability: str) -> Callable[..., Any]:
        """The function for ``capability`` ("write", "read", "open", "check", "describe"),
        or a FormatError saying this format cannot do it."""
        fn = getattr(self, capability)
        if fn is None:
            raise FormatError("the %s format cannot %s files" % (self.name, capability))
        return fn


FORMATS: Dict[str, Format] = {}


def register(fmt: Format, replace: bool = False) -> Format:
    """Add ``fmt`` to the registry (``replace=True`` to swap a format of the same name)."""
    if not fmt.extensions or not all(e.startswith(".") and e == e.lower() for e in fmt.extensions):
        raise ValueError("format %r: extensions must be lower-case and start with '.', got %r"
                         % (fmt.name, fmt.extensions))
    if fmt.name in FORMATS and not replace:
        raise ValueError("format %r is already registered (pass replace=True)" % fmt.name)
    taken = {e: f.name for f in FORMATS.values() if f.name != fmt.name for e in f.extensions}
    clash = [e for e in fmt.extensions if e in taken]
    if clash:
        raise ValueError("format %r: extension %s already belongs to format %r" % (fmt.name, clash[0], taken[clash[0]]))
    FORMATS[fmt.name] = fmt
    return fmt


def unregister(name: str) -> None:
    FORMATS.pop(name, None)


def known() -> str:
    return ", ".join("%s (%s)" % (f.name, " ".join(f.extensions)) for f in FORMATS.values())


def by_name(name: str) -> Format:
    key = name.lower().lstrip(".")
    for f in FORMATS.values():
        if f.name == key or ("." + key) in f.extensions:
            return f
    raise FormatError("unknown artefact format %r; known: %s" % (name, known()))


def by_extension(path: PathLike) -> Optional[Format]:
    ext = Path(path).suffix.lower()
    return next((f for f in FORMATS.values() if ext in f.extensions), None)


def for_output(path: PathLike, name: Optional[str] = None) -> Format:
    """The format to write ``path`` in: ``name`` when given, else by the extension."""
    if name:
        return by_name(name)
    fmt = by_extension(path)
    if fmt is None:
        raise FormatError("cannot tell the artefact format from %r; use one of the extensions %s or name a format"
                          % (str(path), ", ".join(e for f in FORMATS.values() if f.write for e in f.extensions)))
    return fmt


def _recognising(head: bytes) -> Optional[Format]:
    return next((f for f in FORMATS.values() if f.sniff is not None and f.sniff(head)), None)


def _head(path: PathLike, size: int = SNIFF_BYTES) -> bytes:
    with open(path, "rb") as fh:
        return fh.read(size)


def sniff(path: PathLike) -> Optional[Format]:
    """The format whose ``sniff`` recognises the first bytes of ``path``, or None."""
    return _recognising(_head(path))


def for_file(path: PathLike, what: str = "artefact") -> Format:
    """The format of an existing file: the format of its extension when the content agrees
    (or that format cannot tell), else the format its content shows, else the extension's.

    Raises FileNotFoundError for a missing path, IsADirectoryError for a folder, and
    FormatError when no registered format recognises the file."""
    p = Path(path)
    if p.is_dir():
        raise IsADirectoryError("%s %r is a folder, not a file" % (what, str(p)))
    if not p.exists():
        raise FileNotFoundError("%s file %r not found" % (what, str(p)))
    head = _head(p)
    named = by_extension(p)
    if named is not None and (named.sniff is None or named.sniff(head)):
        return named
    fmt = _recognising(head) or named
    if fmt is None:
        raise FormatError("%r is not an artefact of any known format (%s)" % (str(p), known()))
    return fmt


_DIGEST_KEY = b'"%s"' % DIGEST_KEY.encode()  # the artefact's first key (boxwood_runtime.scorer)


def file_kind(path, head_bytes=4096):
    """What the file at ``path`` is, from its content: one of "folder", "missing",
    "json-artefact" (a JSON object carrying a boxwood digest), "json" (another JSON
    document), "jsonl" (JSON Lines data), "csv" (delimited text data), "text", "zip",
    "pickle" (pickle or joblib), or the name of a registered artefact format
    ("onnx", ...) whose sniff recognises it; "unknown" otherwise."""
    if os.path.isdir(path):
        return "folder"
    if not os.path.exists(path):
        return "missing"
    head = _head(path, head_bytes)
    body = head.lstrip()
    if head[:4] == b"PK\x03\x04":
        return "zip"
    if body[:1] == b"{":
        if _DIGEST_KEY in head:
            return "json-artefact"
        lines = [line for line in body.splitlines() if line.strip()]
        if len(lines) > 1 and all(line.lstrip()[:1] == b"{" and line.rstrip()[-1:] == b"}" for line in lines[:-1]):
            return "jsonl"
        return "json"
    if head[:1] == b"\x80" or head[:2] in (b"\x1f\x8b", b"BZ") or head[:2] in (b"\x78\x01", b"\x78\x5e", b"\x78\x9c", b"\x78\xda") or head[:6] == b"\xfd7zXZ\x00":
        return "pickle"  # pickle protocol 2+ or a joblib compression header (zlib, gzip, bz2, xz)
    for fmt in FORMATS.values():
        if fmt.name != "json" and fmt.sniff is not None and fmt.sniff(head):
            return fmt.name
    if b"\x00" not in head:
        try:
            text = head.decode("utf-8")
        except UnicodeDecodeError:
            return "unknown"
        first = text.splitlines()[0] if text.strip() else ""
        return "csv" if any(d in first for d in ",;\t") else "text"
    return "unknown"


def open_artefact(path: PathLike) -> Artefact:
    """Open ``path`` with its format: the read-back ensemble and the evaluators that run it."""
    from ..contract import check_evaluator

    fmt = for_file(path)
    opener = fmt.needs("open")
    if fmt.check_ready is not None:
        fmt.check_ready()
    try:
        opened = opener(Path(path))
    except ImportError as exc:  # an optional dependency of this format
        raise MissingDependency("cannot open %r: the %s format needs %s (%s)"
                                % (str(path), fmt.name, getattr(exc, "name", None) or "a package", exc))
    if not opened.evaluators:
        raise FormatError("the %s format gave no evaluator for %r" % (fmt.name, str(path)))
    for ev in opened.evaluators:
        check_evaluator(ev)
    return opened
