"""ONNX export: every zoo model as an ONNX graph, run by two independent ONNX evaluators and
compared with scikit-learn.

Outside references:
- scikit-learn's own ``decision_function`` / ``predict`` / ``predict_proba`` / ``apply``
  on the same inputs (the numbers a user sees on the workstation);
- onnxruntime (the C++ runtime; one thread, see test_summation_order_findings) and
  ``onnx.reference.ReferenceEvaluator`` (ONNX's own Python implementation of each
  operator): two independent evaluators of the same file;
- ``onnx.checker.check_model(full_check=True)`` (the ONNX standard's own validity check).

Rows: the conformance suite's (tests/test_conformance.py: data set rows, every split
threshold and one float64 step either side, float32 steps for float32-compared models,
NaN, every category), plus, for float32-compared models, the float64 values at and one
step either side of the point where the float32 rounding of the input crosses each
threshold. onnx.reference is slow (pure Python per row and tree), so it runs on a
subset that keeps data rows, threshold probes and NaN probes.

Stated bounds, checked here:
- exact graph, float64 or float32 input: raw scores bit-identical; probabilities and
  exp predictions within PROBA_ULPS units in the last place; labels identical;
- legacy float32 graph: zero decision flips on float32 threshold probes (leaf by leaf);
  raw scores within the bound the writer states (formats/onnx/legacy.raw_error_bound).
"""
from __future__ import annotations

import dataclasses
import json
import math

import numpy as np
import pytest

onnx = pytest.importorskip("onnx")
pytest.importorskip("onnxruntime")

from boxwood.ir import LEAF, Ensemble, Tree  # noqa: E402
from boxwood.formats.onnx.evaluators import OnnxReferenceEvaluator, OnnxRuntimeEvaluator, rows_to_matrix  # noqa: E402
from boxwood.formats.onnx.reader import read_onnx  # noqa: E402
from boxwood.sources.model import SourceModel  # noqa: E402
from boxwood.formats.onnx import legacy as onnx_legacy  # noqa: E402
from boxwood.formats.onnx import writer as onnx_writer  # noqa: E402
from boxwood.formats.onnx.exact import to_model  # noqa: E402
from boxwood.numerics import float32_floor  # noqa: E402
from boxwood.formats.json.writer import to_bytes  # noqa: E402
from boxwood_runtime.scorer import ulp_distance  # noqa: E402

import zoo  # noqa: E402
from test_conformance import probe_rows  # noqa: E402

PROBA_ULPS = 4  # measured: at most 3 (onnxruntime's Exp and Softmax kernels), 1 for onnx.reference
REFERENCE_ROWS = 260  # rows given to onnx.reference per case


def rounding_probes(ensemble):
    """(feature, value) pairs at the float64 points where float32 rounding of the input
    crosses each threshold: the midpoint m between t32 (the largest float32 <= t) and the
    next float32, and the float64 steps either side of m. Round-to-nearest-even sends m
    to whichever float32 has an even significand (IEEE 754-2019, clause 4.3.1)."""
    out, seen = [], set()
    for t in ensemble.trees:
        for i in range(t.n_nodes):
            f = t.feature[i]
            if f < 0 or t.left_categories[i] is not None or not math.isfinite(t.threshold[i]):
                continue
            lo = np.float32(float32_floor(t.threshold[i]))
            hi = np.nextafter(lo, np.float32(np.inf))
            if not np.isfinite(hi) or (f, float(lo)) in seen:
                continue
            seen.add((f, float(lo)))
            m = (float(lo) + float(hi)) / 2.0  # exact in float64
            out += [(f, m), (f, float(np.nextafter(m, -np.inf))), (f, float(np.nextafter(m, np.inf)))]
    return out


def all_rows(case, ensemble):
    rows = probe_rows(case, ensemble)
    if ensemble.compare_precision == "float32":
        for n, (f, v) in enumerate(rounding_probes(ensemble)):
            row = list(case.rows[n % len(case.rows)])
            row[f] = v
            rows.append(row)
    return rows


def subset(rows, n_data, limit=REFERENCE_ROWS):
    """Some data rows and an even spread of the probe rows that follow them."""
    head = rows[:min(40, n_data)]
    probes = rows[n_data:]
    missing = [r for r in probes if None in r][:40]
    room = limit - len(head) - len(missing)
    step = max(1, len(probes) // room)
    return head + missing + probes[::step][:room]


@pytest.fixture(scope="module", params=zoo.CASES)
def exact(request):
    case, ensemble, _ = zoo.exported(request.param)
    model = to_model(ensemble)
    rows = all_rows(case, ensemble)
    source = SourceModel(case.model, ensemble)
    return case, ensemble, model, rows, source


def first_mismatch(got, want):
    bad = np.flatnonzero(np.any(got != want, axis=1))
    return None if bad.size == 0 else (int(bad[0]), got[bad[0]].tolist(), want[bad[0]].tolist(), int(bad.size))


# ----------------------------------------------------------------------------- exact graph
def test_checker_passes(exact):
    case, ensemble, model, rows, source = exact
    onnx.checker.check_model(model, full_check=True)
    onnx.checker.check_model(to_model(ensemble, "float32"), full_check=True)
    onnx.checker.check_model(onnx_legacy.to_model(ensemble), full_check=True)
    ops = {(n.domain, n.op_type) for n in model.graph.node}
    assert ("ai.onnx.ml", "TreeEnsemble") in ops
    assert {o.domain or "ai.onnx": o.version for o in model.opset_import}["ai.onnx.ml"] == 5


def test_onnxruntime_raw_scores_bit_identical(exact):
    case, ensemble, model, rows, source = exact
    got = OnnxRuntimeEvaluator(model, ensemble).raw(rows)
    assert first_mismatch(got, source.raw(rows)) is None


def test_reference_evaluator_raw_scores_bit_identical(exact):
    case, ensemble, model, rows, source = exact
    some = subset(rows, len(case.rows))
    assert any(None in r for r in some) or ensemble.missing_values == "reject"
    got = OnnxReferenceEvaluator(model, ensemble).raw(some)
    assert first_mismatch(got, source.raw(some)) is None


def test_outputs_match_sklearn(exact):
    """Labels identical; probabilities and predictions as scikit-learn's, within PROBA_ULPS."""
    case, ensemble, model, rows, source = exact
    ev = OnnxRuntimeEvaluator(model, ensemble)
    out = ev.run(rows)
    X = source.matrix(rows)
    if case.task == "classification":
        assert list(out["label"]) == list(case.model.predict(X))
        want = case.model.predict_proba(X)
        got = out["probabilities"]
        assert got.shape == want.shape
        if want.shape[1] == 2:
            # P(negative) = 1 - P(positive) in both: one ulp of P(positive) near 1 is many
            # ulps of a small P(negative), so that column is held to the absolute error.
            assert np.abs(got[:, 0] - want[:, 0]).max() <= PROBA_ULPS * 2.0 ** -53
            got, want = got[:, 1], want[:, 1]
    else:
        want = case.model.predict(X).reshape(len(rows), -1)
        got = out["prediction"]
    worst = max(ulp_distance(float(a), float(b)) for a, b in zip(got.ravel(), want.ravel()))
    assert worst <= (0 if ensemble.post_transform == "identity" else PROBA_ULPS)


def test_float32_input_graph_bit_identical(exact):
    """input_type="float32": scikit-learn given the same float32 values (as float64)."""
    case, ensemble, model, rows, source = exact
    m32 = to_model(ensemble, "float32")
    rows32 = [list(r) for r in rows]
    X = rows_to_matrix(ensemble, rows32, np.float32).astype(np.float64)
    for i, r in enumerate(rows32):
        for j, f in enumerate(ensemble.features):
            if not f.is_categorical and r[j] is not None:
                r[j] = float(X[i, j])
    want = source.raw(rows32)
    assert first_mismatch(OnnxRuntimeEvaluator(m32, ensemble).raw(rows32), want) is None
    some = subset(rows32, len(case.rows), 120)
    assert first_mismatch(OnnxReferenceEvaluator(m32, ensemble).raw(some), source.raw(some)) is None


def test_float32_rounding_is_reproduced_at_thresholds():
    """Classic boosting rounds float64 inputs to float32 before comparing; the graph's
    Cast(FLOAT) -> Cast(DOUBLE) does the same, so the float64 values around each rounding
    boundary (see rounding_probes) land where scikit-learn puts them."""
    case, ensemble, _ = zoo.exported("gbr_squared_error")
    probes = rounding_probes(ensemble)
    assert len(probes) > 100
    rows = []
    for n, (f, v) in enumerate(probes):
        row = list(case.rows[n % len(case.rows)])
        row[f] = v
        rows.append(row)
    source = SourceModel(case.model, ensemble)
    model = to_model(ensemble)
    assert first_mismatch(OnnxRuntimeEvaluator(model, ensemble).raw(rows), source.raw(rows)) is None
    assert first_mismatch(OnnxReferenceEvaluator(model, ensemble).raw(rows[:150]), source.raw(rows[:150])) is None
    # The probes matter: without the rounding step, the trees would decide differently.
    plain = dataclasses.replace(ensemble, compare_precision="float64")
    unrounded = OnnxRuntimeEvaluator(to_model(plain), plain).raw(rows)
    assert first_mismatch(unrounded, source.raw(rows)) is not None


def test_unknown_category_codes_route_as_missing():
    """A code that is no category (unseen, negative, fractional, huge) follows the
    missing-value direction, as scikit-learn routes an unseen category (scikit-learn
    user guide, HistGradientBoosting "Categorical Features Support")."""
    case, ensemble, _ = zoo.exported("hgbr_categorical_nan")
    j = [f.name for f in ensemble.features].index("bmi_band")
    n = len(ensemble.features[j].categories)
    row = list(case.rows[3])
    row[j] = None
    X = rows_to_matrix(ensemble, [row] * 5)
    X[1:, j] = [n, -1.0, 0.5, 1e9]
    model = to_model(ensemble)
    source = SourceModel(case.model, ensemble)
    unseen = list(row)
    unseen[j] = "not-a-band"
    want = source.raw([unseen])[0]
    for ev in (OnnxRuntimeEvaluator(model, ensemble), OnnxReferenceEvaluator(model, ensemble)):
        got = ev._run(ev.model, X, ["raw_score"])[0]
        assert (got == want).all(), ev.name


def _add_base_after(ensemble):
    """The same trees with the base value added by an Add node after the tree sum."""
    zero = dataclasses.replace(ensemble, base_values=[0.0] * ensemble.n_outputs, reference=None)
    model = to_model(zero)
    g = model.graph
    tree = [n for n in g.node if n.op_type == "TreeEnsemble"][0]
    tree.output[0] = "tree_sum"
    g.initializer.append(onnx.numpy_helper.from_array(np.asarray(ensemble.base_values), "base_after"))
    g.node.insert(list(g.node).index(tree) + 1,
                  onnx.helper.make_node("Add", ["tree_sum", "base_after"], ["raw_score"], name="add_base"))
    onnx.checker.check_model(model)
    return model


@pytest.mark.parametrize("name", ["gbr_squared_error", "hgbc_multiclass"])
def test_summation_order_findings(name, record_property):
    """Why the base value is written as a leading single-leaf tree.

    scikit-learn computes base + leaf_1 + leaf_2 + ... in float64. The tree operator
    adds its trees in order from 0.0 in both evaluators, so a leading tree holding the
    base value reproduces that sum bit for bit; adding the base value after the trees
    (an Add node, as opset 3's base_values attribute also does) gives
    (leaf_1 + ...) + base, which differs in the last bits on most rows. onnxruntime
    with more than one thread splits the trees into groups and adds the group sums:
    not bit-identical either (recorded, not asserted: it depends on the thread count)."""
    case, ensemble, _ = zoo.exported(name)
    rows = case.rows
    want = SourceModel(case.model, ensemble).raw(rows)
    leading = to_model(ensemble)
    after = _add_base_after(ensemble)
    assert first_mismatch(OnnxRuntimeEvaluator(leading, ensemble).raw(rows), want) is None
    assert first_mismatch(OnnxReferenceEvaluator(leading, ensemble).raw(rows[:120]), want[:120]) is None
    ort_after = first_mismatch(OnnxRuntimeEvaluator(after, ensemble).raw(rows), want)
    ref_after = first_mismatch(OnnxReferenceEvaluator(after, ensemble).raw(rows[:120]), want[:120])
    assert ort_after is not None and ref_after is not None
    # ... but only in the last bits: the same numbers up to rounding.
    assert np.allclose(OnnxRuntimeEvaluator(after, ensemble).raw(rows), want, rtol=1e-12, atol=1e-12)
    record_property("add_after_mismatching_rows_onnxruntime", "%d of %d" % (ort_after[3], len(rows)))
    record_property("add_after_mismatching_rows_reference", "%d of 120" % ref_after[3])
    import onnxruntime as ort

    options = ort.SessionOptions()
    options.intra_op_num_threads = 2
    session = ort.InferenceSession(leading.SerializeToString(), options, providers=["CPUExecutionProvider"])
    threaded = session.run(["raw_score"], {"input": rows_to_matrix(ensemble, rows)})[0]
    found = first_mismatch(threaded, want)
    record_property("two_thread_mismatching_rows", "%d of %d" % (found[3] if found else 0, len(rows)))


# ----------------------------------------------------------------------------- legacy float32 graph
def float32_rows(case, ensemble):
    """Float32 rows: the data and, per threshold, the float32 values t32, one float32 step
    either side, and float32(t) (rounded to nearest), plus NaN and category probes."""
    rows = [list(r) for r in case.rows]
    probes = []
    seen = set()
    for t in ensemble.trees:
        for i in range(t.n_nodes):
            f = t.feature[i]
            if f < 0 or t.left_categories[i] is not None or not math.isfinite(t.threshold[i]) \
                    or (f, t.threshold[i]) in seen:
                continue
            seen.add((f, t.threshold[i]))
            t32 = np.float32(float32_floor(t.threshold[i]))
            with np.errstate(over="ignore"):
                near = np.float32(t.threshold[i])
            for v in (t32, np.nextafter(t32, np.float32(-np.inf)), np.nextafter(t32, np.float32(np.inf)), near):
                if np.isfinite(v):
                    probes.append((f, float(v)))
    for j, feat in enumerate(ensemble.features):
        if ensemble.missing_values == "route":
            probes.append((j, None))
        if feat.is_categorical:
            probes.extend((j, c) for c in feat.categories)
    for n, (f, v) in enumerate(probes):
        row = list(case.rows[n % len(case.rows)])
        row[f] = v
        rows.append(row)
    out = []
    for r in rows:
        out.append([v if (f.is_categorical or v is None) else float(np.float32(v))
                    for f, v in zip(ensemble.features, r)])
    return out


def leaf_id_ensemble(ensemble):
    """The same trees, each its own output, each leaf's value its node index: the graph's
    raw scores then name the leaf every tree reached."""
    trees = []
    for k, t in enumerate(ensemble.trees):
        value = [float(i) if t.feature[i] == LEAF else 0.0 for i in range(t.n_nodes)]
        trees.append(dataclasses.replace(t, output=k, value=value))
    return dataclasses.replace(ensemble, task="regression", trees=trees, base_values=[0.0] * len(trees),
                               post_transform="identity", classes=None, binary_rule=None, output_names=[],
                               reference=None).check()


def walk(ensemble, x):
    """Leaf index per tree for one float32 row (numpy float64 values), straight from the
    hub's stated rule: float64(x) <= t, NaN follows missing_left, categories by code."""
    out = []
    for t in ensemble.trees:
        i = 0
        while t.feature[i] != LEAF:
            v = x[t.feature[i]]
            cats = t.left_categories[i]
            if np.isnan(v):
                go_left = t.missing_left[i]
            elif cats is not None:
                go_left = int(v) in cats
            else:
                go_left = v <= t.threshold[i]
            i = t.left[i] if go_left else t.right[i]
        out.append(i)
    return out


@pytest.fixture(scope="module", params=zoo.CASES)
def legacy(request):
    case, ensemble, _ = zoo.exported(request.param)
    rows = float32_rows(case, ensemble)
    return case, ensemble, rows


def test_legacy_makes_no_decision_flips(legacy):
    """Every tree reaches the same leaf as in scikit-learn, for every float32 probe:
    scikit-learn's own ``apply`` for classic trees; for histogram trees (which have no
    ``apply``) the hub's rule walked here on float64(x)."""
    case, ensemble, rows = legacy
    ids = leaf_id_ensemble(ensemble)
    model = onnx_legacy.to_model(ids)
    X = rows_to_matrix(ensemble, rows)
    if hasattr(case.model, "apply") and ensemble.compare_precision == "float32":
        want = case.model.apply(X.astype(np.float32)).reshape(len(rows), -1)
    else:
        want = np.array([walk(ensemble, x) for x in X])
    ort_ids = OnnxRuntimeEvaluator(model, read_onnx(model)).raw(rows)
    assert first_mismatch(ort_ids, want.astype(np.float64)) is None
    some = subset(rows, len(case.rows), 150)
    ref_ids = OnnxReferenceEvaluator(model, read_onnx(model)).raw(some)
    some_want = np.array([walk(ensemble, x) for x in rows_to_matrix(ensemble, some)])
    assert first_mismatch(ref_ids, some_want.astype(np.float64)) is None


def test_legacy_raw_scores_within_stated_bound(legacy, record_property):
    case, ensemble, rows = legacy
    model = onnx_legacy.to_model(ensemble)
    bound = np.asarray(onnx_legacy.raw_error_bound(ensemble))
    meta = {p.key: p.value for p in model.metadata_props}
    assert json.loads(meta["boxwood.raw_error_bound"]) == bound.tolist()
    want = SourceModel(case.model, ensemble).raw(rows)
    got = OnnxRuntimeEvaluator(model, read_onnx(model)).raw(rows)
    err = np.abs(got - want).max(axis=0)
    assert np.all(err <= bound), (err, bound)
    some = subset(rows, len(case.rows), 120)
    ref = OnnxReferenceEvaluator(model, read_onnx(model)).raw(some)
    assert np.all(np.abs(ref - SourceModel(case.model, ensemble).raw(some)).max(axis=0) <= bound)
    record_property("largest_error_over_bound", float((err / bound).max()))
    if case.task == "classification":  # labels agree wherever the raw score is clear of 0 by the bound
        labels = OnnxRuntimeEvaluator(model, read_onnx(model)).labels(rows)
        source = SourceModel(case.model, ensemble)
        expect = source.predict(rows)
        raw = want
        clear = np.min(np.abs(raw), axis=1) > bound.max() if raw.shape[1] == 1 else \
            np.sort(raw, axis=1)[:, -1] - np.sort(raw, axis=1)[:, -2] > 2 * bound.max()
        assert all(a == b for a, b, c in zip(labels, expect, clear) if c)


def test_float32_threshold_rule():
    """float32_threshold(t) is the largest float32 <= t (checked against numpy's float32
    neighbours) and keeps every float32 decision: x <= t32 iff x <= t."""
    rng = np.random.default_rng(0)
    ts = list(rng.normal(size=200) * 10.0 ** rng.integers(-30, 30, 200)) + [
        0.0, -0.0, 1e-45, -1e-45, 3.4028235e38, 3.4028236e38, 1e300, -1e300, math.inf, -math.inf, 0.1, 1 / 3]
    up32 = lambda v: np.nextafter(np.float32(v), np.float32(np.inf))  # noqa: E731
    down32 = lambda v: np.nextafter(np.float32(v), np.float32(-np.inf))  # noqa: E731
    with np.errstate(over="ignore"):
        for t in ts:
            t32 = float32_floor(t)
            assert t32 <= t and float(np.float32(t32)) == t32
            assert float(up32(t32)) > t or t32 == math.inf
            for x in (np.float32(t32), up32(t32), down32(t32)):
                assert (float(x) <= t32) == (float(x) <= t)


def test_legacy_categorical_chains():
    """Categorical splits become BRANCH_EQ chains (opset 3 has no set membership)."""
    _, ensemble, _ = zoo.exported("hgbc_categorical")
    model = onnx_legacy.to_model(ensemble)
    node = [n for n in model.graph.node if n.op_type == "TreeEnsembleRegressor"][0]
    modes = [m.decode() for m in onnx.helper.get_attribute_value([a for a in node.attribute
                                                                  if a.name == "nodes_modes"][0])]
    assert "BRANCH_EQ" in modes and "BRANCH_MEMBER" not in modes
    assert {o.domain or "ai.onnx": o.version for o in model.opset_import}["ai.onnx.ml"] == 3
    assert model.graph.input[0].type.tensor_type.elem_type == onnx.TensorProto.FLOAT


# ----------------------------------------------------------------------------- round trip and metadata
@pytest.mark.parametrize("name", zoo.CASES)
def test_json_onnx_hub_json_is_identical(name):
    _, ensemble, data = zoo.exported(name)
    from boxwood.formats.json.reader import read_file

    start = read_file(data)
    back = read_onnx(onnx_writer.to_bytes(start))
    assert back.trees == ensemble.trees
    assert back.base_values == ensemble.base_values
    assert to_bytes(back) == data


def test_metadata_names_the_model():
    case, ensemble, _ = zoo.exported("hgbr_categorical_nan")
    model = to_model(ensemble)
    meta = {p.key: p.value for p in model.metadata_props}
    assert json.loads(meta["boxwood.feature_names"]) == list(case.X.columns)
    cats = json.loads(meta["boxwood.categories"])
    assert cats["sex"] == ["female", "male"] and len(cats["bmi_band"]) == 5
    assert meta["boxwood.source_estimator"] == "sklearn.ensemble.HistGradientBoostingRegressor"
    from boxwood import __version__

    assert meta["boxwood.version"] == __version__ and model.producer_name == "boxwood"
    assert json.loads(meta["boxwood.semantics"])["compare_precision"] == "float64"
    assert "category" in model.doc_string


def test_mean_of_trees_is_exact():
    """combine == "mean": raw = base + (sum of trees) / count, as the hub states it
    (checked against the hub's stated formula computed here with numpy in tree order)."""
    case, ensemble, _ = zoo.exported("hgbr_nan")
    mean = dataclasses.replace(ensemble, combine="mean", reference=None)
    model = to_model(mean)
    rows = case.rows[:300]
    leaf_sum = SourceModel(case.model, ensemble).raw(rows)[:, 0]
    # (base + l1 + ... + ln) - base is not exactly l1 + ... + ln, so recompute from leaves.
    ids = OnnxRuntimeEvaluator(to_model(leaf_id_ensemble(ensemble)), None).raw(rows).astype(int)
    expect = []
    for r in ids:
        acc = 0.0
        for t, leaf in zip(ensemble.trees, r):
            acc += t.value[leaf]
        expect.append(ensemble.base_values[0] + acc / len(ensemble.trees))
    del leaf_sum
    got = OnnxRuntimeEvaluator(model, mean).raw(rows)[:, 0]
    assert np.array_equal(got, np.array(expect))
    assert read_onnx(model).combine == "mean"


def test_single_leaf_trees_and_empty_category_sets():
    """Edge cases the zoo may not reach: a tree that is one leaf, a categorical split
    that sends no category left (onnxruntime refuses an empty membership set)."""
    feats = [dataclasses.replace(zoo.exported("hgbr_categorical")[1].features[1])]
    trees = [Tree(0, [LEAF], [0.0], [LEAF], [LEAF], [False], [0.25]),
             Tree(0, [0, LEAF, LEAF], [0.0, 0.0, 0.0], [1, -1, -1], [2, -1, -1], [True, False, False],
                  [0.0, 1.0, 2.0], [(), None, None])]
    e = Ensemble(task="regression", features=feats, trees=trees, base_values=[0.5], output_names=["y"]).check()
    model = to_model(e)
    X = np.array([[0.0], [1.0], [np.nan], [7.0]])
    want = np.array([[0.5 + 0.25 + 2.0], [0.5 + 0.25 + 2.0], [0.5 + 0.25 + 1.0], [0.5 + 0.25 + 1.0]])
    for ev in (OnnxRuntimeEvaluator(model, e), OnnxReferenceEvaluator(model, e)):
        assert np.array_equal(ev._run(ev.model, X, ["raw_score"])[0], want), ev.name
    back = read_onnx(model)
    assert back.trees == e.trees and back.base_values == e.base_values


# ----------------------------------------------------------------------------- trees and forests
ONNX_FOREST_CASES = [n for n in zoo.FOREST_CASES
                     if not n.startswith(("iforest", "ada_"))]  # those: test_every_zoo_case_exact_graph


@pytest.mark.parametrize("name", ONNX_FOREST_CASES)
def test_trees_and_forests_bit_identical(name):
    """Single trees and forests (combine "mean": sum, Div by the tree count, Add the base):
    raw scores (for classifiers, the class probabilities) bit-identical to scikit-learn in
    onnxruntime and onnx.reference, labels identical, and JSON -> ONNX -> hub -> JSON
    gives the same bytes."""
    case, ensemble, data = zoo.exported(name)
    model = to_model(ensemble)
    rows = probe_rows(case, ensemble, limit=1500)
    source = SourceModel(case.model, ensemble)
    ev = OnnxRuntimeEvaluator(model, ensemble)
    assert first_mismatch(ev.raw(rows), source.raw(rows)) is None
    some = subset(rows, len(case.rows), 120)
    assert first_mismatch(OnnxReferenceEvaluator(model, ensemble).raw(some), source.raw(some)) is None
    if case.task == "classification":
        assert ev.labels(rows) == list(source.predict(rows))
    assert to_bytes(read_onnx(model)) == data


# ----------------------------------------------------------------------------- every zoo case
ISOLATION_ULPS = 1  # score_samples: measured 1 ulp (onnxruntime's Pow vs numpy's power), 0 for onnx.reference


def _preprocessing(model):
    """The fitted preprocessing steps of a pipeline, also inside a wrapper
    (MultiOutputRegressor: every target's pipeline is fitted on the same rows, so the first's;
    TransformedTargetRegressor: its regressor's)."""
    if hasattr(model, "estimators_"):
        return _preprocessing(model.estimators_[0])
    if hasattr(model, "regressor_"):
        return _preprocessing(model.regressor_)
    return model[:-1]


def _preprocessed_rows(case, ensemble, read, rows):
    """A pipeline's rows as the graph takes them: the raw fields put through the fitted
    pipeline's own preprocessing steps (scikit-learn's pipeline[:-1].transform), then as
    feature rows (None for NaN) of the ensemble read back from the graph."""
    X = SourceModel(case.model, ensemble).matrix(rows)
    pre = np.asarray(_preprocessing(case.model).transform(X), dtype=np.float64)
    return [[None if np.isnan(v) else float(v) for v in r] for r in pre]


def _outputs_vs_sklearn(case, ensemble, ev, rows, graph_rows):
    """Compare one evaluator's outputs on ``graph_rows`` with scikit-learn on ``rows``;
    return the largest ulp distance of the transformed outputs."""
    source = SourceModel(case.model, ensemble)
    got = ev.evaluate(graph_rows)
    X = source.matrix(rows)
    assert first_mismatch(got.raw, source.raw(rows)) is None, ev.name
    want_t = source.transformed(rows)
    assert got.transformed.shape == want_t.shape
    worst = max(ulp_distance(float(a), float(b)) for a, b in zip(got.transformed.ravel(), want_t.ravel()))
    if ensemble.task != "regression":
        assert [v.item() if hasattr(v, "item") else v for v in got.labels] == \
            [v.item() if hasattr(v, "item") else v for v in case.model.predict(X)], ev.name
    if ensemble.task == "outlier_detection":
        out = ev.run(graph_rows)
        decision = out["decision"].ravel()
        want_d = case.model.decision_function(X)
        # decision = score - offset in both: within the score's error, in absolute terms
        score = want_t.ravel()
        assert np.all(np.abs(decision - want_d) <= ISOLATION_ULPS * np.spacing(np.abs(score))), ev.name
        assert np.array_equal(out["raw_score"].ravel(), source.raw(rows).ravel())
    if ensemble.post_transform == "samme":
        out = ev.run(graph_rows)  # the decision output IS scikit-learn's decision_function, bit for bit
        assert np.array_equal(out["decision"].reshape(len(rows), -1),
                              np.asarray(case.model.decision_function(X)).reshape(len(rows), -1))
    return worst


@pytest.mark.parametrize("name", [n for n in zoo.ALL_CASES  # calibration: refused (tests/test_calibration.py)
                                  if n not in zoo.CALIBRATION_CASES and n not in zoo.ONNX_REFUSED])
def test_every_zoo_case_exact_graph(name, record_property):
    """Every zoo case, exact graph: onnx.checker passes; onnxruntime (all probe rows) and
    onnx.reference (a subset) both against scikit-learn: raw / exact values bit-identical
    (AdaBoost: decision_function; isolation forests: the path-length sums), transformed
    outputs within PROBA_ULPS (isolation score_samples within ISOLATION_ULPS, and
    decision_function within the same absolute error), labels identical. Pipelines: the
    graph is fed the features computed by the pipeline's own preprocessing steps."""
    case, ensemble, _ = zoo.exported(name)
    model = to_model(ensemble)
    onnx.checker.check_model(model, full_check=True)
    read = read_onnx(model)
    rows = probe_rows(case, ensemble, limit=1500)
    if ensemble.fields is not None:
        graph_rows = _preprocessed_rows(case, ensemble, read, rows)
    else:
        graph_rows = rows
    exp_steps = any(st["op"] in ("exp", "expm1") for st in ensemble.target_steps)  # a wrapper's inverse
    limit = ISOLATION_ULPS if ensemble.task == "outlier_detection" else (
        0 if ensemble.post_transform == "identity" and not exp_steps else PROBA_ULPS)
    worst = _outputs_vs_sklearn(case, ensemble, OnnxRuntimeEvaluator(model, read), rows, graph_rows)
    assert worst <= limit
    tagged = [list(r) + [i] for i, r in enumerate(rows)]  # row index carried at the end
    some = [r[-1] for r in subset(tagged, len(case.rows), 120)]
    worst_ref = _outputs_vs_sklearn(case, ensemble, OnnxReferenceEvaluator(model, read),
                                    [rows[i] for i in some], [graph_rows[i] for i in some])
    assert worst_ref <= limit
    record_property("transformed_ulps_onnxruntime", worst)
    record_property("transformed_ulps_reference", worst_ref)


@pytest.mark.parametrize("name", [n for n in zoo.ALL_CASES  # calibration: refused (tests/test_calibration.py)
                                  if n not in zoo.CASES and n not in zoo.CALIBRATION_CASES
                                  and n not in zoo.ONNX_REFUSED])
def test_new_kinds_round_trip(name):
    """JSON -> ONNX -> hub -> JSON: identical trees for every new kind. Isolation forests,
    AdaBoost, trees and forests: the same artefact bytes. Pipelines: the same trees, base
    values, features (names, kinds, categories), post-transform and classes; the raw
    fields and every feature's source are dropped (the graph holds the tree part only),
    and the provenance says so."""
    from boxwood.formats.json.reader import read_file

    _, ensemble, data = zoo.exported(name)
    start = read_file(data)
    model = to_model(start)
    back = read_onnx(model)
    assert back.trees == ensemble.trees and back.base_values == ensemble.base_values
    assert back.post_transform == ensemble.post_transform
    assert back.post_transform_params == ensemble.post_transform_params
    if ensemble.fields is None:
        assert to_bytes(back) == data
        return
    assert back.fields is None and all(f.source is None for f in back.features)
    assert [(f.name, f.kind, f.categories) for f in back.features] == \
        [(f.name, f.kind, f.categories) for f in ensemble.features]
    assert back.classes == ensemble.classes and back.combine == ensemble.combine
    assert back.compare_precision == ensemble.compare_precision
    assert "not in the graph" in back.provenance["preprocessing"]
    meta = {p.key: p.value for p in model.metadata_props}
    stated = json.loads(meta["boxwood.preprocessing"])
    assert stated["in_graph"] is False and stated["fields"] == ensemble.fields
    assert [f["source"] for f in stated["features"]] == [f.source for f in ensemble.features]
    assert "preprocessed feature vector" in model.doc_string


@pytest.mark.parametrize("name", ["iforest", "ada_binary"])
def test_legacy_refuses_samme_and_isolation_naming_the_exact_writer(name):
    _, ensemble, _ = zoo.exported(name)
    with pytest.raises(ValueError, match="write the exact graph instead"):
        onnx_legacy.to_model(ensemble)


@pytest.mark.parametrize("name", ["iforest_subsets", "ada_multiclass", "pipe_hgbr_encoded", "pipe_gbc_strict_encoder"])
def test_verify_passes_on_new_kinds(name, tmp_path):
    """boxwood verify of the exact graph against the source model: the structural proof of
    the trees, and the empirical check by onnxruntime. For a pipeline, the ONNX evaluator
    feeds the graph the raw-field probe rows prepared by the device scorer's
    preprocessing of the source ensemble, and the proof notes that the artefact holds the
    tree part only."""
    from boxwood.verify import verify

    case, ensemble, _ = zoo.exported(name)
    path = tmp_path / ("%s.onnx" % name)
    onnx_writer.write(ensemble, path)
    result = verify(case.model, path, probes=300, progress=False)
    assert result.passed
    if ensemble.fields is not None:
        text = json.dumps(result.to_dict() if hasattr(result, "to_dict") else str(result), default=str)
        assert "tree part only" in text


def test_verify_legacy_graph_with_categorical_chains(tmp_path):
    """The legacy graph writes categorical sets as chains of equality tests, so its trees
    are shaped differently from the source's. The verifier walks both trees over the same
    input regions: every input reaches leaves whose values agree within float32 rounding,
    so the routing differences are notes, the structure check passes, and the bound and
    the empirical check judge the float32 leaf error. Moving one category in the source
    tree's set is still a structural failure (a planted fault)."""
    from boxwood.verify import verify

    case, ensemble, _ = zoo.exported("hgbr_categorical")
    path = tmp_path / "legacy.onnx"
    onnx_writer.write(ensemble, path, legacy=True)
    tol = 1e-3  # above the float32 leaf and summation error of this model (~8e-4)
    result = verify(case.model, path, probes=300, progress=False, abs_tol=tol)
    structure = [c for c in result.checks if c.name == "structure"]
    assert result.passed and structure and all(c.status == "pass" for c in structure)

    faulty = dataclasses.replace(ensemble, trees=[dataclasses.replace(t) for t in ensemble.trees])
    for t in faulty.trees:
        cats = [i for i, c in enumerate(t.left_categories) if c]
        if cats:
            i = cats[0]
            codes = set(t.left_categories[i])
            moved = next(c for c in range(len(ensemble.features[t.feature[i]].categories)) if c not in codes)
            t.left_categories = list(t.left_categories)
            t.left_categories[i] = tuple(sorted(codes | {moved}))
            break
    bad = tmp_path / "legacy-moved.onnx"
    onnx_writer.write(faulty, bad, legacy=True)
    result = verify(case.model, bad, probes=300, progress=False, abs_tol=tol)
    assert not result.passed
    assert any(c.name == "structure" and c.status == "fail" for c in result.checks)
