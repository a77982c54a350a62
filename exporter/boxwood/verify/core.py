"""``verify``: run the structural proof and the empirical check, build the result."""
from __future__ import annotations

import math
import sys
import time
from pathlib import Path
from typing import Any, Dict, List, Optional, Sequence, Tuple, Union

import numpy as np

from boxwood_runtime import ArtefactError

from ..contract import Outputs
from ..formats import Artefact, DamagedArtefact, open_artefact
from ..formats.registry import file_kind
from ..ir import Ensemble
from ..sources import load_model_file, read_model
from ..sources.model import SourceEvaluator
from . import bounds
from . import probes as probes_mod  # the parameter ``probes`` of verify() shadows the name
from .checks import verify_artefact, zero_bound
from .report import ArtefactReport, Check, VerifyResult

CHUNK_ROWS = 1024
PathLike = Union[str, Path]


def _load_model(model_or_path: Any) -> Tuple[Any, str, Optional[str]]:
    if isinstance(model_or_path, (str, Path)):
        path = Path(model_or_path)
        return load_model_file(path), path.name, str(path)
    return model_or_path, type(model_or_path).__name__, None


def _tolerances(source: Ensemble, abs_tol: Optional[float], rel_tol: Optional[float],
                overrides: Optional[Dict[str, Tuple[float, float]]]) -> Dict[str, Dict[str, Any]]:
    out = {}
    for kind, (a, r, why) in bounds.default_tolerances(source.post_transform, source.n_outputs, source).items():
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
                "abs %g, rel %g" % (a, r), bounds.default_tolerances(source.post_transform, source.n_outputs, source)[kind][2])
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


def _run(ev: Any, rows: List[List[Any]], widths: Tuple[int, int], bar: _Progress, pad: bool = False
         ) -> Tuple[Outputs, List[Tuple[int, str]]]:
    """Evaluate ``rows`` in blocks; a block that raises is redone row by row, and the rows
    that still raise are returned as refused (their values are NaN, their label None).
    ``pad``: an artefact with another number of values per row (the structural proof fails
    it: e.g. a calibrated fold dropped) is cut or padded with NaN to the source's widths, so
    the empirical checks fail instead of the run stopping."""
    n_exact, n_out = widths
    raws, outs, labels = [], [], []
    refused: List[Tuple[int, str]] = []
    step = int(getattr(ev, "block_rows", CHUNK_ROWS) or CHUNK_ROWS)

    def run(start: int, block: List[List[Any]]) -> List[Outputs]:
        # A block that raises is split in halves until the rows that raise alone are found.
        try:
            got = ev.evaluate(block)
            m = len(got.raw)
            shapes = (np.asarray(got.raw).reshape(m, -1).shape[1], np.asarray(got.transformed).reshape(m, -1).shape[1])
            if m and shapes != (n_exact, n_out):
                # an artefact with other outputs than the source (e.g. a dropped target): every
                # row is refused with the reason, so the empirical checks fail instead of crashing
                why = ("the artefact gives %d exact values and %d outputs per row, the source %d and %d"
                       % (shapes + (n_exact, n_out)))
                refused.extend((start + i, why) for i in range(m))
                return [Outputs(np.full((m, n_exact), np.nan), np.full((m, n_out), np.nan), [None] * m)]
            return [got]
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
        if bad and pad:
            arr[:] = [np.pad(a[:, :width], ((0, 0), (0, max(0, width - a.shape[1]))), constant_values=np.nan)
                      for a in arr]
        elif bad:
            raise ValueError("evaluator %r returned %d %s per row, expected %d" % (ev.name, bad[0], what, width))
    raw = np.concatenate(raws) if raws else np.empty((0, n_exact))
    out = np.concatenate(outs) if outs else np.empty((0, n_out))
    return Outputs(raw, out, labels), refused


def verify(model_or_path: Any, artefact_paths: Union[PathLike, Sequence[PathLike]], data: Any = None,
           abs_tol: Optional[float] = None, rel_tol: Optional[float] = None,
           probes: int = probes_mod.DEFAULT_PROBE_ROWS, seed: int = 0, progress: Optional[bool] = None,
           tolerances: Optional[Dict[str, Tuple[float, float]]] = None,
           bad_artefacts: str = "raise") -> VerifyResult:
    """Prove that each artefact computes what the source model computes; return a VerifyResult.

    ``model_or_path``: the fitted estimator, or a joblib/pickle file of it. Loading a
    pickle or joblib file RUNS CODE stored in it: only pass files you or someone you trust
    made. ``artefact_paths``: one path or several; the format registry
    (:mod:`boxwood.formats`) opens each by its content or extension. ``data``: rows to compare on besides the
    generated probes: a CSV (header row) or JSON Lines file, a pandas DataFrame, an
    ndarray, or a list of records. ``abs_tol``/``rel_tol``: a difference passes when
    ``|a - s| <= max(abs_tol, rel_tol * |s|)``; given values replace the per-kind defaults
    for every output kind, ``tolerances={"raw": (a, r), "transformed": (a, r)}`` sets one
    kind. ``probes``: the most generated probe rows (0: none). ``seed``: for the random
    rows. ``progress``: a progress bar on stderr (None: only on a terminal).
    ``bad_artefacts``: "raise" (an artefact that cannot be opened raises ValueError/OSError)
    or "report" (it becomes a failing ``open`` check with the reason and the others are
    verified: what ``boxwood verify`` does; a damaged boxwood artefact is a failed check,
    exit code 1, while a missing file or one of another kind also sets ``result.error``,
    exit code 2).

    Raises ValueError / OSError for bad input (an unreadable model, artefact or data file,
    an unsupported model); a parity failure is a result with ``passed`` False, not an error.
    """
    t0 = time.perf_counter()
    model, label, model_path = _load_model(model_or_path)
    source = read_model(model)
    source_ev = SourceEvaluator(model, source)
    paths = [artefact_paths] if isinstance(artefact_paths, (str, Path)) else list(artefact_paths)
    if not paths:
        raise ValueError("give at least one artefact to verify")
    if bad_artefacts not in ("raise", "report"):
        raise ValueError("bad_artefacts must be 'raise' or 'report', got %r" % (bad_artefacts,))
    opened: List[Artefact] = []
    unopened: List[ArtefactReport] = []
    bad_input: List[str] = []
    for p in paths:
        try:
            opened.append(open_artefact(p))
        except (ValueError, OSError) as exc:
            if bad_artefacts == "raise":
                raise
            message = str(exc) or type(exc).__name__
            if str(p) not in message:
                message = "%s: %s" % (p, message)
            # A damaged boxwood artefact (it carries a digest, but the digest, structure or
            # version fails: ArtefactError) is a failed check, exit 1, as everywhere else; a
            # missing file or a file of another kind is bad input, exit 2 (README, "Exit codes").
            damaged = ((isinstance(exc, ArtefactError) and file_kind(p) == "json-artefact")
                       or isinstance(exc, DamagedArtefact))
            unopened.append(ArtefactReport(str(p), "not opened", None, None, [
                Check("open", str(p), None, "fail", "cannot open the artefact: " + message, [message])], []))
            if not damaged:
                bad_input.append(message)
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
        for r, kind, origin, target in zip(probes_mod.to_field_rows(made.rows, source, made.targets), made.kinds,
                                           made.origins, made.targets):
            rows.add(r, kind, origin, target=target)
        if probes:  # every category (unseen, missing) and the raw values around each scaled threshold
            for r, origin, target in probes_mod.field_probes(source, budget=probes):
                rows.add(r, "special", origin, target=target)
        rows.probed_nodes |= made.probed_nodes
        notes.append("the model carries preprocessing: probes are made for the features and mapped back to the "
                     "raw fields (an encoded feature takes the category nearest to the probe's code)")
    else:
        probes_mod.generate(source, sides, rows.rows[:n_data], budget=probes, seed=seed, out=rows)
    all_rows = rows.rows
    n_ev = sum(len(a.evaluators) for a in opened)
    need32 = any(ev.input_precision == "float32" for a in opened for ev in a.evaluators)
    bar = _Progress(progress, len(all_rows) * (1 + n_ev + (1 if need32 else 0)))
    exact_vals, transformed, _ = bounds.value_bounds(source, [zero_bound(source, j) for j in range(source.n_outputs)])
    widths = (len(exact_vals), len(transformed))
    try:
        bar.phase("source model")
        source_runs: Dict[str, Tuple[List[List[Any]], List[int], Outputs, List[Tuple[int, str]]]] = {}
        # The source model reads the user's data file as the workstation does (pandas);
        # the artefacts read it as the box does. Probes are the same rows for both.
        source_rows = rows.for_source()
        src_out, src_refused = _run(source_ev, source_rows, widths, bar)
        source_runs["float64"] = (all_rows, list(range(len(all_rows))), src_out, src_refused)
        if src_refused:
            notes.append("the source model refused %d rows (they are left out); first: row %d (%s): %s"
                         % (len(src_refused), src_refused[0][0], rows.origins[src_refused[0][0]], src_refused[0][1]))
        if need32:
            r32, kept = probes_mod.round_rows_float32(all_rows, source)
            s32 = probes_mod.round_rows_float32([source_rows[i] for i in kept], source, keep_all=True)[0]
            out32, ref32 = _run(source_ev, s32, widths, bar)
            source_runs["float32"] = (r32, kept, out32, ref32)
        cache: Dict[Tuple[Any, ...], Any] = {}

        def run(ev: Any, block_rows: List[List[Any]]) -> Tuple[Outputs, List[Tuple[int, str]]]:
            return _run(ev, block_rows, widths, bar, pad=True)

        reports = [verify_artefact(a, source, source_ev, source_runs, rows.origins, tol, cache, run, bar.phase,
                                   rows.reading)
                   for a in opened]
    finally:
        bar.close()
    counts = rows.counts()
    reports = reports + unopened
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
    result.coverage = _coverage(source, rows)
    if bad_input:
        result.error = {"message": "; ".join(bad_input), "exit_code": 2}
    result.seconds = time.perf_counter() - t0
    return result

def _coverage(source: Ensemble, rows: Any) -> Dict[str, Any]:
    """Per feature of the source: the rows that target it by kind (specials, split probes),
    its splits in the source and how many of them a probe row was built to reach (for the
    HTML report; not part of the JSON report)."""
    names = [f.name for f in source.features]
    n = len(names)
    per_kind = {k: [0] * n for k in ("special", "split")}
    for kind, target in zip(rows.kinds, rows.targets):
        if target is not None and kind in per_kind and 0 <= target < n:
            per_kind[kind][target] += 1
    splits, probed = [0] * n, [0] * n
    for ti, t in enumerate(source.trees):
        for node in range(t.n_nodes):
            f = t.feature[node]
            if 0 <= f < n:
                splits[f] += 1
                if ("source", ti, node) in rows.probed_nodes:
                    probed[f] += 1
    return {"features": names, "rows": per_kind, "splits": splits, "splits_probed": probed}


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
