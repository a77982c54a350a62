"""Check, describe and open boxwood JSON artefacts: the check ``export`` runs after writing
(load as a box would: digest, bounds, self-check), what ``inspect`` prints, and what
``verify`` opens (the registry's ``check``, ``describe`` and ``open`` of the JSON format)."""
from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any, Dict, List, Optional, Tuple, Union

import boxwood_runtime

from ...ir import Ensemble
from ..registry import Artefact
from .evaluators import BatchEvaluator, DeviceEvaluator
from .reader import from_document


def sniff(head: bytes) -> bool:
    """A JSON artefact is a JSON object (canonically ``{"boxwood_digest":...``)."""
    return head.lstrip()[:1] == b"{"


def load_device(path: Union[str, Path], unknown_category: str = "error") -> Any:
    """The device scorer's Model for the file (digest and structure verified, self-check not run)."""
    return boxwood_runtime.load(str(path), unknown_category=unknown_category, self_check=False)


def check(path: Union[str, Path], expected: Optional[Ensemble] = None) -> Tuple[bool, str]:
    """Load the file as a box would and run its embedded self-check; (ok, message)."""
    return load_device(path).self_check()


def open_artefact(path: Path) -> Artefact:
    """The artefact read back through the device loader (digest, bounds, acyclic trees),
    evaluated by the device scorer and the numpy batch evaluator.

    The embedded self-check is run and reported, not enforced here, so that the verifier
    (not the loader) reports what is wrong with a faulty artefact."""
    from boxwood_runtime.batch import BatchModel

    model = boxwood_runtime.load(str(path), unknown_category="as_missing", self_check=False)
    ensemble = from_document(model.doc)
    return Artefact(str(path), ensemble, [DeviceEvaluator(model), BatchEvaluator(BatchModel(model))],
                    format="boxwood JSON artefact, format version %s" % model.doc.get("format_version"),
                    digest=model.doc.get("boxwood_digest"), self_check=model.self_check())


def describe_inputs(fields: Optional[List[str]], features: List[Tuple[str, Optional[list], Optional[dict]]]
                    ) -> List[Dict[str, Any]]:
    """What a record carries: per input field, its name, kind ("numeric", "categorical",
    or "unused" for a field the preprocessing drops), the number of categories, and the
    steps from the field to the trees' features ("impute 0.5", "encode 3 categories
    (unknown: error)", "-> feature x0"). ``features`` holds (name, categories, source)
    per tree feature; without ``fields`` the record fields are the features themselves.
    box.py's ``input_fields`` gives the same on the device (tests/test_exit_codes.py)."""
    if fields is None:
        return [{"name": name, "kind": "numeric" if cats is None else "categorical",
                 "categories": None if cats is None else len(cats), "steps": []}
                for name, cats, _ in features]
    out = []
    for field in fields:
        entry: Dict[str, Any] = {"name": field, "kind": "unused", "categories": None, "steps": []}
        for name, _, source in features:
            if not source or source.get("field") != field:
                continue
            if entry["kind"] == "unused":
                entry["kind"] = "numeric"
            for step in source.get("steps") or []:
                if step.get("op") == "impute":
                    entry["steps"].append("impute %s" % json.dumps(step.get("value")))
                elif step.get("op") == "encode":
                    cats = step.get("categories") or []
                    entry["kind"], entry["categories"] = "categorical", len(cats)
                    unknown = step.get("unknown")
                    entry["steps"].append("encode %d categories (unknown: %s)"
                                          % (len(cats), "missing" if unknown is None else unknown))
                elif step.get("op") == "lookup":
                    cats = step.get("categories") or []
                    entry["kind"], entry["categories"] = "categorical", len(cats)
                    entry["steps"].append("lookup %d categories (unknown: %s)" % (len(cats), step.get("unknown")))
                elif step.get("op") == "arithmetic":
                    entry["steps"].append("scale: " + ", ".join(
                        " ".join(str(v) for v in op) for op in step.get("sequence") or []))
            entry["steps"].append("-> feature %s" % name)
        out.append(entry)
    return out


def _doc_inputs(doc: Dict[str, Any]) -> List[Dict[str, Any]]:
    inputs = doc.get("inputs") if isinstance(doc.get("inputs"), dict) else {}
    feats = [f for f in inputs.get("features") or [] if isinstance(f, dict)]
    return describe_inputs(inputs.get("fields"), [(f.get("name"), f.get("categories"), f.get("source"))
                                                  for f in feats])


def example_row(doc: Dict[str, Any]) -> List[Any]:
    """Values for one record, from the artefact's self-check rows: the first row with no
    missing or non-finite value, else the first row (box.py's ``example_record`` agrees)."""
    ref = doc.get("self_check") if isinstance(doc.get("self_check"), dict) else {}
    rows = ref.get("rows") or []
    for row in rows:
        if all(v is not None and v not in ("inf", "-inf", "nan") for v in row):
            return list(row)
    return list(rows[0]) if rows else []


def describe(path: Union[str, Path], model: Any = None) -> Dict[str, Any]:
    """A JSON-friendly description of the artefact (what ``inspect --json`` prints)."""
    model = model if model is not None else load_device(path)
    doc = model.doc
    prov = doc.get("provenance") if isinstance(doc.get("provenance"), dict) else {}
    ok, message = model.self_check()
    ref = doc.get("self_check") if isinstance(doc.get("self_check"), dict) else {}
    rows = ref.get("rows")
    return {
        "file": str(path),
        "bytes": os.path.getsize(path),
        "digest": doc.get("boxwood_digest"),
        "format": doc.get("format"),
        "format_version": doc.get("format_version"),
        "task": model.task,
        "features": [{"name": n, "kind": "numeric" if c is None else "categorical",
                      "categories": None if c is None else len(c)}
                     for n, c in zip(model.feature_names, model.categories)],
        "inputs": _doc_inputs(doc),
        "compare_precision": model.compare_precision,
        "missing_values": model.missing_values,
        "accepts_infinity": model.accepts_infinity,
        "outputs": {"names": list(model.output_names), "post_transform": model.post_transform,
                    "classes": model.classes, "binary_rule": model.binary_rule},
        "combine": model.combine,
        "trees": model.n_trees,
        "nodes": model.n_nodes,
        "max_depth": model.max_depth,
        "provenance": {"estimator": prov.get("estimator"), "versions": prov.get("versions"),
                       "parameters": prov.get("parameters")},
        "self_check": {"ok": ok, "message": message,
                       "rows": len(rows) if isinstance(rows, list) else 0},
    }
