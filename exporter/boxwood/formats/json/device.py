"""The device scorer run on an in-memory :class:`~boxwood.ir.Ensemble`: the one place the
workstation turns the hub into a ``boxwood_runtime.scorer.Model``.

The device scorer is the project's reference evaluator (short, pure Python, the oracle the
numpy, ONNX and C paths are compared with), so other formats use these functions for
"what the hub's own trees compute": reference rows for a file that carries none, the
float64 scores a float32 graph is checked against, a pipeline's preprocessing in front of
a graph that holds the tree part only.
"""
from __future__ import annotations

import dataclasses
from typing import Any, Callable, List, Sequence

from boxwood_runtime import scorer

from ...contract import Outputs
from ...ir import Ensemble, Reference
from ...reference_rows import probe_rows
from .evaluators import DeviceEvaluator
from .writer import to_document


def device_model(ensemble: Ensemble, unknown_category: str = "as_missing") -> Any:
    """``ensemble`` as the device scorer's Model (no digest or self-check: it never was a file)."""
    bare = ensemble if ensemble.reference is None else dataclasses.replace(ensemble, reference=None)
    return scorer.Model(to_document(bare), dict(scorer.DEFAULT_LIMITS), unknown_category=unknown_category)


def hub_outputs(ensemble: Ensemble, rows: Sequence[Sequence[Any]]) -> Outputs:
    """Exact values, transformed outputs and labels of ``ensemble`` on ``rows``, by the device scorer."""
    return DeviceEvaluator(device_model(ensemble)).evaluate(rows)


def attach_own_reference(ensemble: Ensemble, n_rows: int = 6) -> None:
    """Give ``ensemble`` reference rows scored by its own trees (for files, such as an ONNX
    graph made elsewhere, that carry no source-model numbers); provenance says so."""
    rows = probe_rows(ensemble, n_rows)
    out = hub_outputs(ensemble, rows)
    ensemble.reference = Reference(rows=rows, raw=out.raw.tolist(), transformed=out.transformed.tolist())
    ensemble.provenance["reference_rows"] = ("scored by boxwood's device scorer from the file's trees "
                                             "(the file carries no source-model numbers)")


def feature_preparer(ensemble: Ensemble) -> Callable[..., List[Any]]:
    """A function (record, row index) -> the record's feature row, in the hub's row form
    (a category value for a categorical feature, None when missing), computed by the
    device scorer's preprocessing of ``ensemble`` (which must carry ``fields``). A record
    the preprocessing refuses raises ``boxwood_runtime.RecordError``."""
    model = device_model(ensemble)
    feats = ensemble.features

    def prepare(record: Sequence[Any], row: int = 0) -> List[Any]:
        x = model.prepare([float("nan") if v is None else v for v in record], row)  # None: NaN
        out: List[Any] = []
        for f, v in zip(feats, x):
            if v != v:
                out.append(None)
            elif f.is_categorical:
                out.append(f.categories[int(v)])
            else:
                out.append(float(v))
        return out

    return prepare
