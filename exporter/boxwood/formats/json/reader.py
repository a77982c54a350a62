"""Read a boxwood JSON artefact back into the hub (for inspect, verify and re-export).

The device loader does all the checking (digest, bounds, indices, acyclic trees,
self-check); this module only maps the validated document onto the IR.
"""
from __future__ import annotations

from pathlib import Path
from typing import Any, Dict, Union

from boxwood_runtime import scorer

from ...ir import Ensemble, Feature, Reference, Tree


def _num(v: Any) -> float:
    """A number as the artefact carries it (a float, or "inf"/"-inf") as a float."""
    if isinstance(v, str):
        return {"inf": float("inf"), "-inf": float("-inf")}[v]
    return float(v)


def _target_step(step: Dict[str, Any]) -> Dict[str, Any]:
    out: Dict[str, Any] = {"op": step["op"]}
    if "values" in step:
        out["values"] = [_num(v) for v in step["values"]]
    return out


def from_document(doc: Dict[str, Any]) -> Ensemble:
    """Map an artefact document (already verified by the device loader) onto an Ensemble."""
    inputs, outputs, ens = doc["inputs"], doc["outputs"], doc["ensemble"]
    features = [Feature(f["name"], f["kind"], list(f["categories"]) if f["kind"] == "categorical" else None,
                        f.get("source"))
                for f in inputs["features"]]
    trees = []
    for t in ens["trees"]:
        n = len(t["feature"])
        cats = t.get("left_categories", {})
        trees.append(Tree(
            output=t["output"],
            feature=list(t["feature"]),
            threshold=[_num(v) for v in t["threshold"]],
            left=list(t["left"]),
            right=list(t["right"]),
            missing_left=list(t["missing_left"]),
            value=[_num(v) for v in t["value"]],
            left_categories=[tuple(cats[str(i)]) if str(i) in cats else None for i in range(n)],
        ))
    reference = None
    ref = doc.get("self_check")
    if ref:
        reference = Reference(
            rows=[list(r) for r in ref["rows"]],
            raw=[[_num(v) for v in r] for r in ref["raw"]],
            transformed=[[_num(v) for v in r] for r in ref["transformed"]],
        )
    return Ensemble(
        task=doc["task"],
        features=features,
        trees=trees,
        base_values=[_num(v) for v in ens["base_values"]],
        post_transform=outputs["post_transform"],
        combine=ens["combine"],
        compare_precision=inputs["compare_precision"],
        missing_values=inputs["missing_values"],
        classes=outputs.get("classes"),
        binary_rule=outputs.get("binary_rule"),
        softmax_sum=outputs.get("softmax_sum", "sequential"),
        output_names=list(outputs["names"]),
        accepts_infinity=inputs["accepts_infinity"],
        fields=inputs.get("fields"),
        post_transform_params={k: _num(v) for k, v in outputs.get("post_transform_params", {}).items()},
        target_steps=[_target_step(st) for st in outputs.get("target_steps", [])],
        provenance=doc.get("provenance", {}),
        reference=reference,
        calibration=_calibration(outputs.get("calibration")),
    ).check()


def _calibration(cal: Any) -> Any:
    """``outputs.calibration`` (format version 3) as ``Ensemble.calibration``, or None."""
    if cal is None:
        return None
    folds = []
    for fold in cal["folds"]:
        cals = []
        for c in fold["calibrators"]:
            if c["method"] == "isotonic":
                cals.append({"method": "isotonic", "x": [_num(v) for v in c["x"]], "y": [_num(v) for v in c["y"]]})
            else:
                cals.append({"method": "sigmoid", "a": _num(c["a"]), "b": _num(c["b"])})
        folds.append({"post_transform_params": {k: _num(v) for k, v in fold["post_transform_params"].items()},
                      "calibrators": cals})
    return {"response": cal["response"], "normalisation": cal["normalisation"], "folds": folds}


def read_file(path: Union[str, Path, bytes]) -> Ensemble:
    """Load, verify (digest, structure, self-check) and map an artefact file onto an Ensemble."""
    model = scorer.load(path)
    return from_document(model.doc)
