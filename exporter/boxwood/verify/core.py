"""``verify``: run the structural proof and the empirical check, build the result."""
from __future__ import annotations

import math
import sys
import time
from pathlib import Path
from typing import Any, Dict, List, Optional, Sequence, Tuple, Union

import numpy as np

from ..ir import Ensemble
from . import bounds, empirical, probes
from .evaluators import Artefact, Outputs, SourceEvaluator, open_artefact
from .report import ArtefactReport, Check, EvaluatorReport, VerifyResult
from .structure import Side, prove

CHUNK_ROWS = 1024
PathLike = Union[str, Path]


def _load_model(model_or_path: Any) -> Tuple[Any, str, Optional[str]]:
    if isinstance(model_or_path, (str, Path)):
        from ..export import load_model_file

        path = Path(model_or_path)
        if not path.is_file():
            raise FileNotFoundError("model file %r not found" % str(path))
        try:
            model = load_model_file(path)
        except (OSError, MemoryError):
            raise
        except Exception as exc:  # unpickling can raise anything; it is the user's file
            raise ValueError("cannot load %r as a joblib or pickle file: %s: %s"
                             % (str(path), type(exc).__name__, exc))
        return model, path.name, str(path)
    return model_or_path, type(model_or_path).__name__, None


def _tolerances(source: Ensemble, abs_tol: Optional[float], rel_tol: Optional[float],
                overrides: Optional[Dict[str, Tuple[float, float]]]) -> Dict[str, Dict[str, Any]]:
    out = {}
    for kind, (a, r, why) in bounds.default_tolerances(source.post_transform, source.n_outputs).items():
        source_of = "default"
        if overrides and kind in overrides:
            a, r = overrides[kind]
            why, source_of = "given for %s outputs" % kind, "given"
        if abs_tol is not None:
            a, source_of = float(abs_tol), "given"
        if rel_tol is not None:
            r, source_of = float(rel_tol), "given"
        for name, v in (("abs", a), ("rel", r)):
            if not (isinstance(v, (int, float)) and v >= 0 and not math.isnan(v)):
                raise ValueError("the %s tolerance must be a number >= 0, got %r" % (name, v))
        if source_of == "given":
            why = "set by the caller (%s); the default was: %s" % (
                "abs %g, rel %g" % (a, r), bounds.default_tolerances(source.post_transform, source.n_outputs)[kind][2])
        out[kind] = {"abs": float(a), "rel": float(r), "origin": source_of, "why": why}
    return out


class _Progress:
    """A progress bar on stderr (tqdm), shown only on a terminal unless asked for."""

    def __init__(self, enabled: Optional[bool], total: int):
        if enabled is None:
            enabled = bool(getattr(sys.stderr, "isatty", lambda: False)())
        self.bar = None
        if enabled and total:
            from tqdm import tqdm

            self.bar = tqdm(total=total, unit="row", file=sys.stderr, leave=False, dynamic_ncols=True,
                            desc="boxwood verify")

    def phase(self, text: str) -> None:
        if self.bar is not None:
            self.bar.set_description("verify: %s" % text)

    def step(self, n: int) -> None:
        if self.bar is not None:
            self.bar.update(n)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()


def _run(ev: Any, rows: List[List[Any]], widths: Tuple[int, int], bar: _Progress
         ) -> Tuple[Outputs, List[Tuple[int, str]]]:
    """Evaluate ``rows`` in blocks; a block that raises is redone row by row, and the rows
    that still raise are returned as refused (their values are NaN, their label None)."""
    n_exact, n_out = widths
    raws, outs, labels = [], [], []
    refused: List[Tuple[int, str]] = []
    step = int(getattr(ev, "block_rows", CHUNK_ROWS) or CHUNK_ROWS)

    def run(start: int, block: List[List[Any]]) -> List[Outputs]:
        # A block that raises is split in halves until the rows that raise alone are found.
        try:
            return [ev.evaluate(block)]
        except (ValueError, OverflowError, TypeError) as exc:
            if len(block) == 1:
                refused.append((start, "%s: %s" % (type(exc).__name__, exc)))
                return [Outputs(np.full((1, n_exact), np.nan), np.full((1, n_out), np.nan), [None])]
            half = len(block) // 2
            return run(start, block[:half]) + run(start + half, block[half:])

    for start in range(0, len(rows), step):
        block = rows[start:start + step]
        for p in run(start, block):
            m = len(p.raw)
            raws.append(np.asarray(p.raw, dtype=np.float64).reshape(m, -1))
            outs.append(np.asarray(p.transformed, dtype=np.float64).reshape(m, -1))
            labels.extend(p.labels if p.labels is not None else [None] * m)
        bar.step(len(block))
    for arr, width, what in ((raws, n_exact, "exact values"), (outs, n_out, "transformed outputs")):
        bad = [a.shape[1] for a in arr if a.shape[1] != width]
        if bad:
            raise ValueError("evaluator %r returned %d %s per row, expected %d" % (ev.name, bad[0], what, width))
    raw = np.concatenate(raws) if raws else np.empty((0, n_exact))
    out = np.concatenate(outs) if outs else np.empty((0, n_out))
    return Outputs(raw, out, labels), refused


def verify(model_or_path: Any, artefact_paths: Union[PathLike, Sequence[PathLike]], data: Any = None,
           abs_tol: Optional[float] = None, rel_tol: Optional[float] = None,
           probes: int = probes.DEFAULT_PROBE_ROWS, seed: int = 0, progress: Optional[bool] = None,
           tolerances: Optional[Dict[str, Tuple[float, float]]] = None) -> VerifyResult:
    """Prove that each artefact computes what the source model computes; return a VerifyResult.

    ``model_or_path``: the fitted estimator, or a joblib/pickle file of it. Loading a
    pickle or joblib file RUNS CODE stored in it: only pass files you or someone you trust
    made. ``artefact_paths``: one path or several; the extension picks the artefact kind
    (:data:`boxwood.verify.ARTEFACT_KINDS`). ``data``: rows to compare on besides the
    generated probes: a CSV (header row) or JSON Lines file, a pandas DataFrame, an
    ndarray, or a list of records. ``abs_tol``/``rel_tol``: a difference passes when
    ``|a - s| <= max(abs_tol, rel_tol * |s|)``; given values replace the per-kind defaults
    for every output kind, ``tolerances={"raw": (a, r), "transformed": (a, r)}`` sets one
    kind. ``probes``: the most generated probe rows (0: none). ``seed``: for the random
    rows. ``progress``: a progress bar on stderr (None: only on a terminal).

    Raises ValueError / OSError for bad input (an unreadable model, artefact or data file,
    an unsupported model); a parity failure is a result with ``passed`` False, not an error.
    """
    t0 = time.perf_counter()
    from ..readers import read_model

    model, label, model_path = _load_model(model_or_path)
    source = read_model(model)
    source_ev = SourceEvaluator(model, source)
    paths = [artefact_paths] if isinstance(artefact_paths, (str, Path)) else list(artefact_paths)
    if not paths:
        raise ValueError("give at least one artefact to verify")
    opened: List[Artefact] = [open_artefact(p) for p in paths]
    if getattr(source, "fields", None) is not None:
        # An artefact holding a pipeline's tree part only (boxwood's ONNX graphs) takes the
        # preprocessed features: evaluators that can, prepare the raw-field rows with the
        # source's preprocessing (the device scorer's) before running the artefact.
        for a in opened:
            if getattr(a.ensemble, "fields", None) is None:
                for ev in a.evaluators:
                    hook = getattr(ev, "use_source_preprocessing", None)
                    if hook is not None:
                        hook(source)
    tol = _tolerances(source, abs_tol, rel_tol, tolerances)
    if not isinstance(probes, int) or isinstance(probes, bool) or probes < 0:
        raise ValueError("probes must be a whole number >= 0, got %r" % (probes,))

    rows = probes_mod.read_data(data, source) if data is not None else probes_mod.Rows()
    n_data = len(rows)
    sides = []
    for a in opened:
        precisions = {ev.compare_precision or a.ensemble.compare_precision for ev in a.evaluators}
        for p in sorted(precisions):
            sides.append((a.ensemble, p, Path(a.path).name))
    notes: List[str] = []
    if getattr(source, "fields", None) is not None:
        # A pipeline: records hold raw fields. Probes are made in feature space (no data
        # rows as bases) and mapped back to fields through the encoders.
        made = probes_mod.generate(source, sides, [], budget=probes, seed=seed)
        for r, kind, origin in zip(probes_mod.to_field_rows(made.rows, source), made.kinds, made.origins):
            rows.add(r, kind, origin)
        notes.append("the model carries preprocessing: probes are made for the features and mapped back to the "
                     "raw fields (an encoded feature takes the category nearest to the probe's code)")
    else:
        probes_mod.generate(source, sides, rows.rows[:n_data], budget=probes, seed=seed, out=rows)
    all_rows = rows.rows
    n_ev = sum(len(a.evaluators) for a in opened)
    need32 = any(ev.input_precision == "float32" for a in opened for ev in a.evaluators)
    bar = _Progress(progress, len(all_rows) * (1 + n_ev + (1 if need32 else 0)))
    exact_vals, transformed, _ = bounds.value_bounds(source, [_zero_bound(source, j) for j in range(source.n_outputs)])
    widths = (len(exact_vals), len(transformed))
    try:
        bar.phase("source model")
        source_runs: Dict[str, Tuple[List[List[Any]], List[int], Outputs, List[Tuple[int, str]]]] = {}
        src_out, src_refused = _run(source_ev, all_rows, widths, bar)
        source_runs["float64"] = (all_rows, list(range(len(all_rows))), src_out, src_refused)
        if src_refused:
            notes.append("the source model refused %d rows (they are left out); first: row %d (%s): %s"
                         % (len(src_refused), src_refused[0][0], rows.origins[src_refused[0][0]], src_refused[0][1]))
        if need32:
            r32, kept = probes_mod.round_rows_float32(all_rows, source)
            out32, ref32 = _run(source_ev, r32, widths, bar)
            source_runs["float32"] = (r32, kept, out32, ref32)
        proofs: Dict[Tuple[Any, ...], Any] = {}
        reports = []
        for a in opened:
            reports.append(_verify_artefact(a, source, source_ev, source_runs, rows, tol, proofs, widths, bar))
    finally:
        bar.close()
    counts = rows.counts()
    result = VerifyResult(
        model={"label": label, "path": model_path, "estimator": source.provenance.get("estimator"),
               "task": source.task, "trees": len(source.trees), "nodes": source.n_nodes,
               "outputs": source.n_outputs, "post_transform": source.post_transform,
               "compare_precision": source.compare_precision, "classes": source.classes},
        artefacts=reports,
        rows={"total": len(all_rows), "data": counts["data"], "special": counts["special"],
              "split": counts["split"], "random": counts["random"]},
        tolerances=tol,
        settings={"probes": probes, "seed": seed, "data": str(data) if isinstance(data, (str, Path)) else
                  (None if data is None else type(data).__name__)},
        notes=notes,
    )
    result.seconds = time.perf_counter() - t0
    return result


probes_mod = probes  # the parameter ``probes`` shadows the module inside verify()


def _fmt_bound(x: float) -> str:
    return "0" if x == 0 else ("inf" if math.isinf(x) else "%.3g" % x)


def _verify_artefact(a: Artefact, source: Ensemble, source_ev: SourceEvaluator, source_runs, rows: "probes.Rows",
                     tol: Dict[str, Dict[str, Any]], proofs, widths: Tuple[int, int], bar: _Progress) -> ArtefactReport:
    name = a.path
    art_checks: List[Check] = []
    self_check = None
    if a.self_check is not None:
        ok, message = a.self_check
        self_check = {"ok": bool(ok), "message": message}
        art_checks.append(Check("self-check", name, None, "pass" if ok else "fail",
                                message if ok else "the artefact's own self-check fails: " + message,
                                [] if ok else ["a device loading this artefact with the default settings refuses it: "
                                               + message]))
    evs = []
    for ev in a.evaluators:
        evs.append(_verify_evaluator(a, ev, source, source_ev, source_runs, rows, tol, proofs, widths, bar))
    return ArtefactReport(a.path, a.format, a.digest, self_check, art_checks, evs, list(a.notes))


def _zero_bound(source: Ensemble, j: int):
    from .structure import OutputBound

    return OutputBound(j, str(source.output_names[j]) if j < len(source.output_names) else str(j), True,
                       0.0, 0.0, 0.0, 0.0, [], (0.0, 0.0), (0.0, 0.0))


def _verify_evaluator(a: Artefact, ev: Any, source: Ensemble, source_ev: SourceEvaluator, source_runs,
                      rows: "probes.Rows", tol, proofs, widths: Tuple[int, int], bar: _Progress) -> EvaluatorReport:
    name = a.path
    checks: List[Check] = []
    props = {"input_precision": ev.input_precision, "compare_precision": ev.compare_precision,
             "summation_order": ev.summation_order, "summation_precision": ev.summation_precision,
             "transform_implementation": getattr(ev, "transform_implementation", "unspecified")}
    cp = ev.compare_precision or a.ensemble.compare_precision
    props["effective_compare_precision"] = cp

    # ---- structure and certified bound (shared by evaluators with the same semantics)
    bar.phase("structure (%s)" % ev.name)
    t = time.perf_counter()
    key = (id(a), ev.input_precision, cp, ev.summation_order, ev.summation_precision)
    if key not in proofs:
        src_side = Side(source, source.compare_precision, source_ev.summation_order, source_ev.summation_precision)
        art_side = Side(a.ensemble, cp, ev.summation_order, ev.summation_precision)
        proof = prove(src_side, art_side, ev.input_precision)
        if proof.comparable and a.ensemble.post_transform == source.post_transform:
            exact_b, trans_b, lines = bounds.value_bounds(source, proof.outputs,
                                                          getattr(a.ensemble, "post_transform_params", None))
        else:
            ev_e, ev_t, _ = bounds.value_bounds(source, [_zero_bound(source, j) for j in range(source.n_outputs)])
            exact_b = [bounds.ValueBound(v.name, math.inf, math.inf) for v in ev_e]
            trans_b = [bounds.ValueBound(v.name, math.inf, math.inf) for v in ev_t]
            lines = ["no bound: the two models differ in their inputs, outputs or post-transform"]
        proofs[key] = (proof, exact_b, trans_b, lines, time.perf_counter() - t)
    proof, exact_b, trans_b, transform_lines, t_structure = proofs[key]
    fails = [f for f in proof.findings if f.severity == "fail"]
    n_fail, n_value, n_note = proof.count("fail"), proof.count("value"), proof.count("note")
    if n_fail:
        summary = "%d difference%s in routing or metadata (%s)" % (
            n_fail, "" if n_fail == 1 else "s", ", ".join(sorted({f.kind for f in fails})))
    elif n_value:
        summary = "routing %s; %d value difference%s (judged by the bound)" % (
            "equivalent (see notes)" if n_note else "identical", n_value, "" if n_value == 1 else "s")
    else:
        summary = "%d trees, %d nodes paired; no differences" % (proof.trees_compared, proof.nodes_compared)
    details = ["%s: %s: %s" % (f.location(), f.kind, f.message) for f in fails]
    details += ["%s: %s: %s" % (f.location(), f.kind, f.message) for f in proof.findings if f.severity == "value"]
    checks.append(Check("structure", name, ev.name, "fail" if n_fail else "pass", summary, details, t_structure))

    raw_bound = max((o.raw_abs for o in proof.outputs), default=0.0)
    for kind, vbs in (("raw", exact_b), ("transformed", trans_b)):
        tk = tol[kind]
        bad, parts = [], []
        for vb in vbs:
            ok = bounds.within(vb.abs, vb.rel, tk["abs"], tk["rel"])
            parts.append("%s: %s" % (vb.name, "exact" if (vb.exact and kind == "raw") else
                                     "abs %s, rel %s" % (_fmt_bound(vb.abs), _fmt_bound(vb.rel))))
            if ok:
                continue
            line = ("output %s: certified bound abs %s / rel %s exceeds the tolerance (abs %s, rel %s)"
                    % (vb.name, _fmt_bound(vb.abs), _fmt_bound(vb.rel), _fmt_bound(tk["abs"]), _fmt_bound(tk["rel"])))
            if kind == "raw":
                o = next((o for o in proof.outputs if o.name == vb.name), None)
                if o is not None:
                    top = ", ".join("tree %s: %s" % (s if s is not None else "artefact %s" % t_a, _fmt_bound(c))
                                    for s, t_a, c in o.contributions[:3])
                    line += "; leaves %s, base %s, rounding %s%s" % (
                        _fmt_bound(o.leaf_term), _fmt_bound(o.base_term), _fmt_bound(o.rounding_term),
                        "; largest: " + top if top else "")
            else:
                line += "; from raw bounds up to %s through %s" % (_fmt_bound(raw_bound), source.post_transform)
            bad.append(line)
        summary = "; ".join(parts[:3]) + ("; ..." if len(parts) > 3 else "")
        extra = [proof.decisions] if (kind == "raw" and bad and proof.decisions) else []
        checks.append(Check("bound: %s" % kind, name, ev.name, "fail" if bad else "pass", summary, bad + extra))

    # ---- empirical
    bar.phase(ev.name)
    t = time.perf_counter()
    run_rows, kept, src_out, src_refused = source_runs[ev.input_precision]
    got, refused = _run(ev, run_rows, widths, bar)
    t_eval = time.perf_counter() - t
    origins = [rows.origins[i] for i in kept]
    usable = np.ones(len(run_rows), dtype=bool)
    for i, _ in src_refused:
        usable[i] = False
    refused_usable = [(i, m) for i, m in refused if usable[i]]
    for i, _ in refused:
        usable[i] = False
    idx = np.flatnonzero(usable)
    measured = {"raw": [], "transformed": []}
    failures = {"raw": [], "transformed": []}
    for kind, vbs, s_arr, a_arr in (("raw", exact_b, src_out.raw, got.raw),
                                    ("transformed", trans_b, src_out.transformed, got.transformed)):
        for j, vb in enumerate(vbs):
            m = empirical.measure(s_arr[idx, j], a_arr[idx, j], tol[kind]["abs"], tol[kind]["rel"])
            m.worst_row = None if m.worst_row is None else int(idx[m.worst_row])
            m.examples = [int(idx[r]) for r in m.examples]
            measured[kind].append(m)
            if m.over:
                failures[kind].append("output %s: %d of %d rows over the tolerance; largest |difference| %s "
                                      "(%d ulps) at row %d, %s: source %r, artefact %r" % (
                                          vb.name, m.over, m.rows, _fmt_bound(m.max_abs), m.max_ulp, m.worst_row,
                                          origins[m.worst_row], m.worst_source, m.worst_value))
                for r in m.examples[:3]:
                    failures[kind].append("  row %d (%s): source %r, artefact %r" % (
                        r, origins[r], float(s_arr[r, j]), float(a_arr[r, j])))
    for kind in ("raw", "transformed"):
        ms = measured[kind]
        details = list(failures[kind])
        if kind == "raw" and refused_usable:
            details.insert(0, "%d rows the source scores were refused; first: row %d (%s): %s" % (
                len(refused_usable), refused_usable[0][0], origins[refused_usable[0][0]], refused_usable[0][1]))
        summary = "%d rows; max |diff| %s, max rel %s, max %d ulps; %d over tolerance" % (
            len(idx), _fmt_bound(max((m.max_abs for m in ms), default=0.0)),
            _fmt_bound(max((m.max_rel for m in ms), default=0.0)), max((m.max_ulp for m in ms), default=0),
            sum(m.over for m in ms))
        if kind == "raw" and refused_usable:
            summary += "; %d refused" % len(refused_usable)
        checks.append(Check("empirical: %s" % kind, name, ev.name, "fail" if details else "pass", summary, details,
                            t_eval if kind == "raw" else 0.0))

    dec = None
    if source.task != "regression":
        s_lab = [src_out.labels[i] for i in idx]
        a_lab = [got.labels[i] for i in idx]
        rule = source.binary_rule if (source.n_outputs == 1 and source.task == "classification") else None
        dec = empirical.decisions(s_lab, a_lab, src_out.raw[idx], got.raw[idx], rule)
        dec["flip_rows"] = [int(idx[r]) for r in dec["flip_rows"]]
        if "crossing_rows" in dec:
            dec["crossing_rows"] = [int(idx[r]) for r in dec["crossing_rows"]]
        details = ["row %d (%s): source says %r, artefact says %r" % (r, origins[r], src_out.labels[r],
                                                                      got.labels[r]) for r in dec["flip_rows"]]
        summary = "%d label flips in %d rows" % (dec["flips"], len(idx))
        if "crossings" in dec:
            summary += "; %d raw-score crossings of the %s rule" % (dec["crossings"], rule)
        checks.append(Check("empirical: decisions", name, ev.name, "fail" if dec["flips"] else "pass", summary, details))
    else:
        checks.append(Check("empirical: decisions", name, ev.name, "skip", "regression: no decisions to compare"))

    # ---- the certified bound is never below an observed difference
    broken = []
    for kind, vbs in (("raw", exact_b), ("transformed", trans_b)):
        for vb, m in zip(vbs, measured[kind]):
            if m.max_abs > vb.abs or m.max_rel > vb.rel:
                broken.append("output %s %s: observed abs %r / rel %r, certified abs %r / rel %r (row %s, %s)" % (
                    vb.name, kind, m.max_abs, m.max_rel, vb.abs, vb.rel, m.worst_row,
                    origins[m.worst_row] if m.worst_row is not None else "-"))
    if broken:
        broken.append("the certified bound's assumptions do not hold here (e.g. exp less accurate than assumed) "
                      "or boxwood has a bug: please report it")
    checks.append(Check("bound holds", name, ev.name, "fail" if broken else "pass",
                        "every observed difference is within the certified bound" if not broken else
                        "%d observed differences exceed the certified bound" % (len(broken) - 1), broken))

    structure = {
        "comparable": proof.comparable,
        "trees_compared": proof.trees_compared,
        "nodes_compared": proof.nodes_compared,
        "coarse_pairs": proof.coarse_pairs,
        "counts": {"fail": n_fail, "value": n_value, "note": n_note},
        "counts_by_kind": dict(sorted(proof.counts.items())),
        "findings": [f.to_dict() for f in proof.findings],
        "domain": list(proof.domain),
        "decisions": proof.decisions,
    }
    bound = {"derivation": list(proof.derivation) + list(transform_lines),
             "outputs": [o.to_dict() for o in proof.outputs],
             "exact_values": [v.to_dict() for v in exact_b],
             "transformed": [v.to_dict() for v in trans_b]}
    per_value = {"raw": [dict(m.to_dict(origins), name=vb.name) for vb, m in zip(exact_b, measured["raw"])],
                 "transformed": [dict(m.to_dict(origins), name=vb.name)
                                 for vb, m in zip(trans_b, measured["transformed"])]}
    emp = {"rows": int(len(idx)),
           "refused": {"count": len(refused_usable),
                       "examples": [{"row": i, "origin": origins[i], "message": m} for i, m in refused_usable[:5]]},
           "raw": per_value["raw"], "transformed": per_value["transformed"], "decisions": dec}
    return EvaluatorReport(ev.name, props, structure, bound, emp, checks)


def assert_equivalent(model_or_path: Any, artefact_paths: Union[PathLike, Sequence[PathLike]], data: Any = None,
                      **options: Any) -> VerifyResult:
    """Run :func:`verify` and raise AssertionError with the terminal summary unless it passes.

    For pytest::

        from boxwood.verify import assert_equivalent

        def test_exported_model_matches(fitted_model, tmp_path):
            assert_equivalent(fitted_model, "model.json", data=X_test)
    """
    result = verify(model_or_path, artefact_paths, data=data, **options)
    if not result.passed:
        raise AssertionError("boxwood verify failed\n" + result.summary())
    return result
