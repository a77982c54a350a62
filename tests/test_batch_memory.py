"""The numpy batch evaluator on large arrays: memory, results across blocks, and errors.

``BatchModel`` checks and prepares an ndarray block by block; ``predict``,
``predict_proba``, ``decision_function`` and ``score_samples`` prepare, score and
finish one step of rows at a time into a preallocated result. The bound asserted
here (issue 13, "Lean batch"): at 1,000,000 rows, the peak memory traced by
tracemalloc during one call, **the result array included**, is at most
``PEAK_RATIO`` = 1.5 times the input array's size (``X.nbytes``). ``prepare`` alone
returns a full float64 copy (1.0x), so its bound includes that copy too.

Results: bit-identical to the pure-Python scorer on sampled rows (block edges
included), to the unfused composition ``transform_raw(raw_scores(prepare(X)))`` on
arrays of several blocks, and to scikit-learn on the zoo rows repeated over several
blocks. Errors: the same RecordError as before (first bad row, in it the first bad
field), also when the bad values sit in later blocks. No test here measures time.
"""
import gc
import tracemalloc

import numpy as np
import pytest

import zoo
from boxwood_runtime import RecordError, load
from boxwood_runtime import native
from boxwood_runtime.batch import BLOCK_ROWS, TRANSFORM_ULPS, BatchModel, transform
from test_batch import same_bits, setup, ulps

PEAK_RATIO = 1.5
BIG = 1000000
HAS_CC = native.find_compiler() is not None


def _records_array(case, model):
    """The zoo rows as the ndarray a caller passes: category codes, NaN for missing."""
    if any(c is not None for c in model.categories):
        return BatchModel(model).prepare(case.rows)  # strings become codes
    return np.array([[np.nan if v is None else v for v in r] for r in case.rows], dtype=np.float64)


def big_array(name, n, nan_rate=0.02, seed=0):
    """``n`` rows: the zoo rows repeated, with NaN sprinkled in when the model routes it."""
    case, _, data = zoo.exported(name)
    model = load(data)
    A = _records_array(case, model)
    X = np.ascontiguousarray(np.resize(A, (n, A.shape[1])))
    if model.missing_values == "route" and nan_rate:
        X[np.random.default_rng(seed).random(X.shape) < nan_rate] = np.nan
    return case, model, X


def traced_peak(fn, X):
    """(result, peak bytes tracemalloc saw during fn(X), the result included)."""
    gc.collect()
    tracemalloc.start()
    try:
        result = fn(X)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    return result, peak


def record(model, x):
    """Row ``x`` of an array as the record the pure-Python scorer takes: None for NaN, the
    category itself for a code."""
    out = []
    for v, cats in zip(x.tolist(), model.categories):
        if v != v:
            out.append(None)
        elif cats is not None and v == int(v) and 0 <= v < len(cats):
            out.append(cats[int(v)])
        else:
            out.append(v)
    return out


def scorer_raw(model, X, idx):
    """The pure-Python scorer's raw scores for rows ``idx`` of X."""
    return np.array([model.raw_scores(model.prepare(record(model, X[i]), int(i))) for i in idx])


def sample_rows(n, seed=1):
    """Rows at every block edge and a random spread, sorted."""
    edges = [e + d for e in range(0, n, BLOCK_ROWS) for d in (-1, 0, 1)]
    rand = np.random.default_rng(seed).integers(0, n, 120).tolist()
    return sorted(set(i for i in edges + rand + [0, n - 1] if 0 <= i < n))


# --------------------------------------------------------------------------- memory at 1M rows
MEMORY_CASES = [
    ("hgbc_categorical", "predict_proba", "numpy"),   # categorical codes and NaN, 3 classes
    ("hgbc_categorical", "prepare", "numpy"),
    ("rfr", "predict", "numpy"),                      # classic trees: float32 rounding
    ("rfr", "prepare", "numpy"),
    ("rfr", "predict", "c"),
]


@pytest.mark.parametrize("name,method,engine", MEMORY_CASES)
def test_peak_memory_at_a_million_rows(name, method, engine):
    if engine == "c" and not HAS_CC:
        pytest.skip("no C compiler on this machine")
    case, model, X = big_array(name, BIG)
    assert X.shape[0] == BIG and X.dtype == np.float64
    before = X.copy()
    batch = BatchModel(model, engine=engine)
    result, peak = traced_peak(getattr(batch, method), X)
    assert peak <= PEAK_RATIO * X.nbytes, "peak %.3fx the input" % (peak / X.nbytes)
    assert result.shape[0] == BIG
    assert same_bits(X, before)  # the caller's array is never changed
    # sampled rows (block edges, far rows such as the last): the same bits as the same rows
    # scored on their own, and raw scores equal to the pure-Python scorer's
    idx = sample_rows(BIG)
    alone = getattr(batch, method)(X[idx])
    if result.dtype.kind == "f":
        assert same_bits(result[idx], alone)
    else:
        np.testing.assert_array_equal(result[idx], alone)
    if method != "prepare":
        got = batch.raw_scores(batch.prepare(X[idx]))
        assert same_bits(got, scorer_raw(model, X, idx))


# --------------------------------------------------------------------------- results across blocks
FUSED_CASES = ["hgbc_categorical", "hgbr_categorical_nan", "hgbc_multiclass_nan", "hgbc_binary",
               "gbc_multiclass", "gbr_squared_error", "hgbr_poisson", "rfr", "rfr_multioutput", "rfc_binary",
               "ada_multiclass", "ada_binary", "iforest"]


def _unfused(batch, X, method):
    """The old composition, whole-array steps through the public API."""
    m = batch.model
    raw = batch.raw_scores(batch.prepare(X))
    if method == "decision_function":
        d = batch.decision_values(raw)
        return d[:, 0] if d.shape[1] == 1 else d
    if method == "score_samples":
        return transform("isolation", raw, m.post_transform_params)[:, 0]
    if method == "predict_proba":
        p = batch.transform_raw(raw)
        return np.column_stack([1.0 - p[:, 0], p[:, 0]]) if p.shape[1] == 1 else p
    if m.task == "regression":
        y = batch.transform_raw(raw)
        return y[:, 0] if y.shape[1] == 1 else y
    return np.asarray(m.classes)[batch.class_index(raw)]


@pytest.mark.parametrize("name", [n for n in FUSED_CASES if n in zoo.ALL_CASES])
def test_fused_path_equals_unfused_composition_and_scorer(name):
    n = 3 * BLOCK_ROWS + 1234  # several blocks and a short last one
    case, model, X = big_array(name, n, nan_rate=0.05)
    batch = BatchModel(model)
    methods = ["decision_function", "predict"] + (["predict_proba"] if model.task == "classification" else []) \
        + (["score_samples"] if model.task == "outlier_detection" else [])
    for method in methods:
        got, want = getattr(batch, method)(X), _unfused(batch, X, method)
        assert got.shape == want.shape and got.dtype == want.dtype
        if got.dtype.kind == "f":
            assert same_bits(got, want), method
        else:
            np.testing.assert_array_equal(got, want)
    idx = sample_rows(n)
    assert same_bits(batch.raw_scores(batch.prepare(X))[idx], scorer_raw(model, X, idx))
    # prepare() of the array equals the scorer's prepare of each sampled record
    P = batch.prepare(X)
    want = np.array([model.prepare(record(model, X[i]), int(i)) for i in idx], dtype=np.float64)
    assert same_bits(P[idx], want)


@pytest.mark.skipif(not HAS_CC, reason="no C compiler on this machine")
@pytest.mark.parametrize("name", ["hgbc_categorical", "rfr"])
def test_c_engine_fused_path_bit_identical(name):
    case, model, X = big_array(name, 5 * BLOCK_ROWS + 7)
    fast, slow = BatchModel(model, engine="c"), BatchModel(model)
    assert same_bits(fast.decision_function(X), slow.decision_function(X))
    assert same_bits(fast.raw_scores(fast.prepare(X)), slow.raw_scores(slow.prepare(X)))
    np.testing.assert_array_equal(fast.predict(X), slow.predict(X))


@pytest.mark.parametrize("name", ["hgbc_categorical", "rfr", "gbc_multiclass"])
def test_zoo_rows_over_several_blocks_match_sklearn(name):
    """The zoo rows (with threshold and missing-value probes for boosted models) repeated
    past several blocks: decision values bit for bit, labels equal, probabilities within
    TRANSFORM_ULPS of scikit-learn."""
    if name in zoo.CASES:
        case, model, rows, Xsk, sk_raw = setup(name)
    else:
        case, _, data = zoo.exported(name)
        model, rows = load(data), case.rows
        Xsk = np.array([[np.nan if v is None else v for v in r] for r in rows], dtype=np.float64)
        sk_raw = np.asarray(case.model.predict(Xsk), dtype=np.float64)
    batch = BatchModel(model)
    if any(c is not None for c in model.categories):
        A = batch.prepare(rows)
    else:
        A = np.array([[np.nan if v is None else v for v in r] for r in rows], dtype=np.float64)
    reps = 2 * BLOCK_ROWS // len(rows) + 2
    X = np.tile(A, (reps, 1))
    assert X.shape[0] > 2 * BLOCK_ROWS
    tiled = np.tile(sk_raw, reps) if sk_raw.ndim == 1 else np.tile(sk_raw, (reps, 1))
    assert same_bits(batch.decision_function(X) if case.task == "classification" else batch.predict(X), tiled)
    if case.task == "classification":
        np.testing.assert_array_equal(batch.predict(X), np.tile(case.model.predict(Xsk), reps))
        sk_p = np.tile(np.asarray(case.model.predict_proba(Xsk), dtype=np.float64), (reps, 1))
        assert ulps(batch.predict_proba(X), sk_p).max() <= TRANSFORM_ULPS


# --------------------------------------------------------------------------- errors in later blocks
def _both_errors(batch, X, method="predict"):
    """The RecordError of prepare(X) and of a scoring method: the same text."""
    with pytest.raises(RecordError) as a:
        batch.prepare(X)
    with pytest.raises(RecordError) as b:
        getattr(batch, method)(X)
    assert str(a.value) == str(b.value)
    return a.value


def _scorer_error(model, X, row):
    with pytest.raises(RecordError) as err:
        model.prepare(record(model, X[row]), row)
    return err.value


def _reject_big(n=BIG):
    """Classic gradient boosting: rejects NaN and infinity, compares in float32."""
    case, model, X = big_array("gbr_squared_error", n)
    assert model.missing_values == "reject" and not model.accepts_infinity
    assert model.compare_precision == "float32"
    return case, model, BatchModel(model), X


def test_nan_refused_first_bad_row_of_a_million():
    case, model, batch, X = _reject_big()
    X[900000, 0] = np.nan
    X[700000, 5] = np.nan  # a later column than row 900,000's, an earlier row: reported
    err = _both_errors(batch, X)
    assert (err.row, err.field) == (700000, model.feature_names[5])
    assert str(err) == str(_scorer_error(model, X, 700000))
    assert "missing" in str(err)


def test_infinity_refused_and_first_bad_value_in_the_row_wins():
    case, model, batch, X = _reject_big()
    X[900000, 1] = np.inf
    X[700000, 6] = np.nan
    X[700000, 4] = -np.inf  # left of the NaN in the same row: reported first
    err = _both_errors(batch, X)
    assert (err.row, err.field) == (700000, model.feature_names[4])
    assert str(err) == str(_scorer_error(model, X, 700000))
    assert "infinity" in str(err)


def test_float32_overflow_in_a_later_block_and_bad_value_before_overflow():
    case, model, batch, X = _reject_big()
    big = float(np.finfo(np.float32).max) * 2.0
    X[900000, 0] = big
    X[700000, 3] = -big
    err = _both_errors(batch, X)
    assert (err.row, err.field) == (700000, model.feature_names[3])
    assert str(err) == str(_scorer_error(model, X, 700000))
    assert "float32 range" in str(err)
    # in one row, a refused value is reported before an overflow in an earlier column
    X[700000, 7] = np.nan
    err = _both_errors(batch, X)
    assert (err.row, err.field) == (700000, model.feature_names[7])
    assert str(err) == str(_scorer_error(model, X, 700000))
    # the largest float32 itself is in range
    X[700000, 3] = X[900000, 0] = float(np.finfo(np.float32).max)
    X[700000, 7] = 0.0
    y = batch.predict(X[699990:700010])
    assert same_bits(y, case.model.predict(X[699990:700010]))


def test_infinity_and_overflow_for_a_float32_forest_that_routes_missing():
    case, model, X = big_array("rfr", BIG)
    batch = BatchModel(model)
    assert model.missing_values == "route" and not model.accepts_infinity
    X[900000, 2] = np.inf
    X[700000, 8] = float(np.finfo(np.float32).max) * 4.0
    err = _both_errors(batch, X)
    assert (err.row, err.field) == (700000, model.feature_names[8])
    assert str(err) == str(_scorer_error(model, X, 700000))


def test_category_code_errors_in_later_blocks():
    case, model, X = big_array("hgbc_categorical", BIG)
    batch = BatchModel(model)
    j = model.feature_names.index("bmi_band")
    k = [i for i, c in enumerate(model.categories) if c is not None and i != j][0]
    X[900000, k] = 0.0 + 7
    X[700000, j] = 2.5  # not a whole number
    with pytest.raises(RecordError) as err:
        batch.prepare(X)
    assert (err.value.row, err.value.field) == (700000, "bmi_band")
    assert "category code 2.5 is not one of 0..4" in str(err.value)
    for bad in (99.0, -1.0, np.inf):
        X[700000, j] = bad
        with pytest.raises(RecordError) as err:
            batch.prepare(X)
        assert (err.value.row, err.value.field) == (700000, "bmi_band")
    X[700000, j] = 1.0
    with pytest.raises(RecordError) as err:
        batch.prepare(X)
    assert (err.value.row, err.value.field) == (900000, model.feature_names[k])
    # through predict_proba, on a smaller array (scoring 70,000 rows first, not 700,000)
    S = X[:100000].copy()
    S[90000, k] = 7.0
    S[70000, j] = 5.0
    with pytest.raises(RecordError) as a:
        batch.predict_proba(S)
    with pytest.raises(RecordError) as b:
        batch.prepare(S)
    assert (a.value.row, a.value.field) == (70000, "bmi_band") and str(a.value) == str(b.value)


def test_unknown_codes_as_missing_in_later_blocks():
    """unknown_category="as_missing": a bad code anywhere routes as NaN, the caller's array
    unchanged."""
    case, _, data = zoo.exported("hgbc_categorical")
    lenient = BatchModel(load(data, unknown_category="as_missing"))
    _, _, X = big_array("hgbc_categorical", 3 * BLOCK_ROWS + 5)
    j = lenient.feature_names.index("bmi_band")
    bad_rows = [5, BLOCK_ROWS + 3, 3 * BLOCK_ROWS + 4]
    X[bad_rows, j] = [99.0, -2.0, 1.5]
    before = X.copy()
    with_nan = X.copy()
    with_nan[bad_rows, j] = np.nan
    assert same_bits(lenient.predict_proba(X), lenient.predict_proba(with_nan))
    assert same_bits(lenient.prepare(X), lenient.prepare(with_nan))
    assert same_bits(X, before)


def test_input_dtypes_and_layouts():
    """float32, integer and Fortran-ordered arrays, and views: the same numbers as a
    C-ordered float64 copy."""
    case, model, X = big_array("rfr", 2 * BLOCK_ROWS + 11, nan_rate=0.0)
    batch = BatchModel(model)
    want = batch.predict(X)
    assert same_bits(batch.predict(np.asfortranarray(X)), want)
    X32 = X.astype(np.float32)
    assert same_bits(batch.predict(X32), batch.predict(X32.astype(np.float64)))
    Xi = np.rint(X * 100).astype(np.int64)
    assert same_bits(batch.predict(Xi), batch.predict(Xi.astype(np.float64)))
    assert same_bits(batch.predict(X[::2]), want[::2])
    assert same_bits(batch.prepare(np.asfortranarray(X)), batch.prepare(X))


def test_shape_errors_before_any_work():
    _, model, batch, X = _reject_big(n=3 * BLOCK_ROWS)
    X[2 * BLOCK_ROWS, 0] = np.nan
    for bad in (X[:, :-1], X[0], X[None]):
        for method in ("prepare", "predict", "decision_function"):
            with pytest.raises(RecordError) as err:
                getattr(batch, method)(bad)
            assert "(n, %d)" % model.n_features in str(err.value)
