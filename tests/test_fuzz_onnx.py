"""The ONNX reader fails closed, and what it accepts agrees with onnxruntime (issue 11).

Planted cases, one per problem the fuzzing campaign of issue 11 found (each named after it):
deep metadata nesting (RecursionError), reference rows and provenance of the wrong type
(TypeError / KeyError), a small file claiming 10**9 targets (allocation until MemoryError),
bytes that are not text, and two silent disagreements with onnxruntime: a missing-value flag
other than 0/1, and an internal node relabelled as a leaf (its subtree orphaned). Each must now
end in OnnxReadError (a FormatError) with a one-line reason.

The property test mutates one attribute of the tree operator (or a metadata entry) of boxwood's
exact graphs: the reader either refuses the mutant with OnnxReadError, or reads it, and then its
reading scored by the device scorer agrees with onnxruntime running the mutant (outside
reference: onnxruntime, the ONNX runtime's C++ implementation of the ai.onnx.ml TreeEnsemble
operator) on rows at the read trees' own thresholds: raw scores bit for bit, labels equal.
"""
from __future__ import annotations

import json

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

onnx = pytest.importorskip("onnx")
pytest.importorskip("onnxruntime")

from boxwood.formats.json.device import device_model, hub_outputs  # noqa: E402
from boxwood_runtime.scorer import RecordError  # noqa: E402
from boxwood.formats.onnx import legacy as onnx_legacy  # noqa: E402
from boxwood.formats.onnx.evaluators import OnnxRuntimeEvaluator  # noqa: E402
from boxwood.formats.onnx.exact import to_model  # noqa: E402
from boxwood.formats.onnx.parse import OnnxReadError  # noqa: E402
from boxwood.formats.onnx.reader import UNEXPECTED_CONTENT, read_onnx  # noqa: E402
from boxwood.formats.registry import FormatError  # noqa: E402
from boxwood.reference_rows import probe_rows  # noqa: E402

import zoo  # noqa: E402

CASES = ["rfr", "gbc_multiclass", "ada_binary", "iforest", "hgbc_categorical", "rfc_binary"]
FUZZ = settings(max_examples=60, deadline=None, derandomize=True, database=None,
                suppress_health_check=list(HealthCheck))


def model_of(name):
    m = onnx.ModelProto()
    m.ParseFromString(_bytes(name))
    return m


_CACHE = {}


def _bytes(name):
    if name not in _CACHE:
        _CACHE[name] = to_model(zoo.exported(name)[1]).SerializeToString()
    return _CACHE[name]


def tree_node(m):
    return next(n for n in m.graph.node if n.op_type.startswith("TreeEnsemble"))


def attr(node, name):
    return next(a for a in node.attribute if a.name == name)


def set_meta(m, key, value):
    for p in m.metadata_props:
        if p.key == key:
            p.value = value
            return
    p = m.metadata_props.add()
    p.key, p.value = key, value


def refused(m, *words):
    data = m.SerializeToString() if hasattr(m, "SerializeToString") else m
    with pytest.raises(OnnxReadError) as err:
        read_onnx(data)
    text = str(err.value)
    assert isinstance(err.value, FormatError)
    assert UNEXPECTED_CONTENT not in text, text
    assert "\n" not in text
    for w in words:
        assert w in text, text
    return text


def agrees_with_onnxruntime(model_bytes, ensemble):
    """None when boxwood's reading and onnxruntime agree on rows at the read trees' thresholds,
    else a description of the first disagreement. onnxruntime refusing the model is not one."""
    model = device_model(ensemble)
    rows = []
    for r in probe_rows(ensemble, 24):  # rows the model itself takes (e.g. no infinity where refused)
        try:
            model.prepare([float("nan") if v is None else v for v in r])
        except RecordError:
            continue
        rows.append(r)
    if not rows:
        return None
    try:
        ort = OnnxRuntimeEvaluator(model_bytes, ensemble).evaluate(rows)
    except FormatError:
        raise
    except Exception:  # onnxruntime refuses the graph itself: nothing to compare
        return None
    ours = hub_outputs(ensemble, rows)
    if ort.raw.shape != ours.raw.shape or not np.array_equal(ort.raw, ours.raw):
        return "raw scores differ: %r vs %r" % (ort.raw[:2].tolist(), ours.raw[:2].tolist())
    if ours.labels is not None and list(ort.labels) != list(ours.labels):
        return "labels differ"
    return None


# ----------------------------------------------------------------------------- planted cases
def test_planted_recursion_deep_metadata_nesting():
    m = model_of("rfr")
    set_meta(m, "boxwood.semantics", "[" * 100000 + "]" * 100000)
    refused(m, "nests deeper")


@pytest.mark.parametrize("bad", [5, "x", [[{"a": 1}]], {"rows": 3}, {"rows": [[1.0]], "raw": [["a"]],
                                                                    "transformed": [[1.0]]},
                                 {"rows": [[1.0]], "raw": [[1.0]]}])
def test_planted_typeerror_reference_rows_of_the_wrong_type(bad):
    m = model_of("rfr")
    set_meta(m, "boxwood.reference", json.dumps(bad))
    refused(m, "boxwood.reference")


def test_planted_typeerror_provenance_and_names_of_the_wrong_type():
    m = model_of("rfr")
    set_meta(m, "boxwood.provenance", json.dumps({"estimator": ["a list"]}))
    refused(m, "provenance")
    m = model_of("rfr")
    set_meta(m, "boxwood.feature_names", json.dumps([["a"], {"b": 1}] + ["x"] * 8))
    refused(m, "feature_names")
    m = model_of("rfr")
    set_meta(m, "boxwood.semantics", json.dumps({"leading_base_trees": [1]}))
    refused(m, "leading_base_trees")


@pytest.mark.parametrize("claim", [10 ** 9, 10 ** 7, 2, 0, -3])
def test_planted_memoryerror_claimed_targets(claim):
    m = model_of("rfr")  # one target
    attr(tree_node(m), "n_targets").i = claim
    refused(m, "n_targets" if claim < 1 else "claims")


def test_planted_claimed_features_checked_before_allocating():
    m = model_of("rfr")
    m.graph.input[0].type.tensor_type.shape.dim[1].dim_value = 10 ** 12
    with pytest.raises(OnnxReadError):
        read_onnx(m.SerializeToString())


def test_planted_bytes_where_text_is_expected():
    m = onnx_legacy.to_model(zoo.exported("rfr")[1])  # opset 3: nodes_modes are strings
    modes = attr(tree_node(m), "nodes_modes")
    modes.strings[0] = b"\xff\xfe"
    refused(m, "UTF-8")


@pytest.mark.parametrize("flag", [2, -1, 255])
def test_planted_silent_missing_value_flag_outside_0_1(flag):
    m = model_of("rfr")
    a = attr(tree_node(m), "nodes_missing_value_tracks_true")
    a.ints[1] = flag
    refused(m, "nodes_missing_value_tracks_true", "0 or 1")


def _relabel_internal_as_leaf(m):
    node = tree_node(m)
    tleaf = attr(node, "nodes_trueleafs").ints
    for i, v in enumerate(tleaf):
        if v == 0:  # its true child is an internal node: mark it a leaf
            tleaf[i] = 1
            return i
    raise AssertionError("no internal child found")


def test_planted_silent_internal_node_relabelled_as_leaf():
    m = model_of("gbc_multiclass")
    _relabel_internal_as_leaf(m)
    refused(m, "reached from no tree root")


def test_agreement_check_catches_a_planted_disagreement():
    """Check of the checker: a reading that differs from the file in one leaf (or one label)
    must be reported by agrees_with_onnxruntime."""
    data = _bytes("gbc_multiclass")
    ensemble = read_onnx(data)
    tree = ensemble.trees[0]
    leaf = tree.feature.index(-1)
    tree.value[leaf] += 0.5
    assert agrees_with_onnxruntime(data, ensemble) is not None
    ensemble = read_onnx(data)
    ensemble.classes = ensemble.classes[1:] + ensemble.classes[:1]
    assert agrees_with_onnxruntime(data, ensemble) is not None


def test_unmutated_graphs_read_and_agree():
    for name in CASES:
        data = _bytes(name)
        assert agrees_with_onnxruntime(data, read_onnx(data)) is None


# ----------------------------------------------------------------------------- property
_INTS = st.one_of(st.integers(-3, 3), st.integers(-10 ** 9, 10 ** 9), st.sampled_from([2 ** 31 - 1, -2 ** 63]))
_FLOATS = st.one_of(st.floats(allow_nan=True, allow_infinity=True, width=64), st.sampled_from([0.0, -0.0, 1e300]))


@FUZZ
@given(name=st.sampled_from(CASES), which=st.integers(min_value=0), pos=st.integers(min_value=0),
       how=st.sampled_from(["set", "truncate", "extend", "delete", "meta"]), i=_INTS, f=_FLOATS,
       meta=st.sampled_from(["boxwood.semantics", "boxwood.reference", "boxwood.feature_names",
                             "boxwood.categories", "boxwood.provenance"]),
       junk=st.sampled_from(["5", "[]", "{}", '{"a": [1, {"b": null}]}', '"text"', "not json", "1" * 5000, "null"]))
def test_property_mutated_tree_operator(name, which, pos, how, i, f, meta, junk):
    m = model_of(name)
    node = tree_node(m)
    attrs = list(node.attribute)
    a = attrs[which % len(attrs)]
    if how == "meta":
        set_meta(m, meta, junk)
    elif how == "delete":
        node.attribute.remove(a)
    else:
        seq = a.ints if len(a.ints) else a.floats if len(a.floats) else None
        if seq is None:
            if a.type == onnx.AttributeProto.INT:
                a.i = i
            elif a.type == onnx.AttributeProto.FLOAT:
                a.f = f
            elif a.type == onnx.AttributeProto.TENSOR and len(a.t.double_data):
                seq = a.t.double_data
        if seq is not None:
            k = pos % len(seq)
            value = i if seq is a.ints else f
            if how == "set":
                seq[k] = value
            elif how == "truncate":
                del seq[k:]
            else:
                seq.append(value)
    data = m.SerializeToString()
    try:
        ensemble = read_onnx(data)
    except OnnxReadError as exc:
        assert UNEXPECTED_CONTENT not in str(exc), str(exc)
        return
    problem = agrees_with_onnxruntime(data, ensemble)
    assert problem is None, problem


@FUZZ
@given(name=st.sampled_from(CASES), edits=st.lists(st.tuples(st.integers(min_value=0), st.integers(0, 255)),
                                                   min_size=1, max_size=4))
def test_property_mutated_bytes(name, edits):
    data = bytearray(_bytes(name))
    for pos, byte in edits:
        data[pos % len(data)] = byte
    try:
        ensemble = read_onnx(bytes(data))
    except OnnxReadError as exc:
        assert UNEXPECTED_CONTENT not in str(exc), str(exc)
        return
    problem = agrees_with_onnxruntime(bytes(data), ensemble)
    assert problem is None, problem


def test_campaign_finding_operator_transform_then_isolation_arithmetic():
    """Found by the campaign (seed 11, onnx mutant 3611): an isolation forest's operator given
    post_transform LOGISTIC, its boxwood.semantics replaced, was read as a logistic model whose
    labels disagreed with onnxruntime (which applies the logistic and then the graph's Pow chain)."""
    m = model_of("iforest")
    attr(tree_node(m), "post_transform").i = 2
    set_meta(m, "boxwood.semantics", json.dumps({"rows": 0}))
    refused(m, "post_transform LOGISTIC")


def test_campaign_finding_tree_ensemble_without_n_targets():
    """onnxruntime refuses a TreeEnsemble (opset 5) without n_targets (its target count is then 0);
    the reader used to assume 1."""
    m = model_of("rfr")
    tree_node(m).attribute.remove(attr(tree_node(m), "n_targets"))
    refused(m, "n_targets")


def _set_const(m, name, values):
    """Replace the initializer (or Constant node value) ``name`` by ``values`` (float64)."""
    from onnx import numpy_helper

    for init in m.graph.initializer:
        if init.name == name:
            init.CopyFrom(numpy_helper.from_array(np.asarray(values, dtype=np.float64), name))
            return
    for n in m.graph.node:
        if n.op_type == "Constant" and n.output[0] == name:
            n.attribute[0].t.CopyFrom(numpy_helper.from_array(np.asarray(values, dtype=np.float64), name))
            return
    raise AssertionError("no constant %r" % name)


def _const(m, name):
    from onnx import numpy_helper

    for init in m.graph.initializer:
        if init.name == name:
            return numpy_helper.to_array(init)
    for n in m.graph.node:
        if n.op_type == "Constant" and n.output[0] == name:
            return numpy_helper.to_array(n.attribute[0].t)
    raise AssertionError("no constant %r" % name)


@pytest.mark.parametrize("value", [float("nan"), 0.0, 1e300])
def test_campaign_finding_input_check_bound_on_a_numeric_column(value):
    """Found by the campaign (seed 12, onnx mutant 9914): one byte of the input check's upper
    bounds (``code_high``) turned a numeric column's +inf into NaN; onnxruntime then made every
    value of that column missing while the reader ignored the check (16 of 17 probe rows
    disagreed). The reader now accepts the check only as boxwood writes it."""
    m = model_of("hgbc_categorical")
    hi = _const(m, "code_high").copy()
    j = int(np.flatnonzero(np.isinf(hi))[0])  # a numeric column
    hi[j] = value
    _set_const(m, "code_high", hi)
    refused(m, "input check", "upper bounds")


def test_campaign_finding_negative_isolation_leaf():
    """Found by the campaign (seed 12, onnx mutant 3069): a negative leaf in an isolation forest
    (a path length) was read, and the device scorer then refused the model with its own error
    class outside the reader. The hub refuses it now, so the reader says so as OnnxReadError."""
    from onnx import numpy_helper

    m = model_of("iforest")
    leaf = attr(tree_node(m), "leaf_weights")
    w = numpy_helper.to_array(leaf.t).copy()
    w[len(w) // 2] = -1.0
    leaf.t.CopyFrom(numpy_helper.from_array(w, leaf.t.name))
    refused(m, "path lengths")
