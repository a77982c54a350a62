"""Evaluators and artefact kinds: what the verifier runs, and how it opens an artefact.

An **evaluator** computes a model's outputs for rows given in feature order (numbers,
category values, None for missing; an unseen category is routed as missing, as
scikit-learn does). It is an object with:

* ``name`` (str) - shown in reports, e.g. "device scorer";
* ``evaluate(rows) -> Outputs(raw, transformed, labels)`` - the values a device must
  reproduce bit for bit (``boxwood.source.SourceModel.raw``: the raw scores; AdaBoost's
  decision values), shape (n, n_values); the transformed outputs
  (``SourceModel.transformed``: the prediction, the class probabilities - for a binary
  classifier with one raw output the positive class only -, an isolation forest's
  score_samples); predicted labels (a list) or None for a regressor. Rows hold what a
  record holds: the features in order, or the raw fields of a pipeline.
  The base class builds it from ``raw(rows)``, ``transformed(rows)`` and optionally
  ``labels(rows)``; override ``evaluate`` when one pass gives all three. A row the
  evaluator refuses raises ``ValueError`` (``boxwood_runtime.RecordError`` is one);
  the verifier then re-runs that block row by row and reports the refused rows.

and, for the structural proof, what it does with numbers:

* ``input_precision`` - "float64" (takes float64 inputs) or "float32" (takes float32
  inputs: the proof then covers float32-representable inputs only, and the empirical
  check rounds rows to float32 before comparing);
* ``compare_precision`` - None (compares as the artefact states) or "float32"/"float64";
* ``summation_order`` - "tree" (base value first, then each tree's leaf in artefact
  order: the source's order) or "any" (another order; the bound then adds a rounding
  term);
* ``summation_precision`` - "float64" or "float32" (the accumulator; float32 also rounds
  each leaf and base value to float32 before adding).

An **artefact kind** is a loader registered for a file extension:
``register_artefact_kind(".onnx", load_onnx)``. ``load_onnx(path)`` returns an
:class:`Artefact`: the :class:`~boxwood.ir.Ensemble` read back from the file (the
structural proof compares it with the source's) and the evaluators that run the file.
It raises ``ValueError`` (or ``OSError``) when the file is not a valid artefact.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Dict, List, NamedTuple, Optional, Sequence, Tuple, Union

import numpy as np

from ..ir import Ensemble

PRECISIONS = ("float64", "float32")
SUMMATION_ORDERS = ("tree", "any")


class Outputs(NamedTuple):
    """What an evaluator returns for a block of rows."""

    raw: np.ndarray  # (n, n_exact) float64: the values a device reproduces bit for bit
    transformed: np.ndarray  # (n, n_transformed) float64
    labels: Optional[List[Any]]  # predicted labels (classes, or -1/1 for outliers); None for regressors


class Evaluator:
    """Base class of evaluators (see the module docstring for the contract)."""

    name = "evaluator"
    input_precision = "float64"
    compare_precision: Optional[str] = None
    summation_order = "tree"
    summation_precision = "float64"
    # A short description of how the post-transform is computed (reports only).
    transform_implementation = "unspecified"
    # Rows handed to evaluate() at once (the progress bar moves once per block).
    block_rows = 1024

    def raw(self, rows: Sequence[Sequence[Any]]) -> np.ndarray:
        raise NotImplementedError

    def transformed(self, rows: Sequence[Sequence[Any]]) -> np.ndarray:
        raise NotImplementedError

    def labels(self, rows: Sequence[Sequence[Any]]) -> Optional[List[Any]]:
        return None

    def evaluate(self, rows: Sequence[Sequence[Any]]) -> Outputs:
        return Outputs(self.raw(rows), self.transformed(rows), self.labels(rows))

    def properties(self) -> Dict[str, Any]:
        """What the structural proof and the report need to know about this evaluator."""
        return {
            "input_precision": self.input_precision,
            "compare_precision": self.compare_precision,
            "summation_order": self.summation_order,
            "summation_precision": self.summation_precision,
            "transform_implementation": self.transform_implementation,
        }


def check_evaluator(ev: Any) -> None:
    """Raise ValueError unless ``ev`` states valid properties (plugins are checked on use)."""
    name = getattr(ev, "name", None)
    if not isinstance(name, str) or not name:
        raise ValueError("an evaluator needs a non-empty name, got %r" % (name,))
    if not callable(getattr(ev, "evaluate", None)):
        raise ValueError("evaluator %r has no evaluate(rows) method" % name)
    for attr, allowed in (("input_precision", PRECISIONS), ("summation_order", SUMMATION_ORDERS),
                          ("summation_precision", PRECISIONS), ("compare_precision", PRECISIONS + (None,))):
        value = getattr(ev, attr, None)
        if value not in allowed:
            raise ValueError("evaluator %r: %s is %r; expected one of %s"
                             % (name, attr, value, ", ".join(map(repr, allowed))))


# ----------------------------------------------------------------------------- the source
class SourceEvaluator(Evaluator):
    """The fitted source model itself (scikit-learn's own predict / decision_function /
    predict_proba), through :class:`boxwood.source.SourceModel`."""

    transform_implementation = "scikit-learn (numpy.exp; scipy.special.expit for logistic)"
    block_rows = 8192  # scikit-learn's per-call cost (validation, threads) is high

    def __init__(self, model: Any, ensemble: Ensemble):
        from ..source import SourceModel

        self.source = SourceModel(model, ensemble)
        self.ensemble = ensemble
        self.name = ensemble.provenance.get("estimator") or type(model).__name__
        # Boosting adds base value, then trees in order, in float64 (scikit-learn's
        # predict_stages and HistGradientBoosting's _raw_predict). Forests add per-tree
        # predictions through joblib; with n_jobs None or 1 that runs the trees one after
        # the other in order (the conformance suite sees bit-identical means), with more
        # jobs the order depends on the threads (from sklearn.ensemble._forest, stated).
        final = model.steps[-1][1] if hasattr(model, "steps") else model
        jobs = getattr(final, "n_jobs", None)
        self.summation_order = "tree" if ensemble.combine == "sum" or jobs in (None, 1) else "any"

    def evaluate(self, rows: Sequence[Sequence[Any]]) -> Outputs:
        # scikit-learn's finiteness check sums the rows; extreme probes overflow that sum
        # (harmlessly: it then checks each value), which numpy would warn about.
        with np.errstate(over="ignore", invalid="ignore"):
            raw = self.source.raw(rows)
            transformed = self.source.transformed(rows)
            labels = None
            if self.ensemble.task != "regression":
                labels = [_plain(v) for v in self.source.predict(rows)]
        return Outputs(raw, transformed, labels)


def _plain(v: Any) -> Any:
    return v.item() if hasattr(v, "item") and not isinstance(v, (str, bytes)) else v


# ----------------------------------------------------------------------------- JSON artefact
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
            raw = m.raw_scores(m.prepare(row, i))
            exact.append(m.exact_values(raw) if hasattr(m, "exact_values") else raw)
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
        from boxwood_runtime import batch as batch_mod

        b = self.batch
        m = b.model
        raw = b.raw_scores(b.prepare([list(r) for r in rows]))
        params = getattr(m, "post_transform_params", None) or {}
        exact = raw
        if m.post_transform == "samme":  # the exact values, as the scorer's exact_values
            exact = batch_mod.samme_decision(raw, params["weight_total"])
        out = batch_mod.transform(m.post_transform, raw, params)
        labels = None
        if m.task != "regression":
            labels = [m.classes[i] for i in b.class_index(raw).tolist()]
        return Outputs(exact, out, labels)


# ----------------------------------------------------------------------------- artefact kinds
@dataclass
class Artefact:
    """An opened artefact: the ensemble read back from it and the evaluators that run it.

    ``digest`` (a string such as "sha256:...") and ``self_check`` ((ok, message): the
    artefact's own embedded check, where the format has one) appear in the report.
    """

    path: str
    ensemble: Ensemble
    evaluators: List[Any]
    format: str = ""
    digest: Optional[str] = None
    self_check: Optional[Tuple[bool, str]] = None
    notes: List[str] = field(default_factory=list)


Loader = Callable[[Path], Union[Artefact, Tuple[Ensemble, List[Any]]]]
ARTEFACT_KINDS: Dict[str, Loader] = {}


def register_artefact_kind(extension: str, loader: Loader, replace: bool = False) -> None:
    """Make the verifier open files ending in ``extension`` (e.g. ".onnx") with ``loader``."""
    ext = extension.lower()
    if not ext.startswith("."):
        ext = "." + ext
    if ext in ARTEFACT_KINDS and not replace and ARTEFACT_KINDS[ext] is not loader:
        raise ValueError("artefact kind %r is already registered (pass replace=True)" % ext)
    ARTEFACT_KINDS[ext] = loader


def open_artefact(path: Union[str, Path]) -> Artefact:
    """Open ``path`` with the loader registered for its extension."""
    path = Path(path)
    ext = path.suffix.lower()
    loader = ARTEFACT_KINDS.get(ext)
    if loader is None:
        raise ValueError("cannot verify %r: no artefact kind is registered for %r; known: %s"
                         % (str(path), ext or "(no extension)", ", ".join(sorted(ARTEFACT_KINDS)) or "none"))
    if not path.is_file():
        raise FileNotFoundError("artefact file %r not found" % str(path))
    try:
        opened = loader(path)
    except ImportError as exc:  # an optional dependency of this kind (bad usage: exit 2)
        raise ValueError("cannot verify %r: %s is needed for %s files (%s)"
                         % (str(path), getattr(exc, "name", None) or "a package", ext, exc))
    if not isinstance(opened, Artefact):
        ensemble, evaluators = opened
        opened = Artefact(str(path), ensemble, list(evaluators), format=ext)
    if not opened.evaluators:
        raise ValueError("the %s loader gave no evaluator for %r" % (ext, str(path)))
    for ev in opened.evaluators:
        check_evaluator(ev)
    return opened


def load_json_artefact(path: Path) -> Artefact:
    """The boxwood JSON artefact: read back through the device loader (digest, bounds,
    acyclic trees), evaluated by the device scorer and the numpy batch evaluator.

    The embedded self-check is run and reported, not enforced here, so that the
    verifier (not the loader) reports what is wrong with a faulty artefact.
    """
    import boxwood_runtime
    from boxwood_runtime.batch import BatchModel

    from ..readers.json_artefact import from_document

    model = boxwood_runtime.load(str(path), unknown_category="as_missing", self_check=False)
    ensemble = from_document(model.doc)
    ok, message = model.self_check()
    return Artefact(str(path), ensemble, [DeviceEvaluator(model), BatchEvaluator(BatchModel(model))],
                    format="boxwood JSON artefact, format version %s" % model.doc.get("format_version"),
                    digest=model.doc.get("boxwood_digest"), self_check=(ok, message))


register_artefact_kind(".json", load_json_artefact)


def load_onnx_artefact(path: Path) -> Artefact:
    """An ONNX file (boxwood's exact or legacy graph, or a tree graph made elsewhere): read
    back by boxwood.readers.onnx_reader, run by onnxruntime in one thread; see
    boxwood.onnx_check (onnx and onnxruntime are imported only when one is verified)."""
    from ..onnx_check import load_onnx_artefact as load

    return load(path)


register_artefact_kind(".onnx", load_onnx_artefact)
