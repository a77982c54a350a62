"""Check, describe and open ONNX files: the check ``export`` runs after writing, what
``inspect`` prints, and what ``verify`` opens (the registry's ``check``, ``describe`` and
``open`` of the ONNX format).

The check runs the file with onnxruntime (one thread) on reference rows and compares:

* an exact (ai.onnx.ml opset 5) graph with boxwood metadata: its ``raw_score`` output
  against the source model's raw scores carried in the metadata, **bit for bit**, and
  the transformed outputs within ``SELF_CHECK_ULPS`` units in the last place;
* a legacy float32 graph: against the hub's float64 scores of the same float32-rounded
  rows, within the per-output bound stated in ``boxwood.raw_error_bound``;
* an ONNX file made elsewhere: against the hub's float64 scores of the trees read from
  it, within the float32 summation bound when the operator works in float32.
"""
from __future__ import annotations

import hashlib
from pathlib import Path
from typing import Any, Dict, List, Optional, Sequence, Tuple, Union

import numpy as np

from ...ir import Ensemble
from ..registry import Artefact, MissingDependency
from ..json.check import describe_inputs
from ..json.device import hub_outputs
from .evaluators import OnnxRuntimeEvaluator
from .parse import TREE_OPS, load, metadata
from .reader import read_onnx


def rows_as_float32(ensemble: Ensemble, rows: Sequence[Sequence[Any]]) -> List[List[Any]]:
    """Rows with every numeric value rounded to float32 (what a float32 graph sees)."""
    out = []
    for row in rows:
        new = []
        for f, v in zip(ensemble.features, row):
            if f.is_categorical or v is None or isinstance(v, str):
                new.append(v)
            else:
                with np.errstate(over="ignore"):
                    new.append(float(np.float32(v)))
        out.append(new)
    return out


def _ulps(a: float, b: float) -> int:
    from boxwood_runtime.scorer import ulp_distance

    return ulp_distance(float(a), float(b))


RUNTIME_HINT = 'pip install "boxwood[onnx]"'


def require_runtime() -> None:
    """MissingDependency (with the install hint) unless onnxruntime can be imported: the
    check of an ONNX file runs it, and a check that cannot run is never reported as passed."""
    try:
        import onnxruntime  # noqa: F401
    except ImportError as exc:
        raise MissingDependency("checking an ONNX file needs onnxruntime, which is not installed (%s): %s"
                                % (exc, RUNTIME_HINT))


def check_onnx(source: Any, expected: Optional[Ensemble] = None) -> Tuple[bool, str]:
    """Run the ONNX model with onnxruntime on reference rows; return (ok, one-line message).

    ``expected``: the ensemble the file was written from (at export time); without it the
    check uses the source numbers carried in the metadata, or the trees read from the file."""
    from boxwood_runtime.scorer import SELF_CHECK_ULPS

    require_runtime()
    model = load(source)
    read = read_onnx(model)
    evaluator = OnnxRuntimeEvaluator(model, read)
    meta = metadata(model)
    semantics = meta.get("boxwood.semantics") if isinstance(meta.get("boxwood.semantics"), dict) else {}
    bound = meta.get("boxwood.raw_error_bound")
    if read.reference is not None:  # exact graph, float64 input: the source's own numbers
        ref = read.reference
        raw, transformed, _ = evaluator.evaluate(ref.rows)
        want = np.asarray(ref.raw, dtype=np.float64)
        if raw.shape != want.shape or not np.array_equal(raw, want):
            bad = int(np.flatnonzero(np.any(raw != want, axis=1))[0]) if raw.shape == want.shape else 0
            return False, "reference row %d: onnxruntime raw scores %r, the source's %r" % (
                bad, raw[bad].tolist(), want[bad].tolist())
        want_t = np.asarray(ref.transformed, dtype=np.float64)
        worst = max((_ulps(a, b) for a, b in zip(transformed.ravel(), want_t.ravel())), default=0)
        if worst > SELF_CHECK_ULPS:
            return False, "transformed outputs differ from the source's by %d ulps (allowed %d)" % (
                worst, SELF_CHECK_ULPS)
        return True, ("%d reference rows reproduced by onnxruntime (raw scores exact, outputs within %d ulps)"
                      % (len(ref.rows), worst))
    # (a pipeline's ensemble takes raw fields; its graph takes the features: use the trees read)
    basis = expected if expected is not None and expected.fields is None else read
    if basis.reference is not None:
        rows = basis.reference.rows
    else:
        from ...reference_rows import probe_rows

        rows = probe_rows(basis, 6)
    if evaluator.input_precision == "float32":
        rows = rows_as_float32(basis, rows)
    want = hub_outputs(basis, rows).raw
    raw = evaluator.raw(rows)
    if isinstance(bound, list) and len(bound) == basis.n_outputs:
        limit = np.asarray(bound, dtype=np.float64)
        what = "boxwood.raw_error_bound"
    elif evaluator.summation_precision == "float32":
        from .legacy import raw_error_bound

        limit = np.asarray(raw_error_bound(read), dtype=np.float64)
        what = "the float32 summation bound"
    else:
        limit = np.zeros(basis.n_outputs)
        what = "exactness"
    err = np.abs(raw - want).max(axis=0) if len(rows) else np.zeros(basis.n_outputs)
    if raw.shape != want.shape or not np.all(err <= limit):
        return False, "onnxruntime raw scores differ from the trees' float64 scores by %r (allowed by %s: %r)" % (
            err.tolist(), what, limit.tolist())
    kind = semantics.get("variant", "made elsewhere")
    if what == "exactness":
        return True, "%d rows: onnxruntime raw scores identical to the trees' float64 scores (%s graph)" % (
            len(rows), kind)
    return True, "%d rows: onnxruntime within %s of the trees' float64 scores (%s graph; largest error %s)" % (
        len(rows), what, kind, ", ".join("%.3g" % e for e in err))


def describe_onnx(path: Union[str, Path]) -> Dict[str, Any]:
    """What ``boxwood inspect`` shows for an ONNX file (same keys as for a JSON artefact)."""
    data = Path(path).read_bytes()
    model = load(data)
    e = read_onnx(model)
    meta = metadata(model)
    tree = [n for n in model.graph.node if n.op_type in TREE_OPS][0]
    opsets = {o.domain or "ai.onnx": o.version for o in model.opset_import}
    ok, message = check_onnx(model)
    prov = e.provenance
    return {
        "file": str(path),
        "bytes": len(data),
        "digest": "sha256:" + hashlib.sha256(data).hexdigest(),
        "format": "ONNX (%s, ai.onnx.ml opset %s; %s)" % (tree.op_type, opsets.get("ai.onnx.ml"),
                                                        (meta.get("boxwood.semantics") or {}).get("variant", "not made by boxwood")
                                                        if isinstance(meta.get("boxwood.semantics"), dict) else "not made by boxwood"),
        "format_version": "ir %d, opsets %s" % (model.ir_version, ", ".join("%s %s" % kv for kv in sorted(opsets.items()))),
        "task": e.task,
        "features": [{"name": f.name, "kind": f.kind, "categories": len(f.categories) if f.is_categorical else None}
                     for f in e.features],
        "inputs": describe_inputs(e.fields, [(f.name, f.categories if f.is_categorical else None, f.source)
                                             for f in e.features]),
        "compare_precision": e.compare_precision,
        "missing_values": e.missing_values,
        "accepts_infinity": e.accepts_infinity,
        "outputs": {"names": list(e.output_names), "post_transform": e.post_transform, "classes": e.classes,
                    "binary_rule": e.binary_rule,
                    "graph_outputs": [o.name for o in model.graph.output]},
        "combine": e.combine,
        "trees": len(e.trees),
        "nodes": e.n_nodes,
        "max_depth": e.max_depth(),
        "provenance": {"estimator": prov.get("estimator"), "versions": prov.get("versions"),
                       "parameters": prov.get("parameters"),
                       "producer": "%s %s" % (model.producer_name, model.producer_version)},
        "self_check": {"ok": ok, "message": message, "rows": len(e.reference.rows) if e.reference else 0},
    }


def open_artefact(path: Path) -> Artefact:
    """The verifier's loader for ``.onnx`` files: the ensemble read from the graph and an
    onnxruntime evaluator (one thread), plus the file's own check as its self-check."""
    data = Path(path).read_bytes()
    model = load(data)
    ensemble = read_onnx(model)
    evaluators = [OnnxRuntimeEvaluator(model, ensemble)]
    meta = metadata(model)
    notes = []
    bound = meta.get("boxwood.raw_error_bound")
    if isinstance(bound, list):
        notes.append("legacy float32 graph: leaves, base values and the sum are float32; stated raw-score "
                     "error bound per output: %s" % ", ".join("%.3g" % b for b in bound))
    tree = [n for n in model.graph.node if n.op_type in TREE_OPS][0]
    return Artefact(str(path), ensemble, evaluators,
                    format="ONNX (%s, ai.onnx.ml opset %s)" % (
                        tree.op_type, {o.domain: o.version for o in model.opset_import}.get("ai.onnx.ml")),
                    digest="sha256:" + hashlib.sha256(data).hexdigest(), self_check=check_onnx(model),
                    notes=notes, stated_raw_bound=[float(b) for b in bound] if isinstance(bound, list) else None)
