"""boxwood batch scorer: score many rows at once with numpy (for gateways that have it).

The scoring core, :mod:`boxwood_runtime.scorer`, never imports this module; this
module imports the core and builds on a model it has already loaded and validated:

    from boxwood_runtime import load
    from boxwood_runtime.batch import BatchModel
    batch = BatchModel(load("model.json"))
    batch.predict(X)            # X: ndarray (n, n_features), or a list of records

How it evaluates. The trees are read from the loaded model's nested tuples (the
same values the pure-Python scorer walks) into flat node arrays, numbered so that
the two children of a split sit next to each other: a step down the tree is then
``node = first_child[node] + goes_right``. Each tree is evaluated for all rows of a
block at once, one depth level per numpy step; a leaf is its own child and never
goes right, so extra steps leave finished rows where they are. A missing value
(NaN) goes right where the node's ``missing_left`` is false; at a categorical split
a category code goes left when it is set in the node's row of a boolean look-up
table of shape (categorical splits, categories).

Memory. An ndarray is checked and prepared block by block (``BLOCK_ROWS`` rows; for the
C engine, that many per thread): ``predict``, ``predict_proba``, ``decision_function``
and ``score_samples`` copy a block of the caller's rows, check and prepare it, score it
and finish it into one preallocated result, so beyond the result only a few blocks'
worth is allocated; ``prepare`` alone fills its full float64 result the same way. The
first bad value still decides the error: blocks are checked in row order, and a block
with anything to report goes through the full check, which names its first bad row
(counted from the start of the input) and, in that row, its first bad field.
tests/test_batch_memory.py holds the peak traced memory of a 1,000,000-row call, the
result included, to at most 1.5 times the input array's size.

Exactness. Raw scores are built exactly as the pure-Python scorer builds them: the
base value first, then the leaf value of each tree of that output, in tree order,
added in float64 (for ``combine == "mean"``: the leaves summed from 0.0, divided by
the tree count, added to the base value). They are therefore bit-identical to
:meth:`boxwood_runtime.scorer.Model.raw_scores` and, where the source works in
float64, to scikit-learn.

Post-transforms use numpy: ``np.exp``; logistic as ``1 / (1 + np.exp(-x))``;
softmax as max-subtract, ``np.exp``, a left-to-right sum, divide. They differ from
the pure-Python scorer only where ``np.exp`` and ``math.exp`` round differently.
Measured on the rows tests/test_batch.py scores (45,927 rows of the zoo: data, threshold
probes, missing values; numpy 2.4.6, scikit-learn 1.9.1, Python 3.11, x86-64):

- raw scores and identity outputs: bit-identical to the scorer and scikit-learn;
- exp and softmax: bit-identical to scikit-learn (which also uses ``np.exp``),
  at most 2 ulp from the pure-Python scorer (``math.exp``);
- logistic: at most 2 ulp from both (scikit-learn uses ``scipy.special.expit``,
  which rounds like ``math.exp``);
- binary classifiers' negative-class column is ``1 - p`` (as in scikit-learn), so
  there the bound is absolute: 2 ulp of 1.0.

Another numpy build (another ``np.exp``) may round differently; the tests enforce
``TRANSFORM_ULPS = 4``, half the core's self-check tolerance ``SELF_CHECK_ULPS = 8``.
"""
try:
    import numpy as np
except ImportError as _exc:  # pragma: no cover - exercised in a subprocess test
    raise ImportError(
        "boxwood_runtime.batch needs numpy, which is not installed here; the standard-library "
        "scorer (boxwood_runtime.scorer / boxwood_runtime.load) works without it"
    ) from _exc

from .scorer import Model, RecordError

# Transformed outputs are within this many ulps of the pure-Python scorer and of
# scikit-learn (measured: 2; see the module docstring).
TRANSFORM_ULPS = 4
# Rows evaluated together: big enough that numpy's per-call overhead is small,
# small enough that a block's working arrays stay in the CPU cache.
BLOCK_ROWS = 16384


class BatchModel:
    """Vectorised scorer for a :class:`boxwood_runtime.scorer.Model`.

    Methods mirror the model's (and scikit-learn's) names and return ndarrays
    shaped like scikit-learn's: ``decision_function`` (n,) for one output or
    (n, K); ``predict`` (n,); ``predict_proba`` (n, K) with K the class count.
    """

    def __init__(self, model, engine="numpy"):
        """``engine``: "numpy" walks the trees with numpy; "c" with the model's C target built
        by the machine's C compiler (boxwood_runtime.native: cached per artefact, a
        NativeBuildError when no compiler is found). Both prepare input the same way and
        give bit-identical raw scores."""
        if not isinstance(model, Model):
            raise TypeError("BatchModel needs a loaded boxwood_runtime.scorer.Model, got %s"
                            % type(model).__name__)
        if engine not in ("numpy", "c"):
            raise ValueError("engine must be \"numpy\" or \"c\", got %r" % (engine,))
        self.model = model
        self.engine = engine
        self._native = None
        if engine == "c":
            from .native import NativeEngine

            self._native = NativeEngine(model)
        self.n_features = model.n_features
        self.feature_names = list(model.feature_names)
        self._n_categories = [None if c is None else len(c) for c in model.categories]
        self._numeric_cols = np.array([c is None for c in model.categories], dtype=bool)
        self._categorical_cols = [(j, n) for j, n in enumerate(self._n_categories) if n is not None]
        # rows per step of the fused path: the C engine splits a step across its threads
        self._step_rows = BLOCK_ROWS * (self._native.threads if self._native is not None else 1)
        self._build_nodes()

    # -- layout ----------------------------------------------------------------------
    def _build_nodes(self):
        """Flatten the model's trees into node arrays (children of a split adjacent)."""
        feature, threshold, first, missing_right, value, cat_row = [], [], [], [], [], []
        lut_rows = []
        width = max([n for n in self._n_categories if n] or [1])
        inf = float("inf")

        def add(node):
            i = len(feature)
            if node.__class__ is tuple:
                f, t, _, _, m = node
                feature.append(f)
                if m is True or m is False:  # numeric split
                    threshold.append(t)
                    missing_right.append(not m)
                    cat_row.append(-1)
                else:  # categorical split: threshold +inf, so only the table decides
                    threshold.append(inf)
                    missing_right.append(not m[0])
                    cat_row.append(len(lut_rows))
                    row = [False] * width
                    for code in m[1]:
                        row[code] = True
                    lut_rows.append(row)
            else:  # a leaf: its own child; +inf threshold, so it never goes right
                feature.append(0)
                threshold.append(inf)
                missing_right.append(False)
                cat_row.append(-1)
            first.append(i)
            value.append(node if node.__class__ is not tuple else 0.0)
            return i

        # plan: per output, (base value, [(root index, depth), ...]) in tree order
        self._plan = []
        for j, roots in enumerate(self.model.trees_per_output):
            trees = []
            for root in roots:
                start = add(root)
                level, depth = [(root, start)], 0
                while True:  # breadth first: a split's two children are appended together
                    nxt = []
                    for node, i in level:
                        if node.__class__ is tuple:
                            first[i] = len(feature)
                            nxt.append((node[2], add(node[2])))
                            nxt.append((node[3], add(node[3])))
                    if not nxt:
                        break
                    depth += 1
                    level = nxt
                trees.append((start, depth))
            self._plan.append((self.model.base_values[j], trees))
        self._feature = np.array(feature, dtype=np.intp)
        self._threshold = np.array(threshold, dtype=np.float64)
        self._first = np.array(first, dtype=np.intp)
        self._missing_right = np.array(missing_right, dtype=bool)
        self._value = np.array(value, dtype=np.float64)
        self._cat_row = np.array(cat_row, dtype=np.intp)
        self._lut = np.array(lut_rows, dtype=bool).reshape(len(lut_rows), width)
        self._has_cat_splits = bool(lut_rows)

    # -- input -----------------------------------------------------------------------
    def prepare(self, records):
        """Validate input and return the float64 matrix (n, n_features) the trees compare.

        ``records`` is either a numeric ndarray of shape (n, n_features) whose
        categorical columns hold category codes (0 .. number of categories - 1) and
        NaN for missing, or a sequence of records (dicts or sequences, one dict alone
        is one record) that are passed one by one to ``Model.prepare``, so errors are
        the same as the pure-Python scorer's. Raises RecordError naming the row and
        field of the first bad value.

        An ndarray is checked and converted block by block into the result, so the
        memory needed beyond the result is a few blocks' worth; the caller's array is
        never changed.
        """
        X = self._array_or_rows(records)
        if X.__class__ is not _Unprepared:
            return X
        X = X.array
        out = np.empty(X.shape, dtype=np.float64)
        for lo in range(0, X.shape[0], BLOCK_ROWS):
            buf = out[lo:lo + BLOCK_ROWS]
            buf[...] = X[lo:lo + BLOCK_ROWS]
            done = self._prepare_block(buf, lo)
            if done is not buf:
                buf[...] = done
        return out

    def _array_or_rows(self, records):
        """A prepared matrix for record lists; an :class:`_Unprepared` wrapping a numeric
        ndarray of the right shape, still to be checked block by block."""
        if isinstance(records, np.ndarray) and self.model.preprocesses:
            raise RecordError(None, None, "this artefact carries preprocessing (raw fields %s); pass a list of "
                              "records, not a feature matrix" % ", ".join(self.model.input_names))
        if isinstance(records, np.ndarray) and records.dtype.kind in "fiu":
            if records.ndim != 2 or records.shape[1] != self.n_features:
                raise RecordError(None, None, "the array has shape %s, the model takes (n, %d) columns (%s)"
                                  % (records.shape, self.n_features, ", ".join(self.feature_names)))
            return _Unprepared(records)
        if isinstance(records, np.ndarray):
            if records.dtype.kind != "O":
                raise RecordError(None, None, "expected a numeric or object array, got dtype %s"
                                  % records.dtype)
            records = records.tolist()
        if isinstance(records, dict):
            records = [records]
        if not isinstance(records, (list, tuple)):
            raise RecordError(None, None, "expected an ndarray or a list of records, got %s"
                              % type(records).__name__)
        prepare = self.model.prepare
        rows = [prepare(r, i) for i, r in enumerate(records)]
        return np.array(rows, dtype=np.float64).reshape(len(rows), self.n_features)

    def _prepare_block(self, X, offset):
        """Check and prepare rows ``offset ..`` of the caller's array, given as ``X``: a
        float64 copy of them that this method may change. Returns the prepared block (``X``
        itself or a new array). A quick look finds blocks that need nothing but the float32
        rounding; any other block goes through :meth:`_prepare_checked`, which finds the
        first bad value or applies unknown_category="as_missing"."""
        m = self.model
        if m.missing_values == "reject":
            suspect = not (np.isfinite(X).all() if not m.accepts_infinity else not np.isnan(X).any())
        else:
            suspect = not m.accepts_infinity and bool(np.isinf(X).any())
        if not suspect:
            for j, n_cats in self._categorical_cols:
                col = X[:, j]
                good = (col >= 0) & (col < n_cats) & (col == np.floor(col))  # False for NaN
                good |= np.isnan(col)
                if not good.all():
                    suspect = True
                    break
        if suspect:
            return self._prepare_checked(X, offset)
        if m.compare_precision == "float32":
            with np.errstate(over="ignore"):
                X32 = X.astype(np.float32)
            inf32 = np.isinf(X32)
            if inf32.any() and (inf32 & np.isfinite(X)).any():
                return self._prepare_checked(X, offset)
            X[...] = X32
        return X

    def _prepare_checked(self, X, offset):
        """The full check of a block (float64, changed in place): every bad value marked,
        then the first one raised (row numbers counted from ``offset``)."""
        m = self.model
        nan = np.isnan(X)
        bad = np.zeros(X.shape, dtype=bool)
        reason = np.zeros(X.shape, dtype=np.int8)  # 1 missing, 2 infinity, 3 bad code
        num = self._numeric_cols
        if not m.accepts_infinity:
            inf = np.isinf(X) & num
            bad |= inf
            reason[inf] = 2
        for j, n_cats in self._categorical_cols:
            col = X[:, j]
            wrong = ~nan[:, j] & ~((col >= 0) & (col < n_cats) & (col == np.floor(col)))
            if not wrong.any():
                continue
            if m.unknown_category == "error":
                bad[:, j] |= wrong
                reason[wrong, j] = 3
            else:  # as scikit-learn does: an unknown category is a missing value
                col[wrong] = np.nan
                nan[:, j] |= wrong
        if m.missing_values == "reject":
            bad |= nan & (reason == 0)
            reason[nan & (reason == 0)] = 1
        overflow = None
        if m.compare_precision == "float32":
            with np.errstate(over="ignore"):
                X32 = X.astype(np.float32)
            overflow = np.isinf(X32) & np.isfinite(X)
        if bad.any() or (overflow is not None and overflow.any()):
            self._raise_first(X, bad, reason, overflow, offset)
        if overflow is not None:
            X[...] = X32
        return X

    def _raise_first(self, X, bad, reason, overflow, offset=0):
        """Raise the error the per-record scorer raises: the first bad row, in it the first
        bad value, and only then a value outside the float32 range. ``X`` and the masks
        cover one block, whose first row is row ``offset`` of the input."""
        any_row = bad.any(axis=1)
        if overflow is not None:
            any_row = any_row | overflow.any(axis=1)
        r = int(np.argmax(any_row))
        row = offset + r
        if bad[r].any():
            c = int(np.argmax(bad[r]))
            name = self.feature_names[c]
            why = int(reason[r, c])
            if why == 1:
                raise RecordError(row, name, "the value is missing, and this model does not accept missing values")
            if why == 2:
                raise RecordError(row, name, "infinity is not accepted by this model")
            raise RecordError(row, name, "category code %r is not one of 0..%d"
                              % (float(X[r, c]), self._n_categories[c] - 1))
        c = int(np.argmax(overflow[r]))
        raise RecordError(row, self.feature_names[c],
                          "%r is outside the float32 range this model compares in" % (float(X[r, c]),))

    # -- evaluation ------------------------------------------------------------------
    def raw_scores(self, X):
        """Raw scores, shape (n, n_outputs), for a matrix from :meth:`prepare`."""
        if self._native is not None:
            return self._native.raw_scores(X)
        n = X.shape[0]
        out = np.empty((n, len(self._plan)), dtype=np.float64)
        for start in range(0, n, BLOCK_ROWS):
            block = np.ascontiguousarray(X[start:start + BLOCK_ROWS])
            out[start:start + block.shape[0]] = self._block(block)
        return out

    def _block(self, X):
        n, width = X.shape
        flat = X.ravel()
        row_base = np.arange(n, dtype=np.intp) * width
        has_nan = bool(np.isnan(X).any())
        feature, threshold, first = self._feature, self._threshold, self._first
        value, missing_right = self._value, self._missing_right
        mean = self.model.combine == "mean"
        out = np.empty((n, len(self._plan)), dtype=np.float64)
        for j, (base, trees) in enumerate(self._plan):
            acc = np.zeros(n) if mean else np.full(n, base)
            for root, depth in trees:
                if depth == 0:  # a tree that is a single leaf
                    acc += value[root]
                    continue
                # The root level needs no gathers: one column against one threshold.
                v = X[:, feature[root]]
                right = v > threshold[root]
                if has_nan:
                    right |= np.isnan(v) & missing_right[root]
                if self._has_cat_splits and self._cat_row[root] >= 0:
                    self._categorical(np.full(n, root, dtype=np.intp), v, right)
                node = right.astype(np.intp)
                node += first[root]
                for _ in range(depth - 1):
                    v = flat.take(row_base + feature.take(node))
                    right = v > threshold.take(node)  # NaN > t is False: handled next
                    if has_nan:
                        missing = np.isnan(v)
                        right |= missing & missing_right.take(node)
                    if self._has_cat_splits:
                        self._categorical(node, v, right)
                    node = first.take(node) + right
                acc += value.take(node)
            if mean:
                acc = base + acc / len(trees) if trees else np.full(n, base)
            out[:, j] = acc
        return out

    def _categorical(self, node, v, right):
        """At categorical splits, send non-missing codes right unless set in the table."""
        table_row = self._cat_row.take(node)
        at = (table_row >= 0) & ~np.isnan(v)
        if at.any():
            right[at] = ~self._lut[table_row[at], v[at].astype(np.intp)]

    # -- the public methods ----------------------------------------------------------
    def decision_values(self, raw):
        """Decision values for raw scores (n, n_outputs), as the scorer's ``decision_values``
        (a calibrated classifier: its calibrated probabilities, which decide its label)."""
        m = self.model
        if m.calibration is not None:
            return self.transform_raw(raw)
        if m.post_transform == "samme":
            return samme_decision(raw, m.post_transform_params["weight_total"])
        if m.post_transform == "isolation":
            return transform("isolation", raw, m.post_transform_params) - m.post_transform_params["offset"]
        return raw

    def exact_values(self, raw):
        """The values a device must reproduce bit for bit, as the scorer's ``exact_values``:
        the raw scores, except AdaBoost's decision values (a calibrated classifier: every
        fold's own, fold after fold)."""
        m = self.model
        if m.calibration is not None:
            return calibrated_exact_values(m.calibration, m.post_transform, raw)
        if m.post_transform == "samme":
            return samme_decision(raw, m.post_transform_params["weight_total"])
        return raw

    def transform_raw(self, raw):
        """The post-transformed outputs for raw scores (n, n_outputs), as the scorer's ``transform_raw``
        (then the target steps of a regressor)."""
        m = self.model
        if m.calibration is not None:
            return calibrated_probabilities(m.calibration, m.post_transform, m.softmax_sum, raw, len(m.classes))
        out = transform(m.post_transform, raw, m.post_transform_params, m.softmax_sum)
        return apply_target_steps(getattr(m, "target_steps", ()), out)

    def _run(self, records, finish):
        """``finish(raw_scores(prepare(records)))`` in steps of rows: each step of an ndarray
        is copied, checked and prepared, scored and finished before the next, and the
        results fill one preallocated array; the only full-size allocation is the result.
        Errors are the ones :meth:`prepare` raises: steps run in row order and each names
        its first bad row, so the first error met is the first bad row of the input."""
        X = self._array_or_rows(records)
        unprepared = X.__class__ is _Unprepared
        if unprepared:
            X = X.array
        n, step = X.shape[0], self._step_rows
        buf = np.empty((min(n, step), self.n_features), dtype=np.float64) if unprepared else None
        out = None
        for lo in range(0, n, step) if n else [0]:
            if unprepared:
                part = buf[:min(step, n - lo)]
                part[...] = X[lo:lo + step]
                part = self._prepare_block(part, lo)
            else:
                part = X[lo:lo + step]
            res = finish(self.raw_scores(part))
            if out is None:
                if n <= step:
                    return res
                out = np.empty((n,) + res.shape[1:], dtype=res.dtype)
            out[lo:lo + res.shape[0]] = res
        return out

    def decision_function(self, X):
        """Decision values (raw scores for boosted models): shape (n,) or (n, K)."""
        if self.model.calibration is not None:
            raise TypeError("decision_function is not defined for a calibrated classifier (CalibratedClassifierCV "
                            "has none); use predict or predict_proba")
        d = self._run(X, self.decision_values)
        return d[:, 0] if d.shape[1] == 1 else d

    def score_samples(self, X):
        """Isolation forests: scikit-learn's ``score_samples``, shape (n,)."""
        m = self.model
        if m.task != "outlier_detection":
            raise TypeError("score_samples is for outlier detectors; this model does %s" % m.task)
        params = m.post_transform_params
        return self._run(X, lambda raw: transform("isolation", raw, params)[:, 0])

    def predict(self, X):
        """Predictions (regression, shape (n,) or (n, K)) or class labels (shape (n,))."""
        m = self.model
        if m.task == "regression":
            out = self._run(X, self.transform_raw)
            return out[:, 0] if out.shape[1] == 1 else out
        classes = np.asarray(m.classes)
        return self._run(X, lambda raw: classes[self.class_index(raw)])

    def predict_proba(self, X):
        """Class probabilities, shape (n, number of classes), in the order of ``classes``."""
        m = self.model
        if m.task != "classification":
            raise TypeError("predict_proba is for classifiers; this model does %s" % m.task)

        def finish(raw):
            if m.calibration is not None:
                return self.transform_raw(raw)
            p = transform(m.post_transform, raw, m.post_transform_params, m.softmax_sum)
            if p.shape[1] == 1:
                return np.column_stack([1.0 - p[:, 0], p[:, 0]])
            return p

        return self._run(X, finish)

    def class_index(self, raw):
        """Index into ``classes`` of the predicted class for raw scores (n, n_outputs)."""
        m = self.model
        if m.task == "outlier_detection":  # scikit-learn: -1 where decision < 0
            return (self.decision_values(raw)[:, 0] >= 0.0).astype(np.intp)
        if m.calibration is not None:
            return np.argmax(self.transform_raw(raw), axis=1)  # the first of equal maxima
        if raw.shape[1] == 1:
            positive = raw[:, 0] > 0.0 if m.binary_rule == "raw_gt_0" else raw[:, 0] >= 0.0
            return positive.astype(np.intp)
        d = self.decision_values(raw)
        if d.shape[1] == 1:  # AdaBoost, two classes
            return (d[:, 0] > 0.0).astype(np.intp)
        return np.argmax(d, axis=1)  # the first of equal maxima, as the scorer's loop


def samme_decision(raw, weight_total):
    """AdaBoost (SAMME) decision values, as scorer.samme_decision, for (n, K) raw sums."""
    d = np.asarray(raw, dtype=np.float64) / weight_total
    return (-d[:, 0] + d[:, 1])[:, None] if d.shape[1] == 2 else d


def _softmax(z, order="sequential"):
    e = np.exp(z - z.max(axis=1, keepdims=True))
    if order == "pairwise":  # numpy's own row sum, as scikit-learn's extmath.softmax adds
        return e / np.ascontiguousarray(e).sum(axis=1)[:, None]
    total = e[:, 0].copy()
    for k in range(1, e.shape[1]):  # left to right, as the scorer adds
        total += e[:, k]
    return e / total[:, None]


def transform(name, raw, params=None, softmax_sum="sequential"):
    """Apply a post-transform to raw scores of shape (n, K); return a new (n, K) array."""
    raw = np.asarray(raw, dtype=np.float64)
    with np.errstate(over="ignore"):
        if name == "identity":
            return raw.copy()
        if name == "exp":
            return np.exp(raw)
        if name == "logistic":
            return 1.0 / (1.0 + np.exp(-raw))
        if name == "logistic_double":
            return 1.0 / (1.0 + np.exp(-(2.0 * raw)))
        if name == "softmax":
            return _softmax(raw, softmax_sum)
        if name == "samme":
            d = samme_decision(raw, params["weight_total"])
            if d.shape[1] == 1:
                return _softmax(np.column_stack([-d[:, 0] / 2, d[:, 0] / 2]), softmax_sum)
            return _softmax(d / (d.shape[1] - 1), softmax_sum)
        if name == "isolation":  # numpy's power, as scikit-learn's score_samples
            den = params["denominator"]
            q = raw / den if den != 0.0 else np.ones_like(raw)
            return -(2 ** (-q))
    raise ValueError("unknown post_transform %r" % (name,))


# ----------------------------------------------------------------------------- calibration
# CalibratedClassifierCV, as the scorer's calibrated_probabilities (the model's calibration
# as the scorer validated it: folds of (post_transform_params, calibrators)).
def _calibrate(cal, t):
    if cal[0] == "isotonic":  # IsotonicRegression(out_of_bounds="clip"): clip, then numpy.interp
        xs, ys = cal[1], cal[2]
        if len(xs) == 1:
            return np.full(t.shape, ys[0])
        return np.interp(np.clip(t, xs[0], xs[-1]), xs, ys)
    with np.errstate(over="ignore"):  # expit(-(a t + b))
        return 1.0 / (1.0 + np.exp(-(-(cal[1] * t + cal[2]))))


def calibrated_exact_values(calibration, post_transform, raw):
    """Every fold's exact values side by side (as scorer.calibrated_exact_values)."""
    raw = np.asarray(raw, dtype=np.float64)
    folds = calibration["folds"]
    m = raw.shape[1] // len(folds)
    parts = [samme_decision(raw[:, f * m:(f + 1) * m], folds[f][0]["weight_total"]) if post_transform == "samme"
             else raw[:, f * m:(f + 1) * m] for f in range(len(folds))]
    return np.concatenate(parts, axis=1)


def calibrated_probabilities(calibration, post_transform, softmax_sum, raw, n_classes):
    """CalibratedClassifierCV.predict_proba for raw scores (n, folds * m)."""
    raw = np.asarray(raw, dtype=np.float64)
    folds = calibration["folds"]
    m = raw.shape[1] // len(folds)
    total = np.zeros((raw.shape[0], n_classes))
    for f, (params, cals) in enumerate(folds):
        r = raw[:, f * m:(f + 1) * m]
        if calibration["response"] == "decision":
            resp = samme_decision(r, params["weight_total"]) if post_transform == "samme" else r
        else:
            resp = transform(post_transform, r, params, softmax_sum)
        if n_classes == 2:
            resp = resp[:, -1:]
        p = np.zeros((raw.shape[0], n_classes))
        for c, cal in enumerate(cals):
            p[:, c + 1 if n_classes == 2 else c] = _calibrate(cal, resp[:, c])
        if n_classes == 2:
            p[:, 0] = 1.0 - p[:, 1]
        else:
            den = np.ascontiguousarray(p).sum(axis=1)[:, None]  # numpy's row sum
            p = np.divide(p, den, out=np.full_like(p, 1 / n_classes), where=den != 0)
        p[(1.0 < p) & (p <= 1.0 + 1e-5)] = 1.0
        total += p
    total /= len(folds)
    return total
def apply_target_steps(steps, values):
    """Apply the scorer's target steps ((op, constants or None) pairs) to outputs (n, K), in
    order, element-wise: numpy.exp / numpy.expm1 (the functions scikit-learn's
    TransformedTargetRegressor calls) or one IEEE *, +, - or / by each output's constant."""
    if not steps:
        return values
    y = np.array(values, dtype=np.float64)
    with np.errstate(over="ignore"):
        for op, c in steps:
            if op == "exp":
                y = np.exp(y)
            elif op == "expm1":
                y = np.expm1(y)
            elif op == "mul":
                y *= np.asarray(c, dtype=np.float64)
            elif op == "add":
                y += np.asarray(c, dtype=np.float64)
            elif op == "sub":
                y -= np.asarray(c, dtype=np.float64)
            elif op == "div":
                y /= np.asarray(c, dtype=np.float64)
            else:
                raise ValueError("unknown target step %r" % (op,))
    return y


class _Unprepared(object):
    """A numeric ndarray of the right shape whose values are still to be checked."""

    __slots__ = ("array",)

    def __init__(self, array):
        self.array = array
