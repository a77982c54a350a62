"""Run a C target file: compile it with the machine's C compiler (boxwood_runtime.native, cached)
and score rows through ctypes, exactly as the file's own functions compute them."""
from __future__ import annotations

import ctypes
from pathlib import Path
from typing import Any, List, Sequence, Tuple

import numpy as np
from boxwood_runtime import native

from ...contract import Evaluator, Outputs
from ...ir import Ensemble
from ..registry import DamagedArtefact, FormatError, MissingDependency
from .reader import check_head, expected_header, parse, read_text, widths

BASE_FLAGS = ("-std=c99", "-Wall", "-Wextra", "-pedantic", "-Werror")
ERRORS = {1: "a missing value, which this model does not accept",
          2: "an infinite value, or one outside float's range, which this model does not accept",
          3: "a value that is not one of the feature's categories", 4: "damaged tables"}


def sources(c_path: Path, ensemble: Ensemble) -> Tuple[str, str, str, str]:
    """(C text, header text, header file name, prefix), the header checked against the one
    boxwood writes for this file (a changed header could redefine what the code calls)."""
    text = read_text(c_path)
    header_name = check_head(text, str(c_path))
    h_path = Path(c_path).with_name(header_name)
    if not h_path.is_file():
        raise FormatError("%s includes %s, which is not beside it" % (c_path, header_name))
    h_text = read_text(h_path)
    if h_text != expected_header(text, ensemble):
        raise DamagedArtefact("%s differs from the header boxwood writes for %s; boxwood compiles only the "
                          "header it wrote" % (h_path, Path(c_path).name))
    return text, h_text, header_name, parse(text)[0]


def need_compiler() -> List[str]:
    cc = native.find_compiler()
    if not cc:
        raise MissingDependency("running a C file needs a C compiler (looked for $CC, cc, gcc, clang): install "
                                "one (Debian/Ubuntu: apt-get install gcc) or set CC")
    return cc


class CEvaluator(Evaluator):
    """The C file compiled as a shared library (``flags`` after the warnings-as-errors set)."""

    transform_implementation = "the C library's exp and pow (libm)"
    block_rows = 65536

    def __init__(self, c_path: Path, ensemble: Ensemble, flags: Sequence[str] = ("-O2",)):
        text, h_text, header_name, prefix = sources(Path(c_path), ensemble)
        cc = need_compiler()
        self.name = "C (%s %s)" % (Path(cc[0]).name, " ".join(flags))
        self.ensemble = ensemble
        # scikit-learn routes an unseen category value as missing; the C file's default refuses it
        all_flags = BASE_FLAGS + tuple(flags) + ("-D%s_UNSEEN_AS_MISSING=1" % prefix.upper(),)
        try:
            path = native.build_library(text, h_text, prefix, all_flags, compiler=cc, header_name=header_name)
        except native.NativeBuildError as exc:
            raise FormatError("%s does not compile: %s" % (c_path, exc))
        self._lib = native.load_library(path, prefix)
        self._many = getattr(self._lib, prefix + "_score_many")
        self.inputs = CInputs(ensemble)
        self.n_exact, self.n_out = widths(ensemble)

    def evaluate(self, rows: Sequence[Sequence[Any]]) -> Outputs:
        X = self.inputs.matrix(rows)
        n = len(rows)
        raw = np.empty((n, self.n_exact))
        out = np.empty((n, self.n_out))
        label = np.empty(n, dtype=np.intc)
        status = np.empty(n, dtype=np.intc)
        dp, ip = ctypes.POINTER(ctypes.c_double), ctypes.POINTER(ctypes.c_int)
        if n:
            self._many(n, X.ctypes.data_as(dp), raw.ctypes.data_as(dp), out.ctypes.data_as(dp),
                       label.ctypes.data_as(ip), status.ctypes.data_as(ip))
        bad = np.flatnonzero(status)
        if bad.size:
            i = int(bad[0])
            raise ValueError("row %d: the C code returned %d (%s)" % (i, status[i], ERRORS.get(int(status[i]), "?")))
        labels = None
        if self.ensemble.task != "regression":
            labels = [self.ensemble.classes[j] for j in label.tolist()]
        return Outputs(raw, out, labels)


class CInputs:
    """Rows in the hub's form (features in order, or a pipeline's raw fields; None for missing)
    as the C functions' x: NaN for missing, a text category as its position in the feature's
    categories (an unseen one as -1, which is no category's value)."""

    def __init__(self, ensemble: Ensemble):
        e = ensemble
        self.n_inputs = len(e.fields) if e.fields is not None else len(e.features)
        self._codes: List[Any] = [None] * self.n_inputs
        if e.fields is None:
            for j, f in enumerate(e.features):
                if f.is_categorical and any(isinstance(c, str) for c in f.categories):
                    self._codes[j] = {c: float(i) for i, c in enumerate(f.categories)}
        self._names = list(e.fields) if e.fields is not None else [f.name for f in e.features]

    def matrix(self, rows: Sequence[Sequence[Any]]) -> np.ndarray:
        """The rows as a float64 array (n, inputs); ValueError naming the row and field of a
        value the C target cannot take."""
        X = np.empty((len(rows), self.n_inputs), dtype=np.float64)
        for i, row in enumerate(rows):
            if len(row) != self.n_inputs:
                raise ValueError("row %d has %d values, the C code takes %d" % (i, len(row), self.n_inputs))
            for j, v in enumerate(row):
                codes = self._codes[j]
                if v is None:
                    X[i, j] = np.nan
                elif codes is not None:
                    X[i, j] = codes.get(v, -1.0) if isinstance(v, str) else -1.0
                elif isinstance(v, bool) or not isinstance(v, (int, float)):
                    raise ValueError("row %d, field %r: %r is not a number (the C target takes numbers only)"
                                     % (i, self._names[j], v))
                else:
                    X[i, j] = float(v)
        return X
