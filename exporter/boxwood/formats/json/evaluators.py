"""The evaluators that run a boxwood JSON artefact: the standard-library device scorer (one
record at a time, exactly as a box runs it) and the optional numpy batch evaluator.

Each uses the device side's own copy of the output contract (``scorer.Model`` and
``batch.BatchModel`` methods), since that copy is what runs on the box; tests/test_contract.py
holds the copies to :mod:`boxwood.contract`.
"""
from __future__ import annotations

from typing import Any, Sequence

import numpy as np

from ...contract import Evaluator, Outputs


class DeviceEvaluator(Evaluator):
    """The standard-library device scorer (boxwood_runtime.scorer), one record at a time."""

    name = "device scorer"
    transform_implementation = "math.exp (boxwood_runtime.scorer.transform)"

    def __init__(self, model: Any):
        self.model = model

    def evaluate(self, rows: Sequence[Sequence[Any]]) -> Outputs:
        m = self.model
        exact, outs, labels = [], [], []
        decide = m.task != "regression"
        for i, row in enumerate(rows):
            # the hub's rows write NaN as None, as the source model reads them
            raw = m.raw_scores(m.prepare([float("nan") if v is None else v for v in row], i))
            exact.append(m.exact_values(raw))
            outs.append(m.transform_raw(raw))
            if decide:
                labels.append(m.classes[m.class_index(raw)])
        n = len(rows)
        return Outputs(np.array(exact, dtype=np.float64).reshape(n, -1),
                       np.array(outs, dtype=np.float64).reshape(n, -1), labels if decide else None)


class BatchEvaluator(Evaluator):
    """The numpy batch evaluator (boxwood_runtime.batch.BatchModel)."""

    name = "numpy batch"
    transform_implementation = "numpy.exp (boxwood_runtime.batch.transform)"
    block_rows = 8192

    def __init__(self, batch: Any):
        self.batch = batch

    def evaluate(self, rows: Sequence[Sequence[Any]]) -> Outputs:
        b = self.batch
        raw = b.raw_scores(b.prepare([[float("nan") if v is None else v for v in r] for r in rows]))  # None: NaN
        labels = None
        if b.model.task != "regression":
            labels = [b.model.classes[i] for i in b.class_index(raw).tolist()]
        return Outputs(b.exact_values(raw), b.transform_raw(raw), labels)
