"""Check, describe and open boxwood JSON artefacts: the check ``export`` runs after writing
(load as a box would: digest, bounds, self-check), what ``inspect`` prints, and what
``verify`` opens (the registry's ``check``, ``describe`` and ``open`` of the JSON format)."""
from __future__ import annotations

import os
from pathlib import Path
from typing import Any, Dict, Optional, Tuple, Union

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
