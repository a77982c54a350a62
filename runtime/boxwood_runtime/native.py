"""The native engine: a loaded model's C target (:mod:`boxwood_runtime.csource`) built with the
machine's C compiler and called through ctypes.

    from boxwood_runtime import load
    from boxwood_runtime.batch import BatchModel
    batch = BatchModel(load("model.json"), engine="c")   # arrays, as the numpy engine
    from boxwood_runtime.native import NativeScorer
    one = NativeScorer(load("model.json"))                # one record at a time
    one.predict([0.1, 2.0, float("nan")])

The compiler is ``$CC`` when set, else the first of ``cc``, ``gcc``, ``clang`` on the path;
none found is a :class:`NativeBuildError` saying what to install. Built libraries are cached
under ``$BOXWOOD_CACHE`` (default ``~/.cache/boxwood``) in a folder named by a SHA-256 of the
artefact's digest, the generated source, the compiler and its flags, so a model is compiled
once per machine; the folder appears whole or not at all (built aside, then renamed).

Exactness: the library computes the same float64 additions in the same order as the
pure-Python scorer (docs/c-target.md); the flags never include -ffast-math, and the source
refuses to compile under it. ``BatchModel(engine="c")`` prepares arrays with the numpy
engine's own checks and hands the prepared rows to ``PREFIX_walk_many``, so its errors are
the numpy engine's and its raw scores are bit-identical to both Python engines.
"""
import ctypes
import hashlib
import os
import shlex
import shutil
import subprocess
import sys
import tempfile

from .csource import generate
from .scorer import SCORER_VERSION, RecordError

DEFAULT_FLAGS = ("-std=c99", "-O2")
PREFIX = "bw_model"
_ERRORS = {1: "the value is missing, and this model does not accept missing values",
           2: "an infinite value, or one outside the float range the model compares in, which this model "
              "does not accept",
           3: "a value that is not one of the feature's categories",
           4: "the compiled tables are damaged"}


class NativeBuildError(RuntimeError):
    """No C compiler was found, or compiling the generated source failed (the message says which)."""


def find_compiler():
    """The compiler command as a list (``$CC`` split like a shell would), or None."""
    cc = os.environ.get("CC")
    if cc:
        parts = shlex.split(cc)
        return parts if parts and shutil.which(parts[0]) else None
    for name in ("cc", "gcc", "clang"):
        path = shutil.which(name)
        if path:
            return [path]
    return None


def cache_root():
    root = os.environ.get("BOXWOOD_CACHE")
    if root:
        return root
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return os.path.join(base, "boxwood")


def _library_name(prefix):
    if sys.platform == "darwin":
        return "lib%s.dylib" % prefix
    if sys.platform.startswith("win"):
        return "%s.dll" % prefix
    return "lib%s.so" % prefix


def build_library(c_text, h_text, prefix, flags=DEFAULT_FLAGS, digest="", compiler=None, header_name=None):
    """Compile ``c_text`` (with its header, saved as ``header_name``, default PREFIX.h) as a
    shared library; return its path (cached)."""
    cc = compiler or find_compiler()
    if not cc:
        raise NativeBuildError("no C compiler found (looked for $CC, cc, gcc, clang): install one "
                               "(Debian/Ubuntu: apt-get install gcc) or set CC, or use engine=\"numpy\"")
    h = hashlib.sha256()
    for part in (SCORER_VERSION, digest or "", " ".join(cc), " ".join(flags), c_text, h_text, header_name or ""):
        h.update(part.encode("utf-8"))
        h.update(b"\0")
    folder = os.path.join(cache_root(), "c", h.hexdigest()[:40])
    lib = os.path.join(folder, _library_name(prefix))
    if os.path.exists(lib):
        return lib
    os.makedirs(os.path.dirname(folder), exist_ok=True)
    work = tempfile.mkdtemp(prefix=".build-", dir=os.path.dirname(folder))
    try:
        with open(os.path.join(work, prefix + ".c"), "w", encoding="utf-8") as fh:
            fh.write(c_text)
        with open(os.path.join(work, header_name or prefix + ".h"), "w", encoding="utf-8") as fh:
            fh.write(h_text)
        cmd = list(cc) + list(flags) + ["-shared", "-fPIC", "-o", os.path.join(work, _library_name(prefix)),
                                        os.path.join(work, prefix + ".c"), "-lm"]
        try:
            done = subprocess.run(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, timeout=600)
        except (OSError, subprocess.TimeoutExpired) as exc:
            raise NativeBuildError("the C compiler could not be run (%s): %s" % (" ".join(cmd[:1]), exc))
        if done.returncode != 0:
            raise NativeBuildError("the C compiler failed (%s):\n%s" % (
                " ".join(cmd), done.stderr.decode("utf-8", "replace")[-4000:]))
        try:
            os.rename(work, folder)
        except OSError:  # built meanwhile by another process: theirs is as good
            if not os.path.exists(lib):
                raise
    finally:
        if os.path.isdir(work):
            shutil.rmtree(work, ignore_errors=True)
    return lib


def load_library(path, prefix):
    """The library at ``path`` with its functions' ctypes signatures set."""
    lib = ctypes.CDLL(os.path.abspath(path))
    dp, ip, sz = ctypes.POINTER(ctypes.c_double), ctypes.POINTER(ctypes.c_int), ctypes.c_size_t
    for name, args in (("raw", [dp, dp]), ("predict", [dp, dp])):
        fn = getattr(lib, "%s_%s" % (prefix, name))
        fn.argtypes, fn.restype = args, ctypes.c_int
    fn = getattr(lib, prefix + "_score_many")
    fn.argtypes, fn.restype = [sz, dp, dp, dp, ip, ip], sz
    fn = getattr(lib, prefix + "_walk_many")
    fn.argtypes, fn.restype = [sz, dp, dp], sz
    return lib


def library_for(model, flags=DEFAULT_FLAGS, compiler=None):
    """(ctypes library, prefix) of ``model``'s C target, built or taken from the cache."""
    c_text, h_text = generate(model, PREFIX)
    path = build_library(c_text, h_text, PREFIX, flags, digest=model.doc.get("boxwood_digest") or "",
                         compiler=compiler)
    return load_library(path, PREFIX), PREFIX


class NativeScorer:
    """One record at a time through the compiled C target: ``raw(x)``, ``predict(x)``.

    ``x`` is a sequence of the model's inputs as numbers (NaN for missing; a categorical
    input with text categories as its position in the category list); errors are
    :class:`RecordError` naming the code's reason."""

    def __init__(self, model, flags=DEFAULT_FLAGS, compiler=None):
        self.model = model
        self._lib, prefix = library_for(model, flags, compiler)
        self._raw = getattr(self._lib, prefix + "_raw")
        self._predict = getattr(self._lib, prefix + "_predict")
        self._n = len(model.input_names)
        self._x = (ctypes.c_double * self._n)()
        self._out_raw = (ctypes.c_double * model.n_exact_values)()
        n_out = len(model.classes) if model.calibration is not None else model.n_outputs  # calibrated: every class
        self._out = (ctypes.c_double * n_out)()

    def _call(self, fn, x, out, row):
        if len(x) != self._n:
            raise RecordError(row, None, "has %d values, the model takes %d" % (len(x), self._n))
        try:
            self._x[:] = x
        except TypeError:
            raise RecordError(row, None, "the C target takes numbers only (NaN for missing)")
        rc = fn(self._x, out)
        if rc:
            raise RecordError(row, None, _ERRORS.get(rc, "error code %d" % rc))
        return out[:]

    def raw(self, x, row=None):
        """The values :func:`PREFIX_raw` writes (the model's exact values) for one record."""
        return self._call(self._raw, x, self._out_raw, row)

    def predict(self, x, row=None):
        """The values :func:`PREFIX_predict` writes for one record."""
        return self._call(self._predict, x, self._out, row)


class NativeEngine:
    """The tree walk of a :class:`boxwood_runtime.batch.BatchModel` done by the compiled C target.

    ``threads``: how many threads share a large batch (default: the machine's processors, at
    most 8). ctypes releases the interpreter lock during the call, and rows are independent,
    so the split changes no bit of the result."""

    MIN_ROWS_PER_THREAD = 16384

    def __init__(self, model, flags=DEFAULT_FLAGS, compiler=None, threads=None):
        self._lib, prefix = library_for(model, flags, compiler)
        self._walk = getattr(self._lib, prefix + "_walk_many")
        self.n_raw = model.n_outputs
        self.n_features = model.n_features
        self.threads = max(1, int(threads if threads is not None else min(os.cpu_count() or 1, 8)))

    def raw_scores(self, X):
        """Raw sums (n, n_outputs) for a prepared float64 matrix (n, n_features)."""
        import numpy as np

        X = np.ascontiguousarray(X, dtype=np.float64)
        n = X.shape[0]
        out = np.empty((n, self.n_raw), dtype=np.float64)
        parts = max(1, min(self.threads, n // self.MIN_ROWS_PER_THREAD))
        bounds = [n * i // parts for i in range(parts + 1)]
        dp = ctypes.POINTER(ctypes.c_double)

        def walk(i):
            lo, hi = bounds[i], bounds[i + 1]
            return self._walk(hi - lo, X[lo:hi].ctypes.data_as(dp), out[lo:hi].ctypes.data_as(dp)) if hi > lo else 0

        if parts == 1:
            failed = walk(0)
        else:
            from concurrent.futures import ThreadPoolExecutor

            with ThreadPoolExecutor(parts) as pool:
                failed = sum(pool.map(walk, range(parts)))
        if failed:
            raise RecordError(None, None, _ERRORS[4])
        return out
