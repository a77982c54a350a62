"""Open an ONNX file safely and walk its graph: bounded reading, protobuf parsing,
onnx.checker, boxwood's metadata, and the path of values from the graph input to the
tree operator. Shared by the reader (:mod:`.reader`), the evaluators and the check.
"""
from __future__ import annotations

import json
from typing import Any, Dict, List, Optional, Sequence, Tuple

import numpy as np

from boxwood_runtime.scorer import DEFAULT_LIMITS, ArtefactError, check_nesting

from ..registry import FormatError

TREE_OPS = ("TreeEnsemble", "TreeEnsembleRegressor", "TreeEnsembleClassifier")
ML_DOMAIN = "ai.onnx.ml"
# Ops allowed after the tree operator (they shape outputs or apply the post-transform).
OUTPUT_OPS = ("Identity", "Add", "Sub", "Mul", "Div", "Neg", "Sigmoid", "Softmax", "Exp", "Pow", "Concat", "Greater",
              "GreaterOrEqual", "Cast", "Reshape", "Squeeze", "Unsqueeze", "Flatten", "ArgMax", "Gather",
              "ZipMap", "Constant")
# Ops allowed before it: the value path, and the mask that marks unknown category codes.
INPUT_PATH_OPS = ("Cast", "Identity", "Add", "Where")
MASK_OPS = ("GreaterOrEqual", "LessOrEqual", "Floor", "Equal", "Or", "And", "Not", "IsNaN", "Greater",
            "Less", "Constant", "Cast", "Identity")
MAX_BYTES = 1 << 30
META_PREFIX = "boxwood."
# Bounds checked before anything is allocated from a claimed size (docs/hardening.md): the
# device scorer's own limits, so whatever the reader accepts the scorer can load.
MAX_NESTING = DEFAULT_LIMITS["max_nesting"]  # of a metadata value's JSON
MAX_TARGETS = DEFAULT_LIMITS["max_outputs"]
MAX_FEATURES = DEFAULT_LIMITS["max_features"]


class OnnxReadError(FormatError):
    """The file is not an ONNX model boxwood can read; the message names the node."""


# ----------------------------------------------------------------------------- loading
def onnx_module():
    import onnx

    return onnx


def _parse(data: bytes, where: str) -> Any:
    onnx = onnx_module()
    if len(data) > MAX_BYTES:
        raise OnnxReadError("%s: larger than %d bytes" % (where, MAX_BYTES))
    model = onnx.ModelProto()
    try:
        model.ParseFromString(data)
    except Exception as exc:  # protobuf raises its own DecodeError
        raise OnnxReadError("%s is not an ONNX model: the protobuf does not parse (%s: %s)"
                            % (where, type(exc).__name__, exc))
    if not model.HasField("graph") or not model.graph.node:
        raise OnnxReadError("%s is not an ONNX model with a graph: it holds no graph nodes "
                            "(truncated, damaged, or not an ONNX file)" % where)
    return model


def load(source: Any) -> Any:
    """A checked ``onnx.ModelProto`` from a path, bytes or a ModelProto."""
    onnx = onnx_module()
    if isinstance(source, onnx.ModelProto):
        model, where = source, "the ONNX model"
    elif isinstance(source, (bytes, bytearray)):
        model, where = _parse(bytes(source), "the ONNX bytes"), "the ONNX bytes"
    else:
        where = str(source)
        try:
            with open(source, "rb") as fh:
                data = fh.read(MAX_BYTES + 1)
        except OSError as exc:
            raise OnnxReadError("cannot read %s: %s" % (where, exc))
        model = _parse(data, where)
    try:
        onnx.checker.check_model(model)
    except Exception as exc:
        raise OnnxReadError("%s fails onnx.checker: %s" % (where, str(exc).strip().splitlines()[0]))
    return model


# ----------------------------------------------------------------------------- graph helpers
def node_label(node: Any) -> str:
    return "node %r (%s%s)" % (node.name or "<unnamed>", node.domain + "." if node.domain else "", node.op_type)


class Graph:
    def __init__(self, model: Any):
        onnx = onnx_module()
        self.onnx = onnx
        g = model.graph
        self.nodes = list(g.node)
        self.consts: Dict[str, np.ndarray] = {t.name: onnx.numpy_helper.to_array(t) for t in g.initializer}
        for n in self.nodes:
            if n.op_type == "Constant" and n.domain in ("", "ai.onnx"):
                attr = {a.name: a for a in n.attribute}
                if "value" in attr:
                    self.consts[n.output[0]] = onnx.numpy_helper.to_array(attr["value"].t)
                elif "value_float" in attr:
                    self.consts[n.output[0]] = np.asarray(attr["value_float"].f, dtype=np.float32)
                elif "value_floats" in attr:
                    self.consts[n.output[0]] = np.asarray(list(attr["value_floats"].floats), dtype=np.float32)
                elif "value_int" in attr:
                    self.consts[n.output[0]] = np.asarray(attr["value_int"].i, dtype=np.int64)
                elif "value_ints" in attr:
                    self.consts[n.output[0]] = np.asarray(list(attr["value_ints"].ints), dtype=np.int64)
        self.producer = {o: n for n in self.nodes for o in n.output}
        self.consumers: Dict[str, List[Any]] = {}
        for n in self.nodes:
            for i in n.input:
                self.consumers.setdefault(i, []).append(n)
        self.inputs = [i for i in g.input if i.name not in self.consts]
        self.outputs = [o.name for o in g.output]

    def attrs(self, node: Any) -> Dict[str, Any]:
        return {a.name: self.onnx.helper.get_attribute_value(a) for a in node.attribute}

    def const(self, name: str) -> Optional[np.ndarray]:
        return self.consts.get(name)

    def downstream(self, names: Sequence[str]) -> List[Any]:
        seen, order, stack = set(), [], list(names)
        while stack:
            name = stack.pop()
            for n in self.consumers.get(name, []):
                if id(n) not in seen:
                    seen.add(id(n))
                    order.append(n)
                    stack.extend(n.output)
        return order

    def upstream(self, names: Sequence[str]) -> List[Any]:
        seen, order, stack = set(), [], list(names)
        while stack:
            name = stack.pop()
            n = self.producer.get(name)
            if n is not None and id(n) not in seen:
                seen.add(id(n))
                order.append(n)
                stack.extend(n.input)
        return order


def metadata(model: Any) -> Dict[str, Any]:
    meta = {p.key: p.value for p in model.metadata_props}
    out: Dict[str, Any] = {}
    for key, value in meta.items():
        if not isinstance(key, str) or not isinstance(value, str):  # protobuf hands invalid UTF-8 over as bytes
            raise OnnxReadError("a metadata_props entry (%r) holds bytes that are not UTF-8 text" % (key[:40],))
        if not key.startswith(META_PREFIX):
            continue
        try:  # the nesting first: json.loads recurses once per level (RecursionError)
            check_nesting(value.encode("utf-8", "replace"), MAX_NESTING)
        except ArtefactError as exc:
            if "max_nesting" in str(exc):
                raise OnnxReadError("metadata %s nests deeper than %d levels" % (key, MAX_NESTING))
            out[key] = value  # brackets that do not pair up: not JSON, kept as text (never parsed)
            continue
        try:
            out[key] = json.loads(value)
        except ValueError:
            out[key] = value
    return out


# ----------------------------------------------------------------------------- input path
class InputPath:
    """What happens to the values between the graph input and the tree operator."""

    def __init__(self, graph: Graph, tree: Any):
        T = graph.onnx.TensorProto
        if len(graph.inputs) != 1:
            raise OnnxReadError("the graph has %d inputs (%s); boxwood reads graphs with one input [N, F]"
                                % (len(graph.inputs), ", ".join(i.name for i in graph.inputs)))
        gi = graph.inputs[0]
        self.input_name = gi.name
        self.input_type = gi.type.tensor_type.elem_type
        if self.input_type not in (T.FLOAT, T.DOUBLE):
            raise OnnxReadError("the graph input %r is of element type %s; boxwood reads float or double inputs"
                                % (gi.name, T.DataType.Name(self.input_type)))
        dims = gi.type.tensor_type.shape.dim
        self.n_features = dims[1].dim_value if len(dims) == 2 and dims[1].HasField("dim_value") else None
        self.float32 = self.input_type == T.FLOAT
        self.offsets: Optional[np.ndarray] = None
        self.sanitized = False
        self.path_nodes: List[Any] = []
        name = tree.input[0]
        while name != self.input_name:
            node = graph.producer.get(name)
            if node is None:
                raise OnnxReadError("the tree operator's input %r does not come from the graph input %r"
                                    % (name, self.input_name))
            self.path_nodes.append(node)
            if node.op_type not in INPUT_PATH_OPS or node.domain not in ("", "ai.onnx"):
                raise OnnxReadError("%s between the graph input and the tree operator is not supported "
                                    "(allowed there: %s)" % (node_label(node), ", ".join(INPUT_PATH_OPS)))
            if node.op_type == "Cast":
                to = graph.attrs(node).get("to")
                if to == T.FLOAT:
                    self.float32 = True
                elif to != T.DOUBLE:
                    raise OnnxReadError("%s casts to %s; only float and double are supported"
                                        % (node_label(node), T.DataType.Name(to)))
                name = node.input[0]
            elif node.op_type == "Identity":
                name = node.input[0]
            elif node.op_type == "Add":
                a, b = node.input
                if graph.const(b) is not None and graph.const(a) is None:
                    value, name = graph.const(b), a
                elif graph.const(a) is not None and graph.const(b) is None:
                    value, name = graph.const(a), b
                else:
                    raise OnnxReadError("%s on the input path must add a constant" % node_label(node))
                if self.offsets is not None:
                    raise OnnxReadError("%s: a second offset on the input path is not supported" % node_label(node))
                self.offsets = np.asarray(value, dtype=np.float64).ravel()
            else:  # Where(condition, values, NaN): values failing the check become missing
                cond, values, other = node.input
                fill = graph.const(other)
                if fill is None or fill.size != 1 or not np.isnan(np.asarray(fill, dtype=np.float64)).all():
                    raise OnnxReadError("%s on the input path must replace values by a NaN constant"
                                        % node_label(node))
                for m in graph.upstream([cond]):
                    if m.op_type not in MASK_OPS and m not in self.path_nodes:
                        if m.op_type in INPUT_PATH_OPS:
                            continue
                        raise OnnxReadError("%s in the input check is not supported" % node_label(m))
                self.sanitized = True
                name = values

    def offset(self, feature: int) -> float:
        if self.offsets is None:
            return 0.0
        if self.offsets.size == 1:
            return float(self.offsets[0])
        return float(self.offsets[feature])


_STEP_OPS = {"Exp": "exp", "Mul": "mul", "Add": "add", "Sub": "sub", "Div": "div"}


def target_steps_of(graph: Graph, raw: str) -> Tuple[List[Dict[str, Any]], set]:
    """A regressor's target steps (docs/wrappers.md), read from the graph: the ops between the
    post-transform node (the node that takes the raw score: Identity or Exp) and the graph
    output "prediction", each an Exp or a Mul / Add / Sub / Div of the running value (first
    input) by a constant (second input) with one value per output or one for all. Returns
    (steps in order, the ids of their nodes); none when "prediction" comes straight from the
    post-transform (or is no graph output)."""
    if "prediction" not in graph.outputs:
        return [], set()
    steps: List[Dict[str, Any]] = []
    nodes = set()
    node = graph.producer.get("prediction")
    while node is not None and raw not in node.input:
        op = _STEP_OPS.get(node.op_type)
        if op is None or node.domain not in ("", "ai.onnx"):
            raise OnnxReadError("%s computes the prediction after the post-transform; boxwood reads Exp, or Mul, "
                                "Add, Sub and Div by a constant there" % node_label(node))
        if op == "exp":
            steps.append({"op": "exp"})
        else:
            c = graph.const(node.input[1]) if len(node.input) == 2 else None
            if c is None or graph.const(node.input[0]) is not None:
                raise OnnxReadError("%s must %s the running prediction (first input) by a constant (second input)"
                                    % (node_label(node), op))
            steps.append({"op": op, "values": [float(v) for v in np.asarray(c, dtype=np.float64).ravel()]})
        nodes.add(id(node))
        node = graph.producer.get(node.input[0])
    if node is None and steps:
        raise OnnxReadError("the prediction's steps do not start at the raw score")
    steps.reverse()
    return steps, nodes
