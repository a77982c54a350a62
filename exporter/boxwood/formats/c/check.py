"""Check, describe and open C target files: the check ``export`` runs after writing (read the
file back and compare it with what was written, compile it with warnings as errors, run the
reference rows), what ``inspect`` prints, and what ``verify`` opens."""
from __future__ import annotations

import hashlib
import math
import os
from pathlib import Path
from typing import Any, Dict, Optional, Tuple, Union

from boxwood_runtime import native
from boxwood_runtime.csource import MARKER
from boxwood_runtime.scorer import SELF_CHECK_ULPS, ulp_distance

from ...ir import Ensemble
from ..json.check import describe_inputs
from ..registry import Artefact, FormatError
from .evaluators import CEvaluator
from .reader import check_head, read_c, read_text


def sniff(head: bytes) -> bool:
    """A C target file starts with its marker comment."""
    return head.startswith(("/* " + MARKER).encode("ascii"))


def digest(path: Union[str, Path]) -> str:
    """SHA-256 over the C file and its header, as "sha256:...": what a build should record."""
    text = read_text(path)
    h = hashlib.sha256(text.encode("utf-8"))
    h.update(b"\0")
    h.update(Path(path).with_name(check_head(text, str(path))).read_bytes())
    return "sha256:" + h.hexdigest()


def same_model(a: Ensemble, b: Ensemble) -> Optional[str]:
    """None when ``b`` computes what ``a`` states (every number bit for bit), else where they differ."""
    for name in ("task", "post_transform", "combine", "compare_precision", "missing_values", "binary_rule",
                 "accepts_infinity", "softmax_sum", "fields"):
        if name == "softmax_sum" and a.post_transform not in ("softmax", "samme"):
            continue  # only a softmax adds exponentials
        if getattr(a, name) != getattr(b, name):
            return "%s: %r, read back %r" % (name, getattr(a, name), getattr(b, name))
    bits = lambda xs: [float(x).hex() for x in xs]  # noqa: E731
    if bits(a.base_values) != bits(b.base_values):
        return "base values differ"
    if {k: float(v).hex() for k, v in a.post_transform_params.items()} != \
            {k: float(v).hex() for k, v in b.post_transform_params.items()}:
        return "post-transform parameters differ"
    steps = lambda e: [(st["op"], bits(st.get("values") or [])) for st in e.target_steps]  # noqa: E731
    if steps(a) != steps(b):
        return "target steps differ"
    if _cal_bits(a.calibration) != _cal_bits(b.calibration):
        return "calibration differs (CalibratedClassifierCV's calibrators)"
    for fa, fb in zip(a.features, b.features):
        if (fa.name, fa.kind, fa.categories) != (fb.name, fb.kind, fb.categories):
            return "feature %r differs" % fa.name
    if len(a.trees) != len(b.trees):
        return "%d trees, read back %d" % (len(a.trees), len(b.trees))
    for t, (ta, tb) in enumerate(zip(a.trees, b.trees)):
        for name in ("output", "feature", "left", "right"):
            if getattr(ta, name) != getattr(tb, name):
                return "tree %d: %s differs" % (t, name)
        for n in range(ta.n_nodes):
            leaf = ta.feature[n] < 0
            if leaf and float(ta.value[n]).hex() != float(tb.value[n]).hex():
                return "tree %d node %d: leaf value differs" % (t, n)
            if not leaf and (ta.missing_left[n] != tb.missing_left[n]
                             or ta.left_categories[n] != tb.left_categories[n]
                             or (ta.left_categories[n] is None
                                 and float(ta.threshold[n]).hex() != float(tb.threshold[n]).hex())):
                return "tree %d node %d: split differs" % (t, n)
    return None


def _cal_bits(cal: Any) -> Any:
    """A calibration with every number as its hexadecimal bits (None stays None)."""
    if cal is None:
        return None
    h = lambda v: float(v).hex()  # noqa: E731
    return (cal["response"], cal["normalisation"],
            [({k: h(v) for k, v in f["post_transform_params"].items()},
              [(c["method"], h(c["a"]), h(c["b"])) if c["method"] == "sigmoid" else
               (c["method"], [h(v) for v in c["x"]], [h(v) for v in c["y"]]) for c in f["calibrators"]])
             for f in cal["folds"]])


def self_check(ev: CEvaluator, ensemble: Ensemble) -> Tuple[bool, str]:
    """Run the reference rows through the compiled file: exact values bit for bit, outputs
    within the device scorer's self-check bound."""
    ref = ensemble.reference
    if ref is None or not ref.rows:
        return False, "the file carries no reference rows"
    try:
        out = ev.evaluate(ref.rows)
    except ValueError as exc:
        return False, "reference %s" % exc
    for r in range(len(ref.rows)):
        got = [float(v) for v in out.raw[r]]
        if [v.hex() for v in got] != [float(v).hex() for v in ref.raw[r]]:
            return False, "reference row %d: raw %r, expected %r" % (r, got, ref.raw[r])
        for a, b in zip(out.transformed[r], ref.transformed[r]):
            if not (math.isnan(a) and math.isnan(b)) and ulp_distance(float(a), float(b)) > SELF_CHECK_ULPS:
                return False, "reference row %d: output %r, expected %r" % (r, float(a), b)
    return True, "%d reference rows reproduced by the compiled code (raw scores exact)" % len(ref.rows)


def check(path: Union[str, Path], expected: Optional[Ensemble] = None) -> Tuple[bool, str]:
    """Read back, compare with ``expected``, compile with warnings as errors, run the reference rows."""
    try:
        back = read_c(path)
    except FormatError as exc:
        return False, str(exc)
    if expected is not None:
        diff = same_model(expected, back)
        if diff:
            return False, "the file read back differs from the model written: %s" % diff
    if not native.find_compiler():
        return True, "read back identical; not compiled here (no C compiler found)"
    try:
        ev = CEvaluator(Path(path), back)
    except FormatError as exc:
        return False, str(exc)
    ok, message = self_check(ev, back)
    return ok, ("read back identical; compiles cleanly with %s; %s" % (ev.name, message)) if ok else message


def describe(path: Union[str, Path]) -> Dict[str, Any]:
    """What ``inspect`` shows for a C file (the keys of the JSON format's describe)."""
    e = read_c(path)
    prov = e.provenance
    ref = e.reference
    if native.find_compiler():
        ok, message = self_check(CEvaluator(Path(path), e), e)
    else:
        ok, message = False, "not run: no C compiler found"
    return {
        "file": str(path), "bytes": os.path.getsize(path), "digest": digest(path), "format": "boxwood.c-target",
        "format_version": 1, "task": e.task,
        "features": [{"name": f.name, "kind": f.kind,
                      "categories": None if f.categories is None else len(f.categories)} for f in e.features],
        "inputs": describe_inputs(e.fields, [(f.name, f.categories, f.source) for f in e.features]),
        "compare_precision": e.compare_precision, "missing_values": e.missing_values,
        "accepts_infinity": e.accepts_infinity,
        "outputs": {"names": list(e.output_names), "post_transform": e.post_transform, "classes": e.classes,
                    "binary_rule": e.binary_rule},
        "combine": e.combine, "trees": len(e.trees), "nodes": e.n_nodes, "max_depth": e.max_depth(),
        "provenance": {"estimator": prov.get("estimator"), "versions": prov.get("versions"),
                       "parameters": prov.get("parameters")},
        "self_check": {"ok": ok, "message": message, "rows": len(ref.rows) if ref else 0},
    }


def open_artefact(path: Path) -> Artefact:
    """The C file read back from its tables, run compiled at -O2 and at -O3 -march=native."""
    ensemble = read_c(path)
    evaluators = [CEvaluator(Path(path), ensemble, ("-O2",)), CEvaluator(Path(path), ensemble, ("-O3", "-march=native"))]
    return Artefact(str(path), ensemble, evaluators, format="%s (C99 source and header)" % MARKER,
                    digest=digest(path), self_check=self_check(evaluators[0], ensemble))
