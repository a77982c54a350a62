"""What every command shares: the exit-code exceptions, argument types, and UTF-8 text
input and output that leave no half-written file behind."""
import argparse
import contextlib
import io
import sys

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


def load_artefact(path, unknown_category="error", self_check=True):
    """Load an artefact with the device scorer; a failed self-check raises CheckFailed."""
    import boxwood_runtime

    model = boxwood_runtime.load(path, unknown_category=unknown_category, self_check=False)
    if self_check:
        ok, message = model.self_check()
        if not ok:
            raise CheckFailed("%s: self-check failed: %s" % (path, message))
    return model


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
            self.fh = open(self.path, "w", encoding="utf-8", newline="")
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
