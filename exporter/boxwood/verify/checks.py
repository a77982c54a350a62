"""The checks the verifier runs for each artefact and evaluator, one function per check.

Each returns :class:`~.report.Check` objects (name, artefact, evaluator, status, summary,
details); :func:`verify_artefact` runs them in order and gathers the report:

* ``self-check`` - the artefact's own embedded check, where its format has one;
* ``structure`` - the structural proof (:mod:`.structure`): routing and metadata;
* ``bound: raw`` / ``bound: transformed`` - the certified bound against the tolerance;
* ``empirical: raw`` / ``empirical: transformed`` - observed differences on the rows;
* ``empirical: decisions`` - label flips (skipped for regressors);
* ``bound holds`` - no observed difference exceeds the certified bound.
"""
from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Any, Dict, List, Optional, Tuple

import numpy as np

from ..contract import Outputs
from ..formats import Artefact
from ..ir import Ensemble
from . import bounds, empirical
from .report import ArtefactReport, Check, EvaluatorReport
from .findings import OutputBound, Side
from .structure import prove

NOTHING_COMPARED = "not run: no rows were compared (no --data rows, --probes 0, or every row left out)"
# The source model's outputs per input precision: (rows, kept row indices, outputs, refused rows).
SourceRuns = Dict[str, Tuple[List[List[Any]], List[int], Outputs, List[Tuple[int, str]]]]


def fmt_bound(x: float) -> str:
    return "0" if x == 0 else ("inf" if math.isinf(x) else "%.3g" % x)


def zero_bound(source: Ensemble, j: int) -> OutputBound:
    """A zero raw bound for output ``j`` (used to size the value lists before any proof)."""
    return OutputBound(j, str(source.output_names[j]) if j < len(source.output_names) else str(j), True,
                       0.0, 0.0, 0.0, 0.0, [], (0.0, 0.0), (0.0, 0.0))


@dataclass
class ProvenBounds:
    """The structural proof of one (artefact, evaluator semantics) pair and its value bounds."""

    proof: Any
    exact: List[bounds.ValueBound]
    transformed: List[bounds.ValueBound]
    transform_lines: List[str]
    seconds: float


@dataclass
class Measured:
    """The empirical comparison of one evaluator with the source on the usable rows."""

    idx: np.ndarray  # indices of the rows both sides scored
    origins: List[str]
    got: Outputs
    source: Outputs
    refused: List[Tuple[int, str]]  # rows the evaluator refused that the source scored
    per_value: Dict[str, List[empirical.Metrics]]
    seconds: float


# ----------------------------------------------------------------------------- tolerances
@dataclass
class Tolerances:
    """Per kind ("raw", "transformed"), one (abs, rel) per compared value, and where they come from."""

    per_value: Dict[str, List[Tuple[float, float]]]
    origin: str = "run"  # "run": the run's tolerances; "stated": the artefact's own stated bound


def tolerances_for(a: Artefact, source: Ensemble, pb: ProvenBounds, tol: Dict[str, Dict[str, Any]]) -> Tolerances:
    """The run's tolerances for every value, except for an artefact that states its own raw
    error bound (a float32 ONNX graph) while the caller gave none: that file is held to what
    it states - the stated raw bound per output, and that bound carried through the
    post-transform (:func:`bounds.value_bounds`) for the transformed outputs."""
    run = {kind: [(tol[kind]["abs"], tol[kind]["rel"])] * len(vbs)
           for kind, vbs in (("raw", pb.exact), ("transformed", pb.transformed))}
    stated = a.stated_raw_bound
    if (not stated or len(stated) != source.n_outputs or tol["raw"]["origin"] == "given"
            or not pb.proof.comparable):
        return Tolerances(run)
    carried = [OutputBound(o.output, o.name, False, float(b), 0.0, 0.0, 0.0, [], o.source_range, o.artefact_range)
               for o, b in zip(pb.proof.outputs, stated)]
    exact_t, trans_t, _ = bounds.value_bounds(source, carried)
    per = {"raw": [(v.abs, 0.0) for v in exact_t],
           "transformed": [(max(v.abs, t[0]), max(v.rel, t[1])) if tol["transformed"]["origin"] != "given" else t
                           for v, t in zip(trans_t, run["transformed"])]}
    return Tolerances(per, "stated")


# ----------------------------------------------------------------------------- self-check
def self_check(a: Artefact) -> List[Check]:
    if a.self_check is None:
        return []
    ok, message = a.self_check
    return [Check("self-check", a.path, None, "pass" if ok else "fail",
                  message if ok else "the artefact's own self-check fails: " + message,
                  [] if ok else ["a device loading this artefact with the default settings refuses it: " + message])]


# ----------------------------------------------------------------------------- data reading
def data_reading_check(a: Artefact, reading: Any) -> List[Check]:
    """``data reading``: the box reads the user's data file as the workstation does (pandas),
    row by row and field by field. Absent when the data were Python values (one reading)."""
    if reading is None:
        return []
    if reading.differences:
        return [Check("data reading", a.path, None, "fail",
                      "%d of %d data rows read differently by the box and by %s" % (
                          reading.rows_differing, reading.rows, reading.workstation),
                      list(reading.differences))]
    if not reading.rows:
        return [Check("data reading", a.path, None, "skip", "the data file %s holds no rows" % reading.file)]
    return [Check("data reading", a.path, None, "pass",
                  "%d data rows: the box's reading equals %s, field by field" % (reading.rows, reading.workstation))]


# ----------------------------------------------------------------------------- structure
def prove_bounds(a: Artefact, ev: Any, source: Ensemble, source_ev: Any,
                 cache: Dict[Tuple[Any, ...], ProvenBounds]) -> ProvenBounds:
    """The structural proof for this evaluator's semantics (shared by evaluators that state
    the same precisions and summation) and the bounds carried through the post-transform."""
    cp = ev.compare_precision or a.ensemble.compare_precision
    key = (id(a), ev.input_precision, cp, ev.summation_order, ev.summation_precision)
    if key in cache:
        return cache[key]
    t = time.perf_counter()
    src_side = Side(source, source.compare_precision, source_ev.summation_order, source_ev.summation_precision)
    art_side = Side(a.ensemble, cp, ev.summation_order, ev.summation_precision)
    proof = prove(src_side, art_side, ev.input_precision)
    if proof.comparable and a.ensemble.post_transform == source.post_transform:
        exact_b, trans_b, lines = bounds.value_bounds(source, proof.outputs,
                                                      getattr(a.ensemble, "post_transform_params", None))
    else:
        ev_e, ev_t, _ = bounds.value_bounds(source, [zero_bound(source, j) for j in range(source.n_outputs)])
        exact_b = [bounds.ValueBound(v.name, math.inf, math.inf) for v in ev_e]
        trans_b = [bounds.ValueBound(v.name, math.inf, math.inf) for v in ev_t]
        lines = ["no bound: the two models differ in their inputs, outputs or post-transform"]
    cache[key] = ProvenBounds(proof, exact_b, trans_b, lines, time.perf_counter() - t)
    return cache[key]


def structure_check(a: Artefact, ev: Any, pb: ProvenBounds) -> Check:
    proof = pb.proof
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
    return Check("structure", a.path, ev.name, "fail" if n_fail else "pass", summary, details, pb.seconds)


def bound_checks(a: Artefact, ev: Any, source: Ensemble, pb: ProvenBounds, tols: Tolerances) -> List[Check]:
    """``bound: raw`` and ``bound: transformed``: the certified bound within the tolerance."""
    proof = pb.proof
    raw_bound = max((o.raw_abs for o in proof.outputs), default=0.0)
    checks = []
    for kind, vbs in (("raw", pb.exact), ("transformed", pb.transformed)):
        bad, parts = [], []
        for vb, (t_abs, t_rel) in zip(vbs, tols.per_value[kind]):
            parts.append("%s: %s" % (vb.name, "exact" if (vb.exact and kind == "raw") else
                                     "abs %s, rel %s" % (fmt_bound(vb.abs), fmt_bound(vb.rel))))
            if bounds.within(vb.abs, vb.rel, t_abs, t_rel):
                continue
            line = ("output %s: certified bound abs %s / rel %s exceeds the %s (abs %s, rel %s)"
                    % (vb.name, fmt_bound(vb.abs), fmt_bound(vb.rel),
                       "bound the file states" if tols.origin == "stated" else "tolerance",
                       fmt_bound(t_abs), fmt_bound(t_rel)))
            if kind == "raw":
                o = next((o for o in proof.outputs if o.name == vb.name), None)
                if o is not None:
                    top = ", ".join("tree %s: %s" % (s if s is not None else "artefact %s" % t_a, fmt_bound(c))
                                    for s, t_a, c in o.contributions[:3])
                    line += "; leaves %s, base %s, rounding %s%s" % (
                        fmt_bound(o.leaf_term), fmt_bound(o.base_term), fmt_bound(o.rounding_term),
                        "; largest: " + top if top else "")
            else:
                line += "; from raw bounds up to %s through %s" % (fmt_bound(raw_bound), source.post_transform)
            bad.append(line)
        summary = "; ".join(parts[:3]) + ("; ..." if len(parts) > 3 else "")
        if tols.origin == "stated":
            summary += " (held to the raw error bound the file states%s)" % (
                "" if kind == "raw" else ", carried through %s" % source.post_transform)
        extra = [proof.decisions] if (kind == "raw" and bad and proof.decisions) else []
        checks.append(Check("bound: %s" % kind, a.path, ev.name, "fail" if bad else "pass", summary, bad + extra))
    return checks


# ----------------------------------------------------------------------------- empirical
def measure(ev: Any, pb: ProvenBounds, source_runs: SourceRuns, all_origins: List[str],
            tols: Tolerances, run: Any) -> Measured:
    """Run ``ev`` on the rows of its input precision (``run(ev, rows)`` -> (outputs,
    refused rows)) and measure every value against the source's."""
    t = time.perf_counter()
    run_rows, kept, src_out, src_refused = source_runs[ev.input_precision]
    got, refused = run(ev, run_rows)
    seconds = time.perf_counter() - t
    origins = [all_origins[i] for i in kept]
    usable = np.ones(len(run_rows), dtype=bool)
    for i, _ in src_refused:
        usable[i] = False
    refused_usable = [(i, m) for i, m in refused if usable[i]]
    for i, _ in refused:
        usable[i] = False
    idx = np.flatnonzero(usable)
    per_value: Dict[str, List[empirical.Metrics]] = {"raw": [], "transformed": []}
    for kind, vbs, s_arr, a_arr in (("raw", pb.exact, src_out.raw, got.raw),
                                    ("transformed", pb.transformed, src_out.transformed, got.transformed)):
        for j, _ in enumerate(vbs):
            t_abs, t_rel = tols.per_value[kind][j]
            m = empirical.measure(s_arr[idx, j], a_arr[idx, j], t_abs, t_rel)
            m.worst_row = None if m.worst_row is None else int(idx[m.worst_row])
            m.examples = [int(idx[r]) for r in m.examples]
            per_value[kind].append(m)
    return Measured(idx, origins, got, src_out, refused_usable, per_value, seconds)


def empirical_checks(a: Artefact, ev: Any, pb: ProvenBounds, me: Measured) -> List[Check]:
    """``empirical: raw`` and ``empirical: transformed``: rows over the tolerance."""
    checks = []
    origins = me.origins
    for kind, vbs, s_arr, a_arr in (("raw", pb.exact, me.source.raw, me.got.raw),
                                    ("transformed", pb.transformed, me.source.transformed, me.got.transformed)):
        ms = me.per_value[kind]
        details = []
        for j, (vb, m) in enumerate(zip(vbs, ms)):
            if not m.over:
                continue
            details.append("output %s: %d of %d rows over the tolerance; largest |difference| %s (%d ulps) at row "
                           "%d, %s: source %r, artefact %r" % (vb.name, m.over, m.rows, fmt_bound(m.max_abs),
                                                               m.max_ulp, m.worst_row, origins[m.worst_row],
                                                               m.worst_source, m.worst_value))
            for r in m.examples[:3]:
                details.append("  row %d (%s): source %r, artefact %r" % (
                    r, origins[r], float(s_arr[r, j]), float(a_arr[r, j])))
        if kind == "raw" and me.refused:
            i, message = me.refused[0]
            details.insert(0, "%d rows the source scores were refused; first: row %d (%s): %s" % (
                len(me.refused), i, origins[i], message))
        summary = "%d rows; max |diff| %s, max rel %s, max %d ulps; %d over tolerance" % (
            len(me.idx), fmt_bound(max((m.max_abs for m in ms), default=0.0)),
            fmt_bound(max((m.max_rel for m in ms), default=0.0)), max((m.max_ulp for m in ms), default=0),
            sum(m.over for m in ms))
        if kind == "raw" and me.refused:
            summary += "; %d refused" % len(me.refused)
        status = "fail" if details else "pass"
        if not len(me.idx) and not details:  # nothing compared is not a pass
            status, summary = "skip", NOTHING_COMPARED
        checks.append(Check("empirical: %s" % kind, a.path, ev.name, status, summary, details,
                            me.seconds if kind == "raw" else 0.0))
    return checks


def decisions_check(a: Artefact, ev: Any, source: Ensemble, me: Measured) -> Tuple[Check, Optional[Dict[str, Any]]]:
    """``empirical: decisions``: labels that differ (and raw-score crossings of a binary rule)."""
    if source.task == "regression":
        return Check("empirical: decisions", a.path, ev.name, "skip", "regression: no decisions to compare"), None
    idx = me.idx
    if not len(idx):
        return Check("empirical: decisions", a.path, ev.name, "skip", NOTHING_COMPARED), None
    s_lab = [me.source.labels[i] for i in idx]
    a_lab = [me.got.labels[i] for i in idx]
    rule = source.binary_rule if (source.n_outputs == 1 and source.task == "classification") else None
    dec = empirical.decisions(s_lab, a_lab, me.source.raw[idx], me.got.raw[idx], rule)
    dec["flip_rows"] = [int(idx[r]) for r in dec["flip_rows"]]
    if "crossing_rows" in dec:
        dec["crossing_rows"] = [int(idx[r]) for r in dec["crossing_rows"]]
    details = ["row %d (%s): source says %r, artefact says %r" % (r, me.origins[r], me.source.labels[r],
                                                                  me.got.labels[r]) for r in dec["flip_rows"]]
    summary = "%d label flips in %d rows" % (dec["flips"], len(idx))
    if "crossings" in dec:
        summary += "; %d raw-score crossings of the %s rule" % (dec["crossings"], rule)
    return Check("empirical: decisions", a.path, ev.name, "fail" if dec["flips"] else "pass", summary, details), dec


def bound_holds_check(a: Artefact, ev: Any, pb: ProvenBounds, me: Measured) -> Check:
    """``bound holds``: the certified bound is never below an observed difference."""
    broken = []
    for kind, vbs in (("raw", pb.exact), ("transformed", pb.transformed)):
        for vb, m in zip(vbs, me.per_value[kind]):
            if m.max_abs > vb.abs or m.max_rel > vb.rel:
                broken.append("output %s %s: observed abs %r / rel %r, certified abs %r / rel %r (row %s, %s)" % (
                    vb.name, kind, m.max_abs, m.max_rel, vb.abs, vb.rel, m.worst_row,
                    me.origins[m.worst_row] if m.worst_row is not None else "-"))
    if not broken and not len(me.idx):
        return Check("bound holds", a.path, ev.name, "skip", NOTHING_COMPARED)
    if broken:
        broken.append("the certified bound's assumptions do not hold here (e.g. exp less accurate than assumed) "
                      "or boxwood has a bug: please report it")
    return Check("bound holds", a.path, ev.name, "fail" if broken else "pass",
                 "every observed difference is within the certified bound" if not broken else
                 "%d observed differences exceed the certified bound" % (len(broken) - 1), broken)


# ----------------------------------------------------------------------------- reports
def verify_evaluator(a: Artefact, ev: Any, source: Ensemble, source_ev: Any, source_runs: SourceRuns,
                     origins: List[str], tol: Dict[str, Dict[str, Any]], cache: Dict[Tuple[Any, ...], ProvenBounds],
                     run: Any, phase: Any) -> EvaluatorReport:
    """Every check of one evaluator of one artefact, and its part of the report."""
    props = {"input_precision": ev.input_precision, "compare_precision": ev.compare_precision,
             "summation_order": ev.summation_order, "summation_precision": ev.summation_precision,
             "transform_implementation": getattr(ev, "transform_implementation", "unspecified"),
             "effective_compare_precision": ev.compare_precision or a.ensemble.compare_precision}
    phase("structure (%s)" % ev.name)
    pb = prove_bounds(a, ev, source, source_ev, cache)
    tols = tolerances_for(a, source, pb, tol)
    checks = [structure_check(a, ev, pb)] + bound_checks(a, ev, source, pb, tols)
    phase(ev.name)
    me = measure(ev, pb, source_runs, origins, tols, run)
    checks += empirical_checks(a, ev, pb, me)
    decision, dec = decisions_check(a, ev, source, me)
    checks += [decision, bound_holds_check(a, ev, pb, me)]
    proof = pb.proof
    structure = {
        "comparable": proof.comparable,
        "trees_compared": proof.trees_compared,
        "nodes_compared": proof.nodes_compared,
        "coarse_pairs": proof.coarse_pairs,
        "counts": {"fail": proof.count("fail"), "value": proof.count("value"), "note": proof.count("note")},
        "counts_by_kind": dict(sorted(proof.counts.items())),
        "findings": [f.to_dict() for f in proof.findings],
        "domain": list(proof.domain),
        "decisions": proof.decisions,
    }
    bound = {"derivation": list(proof.derivation) + list(pb.transform_lines),
             "outputs": [o.to_dict() for o in proof.outputs],
             "exact_values": [v.to_dict() for v in pb.exact],
             "transformed": [v.to_dict() for v in pb.transformed]}
    if tols.origin == "stated":
        props["tolerance"] = ("the raw error bound the file states, per output: %s"
                              % ", ".join("%.3g" % t[0] for t in tols.per_value["raw"]))
    emp = {"rows": int(len(me.idx)),
           "refused": {"count": len(me.refused),
                       "examples": [{"row": i, "origin": me.origins[i], "message": m} for i, m in me.refused[:5]]},
           "raw": [dict(m.to_dict(me.origins), name=vb.name) for vb, m in zip(pb.exact, me.per_value["raw"])],
           "transformed": [dict(m.to_dict(me.origins), name=vb.name)
                           for vb, m in zip(pb.transformed, me.per_value["transformed"])],
           "decisions": dec}
    return EvaluatorReport(ev.name, props, structure, bound, emp, checks)


def verify_artefact(a: Artefact, source: Ensemble, source_ev: Any, source_runs: SourceRuns, origins: List[str],
                    tol: Dict[str, Dict[str, Any]], cache: Dict[Tuple[Any, ...], ProvenBounds], run: Any,
                    phase: Any, reading: Any = None) -> ArtefactReport:
    evs = [verify_evaluator(a, ev, source, source_ev, source_runs, origins, tol, cache, run, phase)
           for ev in a.evaluators]
    info = None if a.self_check is None else {"ok": bool(a.self_check[0]), "message": a.self_check[1]}
    return ArtefactReport(a.path, a.format, a.digest, info, self_check(a) + data_reading_check(a, reading), evs,
                          list(a.notes))
