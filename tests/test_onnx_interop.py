"""ONNX import: boxwood's reader on ONNX files made elsewhere (skl2onnx), on its own files
with every node mode, on broken files; and the ONNX side of the command line.

Outside references: scikit-learn's own predictions and ``apply`` (leaf indices), the
ONNX files skl2onnx writes for the same fitted models, onnxruntime and
onnx.reference. Where skl2onnx fails, or where the two ONNX evaluators disagree on
skl2onnx's output, the test asserts the failure and records its message (pytest
``record_property``; shown with ``-rA`` or in JUnit XML) instead of skipping it.
"""
from __future__ import annotations

import dataclasses
import json
import warnings

import joblib
import numpy as np
import pytest

onnx = pytest.importorskip("onnx")
pytest.importorskip("onnxruntime")

from boxwood.cli import main  # noqa: E402
from boxwood.formats.onnx.evaluators import OnnxReferenceEvaluator, OnnxRuntimeEvaluator, rows_to_matrix  # noqa: E402
from boxwood.formats.onnx.parse import OnnxReadError  # noqa: E402
from boxwood.formats.onnx.reader import read_onnx  # noqa: E402
from boxwood.sources.model import SourceModel  # noqa: E402
from boxwood.formats.onnx import legacy as onnx_legacy  # noqa: E402
from boxwood.formats.onnx import writer as onnx_writer  # noqa: E402
from boxwood.formats.onnx.exact import to_model  # noqa: E402
from boxwood.numerics import float32_floor  # noqa: E402
from boxwood.formats.json.writer import to_bytes  # noqa: E402

import zoo  # noqa: E402
from test_conformance import probe_rows  # noqa: E402
from test_onnx import first_mismatch, walk  # noqa: E402

# The zoo cases skl2onnx 1.20 converts (classic gradient boosting with a constant start).
SKL2ONNX_OK = ["gbr_squared_error", "gbr_absolute_error", "gbr_huber", "gbr_quantile", "gbr_init_zero",
               "gbr_subsample", "gbc_binary", "gbc_multiclass", "gbc_wine", "gbc_exponential"]
# The ones it refuses, with the exception and the words of its message (skl2onnx 1.20.0,
# scikit-learn 1.9, onnx 1.23). Histogram models: the converter mixes numpy uint8 and
# Python bools in nodes_missing_value_tracks_true and protobuf refuses the bools.
SKL2ONNX_FAILS = {
    "hgbr_squared_error": (ValueError, "Unable to create node 'TreeEnsembleRegressor'",
                           "Expected an int, got a boolean"),
    "hgbr_nan": (ValueError, "Unable to create node 'TreeEnsembleRegressor'", "Expected an int, got a boolean"),
    "hgbc_binary": (ValueError, "Unable to create node 'TreeEnsembleClassifier'", "Expected an int, got a boolean"),
    "hgbc_multiclass": (ValueError, "Unable to create node 'TreeEnsembleClassifier'",
                        "Expected an int, got a boolean"),
    "gbr_init_dummy_median": (NotImplementedError, "Setting init to an estimator is not supported", None),
}


def skl2onnx_model(case):
    skl2onnx = pytest.importorskip("skl2onnx")
    X = np.asarray(case.X, dtype=np.float32)
    options = {"zipmap": False} if case.task == "classification" else None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return skl2onnx.to_onnx(case.model, X[:1], options=options)


# ----------------------------------------------------------------------------- skl2onnx
@pytest.mark.parametrize("name", SKL2ONNX_OK)
def test_reads_skl2onnx_output(name, record_property):
    """skl2onnx's graph read into the hub: same task, classes, post-transform and tree
    shapes as boxwood's own reading of the model; raw scores within the float32 bound of
    scikit-learn's; onnxruntime on skl2onnx's file agrees with scikit-learn's labels and
    probabilities (float32 accuracy)."""
    case, ours, _ = zoo.exported(name)
    model = skl2onnx_model(case)
    theirs = read_onnx(model)
    assert (theirs.task, theirs.classes, theirs.post_transform, theirs.compare_precision) == \
           (ours.task, ours.classes, ours.post_transform, "float32")
    assert [(t.output, t.feature, t.left, t.right) for t in theirs.trees] == \
           [(t.output, t.feature, t.left, t.right) for t in ours.trees]
    X32 = np.asarray(case.X, dtype=np.float32)
    rows = [[float(v) for v in r] for r in X32]
    bound = np.asarray(onnx_legacy.raw_error_bound(ours))
    from boxwood.formats.json.device import hub_outputs

    hub_raw = hub_outputs(theirs, rows).raw
    want = SourceModel(case.model, ours).raw(rows)
    assert np.all(np.abs(hub_raw - want).max(axis=0) <= bound)
    ev = OnnxRuntimeEvaluator(model, theirs)
    out = ev.evaluate(rows)
    assert np.all(np.abs(out[0] - want).max(axis=0) <= bound)
    if case.task == "classification":
        assert out[2] == list(case.model.predict(X32.astype(np.float64)))
        assert np.abs(out[1] - SourceModel(case.model, ours).transformed(rows)).max() < 1e-6
    # skl2onnx writes each threshold as the largest float32 <= t -- the rule boxwood's
    # legacy writer uses -- so no float32 input changes side. Checked on the thresholds,
    # and leaf by leaf against scikit-learn's apply() on float32 threshold probes.
    pairs = [(a.threshold[i], b.threshold[i]) for a, b in zip(ours.trees, theirs.trees)
             for i in range(a.n_nodes) if a.feature[i] >= 0]
    assert all(s == float32_floor(t) for t, s in pairs)
    nearest_differs = sum(1 for t, s in pairs if float(np.float32(t)) != s)
    probes = []
    for t in ours.trees[:12]:
        for i in range(t.n_nodes):
            if t.feature[i] >= 0:
                for v in (np.float32(t.threshold[i]), float32_floor(t.threshold[i])):
                    row = list(rows[len(probes) % len(rows)])
                    row[t.feature[i]] = float(v)
                    probes.append(row)
    Xp = np.asarray(probes, dtype=np.float64)
    expect = case.model.apply(Xp.astype(np.float32)).reshape(len(probes), -1)[:, :len(theirs.trees)]
    flips = int(sum(a != b for x, e in zip(Xp, expect) for a, b in zip(walk(theirs, x), e)))
    assert flips == 0
    record_property("thresholds_where_float32_rounding_to_nearest_would_flip", nearest_differs)


@pytest.mark.parametrize("name", sorted(SKL2ONNX_FAILS))
def test_records_where_skl2onnx_fails(name, record_property):
    """skl2onnx cannot convert these; boxwood exports and verifies them (test_onnx.py)."""
    case, ensemble, _ = zoo.exported(name)
    kind, words, cause = SKL2ONNX_FAILS[name]
    small = case
    if hasattr(case.model, "max_iter"):
        # the same estimator with 2 iterations fails the same way; skl2onnx pretty-prints
        # every attribute into its message, which takes a minute for the full zoo model
        from sklearn.base import clone

        small = dataclasses.replace(case, model=clone(case.model).set_params(max_iter=2).fit(case.X, case.y))
    with pytest.raises(kind) as err:
        skl2onnx_model(small)
    message = str(err.value)
    assert words in message
    if cause is not None:
        assert cause in repr(err.value.__cause__ or err.value.__context__)
    record_property("skl2onnx_error", "%s: %s ... (cause: %r)" % (
        kind.__name__, message[:160].replace("\n", " "), err.value.__cause__ or err.value.__context__))
    # ... while boxwood's own graph for the same model is exact.
    rows = case.rows[:200]
    got = OnnxRuntimeEvaluator(to_model(ensemble), ensemble).raw(rows)
    assert first_mismatch(got, SourceModel(case.model, ensemble).raw(rows)) is None


def test_records_reference_evaluator_disagreement_on_skl2onnx_binary_classifier(record_property):
    """For skl2onnx's exponential-loss classifier (TreeEnsembleClassifier, two labels, one
    score column, post_transform NONE, then Mul 2 and Sigmoid) onnxruntime lays the scores
    out as [-s, s] and matches scikit-learn; onnx.reference (1.23) lays them out as
    [1 - s, s] and does not. The operator's spec leaves this layout open -- one reason
    boxwood's own graphs use the regressor form and standard ops for labels."""
    case, ours, _ = zoo.exported("gbc_exponential")
    model = skl2onnx_model(case)
    X = np.asarray(case.X, dtype=np.float32)[:200]
    want = case.model.predict_proba(X.astype(np.float64))
    from onnx.reference import ReferenceEvaluator

    import onnxruntime as ort

    session = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    by_ort = session.run(None, {"X": X})[1]
    by_ref = ReferenceEvaluator(model).run(None, {"X": X})[1]
    assert np.abs(by_ort - want).max() < 1e-6
    gap = float(np.abs(by_ref - want).max())
    assert gap > 0.1
    record_property("onnx_reference_probability_gap", gap)
    # boxwood's graph for the same model: both evaluators agree with scikit-learn.
    mine = to_model(ours)
    rows = case.rows[:200]
    for ev in (OnnxRuntimeEvaluator(mine, ours), OnnxReferenceEvaluator(mine, ours)):
        assert np.abs(ev.transformed(rows) - SourceModel(case.model, ours).transformed(rows)).max() < 1e-15


# ----------------------------------------------------------------------------- node modes
def _rewrite_modes(model):
    """Rewrite each BRANCH_LEQ node of an exact graph into LEQ, LT, GTE or GT (by node
    index) with the threshold and branches that keep every decision: x <= t is
    x < next(t), not (x >= next(t)), not (x > t)."""
    copy = onnx.ModelProto()
    copy.CopyFrom(model)
    node = [n for n in copy.graph.node if n.op_type == "TreeEnsemble"][0]
    attrs = {a.name: a for a in node.attribute}
    get = onnx.helper.get_attribute_value
    modes = onnx.numpy_helper.to_array(get(attrs["nodes_modes"])).copy()
    splits = onnx.numpy_helper.to_array(get(attrs["nodes_splits"])).copy()
    t_ids, f_ids = list(attrs["nodes_truenodeids"].ints), list(attrs["nodes_falsenodeids"].ints)
    t_leaf, f_leaf = list(attrs["nodes_trueleafs"].ints), list(attrs["nodes_falseleafs"].ints)
    miss = list(attrs["nodes_missing_value_tracks_true"].ints)
    roots = set(attrs["tree_roots"].ints)
    for i in range(len(modes)):
        if modes[i] != 0 or (i in roots and t_leaf[i] and f_leaf[i] and t_ids[i] == f_ids[i]):
            continue
        kind = i % 4
        if kind in (1, 2):  # LT / GTE compare with the next float64 above t
            splits[i] = np.nextafter(splits[i], np.inf)
        if kind in (2, 3):  # GTE / GT: the branches swap and so does the NaN direction
            t_ids[i], f_ids[i] = f_ids[i], t_ids[i]
            t_leaf[i], f_leaf[i] = f_leaf[i], t_leaf[i]
            miss[i] = 1 - miss[i]
        modes[i] = kind
    for name, value in (("nodes_modes", onnx.numpy_helper.from_array(modes, "nodes_modes")),
                        ("nodes_splits", onnx.numpy_helper.from_array(splits, "nodes_splits"))):
        attrs[name].t.CopyFrom(value)
    for name, value in (("nodes_truenodeids", t_ids), ("nodes_falsenodeids", f_ids),
                        ("nodes_trueleafs", t_leaf), ("nodes_falseleafs", f_leaf),
                        ("nodes_missing_value_tracks_true", miss)):
        del attrs[name].ints[:]
        attrs[name].ints.extend(value)
    onnx.checker.check_model(copy)
    return copy


@pytest.mark.parametrize("name", ["hgbr_nan", "gbc_multiclass"])
def test_every_comparison_mode_reads_exactly(name):
    """LT, GTE and GT nodes read into the hub's x <= t with the same decisions: the hub
    gets back the very trees, and onnxruntime on the rewritten graph still gives
    scikit-learn's raw scores bit for bit (threshold, float-step and NaN probes)."""
    case, ensemble, _ = zoo.exported(name)
    rewritten = _rewrite_modes(to_model(ensemble))
    modes = set(onnx.numpy_helper.to_array(onnx.helper.get_attribute_value(
        [a for a in [n for n in rewritten.graph.node if n.op_type == "TreeEnsemble"][0].attribute
         if a.name == "nodes_modes"][0])).tolist())
    assert {0, 1, 2, 3} <= modes
    back = read_onnx(rewritten)
    assert back.trees == ensemble.trees
    rows = probe_rows(case, ensemble)
    want = SourceModel(case.model, ensemble).raw(rows)
    assert first_mismatch(OnnxRuntimeEvaluator(rewritten, back).raw(rows), want) is None


# ----------------------------------------------------------------------------- broken graphs
def _model(nodes, inputs, outputs, inits=(), ml=False):
    helper = onnx.helper
    opsets = [helper.make_opsetid("", 21)] + ([helper.make_opsetid("ai.onnx.ml", 5)] if ml else [])
    graph = helper.make_graph(nodes, "g", inputs, outputs, list(inits))
    return helper.make_model(graph, opset_imports=opsets)


def test_malformed_file_is_refused(tmp_path):
    _, ensemble, _ = zoo.exported("gbr_squared_error")
    good = onnx_writer.to_bytes(ensemble)
    for data, words in ((b"\x08\x07 this is not protobuf" * 3, "not an ONNX model"),
                        (good[: len(good) // 2], "not an ONNX model"),
                        (b"", "not an ONNX model")):
        path = tmp_path / "bad.onnx"
        path.write_bytes(data)
        with pytest.raises(OnnxReadError) as err:
            read_onnx(str(path))
        assert words in str(err.value) and "bad.onnx" in str(err.value)


def test_graph_without_tree_operator_is_refused():
    vi = onnx.helper.make_tensor_value_info
    T = onnx.TensorProto
    model = _model([onnx.helper.make_node("Add", ["x", "x"], ["y"], name="double_it")],
                   [vi("x", T.DOUBLE, [None, 3])], [vi("y", T.DOUBLE, [None, 3])])
    with pytest.raises(OnnxReadError) as err:
        read_onnx(model)
    text = str(err.value)
    assert "no tree-ensemble operator" in text and "'double_it' (Add)" in text


def test_unsupported_nodes_are_named():
    _, ensemble, _ = zoo.exported("gbr_squared_error")
    T = onnx.TensorProto
    # an op after the trees that boxwood cannot state
    model = to_model(ensemble)
    model.graph.node.append(onnx.helper.make_node("Tanh", ["raw_score"], ["squashed"], name="squash"))
    model.graph.output.append(onnx.helper.make_tensor_value_info("squashed", T.DOUBLE, ["N", 1]))
    with pytest.raises(OnnxReadError) as err:
        read_onnx(model)
    assert "'squash' (Tanh)" in str(err.value) and "after the tree operator" in str(err.value)
    # an op between the input and the trees
    model = to_model(ensemble)
    first = model.graph.node[0]
    first.input[0] = "scaled"
    model.graph.initializer.append(onnx.numpy_helper.from_array(np.array(2.0), "two_"))
    model.graph.node.insert(0, onnx.helper.make_node("Mul", ["input", "two_"], ["scaled"], name="scale_input"))
    with pytest.raises(OnnxReadError) as err:
        read_onnx(model)
    assert "'scale_input' (Mul)" in str(err.value) and "between the graph input" in str(err.value)
    # two tree operators
    model = to_model(ensemble)
    tree = [n for n in model.graph.node if n.op_type == "TreeEnsemble"][0]
    twin = onnx.helper.make_node("Identity", ["x"], ["y"])
    twin.CopyFrom(tree)
    twin.name, twin.output[0] = "second_trees", "second_raw"
    model.graph.node.append(twin)
    model.graph.output.append(onnx.helper.make_tensor_value_info("second_raw", T.DOUBLE, ["N", 1]))
    with pytest.raises(OnnxReadError) as err:
        read_onnx(model)
    assert "2 tree-ensemble operators" in str(err.value) and "second_trees" in str(err.value)


# ----------------------------------------------------------------------------- command line
@pytest.fixture(scope="module")
def model_files(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("onnx_cli")
    files = {}
    for name in ("hgbr_categorical_nan", "gbc_binary", "hgbc_multiclass_nan"):
        files[name] = tmp / (name + ".joblib")
        joblib.dump(zoo.fitted(name).model, files[name])
    return tmp, files


def test_cli_export_onnx_variants(model_files, capsys):
    tmp, files = model_files
    case, ensemble, _ = zoo.exported("hgbr_categorical_nan")
    rows = case.rows[:100]
    want = SourceModel(case.model, ensemble).raw(rows)
    for args, kind in (([], "exact"), (["--input-type", "float32"], "exact"), (["--legacy-float32"], "legacy"),
                       (["--format", "onnx"], "exact")):
        out = tmp / ("m%d.%s" % (len(args), "bin" if "--format" in args else "onnx"))
        assert main(["export", str(files["hgbr_categorical_nan"]), "-o", str(out)] + args) == 0, args
        text = capsys.readouterr().out
        assert "exported sklearn.ensemble.HistGradientBoostingRegressor" in text
        assert ("raw scores exact" in text) if kind == "exact" and not args else "check" in text
        model = onnx.load(str(out))
        onnx.checker.check_model(model)
        if kind == "exact" and "--input-type" not in args:
            assert first_mismatch(OnnxRuntimeEvaluator(model).raw(rows), want) is None


def test_cli_onnx_to_json_and_inspect(model_files, capsys):
    tmp, files = model_files
    onnx_file, json_file = tmp / "c.onnx", tmp / "c.json"
    assert main(["export", str(files["gbc_binary"]), "-o", str(onnx_file)]) == 0
    assert main(["export", str(onnx_file), "-o", str(json_file)]) == 0
    text = capsys.readouterr().out
    assert "source model's, from the ONNX metadata" in text
    import boxwood_runtime

    device = boxwood_runtime.load(str(json_file))
    case, ensemble, data = zoo.exported("gbc_binary")
    assert json.loads(json_file.read_bytes())["ensemble"] == json.loads(data)["ensemble"]
    rows = case.rows[:50]
    assert device.predict(rows) == list(case.model.predict(SourceModel(case.model, ensemble).matrix(rows)))
    assert main(["inspect", str(onnx_file)]) == 0
    text = capsys.readouterr().out
    assert "TreeEnsemble, ai.onnx.ml opset 5" in text and "ok: " in text
    assert main(["inspect", str(onnx_file), "--json"]) == 0
    info = json.loads(capsys.readouterr().out)
    assert info["self_check"]["ok"] and info["trees"] == len(ensemble.trees)


def test_cli_reads_skl2onnx_file(model_files, capsys):
    tmp, _ = model_files
    case, ours, _ = zoo.exported("gbc_multiclass")
    path = tmp / "from_skl2onnx.onnx"
    path.write_bytes(skl2onnx_model(case).SerializeToString())
    out = tmp / "from_skl2onnx.json"
    assert main(["export", str(path), "-o", str(out)]) == 0
    assert "scored by boxwood's device scorer" in capsys.readouterr().out
    assert main(["inspect", str(path)]) == 0
    assert "not made by boxwood" in capsys.readouterr().out
    import boxwood_runtime

    device = boxwood_runtime.load(str(out))
    rows = [[float(v) for v in r] for r in np.asarray(case.X, dtype=np.float32)]
    assert device.predict(rows) == list(case.model.predict(np.asarray(rows)))


def test_cli_refuses_bad_onnx_and_bad_options(model_files, capsys, tmp_path):
    tmp, files = model_files
    bad = tmp_path / "bad.onnx"
    bad.write_bytes(b"not a model")
    assert main(["export", str(bad), "-o", str(tmp_path / "x.json")]) == 2
    assert "not an ONNX model" in capsys.readouterr().err
    assert main(["inspect", str(bad)]) == 2
    assert "not an ONNX model" in capsys.readouterr().err
    assert not (tmp_path / "x.json").exists()
    assert main(["export", str(files["gbc_binary"]), "-o", str(tmp_path / "x.json"), "--legacy-float32"]) == 2
    assert "ONNX output only" in capsys.readouterr().err
    assert main(["export", str(files["gbc_binary"]), "-o", str(tmp_path / "x.onnx"), "--legacy-float32",
                 "--input-type", "float64"]) == 2
    assert "float32 input" in capsys.readouterr().err


def test_json_onnx_roundtrip_through_legacy_keeps_decisions():
    """A legacy file read back: thresholds are the float32 ones written, and the device
    scorer on that hub agrees leaf by leaf with the source on float32 threshold probes."""
    from test_onnx import float32_rows

    case, ensemble, _ = zoo.exported("hgbc_categorical")
    back = read_onnx(onnx_legacy.to_model(ensemble))
    assert back.compare_precision == "float32"
    assert to_bytes(dataclasses.replace(back, reference=None, provenance={}))  # a valid artefact
    rows = float32_rows(case, ensemble)
    X = rows_to_matrix(ensemble, rows)
    from boxwood.formats.json.device import hub_outputs

    raw = hub_outputs(back, rows).raw
    want = SourceModel(case.model, ensemble).raw(rows)
    assert np.all(np.abs(raw - want).max(axis=0) <= np.asarray(onnx_legacy.raw_error_bound(ensemble)))
    assert X.shape[0] == len(rows)


# ----------------------------------------------------------------------------- verifier
def test_verifier_opens_onnx_files(tmp_path):
    """`boxwood verify` takes .onnx files: an exact graph passes with zero tolerance
    (raw scores bit-identical to scikit-learn on the verifier's own probes), and a graph
    with one threshold moved by one float64 step is caught."""
    verify_mod = pytest.importorskip("boxwood.verify")
    case, ensemble, _ = zoo.exported("hgbr_nan")
    good = tmp_path / "good.onnx"
    onnx_writer.write(ensemble, good)
    assert verify_mod.verify(case.model, [str(good)], probes=400).passed
    tree = next(t for t in ensemble.trees if any(f >= 0 for f in t.feature))
    i = next(i for i in range(tree.n_nodes) if tree.feature[i] >= 0 and tree.left_categories[i] is None)
    moved = list(tree.threshold)
    moved[i] = float(np.nextafter(moved[i], np.inf))
    faulty = dataclasses.replace(ensemble, trees=[dataclasses.replace(tree, threshold=moved) if t is tree else t
                                                  for t in ensemble.trees])
    bad = tmp_path / "bad.onnx"
    onnx_writer.write(faulty, bad)
    assert not verify_mod.verify(case.model, [str(bad)], probes=400).passed
