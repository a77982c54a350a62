"""What every command shares: the exit-code exceptions, argument types, and UTF-8 text
input and output that leave no half-written file behind."""
import argparse
import contextlib
import io
import os
import sys

from ..formats.registry import file_kind

PROG = "boxwood"


class CheckFailed(Exception):
    """A check failed (exit code 1)."""


class UsageError(ValueError):
    """Bad usage or bad input found after argument parsing (exit code 2)."""


# ----------------------------------------------------------------------------- helpers
def positive_int(text):
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError("expected a whole number, got %r" % text)
    if value < 1:
        raise argparse.ArgumentTypeError("must be at least 1, got %d" % value)
    return value


def error(message):
    print("%s: error: %s" % (PROG, message), file=sys.stderr)


ARTEFACT_TAKES = "a boxwood JSON artefact (.json, written by 'boxwood export MODEL -o model.json')"
_KIND_TEXT = {
    "json-artefact": "a boxwood JSON artefact",
    "json": "a JSON document that is not a boxwood artefact",
    "jsonl": "a data file (JSON Lines)",
    "csv": "a data file (CSV text)",
    "text": "a text file",
    "zip": "a zip archive",
    "pickle": "a joblib or pickle model file",
    "onnx": "an ONNX file",
    "unknown": "not a file boxwood recognises",
}


def kind_text(kind):
    return _KIND_TEXT.get(kind, "a %s file" % kind)


def existing_file(path, what):
    """UsageError unless ``path`` is an existing file (not a folder); returns its kind."""
    kind = file_kind(path)
    if kind == "folder":
        raise UsageError("%s %r is a folder; expected a file" % (what, path))
    if kind == "missing":
        raise UsageError("%s file %r not found" % (what, path))
    return kind


def refuse_kind(path, kind, takes, hint=""):
    """UsageError saying what ``path`` is and what the command takes instead."""
    raise UsageError("%r is %s; expected %s%s" % (path, kind_text(kind), takes, hint))


_HINTS = {
    "zip": " (unpack it first: a bundle's artefact is model.json)",
    "pickle": " (export it first: boxwood export MODEL -o model.json)",
    "onnx": " (an ONNX file runs in onnxruntime; to score with boxwood, export it: "
            "boxwood export MODEL.onnx -o model.json)",
}


def load_artefact(path, unknown_category="error", self_check=True):
    """Load a boxwood JSON artefact with the device scorer, under the exit-code table:
    a missing file, a folder or a file of another kind is bad input (UsageError, exit 2);
    a file that carries a boxwood digest but fails the loader's checks (digest, structure,
    format version) is damaged, and a failed self-check is a failed check (CheckFailed,
    exit 1)."""
    import boxwood_runtime

    kind = existing_file(path, "artefact")
    if kind not in ("json-artefact", "json"):
        refuse_kind(path, kind, ARTEFACT_TAKES, _HINTS.get(kind, ""))
    try:
        model = boxwood_runtime.load(path, unknown_category=unknown_category, self_check=False)
    except boxwood_runtime.ArtefactError as exc:
        if kind == "json-artefact":
            raise CheckFailed("%s: damaged or unreadable artefact: %s" % (path, exc))
        raise UsageError("%r is %s (%s); expected %s" % (path, kind_text(kind), exc, ARTEFACT_TAKES))
    except OSError as exc:
        raise UsageError("cannot read artefact %r: %s" % (path, exc.strerror or exc))
    if self_check:
        ok, message = model.self_check()
        if not ok:
            raise CheckFailed("%s: self-check failed: %s" % (path, message))
    return model


def output_path(path, what="output"):
    """UsageError unless ``path`` can be written as a file: not a folder, and its folder exists."""
    if path == "-":
        return path
    if os.path.isdir(path):
        raise UsageError("%s %r is a folder; expected a file name" % (what, path))
    parent = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(parent):
        raise UsageError("cannot write %s %r: the folder %r does not exist" % (what, path, parent))
    return path


def write_error(path, exc, what="output"):
    """A UsageError naming the user's ``path`` (never an internal temporary file) and the reason."""
    return UsageError("cannot write %s %r: %s" % (what, str(path), exc.strerror or exc))


@contextlib.contextmanager
def text_input(name):
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


class LazyFile:
    """A text file opened on the first write, so that a run that fails before writing
    anything leaves no empty or truncated output file behind."""

    def __init__(self, path):
        self.path = path
        self.fh = None

    def write(self, text):
        if self.fh is None:
            try:
                self.fh = open(self.path, "w", encoding="utf-8", newline="")
            except OSError as exc:
                raise write_error(self.path, exc)
        return self.fh.write(text)

    def flush(self):
        if self.fh is not None:
            self.fh.flush()


@contextlib.contextmanager
def text_output(name):
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
    lazy = LazyFile(name)
    try:
        yield lazy
        lazy.write("")  # an empty result is still a (created, empty) file
    finally:
        if lazy.fh is not None:
            lazy.fh.close()


def tolerance(text):
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError("expected a number, got %r" % text)
    if not value >= 0 or value == float("inf"):
        raise argparse.ArgumentTypeError("must be a finite number >= 0, got %r" % text)
    return value


def footprint_text(foot):
    mpy = foot.get("micropython") or {}
    if not mpy.get("measured"):
        return "MicroPython heap %s" % mpy.get("why", "not measured")
    return ("MicroPython heap for one record %d bytes (model %d, scorer module %d, record %d); loading "
            "%d to %d; MicroPython %s%s" % (mpy["peak_bytes"], mpy["model_bytes"], mpy["module_bytes"],
                                            mpy["record_bytes"], mpy.get("load_live_bytes", 0),
                                            mpy["load_peak_bytes"], mpy.get("micropython"),
                                            ", from " + mpy["source"] if mpy.get("source") else ""))
