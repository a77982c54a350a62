"""``boxwood diff``: what a retrained model does differently from the one it replaces.

    from boxwood.diff import diff
    result = diff("old.json", "new.joblib", data="readings.csv")
    print(result.summary()); result.write_json("diff.json")   # schemas/diff-report.schema.json

Each side is an artefact file of any registered format (read as data through the format
registry, :func:`boxwood.export.read_source`), a joblib/pickle model file (loading it RUNS
CODE: trusted files only) or a fitted estimator. The result has three parts:

* structure (:mod:`.structure`): trees added, removed and changed, per-feature split counts,
  thresholds moved, leaves changed, base values, settings, features and classes;
* proof: whether the two are proven to behave identically on every input. The verifier's
  structural proof (:func:`boxwood.verify.structure.prove`) is run with OLD as the source and
  NEW as the artefact; identical behaviour is proven when every output's raw score is proven
  bit-identical over all inputs, the proof finds no routing or value difference, and every
  setting that turns raw scores into outputs and decides what inputs are accepted is equal
  (features, categories, preprocessing, classes, post-transform and its parameters,
  precision, missing values, infinity). Bit-identical ensembles always qualify;
* behaviour (:mod:`.behaviour`): both models scored by the device scorer on the user's rows
  and on probes built from both models' splits: rows whose labels, outputs or refusals
  change, the distribution of |change| per output and the rows that change most.

Verdicts and exit codes (README "Exit codes"): "identical" (0) only when proven;
"differs" (1) when a row changes; "no-difference-observed" (1) when the structure differs,
nothing is proven, and no probe or data row changes: not a proof, so CI does not pass it
silently; "incomparable" (2) when the models take different inputs or are of different
tasks, so that no row can be given to both.
"""
from __future__ import annotations

from pathlib import Path
from typing import Any, List, Optional, Tuple

from boxwood_runtime import ArtefactError

from .. import formats
from ..export import read_source
from ..formats.registry import file_kind
from ..ir import Ensemble
from ..verify.findings import Side
from ..verify.structure import prove
from . import behaviour, structure
from .report import DiffResult

__all__ = ["diff", "load", "DiffResult", "DATA_KINDS"]

DATA_KINDS = {"csv": "a data file (CSV text)", "jsonl": "a data file (JSON Lines)", "text": "a text file",
              "zip": "a zip archive", "json": "a JSON document that is not a boxwood artefact",
              "unknown": "not a file boxwood recognises"}
TAKES = "an artefact (%s) or a fitted model saved with joblib or pickle" % ", ".join(
    e for f in formats.FORMATS.values() for e in f.extensions)


def load(source: Any, what: str = "model") -> Tuple[Ensemble, dict]:
    """(Ensemble, description) of one side. A missing file, a folder or a file of another
    kind raises FileNotFoundError / IsADirectoryError / ValueError (bad input); a damaged
    boxwood artefact raises :class:`boxwood.formats.DamagedArtefact` (a failed check)."""
    if not isinstance(source, (str, Path)):
        ensemble, described, fmt = read_source(source)
        return ensemble, _side(ensemble, None, described, fmt)
    path = Path(source)
    kind = file_kind(path)
    if kind == "folder":
        raise IsADirectoryError("%s %r is a folder; expected a file" % (what, str(path)))
    if kind == "missing":
        raise FileNotFoundError("%s file %r not found" % (what, str(path)))
    if kind in DATA_KINDS and formats.registry.by_extension(path) is None:
        raise ValueError("%r is %s; expected %s" % (str(path), DATA_KINDS[kind], TAKES))
    try:
        ensemble, described, fmt = read_source(path)
    except ArtefactError as exc:
        if kind == "json-artefact":
            raise formats.DamagedArtefact("%s: damaged or unreadable artefact: %s" % (path, exc))
        raise ValueError("%r is %s (%s); expected %s" % (str(path), DATA_KINDS.get(kind, kind), exc, TAKES))
    return ensemble, _side(ensemble, str(path), described, fmt)


def _side(e: Ensemble, path: Optional[str], described: str, fmt: Optional[str]) -> dict:
    return {"path": path, "description": described, "format": fmt or "model",
            "estimator": e.provenance.get("estimator"), "task": e.task, "trees": len(e.trees),
            "nodes": e.n_nodes, "features": len(e.features), "outputs": e.n_outputs,
            "classes": [behaviour._json(c) for c in e.classes] if e.classes is not None else None}


def proof_of(old: Ensemble, new: Ensemble, struct: dict) -> dict:
    """Whether OLD and NEW are proven to behave identically on every input, and why (not)."""
    reasons: List[str] = []
    if struct["settings"]:
        reasons.append("settings differ: " + ", ".join(s["name"] for s in struct["settings"]))
    if struct["features"]["added"] or struct["features"]["removed"] or struct["features"]["changed"]:
        reasons.append("the features differ")
    if old.classes != new.classes:
        reasons.append("the classes differ")
    outputs: List[dict] = []
    if old.n_outputs != new.n_outputs or structure.inputs_problem(old, new):
        reasons.append("the models take different inputs or give different outputs")
    else:
        p = prove(Side(old, old.compare_precision), Side(new, new.compare_precision))
        outputs = [{"name": o.name, "exact": bool(o.exact)} for o in p.outputs]
        if not p.comparable:
            reasons.append("the structural proof cannot compare the models")
        if p.count("fail") or p.count("value"):
            kinds = sorted({k.split(":", 1)[1] for k, n in p.counts.items() if n and not k.startswith("note:")})
            reasons.append("the structural proof finds differences (%s)" % ", ".join(kinds))
        if not all(o["exact"] for o in outputs):
            reasons.append("raw scores are not proven bit-identical for %s" % ", ".join(
                o["name"] for o in outputs if not o["exact"]))
    proven = not reasons
    if proven:
        how = ("bit-identical ensembles: every tree, node, threshold, leaf, base value and setting equal"
               if struct["identical"] else
               "structural proof (boxwood.verify.structure.prove): raw scores bit-identical over every input "
               "and every setting equal, although the trees are written differently")
    else:
        how = "not proven: " + "; ".join(reasons)
    return {"proven_identical": proven, "how": how, "outputs": outputs}


def diff(old: Any, new: Any, data: Any = None, probes: Optional[int] = None, seed: int = 0,
         most: int = behaviour.MOST_CHANGED) -> DiffResult:
    """Compare ``new`` with ``old`` (paths or fitted models; see the module docstring).

    ``data``: extra rows (a CSV/JSON Lines path, a DataFrame, an array or records) in OLD's
    inputs. ``probes``: the most generated probe rows per model (None: enough for every
    split of both models; 0: none). ``most``: how many of the most changed rows to list."""
    if probes is not None and (not isinstance(probes, int) or isinstance(probes, bool) or probes < 0):
        raise ValueError("probes must be a whole number >= 0, got %r" % (probes,))
    eo, side_o = load(old, "OLD model")
    en, side_n = load(new, "NEW model")
    struct = structure.compare(eo, en)
    proof = proof_of(eo, en, struct)
    settings = {"probes": probes, "seed": seed,
                "data": str(data) if isinstance(data, (str, Path)) else (None if data is None else type(data).__name__)}
    problem = structure.inputs_problem(eo, en)
    if problem is not None:
        return DiffResult(side_o, side_n, struct, proof, None, settings, problem=problem)
    rows = behaviour.make_rows(eo, en, data, probes, seed)
    part, deltas = behaviour.compare(eo, en, rows, most)
    settings["probes"] = behaviour.auto_budget(eo, en) if probes is None else probes
    return DiffResult(side_o, side_n, struct, proof, part, settings, deltas=deltas, rows=rows)
