"""The ONNX evaluators: onnxruntime (one thread, so sums are added in tree order) and
onnx.reference, in the evaluator contract of :mod:`boxwood.contract`."""
from __future__ import annotations

import math
from typing import Any, Dict, List, Optional, Sequence, Tuple

import numpy as np

from ...contract import Evaluator, OutputContract, Outputs
from ...ir import Ensemble
from .parse import ML_DOMAIN, TREE_OPS, Graph, InputPath, load, metadata, onnx_module
from .reader import classes_from, outputs_of, read_onnx

# ----------------------------------------------------------------------------- evaluators
def rows_to_matrix(ensemble: Ensemble, rows: Sequence[Sequence[Any]], dtype: Any = np.float64) -> np.ndarray:
    """Rows in feature order (numbers, category values, None) as the graph's input: NaN
    for missing, the category's code for a categorical value (NaN for an unseen one)."""
    codes = [None if not f.is_categorical else {c: i for i, c in enumerate(f.categories)} for f in ensemble.features]
    out = np.empty((len(rows), len(ensemble.features)), dtype=np.float64)
    for i, row in enumerate(rows):
        for j, v in enumerate(row):
            if v is None:
                out[i, j] = np.nan
            elif codes[j] is not None and not (isinstance(v, float) and math.isnan(v)):
                out[i, j] = codes[j].get(v, np.nan)
            else:
                out[i, j] = float(v)
    with np.errstate(over="ignore"):
        return out.astype(dtype)


def tree_value_type(graph: Graph, tree: Any, path: InputPath) -> int:
    """Element type of the values the tree operator receives."""
    for node in path.path_nodes:  # nearest the tree first
        if node.op_type == "Cast":
            return graph.attrs(node)["to"]
    return path.input_type


def _expose_raw(model: Any) -> Tuple[Any, bool]:
    """A copy of ``model`` with an output ``raw_score`` holding the raw scores (before any
    post-transform), and whether the raw scores are column 1 of a binary classifier's
    two-column score output (onnxruntime lays a binary TreeEnsembleClassifier's scores
    out as [-s, s] when post_transform is NONE)."""
    onnx = onnx_module()
    graph = Graph(model)
    if RAW_OUTPUT in graph.outputs:
        return model, False
    copy = onnx.ModelProto()
    copy.CopyFrom(model)
    g = Graph(copy)
    tree = [n for n in g.nodes if n.op_type in TREE_OPS and n.domain == ML_DOMAIN][0]
    T = onnx.TensorProto
    binary_column = False
    for a in tree.attribute:
        if a.name == "post_transform":
            if a.type == onnx.AttributeProto.STRING:
                a.s = b"NONE"
            else:
                a.i = 0
    if tree.op_type == "TreeEnsembleClassifier":
        source, elem = tree.output[1], T.FLOAT
        attrs = g.attrs(tree)
        labels = attrs.get("classlabels_int64s") or attrs.get("classlabels_strings")
        used = set(attrs.get("class_ids", []))
        binary_column = bool(labels) and len(labels) == 2 and len(used) <= 1
    else:
        info = outputs_of(g, tree, g.attrs(tree))
        source = info["raw"]
        elem = T.FLOAT if tree.op_type != "TreeEnsemble" else tree_value_type(g, tree, InputPath(g, tree))
    copy.graph.node.append(onnx.helper.make_node("Identity", [source], [RAW_OUTPUT], name="boxwood_raw_score"))
    copy.graph.output.append(onnx.helper.make_tensor_value_info(RAW_OUTPUT, elem, None))
    return copy, binary_column


RAW_OUTPUT = "raw_score"


class _OnnxEvaluator(Evaluator):
    """Shared part: rows -> input matrix -> named outputs, in the evaluator contract
    (boxwood.contract), with ``raw``, ``transformed`` and ``labels`` shortcuts."""

    name = "onnx"
    compare_precision = None  # compares as the ensemble read from the file states
    transform_implementation = "ONNX operators Sigmoid / Softmax / Exp"

    def __init__(self, model: Any, ensemble: Optional[Ensemble] = None):
        self.model = model if hasattr(model, "graph") else load(model)
        self.ensemble = ensemble if ensemble is not None else read_onnx(self.model)
        graph = Graph(self.model)
        T = onnx_module().TensorProto
        gi = graph.inputs[0]
        tree = [n for n in graph.nodes if n.op_type in TREE_OPS and n.domain == ML_DOMAIN][0]
        self.input_name = gi.name
        self.dtype = np.float32 if gi.type.tensor_type.elem_type == T.FLOAT else np.float64
        self.input_precision = "float32" if self.dtype == np.float32 else "float64"
        value_type = tree_value_type(graph, tree, InputPath(graph, tree))
        exact_op = tree.op_type == "TreeEnsemble" and value_type == T.DOUBLE
        self.summation_precision = "float64" if exact_op else "float32"
        semantics = metadata(self.model).get("boxwood.semantics")
        leading = isinstance(semantics, dict) and semantics.get("leading_base_trees")
        # Base value first, then the trees in order: boxwood's exact graphs (the base value
        # is a leading tree); opset-3 operators add base_values after the trees.
        self.summation_order = "tree" if (exact_op and (leading or self.ensemble.base_values == [0.0] * len(
            self.ensemble.base_values))) else "any"
        self.output_names = [o.name for o in self.model.graph.output]
        self.raw_model, self._binary_column = _expose_raw(self.model)
        self._prepare: Any = None

    def use_source_preprocessing(self, source: Ensemble) -> None:
        """Rows given to this evaluator are raw-field records of ``source`` (a pipeline's
        ensemble) while the graph takes the preprocessed features (boxwood writes a
        pipeline's tree part only): prepare each row with the device scorer's own
        preprocessing of ``source`` (boxwood_runtime.scorer.Model.prepare) before the
        graph. A record the preprocessing refuses raises RecordError (a ValueError)."""
        if source.fields is None or self.ensemble.fields is not None:
            return
        from ..json.device import feature_preparer

        self._prepare = feature_preparer(source)
        self.name = "%s (fed the features preprocessed by boxwood's device scorer)" % type(self).name

    def matrix(self, rows: Sequence[Sequence[Any]]) -> np.ndarray:
        if self._prepare is not None:
            rows = [self._prepare(r, i) for i, r in enumerate(rows)]
        return rows_to_matrix(self.ensemble, rows, self.dtype)

    def run(self, rows: Sequence[Sequence[Any]]) -> Dict[str, np.ndarray]:
        """All graph outputs (and ``raw_score``) for ``rows``, by output name."""
        X = self.matrix(rows)
        out = dict(zip(self.output_names, self._run(self.model, X, self.output_names)))
        if RAW_OUTPUT not in out:
            raw = self._run(self.raw_model, X, [RAW_OUTPUT])[0]
            out[RAW_OUTPUT] = raw[:, 1:] if self._binary_column else raw
        return out

    def _run(self, model: Any, X: np.ndarray, names: List[str]) -> List[np.ndarray]:
        raise NotImplementedError

    def _split(self, out: Dict[str, np.ndarray], n: int) -> Outputs:
        """The graph's own outputs as exact values, transformed outputs and labels. What
        each kind means is the output contract's (boxwood.contract); which graph output
        holds it is this format's: ``raw_score`` (exposed when the graph hides it),
        ``decision`` (AdaBoost's exact values), ``score`` and ``label`` (outliers),
        ``probabilities`` or the first float matrix, ``label`` or the first vector."""
        contract = OutputContract(self.ensemble)
        raw = np.asarray(out[RAW_OUTPUT], dtype=np.float64).reshape(n, -1)
        if self.ensemble.post_transform == "samme" and "decision" in out:
            exact = np.asarray(out["decision"], dtype=np.float64).reshape(n, -1)
        else:
            exact = contract.exact_values(raw)
        task = self.ensemble.task
        if task == "outlier_detection":
            score = np.asarray(out["score"], dtype=np.float64).reshape(n, -1)
            return Outputs(exact, score, [int(v) for v in np.asarray(out["label"]).ravel()])
        if task == "classification":
            probs = [v for k, v in out.items() if k != RAW_OUTPUT and np.asarray(v).dtype.kind == "f"
                     and np.asarray(v).ndim == 2]
            p = np.asarray(out.get("probabilities", probs[0] if probs else raw), dtype=np.float64).reshape(n, -1)
            label_out = out.get("label")
            if label_out is None:
                label_out = next(v for k, v in out.items() if np.asarray(v).ndim == 1)
            return Outputs(exact, contract.positive_class(p), classes_from(label_out))
        pred = out.get("prediction")
        if pred is None:
            pred = next(v for k, v in out.items() if k != RAW_OUTPUT)
        return Outputs(exact, np.asarray(pred, dtype=np.float64).reshape(n, -1), None)

    def evaluate(self, rows: Sequence[Sequence[Any]]) -> Outputs:
        return self._split(self.run(rows), len(rows))

    def raw(self, rows: Sequence[Sequence[Any]]) -> np.ndarray:
        """Raw scores (n_rows, n_outputs) as float64."""
        return self._split(self.run(rows), len(rows))[0]

    def transformed(self, rows: Sequence[Sequence[Any]]) -> np.ndarray:
        """The prediction, or the class probabilities (positive class only for a binary
        classifier with one raw output), float64, (n_rows, n)."""
        return self._split(self.run(rows), len(rows))[1]

    def labels(self, rows: Sequence[Sequence[Any]]) -> Optional[List[Any]]:
        return self._split(self.run(rows), len(rows))[2]


class OnnxRuntimeEvaluator(_OnnxEvaluator):
    """onnxruntime, one thread: its tree operator then adds trees in tree order (with
    more threads it splits the trees into groups and adds the group sums, which
    changes the last bits; docs/onnx.md)."""

    name = "onnxruntime"
    transform_implementation = "onnxruntime kernels (Sigmoid, Softmax, Exp)"

    def __init__(self, model: Any, ensemble: Optional[Ensemble] = None):
        super().__init__(model, ensemble)
        self._sessions: Dict[int, Any] = {}

    def _session(self, model: Any) -> Any:
        import onnxruntime as ort

        if id(model) not in self._sessions:
            options = ort.SessionOptions()
            options.intra_op_num_threads = 1
            options.inter_op_num_threads = 1
            options.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
            options.log_severity_level = 3
            self._sessions[id(model)] = ort.InferenceSession(model.SerializeToString(), options,
                                                             providers=["CPUExecutionProvider"])
        return self._sessions[id(model)]

    def _run(self, model: Any, X: np.ndarray, names: List[str]) -> List[np.ndarray]:
        return self._session(model).run(names, {self.input_name: X})


class OnnxReferenceEvaluator(_OnnxEvaluator):
    """onnx.reference.ReferenceEvaluator: ONNX's own Python implementation of each
    operator (slow: a few hundred rows per second on a tree ensemble)."""

    name = "onnx.reference"
    transform_implementation = "onnx.reference (numpy)"

    def __init__(self, model: Any, ensemble: Optional[Ensemble] = None):
        super().__init__(model, ensemble)
        self._sessions: Dict[int, Any] = {}

    def _run(self, model: Any, X: np.ndarray, names: List[str]) -> List[np.ndarray]:
        from onnx.reference import ReferenceEvaluator

        if id(model) not in self._sessions:
            self._sessions[id(model)] = ReferenceEvaluator(model)
        return self._sessions[id(model)].run(names, {self.input_name: X})
