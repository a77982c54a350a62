"""The numpy batch evaluator (boxwood_runtime.batch) against scikit-learn and the pure-Python scorer.

The reference every check compares with is scikit-learn's own output for the same
fitted estimator (``decision_function`` for classifiers, ``predict`` for regressors,
``_raw_predict`` for HistGradientBoosting regressors whose loss has a log link,
``predict_proba`` and ``predict``), on the open data sets of tests/zoo.py (sources
named there). The pure-Python scorer is the second reference: the batch evaluator
must reproduce its raw scores bit for bit.

Inputs: the zoo rows, plus probes at every split threshold scikit-learn stored (the
threshold itself and the neighbouring float64 values; for models that compare in
float32 also the nearest float32 value and its float32 neighbours), each put into an
otherwise typical row, plus a missing value in each feature for models that route
missing values.
"""
import functools
import json
import subprocess
import sys
import textwrap

import numpy as np
import pytest

import zoo
from boxwood_runtime import RecordError, load
from boxwood_runtime.batch import TRANSFORM_ULPS, BatchModel


# --------------------------------------------------------------------------- helpers
def ulps(a, b):
    """Elementwise count of float64 values between a and b.

    Maps each float to an integer that is ordered like the floats (the sign-magnitude
    to two's-complement trick; common practice, described e.g. in B. Dawson,
    "Comparing Floating Point Numbers, 2012 Edition").
    """
    a = np.ascontiguousarray(a, dtype=np.float64)
    b = np.ascontiguousarray(b, dtype=np.float64)
    assert a.shape == b.shape, (a.shape, b.shape)
    ia, ib = a.view(np.int64), b.view(np.int64)
    ka = np.where(ia >= 0, ia, -(ia & 0x7FFFFFFFFFFFFFFF))
    kb = np.where(ib >= 0, ib, -(ib & 0x7FFFFFFFFFFFFFFF))
    return np.abs(ka - kb)


def same_bits(a, b):
    a = np.ascontiguousarray(a, dtype=np.float64)
    b = np.ascontiguousarray(b, dtype=np.float64)
    return a.shape == b.shape and bool(np.all(a.view(np.int64) == b.view(np.int64)))


def sklearn_splits(est):
    """(feature, threshold) of every numeric split, read from scikit-learn's own trees."""
    out = []
    if hasattr(est, "estimators_"):  # GradientBoosting*: sklearn.tree._tree.Tree per stage
        for reg in np.asarray(est.estimators_).ravel():
            t = reg.tree_
            split = t.children_left != -1
            out += zip(t.feature[split].tolist(), t.threshold[split].tolist())
        return out
    # HistGradientBoosting*: the predictors' node records (private attribute, no public
    # equivalent). With categorical features, scikit-learn's preprocessing puts the
    # categorical columns first, so the node's feature index is into that order.
    n = int(est.n_features_in_)
    order = list(range(n))
    is_cat = getattr(est, "is_categorical_", None)
    if is_cat is not None and getattr(est, "_preprocessor", None) is not None:
        order = np.r_[np.flatnonzero(is_cat), np.flatnonzero(~np.asarray(is_cat))].tolist()
    for iteration in est._predictors:
        for predictor in iteration:
            nodes = predictor.nodes
            split = (nodes["is_leaf"] == 0) & (nodes["is_categorical"] == 0)
            out += [(order[int(f)], float(t)) for f, t in
                    zip(nodes["feature_idx"][split], nodes["num_threshold"][split])]
    return out


def probe_rows(case, model):
    """Zoo rows + threshold probes + missing-value probes (see the module docstring)."""
    base = [list(r) for r in case.rows]
    values = {}
    for f, t in sklearn_splits(case.model):
        if not np.isfinite(t):
            continue
        s = values.setdefault(f, set())
        s.update([t, float(np.nextafter(t, -np.inf)), float(np.nextafter(t, np.inf))])
        if model.compare_precision == "float32":
            t32 = np.float32(t)
            s.update(float(v) for v in (t32, np.nextafter(t32, np.float32(-np.inf)),
                                        np.nextafter(t32, np.float32(np.inf))))
    rows = list(base)
    k = 0
    for f in sorted(values):
        for v in sorted(values[f]):
            row = list(base[k % len(base)])
            k += 1
            row[f] = v
            rows.append(row)
    if model.missing_values == "route":
        for f in range(model.n_features):
            for _ in range(8):
                row = list(base[k % len(base)])
                k += 1
                row[f] = None
                rows.append(row)
        rows.append([None] * model.n_features)
    return rows


def sklearn_input(case, rows):
    """Rows in feature order (None = missing) as the input type the estimator was fitted on."""
    if hasattr(case.X, "columns"):
        import pandas as pd

        cols = {}
        for j, name in enumerate(case.X.columns):
            vals = [np.nan if r[j] is None else r[j] for r in rows]
            dtype = case.X[name].dtype
            if isinstance(dtype, pd.CategoricalDtype):
                cols[name] = pd.Categorical(vals, categories=dtype.categories)
            else:
                cols[name] = pd.Series(vals, dtype=np.float64)
        return pd.DataFrame(cols)
    return np.array([[np.nan if v is None else v for v in r] for r in rows], dtype=np.float64)


def sklearn_raw(case, X):
    est = case.model
    if case.task == "classification":
        return np.asarray(est.decision_function(X), dtype=np.float64)
    if getattr(est, "loss", None) in ("gamma", "poisson"):  # log link: predict is exp(raw)
        return np.asarray(est._raw_predict(X), dtype=np.float64).ravel()
    return np.asarray(est.predict(X), dtype=np.float64)


@functools.lru_cache(maxsize=None)
def setup(name):
    case, _, data = zoo.exported(name)
    model = load(data)
    rows = probe_rows(case, model)
    X = sklearn_input(case, rows)
    return case, model, rows, X, sklearn_raw(case, X)


# --------------------------------------------------------------------------- conformance
@pytest.mark.parametrize("name", zoo.CASES)
def test_raw_scores_bit_identical(name):
    case, model, rows, X, sk_raw = setup(name)
    batch = BatchModel(model)
    assert len(rows) > len(case.rows)  # the probes were added
    got = batch.decision_function(rows)
    # scikit-learn's own raw scores, same shape and the same bits
    assert same_bits(got, sk_raw)
    # the pure-Python scorer, row by row
    scorer = np.array([model.raw_scores(model.prepare(r, i)) for i, r in enumerate(rows)])
    assert same_bits(got.reshape(len(rows), -1), scorer)
    # the matrix path: prepare() output, fed back as an ndarray, gives the same bits
    assert same_bits(batch.decision_function(batch.prepare(rows)), got)


# Cases fitted on DataFrames with string categories have no plain numeric matrix form.
FRAME_CASES = ("hgbr_categorical", "hgbr_categorical_nan", "hgbc_categorical")


@pytest.mark.parametrize("name", [n for n in zoo.CASES if n not in FRAME_CASES])
def test_numeric_array_input_matches_sklearn(name):
    """An ndarray straight from the user (not rounded to float32, NaN for missing)."""
    case, model, rows, X, sk_raw = setup(name)
    batch = BatchModel(model)
    assert isinstance(X, np.ndarray)
    for cats in model.categories:  # category codes must equal the values for this input
        assert cats is None or cats == [float(i) for i in range(len(cats))]
    A = np.array([[np.nan if v is None else v for v in r] for r in rows], dtype=np.float64)
    before = A.copy()
    assert same_bits(batch.decision_function(A), sk_raw)
    assert same_bits(A, before)  # the caller's array is not changed (float32 rounding)


@pytest.mark.parametrize("name", zoo.CASES)
def test_transformed_outputs_and_labels(name):
    case, model, rows, X, _ = setup(name)
    batch = BatchModel(model)
    if case.task == "classification":
        sk_p = np.asarray(case.model.predict_proba(X), dtype=np.float64)
        p = batch.predict_proba(rows)
        assert p.shape == sk_p.shape
        if p.shape[1] == 2:
            # the positive class within the bound; the other column is 1 - p, so the
            # bound holds there in absolute terms (ulps of 1.0), as for scikit-learn
            assert ulps(p[:, 1], sk_p[:, 1]).max() <= TRANSFORM_ULPS
            assert np.abs(p[:, 0] - sk_p[:, 0]).max() <= TRANSFORM_ULPS * np.spacing(1.0)
            py = np.array([q[1] for q in model.predict_proba(rows)])
            assert ulps(p[:, 1], py).max() <= TRANSFORM_ULPS
        else:
            assert ulps(p, sk_p).max() <= TRANSFORM_ULPS
            assert ulps(p, np.array(model.predict_proba(rows))).max() <= TRANSFORM_ULPS
        labels = batch.predict(rows)
        assert labels.shape == (len(rows),)
        np.testing.assert_array_equal(labels, case.model.predict(X))
        np.testing.assert_array_equal(labels, np.array(model.predict(rows)))
    else:
        sk_y = np.asarray(case.model.predict(X), dtype=np.float64)
        y = batch.predict(rows)
        assert y.shape == sk_y.shape
        assert ulps(y, sk_y).max() <= TRANSFORM_ULPS
        assert ulps(y, np.array(model.predict(rows))).max() <= TRANSFORM_ULPS
        with pytest.raises(TypeError):
            batch.predict_proba(rows)


@pytest.mark.parametrize("name", ["gbc_binary", "hgbc_binary", "gbc_multiclass", "hgbc_multiclass"])
def test_labels_on_exact_ties_follow_sklearn(name):
    """Raw scores exactly 0 (or all equal) never occur on real rows, so a copy of the
    fitted scikit-learn model is given a zero start and zero leaves; scikit-learn then
    decides the tie itself (GradientBoostingClassifier: raw >= 0 is the positive class,
    HistGradientBoostingClassifier: raw > 0; several outputs: the first maximum)."""
    import copy

    from boxwood.export import build
    from boxwood.formats.json.writer import to_bytes

    case = zoo.fitted(name)
    est = copy.deepcopy(case.model)
    if hasattr(est, "estimators_"):
        est.init_ = "zero"
        for reg in est.estimators_.ravel():
            reg.tree_.value[:] = 0.0
    else:
        est._baseline_prediction = np.zeros_like(est._baseline_prediction)
        for iteration in est._predictors:
            for predictor in iteration:
                predictor.nodes["value"] = 0.0
    X = np.asarray(case.X, dtype=np.float64)[:50]
    assert not np.any(est.decision_function(X))  # the tie is real
    batch = BatchModel(load(to_bytes(build(est))))
    np.testing.assert_array_equal(batch.predict(X), est.predict(X))


@pytest.mark.parametrize("name", ["gbr_squared_error", "hgbc_multiclass_nan"])
def test_mean_combine_and_one_leaf_trees_match_the_scorer(name):
    """No zoo estimator averages its trees or has a one-leaf tree, so both are made by
    editing an artefact; the reference is then the pure-Python scorer, the project's
    reference evaluator (DESIGN.md), which implements the artefact's documented rule."""
    from boxwood_runtime.scorer import DIGEST_KEY, artefact_bytes

    case, _, data = zoo.exported(name)
    body = json.loads(data)
    del body[DIGEST_KEY]
    body["ensemble"]["combine"] = "mean"
    trees = body["ensemble"]["trees"]
    trees[1] = {"output": trees[1]["output"], "feature": [-1], "threshold": [0.0], "left": [-1],
                "right": [-1], "missing_left": [False], "value": [0.3]}
    model = load(artefact_bytes(body), self_check=False)  # its reference rows no longer apply
    rows = setup(name)[2]
    scorer = np.array([model.raw_scores(model.prepare(r, i)) for i, r in enumerate(rows)])
    got = BatchModel(model).raw_scores(BatchModel(model).prepare(rows))
    assert same_bits(got, scorer)
    # the edit changed the scores: the comparison above is not between unchanged models
    assert not same_bits(got.reshape(-1), setup(name)[4].reshape(-1))


# Planted faults: the probes above must notice each of them (DESIGN.md: a checker is
# trusted once it has caught planted faults). Each fault is put into the batch model's
# arrays at the root of the first tree, which every row passes through.
def _plant(batch, fault):
    root = batch._plan[0][1][0][0]
    if fault == "threshold_one_ulp_down":
        batch._threshold[root] = np.nextafter(batch._threshold[root], -np.inf)
    elif fault == "missing_direction_flipped":
        batch._missing_right[root] = not batch._missing_right[root]
    elif fault == "last_tree_dropped":
        base, trees = batch._plan[0]
        batch._plan[0] = (base, trees[:-1])
    elif fault == "leaves_rounded_to_float32":
        batch._value = batch._value.astype(np.float32).astype(np.float64)


@pytest.mark.parametrize("name,fault", [
    ("hgbr_squared_error", "threshold_one_ulp_down"),
    ("hgbc_binary", "threshold_one_ulp_down"),
    ("hgbr_nan", "missing_direction_flipped"),
    ("hgbc_nan", "missing_direction_flipped"),
    ("gbr_squared_error", "last_tree_dropped"),
    ("gbc_multiclass", "last_tree_dropped"),
    ("gbr_squared_error", "leaves_rounded_to_float32"),
    ("hgbc_multiclass", "leaves_rounded_to_float32"),
])
def test_probes_catch_planted_faults(name, fault):
    case, model, rows, X, sk_raw = setup(name)
    batch = BatchModel(model)
    _plant(batch, fault)
    assert not same_bits(batch.decision_function(rows), sk_raw)


# --------------------------------------------------------------------------- errors
def _reject_model():
    case, _, data = zoo.exported("gbr_squared_error")  # classic trees: reject NaN and inf, float32
    model = load(data)
    A = np.array(case.rows[:20], dtype=np.float64)
    return case, model, BatchModel(model), A


def _same_error(batch, model, A, row):
    """The batch error on ndarray A equals the scorer's error for the same row as a list."""
    with pytest.raises(RecordError) as batch_err:
        batch.prepare(A)
    record = [None if v != v else v for v in A[row].tolist()]
    with pytest.raises(RecordError) as scorer_err:
        model.prepare(record, row)
    assert str(batch_err.value) == str(scorer_err.value)
    return batch_err.value


def test_nan_refused_for_reject_model_names_row_and_column():
    case, model, batch, A = _reject_model()
    A[7, 3] = np.nan
    A[9, 0] = np.nan
    err = _same_error(batch, model, A, 7)
    assert (err.row, err.field) == (7, model.feature_names[3])
    assert "missing" in str(err)


def test_infinity_refused_and_first_bad_value_in_row_wins():
    case, model, batch, A = _reject_model()
    assert model.accepts_infinity is False
    A[4, 5] = np.nan
    A[4, 2] = -np.inf  # left of the NaN in the same row: reported first, as the scorer does
    err = _same_error(batch, model, A, 4)
    assert (err.row, err.field) == (4, model.feature_names[2])
    assert "infinity" in str(err)


def test_float32_overflow_names_row_and_column():
    case, model, batch, A = _reject_model()
    assert model.compare_precision == "float32"
    big = float(np.finfo(np.float32).max) * 2.0
    A[11, 6] = big
    err = _same_error(batch, model, A, 11)
    assert (err.row, err.field) == (11, model.feature_names[6])
    # the largest float32 itself is in range and scores like scikit-learn
    A[11, 6] = float(np.finfo(np.float32).max)
    assert same_bits(batch.decision_function(A), case.model.predict(A))


def test_wrong_column_count_and_shape():
    case, model, batch, A = _reject_model()
    for bad in (A[:, :-1], np.c_[A, A[:, :1]], A[0], A[None]):
        with pytest.raises(RecordError) as err:
            batch.prepare(bad)
        assert "(n, %d)" % model.n_features in str(err.value)
    # list records: the scorer's own message, naming the row
    rows = [list(r) for r in A]
    rows[3] = rows[3][:-1]
    with pytest.raises(RecordError) as err:
        batch.prepare(rows)
    assert err.value.row == 3 and "has %d values" % (model.n_features - 1) in str(err.value)


def test_category_codes_in_arrays():
    case, _, data = zoo.exported("hgbr_categorical")
    model = load(data)
    batch = BatchModel(model)
    j = model.feature_names.index("bmi_band")
    A = batch.prepare(case.rows[:10])
    A[2, j] = 99.0  # no such code
    with pytest.raises(RecordError) as err:
        batch.prepare(A)
    assert (err.value.row, err.value.field) == (2, "bmi_band")
    # With unknown_category="as_missing" the code routes as missing, as scikit-learn
    # routes a category it never saw; compare with scikit-learn given a missing value.
    lenient = BatchModel(load(data, unknown_category="as_missing"))
    rows = [list(r) for r in case.rows[:10]]
    rows[2][j] = None
    assert same_bits(lenient.decision_function(A), case.model.predict(sklearn_input(case, rows)))


def test_empty_input_shapes():
    _, model, batch, A = _reject_model()
    assert batch.decision_function(A[:0]).shape == (0,)
    assert batch.predict([]).shape == (0,)


# --------------------------------------------------------------------------- no numpy
_BLOCKED = textwrap.dedent("""
    import json
    import sys

    class BlockNumpy:
        def find_spec(self, name, path=None, target=None):
            if name == "numpy" or name.startswith("numpy."):
                raise ModuleNotFoundError("No module named %r (blocked for this test)" % name)
            return None

    sys.meta_path.insert(0, BlockNumpy())
    import boxwood_runtime.scorer as scorer
    model = scorer.load(sys.argv[1])
    out = {"prediction": model.predict(dict(zip(model.feature_names, map(float, sys.argv[2:])))),
           "numpy_loaded": "numpy" in sys.modules}
    try:
        import boxwood_runtime.batch
        out["batch"] = "imported"
    except ImportError as exc:
        out["batch"] = str(exc)
    print(json.dumps(out))
""")


def test_core_runs_without_numpy_and_batch_says_it_needs_it(tmp_path):
    case, _, data = zoo.exported("gbr_squared_error")
    path = tmp_path / "model.json"
    path.write_bytes(data)
    row = case.rows[5]
    proc = subprocess.run([sys.executable, "-c", _BLOCKED, str(path)] + [repr(v) for v in row],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    out = json.loads(proc.stdout)
    assert out["numpy_loaded"] is False
    # the stdlib scorer's prediction is scikit-learn's, bit for bit
    assert out["prediction"] == float(case.model.predict(np.array([row]))[0])
    assert "needs numpy" in out["batch"]


# --------------------------------------------------------------------------- trees, forests, AdaBoost, isolation
@pytest.mark.parametrize("name", zoo.FOREST_CASES)
def test_forest_kinds_match_sklearn_and_scorer(name):
    """Trees, forests, AdaBoost (SAMME) and isolation forests: batch raw scores are
    bit-identical to the pure-Python scorer's; decision values, labels and
    probabilities match scikit-learn's own (decision values bit for bit, isolation
    forest scores too since both use numpy's power; probabilities within
    TRANSFORM_ULPS)."""
    from boxwood.sources.model import SourceModel

    from test_conformance import probe_rows as ir_probe_rows  # probes from the exported trees

    case, ensemble, data = zoo.exported(name)
    model = load(data)
    rows = ir_probe_rows(case, ensemble)
    source = SourceModel(case.model, ensemble)
    X = source.matrix(rows)
    batch = BatchModel(model)
    raw = batch.raw_scores(batch.prepare(rows))
    scorer = np.array([model.raw_scores(model.prepare(r, i)) for i, r in enumerate(rows)])
    assert same_bits(raw, scorer)
    if hasattr(case.model, "decision_function"):
        assert same_bits(batch.decision_function(rows), np.asarray(case.model.decision_function(X), dtype=np.float64))
    if case.task == "outlier_detection":
        assert same_bits(batch.score_samples(rows), case.model.score_samples(X))
    if case.task in ("classification", "outlier_detection"):
        np.testing.assert_array_equal(batch.predict(rows), case.model.predict(X))
    if case.task == "classification":
        assert ulps(batch.predict_proba(rows), case.model.predict_proba(X)).max() <= TRANSFORM_ULPS
    if case.task == "regression":
        assert same_bits(batch.predict(rows), np.asarray(case.model.predict(X), dtype=np.float64))
