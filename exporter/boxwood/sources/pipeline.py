"""Read a scikit-learn Pipeline (preprocessing + a supported tree model) into the hub.

Every supported preprocessing step works column by column, so each feature the
trees see is one raw record field passed through a short chain of element-wise
steps (see ``ir.Feature.source``). The reader follows the columns through:

- ColumnTransformer: column selection by name, index, boolean mask or callable (as
  fitted), transformers that are supported steps, nested Pipelines of them,
  "passthrough" and "drop", and the remainder;
- SimpleImputer (constant, mean, median, most_frequent; numeric and string columns;
  no indicator columns): the value it was told is missing becomes the fitted
  statistic. Each step records which one (``"replaces": "nan"`` or ``"none"``):
  scikit-learn compares object columns with ``missing_values`` itself, so with the
  default NaN a Python None passes through unchanged (and with None, NaN is refused);
- OrdinalEncoder (categories as fitted; handle_unknown "error" or
  "use_encoded_value"; encoded_missing_value): a value becomes its code. NaN and
  None are told apart as scikit-learn does: a NaN seen in fitting becomes
  ``encoded_missing_value`` (``"missing"``), a None seen in fitting is an ordinary
  category with its own code (``"none"``); either one not seen in fitting is an
  unknown category;
- OneHotEncoder (handle_unknown error, ignore, infrequent_if_exist or warn; drop first,
  if_binary or explicit; infrequent categories; dense or sparse output) and TargetEncoder
  (binary, continuous and multiclass targets): each output column is a ``lookup`` step,
  a table from every fitted category of its raw field to the value that column takes.
  The table is not worked out from the encoder's attributes: it is what the fitted
  encoder's own ``transform`` gives for each category, for an unseen value (or
  "error" when it refuses one) and for NaN / None as fitted (see ``_lookup_tables``);
- StandardScaler, MinMaxScaler (with clip), MaxAbsScaler (with clip), RobustScaler: an
  ``arithmetic`` step, the float64 operations scikit-learn's dense ``transform`` does,
  in its order (``_scaler``), so the trees see the same bits;
- feature selection steps (any fitted selector with ``get_support``) that only drop
  columns;
- "passthrough" steps.

Anything else is refused with an error naming the step and listing what is supported.
"""
from __future__ import annotations

import math
from typing import Any, Dict, List, Optional, Tuple


from ..ir import Ensemble
from . import boosting, forests, wrappers
from .common import UnsupportedModel, is_nan, plain

# The estimators a pipeline may end in (a pipeline inside a pipeline is not read).
FINAL_READERS = (boosting.read, forests.read, wrappers.read)

SUPPORTED_STEPS = ("ColumnTransformer (passthrough, drop, columns by name, index, mask)",
                   "SimpleImputer (constant, mean, median, most_frequent)",
                   "OrdinalEncoder (handle_unknown error or use_encoded_value)",
                   "OneHotEncoder (dense or sparse output)", "TargetEncoder",
                   "StandardScaler, MinMaxScaler, MaxAbsScaler, RobustScaler (dense input)",
                   "feature selection steps that only drop columns", "passthrough")

# A column program: the raw field it starts from and the steps applied so far.
Program = Tuple[str, List[Dict[str, Any]]]


def _unsupported(step: Any, where: str, why: str = "") -> UnsupportedModel:
    return UnsupportedModel("pipeline step %s (%s) is not supported%s; supported steps: %s"
                            % (where, type(step).__name__, ": " + why if why else "", "; ".join(SUPPORTED_STEPS)))


def _number_or_nan(v: Any) -> Optional[float]:
    v = float(v)
    return None if math.isnan(v) else v


def _apply(step: Any, columns: List[Program], where: str) -> List[Program]:
    from sklearn.compose import ColumnTransformer
    from sklearn.feature_selection import SelectorMixin
    from sklearn.impute import SimpleImputer
    from sklearn.pipeline import Pipeline
    from sklearn.preprocessing import OrdinalEncoder

    from sklearn.preprocessing import FunctionTransformer

    if step is None or (isinstance(step, str) and step == "passthrough"):
        return columns
    if isinstance(step, FunctionTransformer) and step.func is None:
        return columns  # the identity (how a fitted ColumnTransformer records "passthrough")
    if isinstance(step, Pipeline):
        return _apply_steps(step.steps, columns, where + "/")
    if isinstance(step, ColumnTransformer):
        return _column_transformer(step, columns, where)
    if isinstance(step, SimpleImputer):
        if step.add_indicator:
            raise _unsupported(step, where, "add_indicator=True adds columns")
        if not is_nan(step.missing_values) and step.missing_values is not None:
            raise _unsupported(step, where, "missing_values other than NaN or None")
        replaces = "none" if step.missing_values is None else "nan"
        stats = list(step.statistics_)
        if len(stats) != len(columns):
            raise _unsupported(step, where, "it was fitted on %d columns, %d arrive" % (len(stats), len(columns)))
        out = []
        for (field, steps), value in zip(columns, stats):
            value = plain(value)
            if value is None or is_nan(value):
                raise _unsupported(step, where, "column %r was all missing in training and is dropped" % field)
            out.append((field, steps + [{"op": "impute", "value": value, "replaces": replaces}]))
        return out
    if isinstance(step, OrdinalEncoder):
        if step.max_categories is not None or step.min_frequency is not None:
            raise _unsupported(step, where, "infrequent-category grouping")
        out = []
        for (field, steps), cats in zip(columns, step.categories_):
            values = [plain(c) for c in cats]
            op: Dict[str, Any] = {"op": "encode"}
            # scikit-learn lists None, then NaN, after the other categories when fitting saw them
            if values and is_nan(values[-1]):
                values = values[:-1]  # NaN becomes encoded_missing_value
                op["missing"] = _number_or_nan(step.encoded_missing_value)
            if values and values[-1] is None:
                values = values[:-1]  # None keeps its own code, like any category
                op["none"] = float(len(values))
            if any(v is None or is_nan(v) for v in values):
                raise _unsupported(step, where, "column %r lists None or NaN among its categories" % field)
            op["categories"] = values
            if step.handle_unknown == "use_encoded_value":
                op["unknown"] = _number_or_nan(step.unknown_value)
            else:
                op["unknown"] = "error"
            out.append((field, steps + [op]))
        return out
    if _is_table_encoder(step):
        return _lookup_tables(step, columns, where)
    if _is_scaler(step):
        return _scaler(step, columns, where)
    if isinstance(step, SelectorMixin):
        keep = step.get_support()
        if len(keep) != len(columns):
            raise _unsupported(step, where, "its mask has %d columns, %d arrive" % (len(keep), len(columns)))
        return [c for c, k in zip(columns, keep) if k]
    raise _unsupported(step, where)


def _apply_steps(steps: List[Tuple[str, Any]], columns: List[Program], prefix: str) -> List[Program]:
    """Steps in order. A scaler after a one-hot encoder with sparse output would get a
    sparse matrix, which scikit-learn scales by a multiplication with 1 / scale (other
    bits than the dense division): refused."""
    sparse = None
    for name, inner in steps:
        if sparse is not None and _is_scaler(inner):
            raise _unsupported(inner, prefix + name, "it follows %s, whose sparse output scikit-learn scales by "
                               "another operation" % sparse)
        columns = _apply(inner, columns, prefix + name)
        if _is_one_hot(inner) and getattr(inner, "sparse_output", False):
            sparse = prefix + name
    return columns


def _is_one_hot(step: Any) -> bool:
    from sklearn.preprocessing import OneHotEncoder
    return isinstance(step, OneHotEncoder)


def _is_table_encoder(step: Any) -> bool:
    from sklearn.preprocessing import OneHotEncoder, TargetEncoder
    return isinstance(step, (OneHotEncoder, TargetEncoder))


_SCALERS = ("StandardScaler", "MinMaxScaler", "MaxAbsScaler", "RobustScaler")


def _is_scaler(step: Any) -> bool:
    from sklearn import preprocessing
    return isinstance(step, tuple(getattr(preprocessing, n) for n in _SCALERS))


def _scaler(step: Any, columns: List[Program], where: str) -> List[Program]:
    """An affine scaler as the float64 operations of its dense ``transform`` (scikit-learn
    1.9.1, sklearn/preprocessing/_data.py), one list per column, in the same order:
    StandardScaler ``X -= mean_`` (with_mean), ``X /= scale_`` (with_std); MinMaxScaler
    ``X *= scale_; X += min_`` then ``clip(X, *feature_range)`` (clip); MaxAbsScaler
    ``X /= scale_`` then ``clip(X, -1, 1)`` (clip); RobustScaler ``X -= center_``
    (with_centering), ``X /= scale_`` (with_scaling)."""
    from sklearn.preprocessing import MaxAbsScaler, MinMaxScaler, RobustScaler, StandardScaler

    n = int(getattr(step, "n_features_in_", len(columns)))
    if n != len(columns):
        raise _unsupported(step, where, "it was fitted on %d columns, %d arrive" % (n, len(columns)))

    def col(attr: str) -> List[float]:
        values = [float(v) for v in getattr(step, attr)]
        if not all(math.isfinite(v) for v in values):
            raise _unsupported(step, where, "a fitted %s is not finite" % attr)
        return values

    seqs: List[List[List[Any]]] = [[] for _ in columns]

    def add(op: str, values: List[float]) -> None:
        for seq, v in zip(seqs, values):
            seq.append([op, v])

    if isinstance(step, StandardScaler):
        if step.with_mean:
            add("sub", col("mean_"))
        if step.with_std:
            add("div", col("scale_"))
    elif isinstance(step, MinMaxScaler):
        add("mul", col("scale_"))
        add("add", col("min_"))
        if step.clip:
            lo, hi = (float(v) for v in step.feature_range)
            for seq in seqs:
                seq.append(["clip", lo, hi])
    elif isinstance(step, MaxAbsScaler):
        add("div", col("scale_"))
        if getattr(step, "clip", False):
            for seq in seqs:
                seq.append(["clip", -1.0, 1.0])
    elif isinstance(step, RobustScaler):
        if step.with_centering:
            add("sub", col("center_"))
        if step.with_scaling:
            add("div", col("scale_"))
    return [(field, steps + ([{"op": "arithmetic", "sequence": seq}] if seq else []))
            for (field, steps), seq in zip(columns, seqs)]


def _probe_frame(step: Any, values_per_column: List[List[Any]], dtypes: List[Any]) -> Any:
    """Rows that hold ``values_per_column[j]`` in column ``j`` (each column's first
    category elsewhere), typed as the encoder was fitted (a DataFrame with the fitted
    column names when it was fitted on one)."""
    import numpy as np
    import pandas as pd

    n_rows = sum(len(v) for v in values_per_column)
    cols = []
    for j, (values, dtype) in enumerate(zip(values_per_column, dtypes)):
        fill = step.categories_[j][0]
        column = np.empty(n_rows, dtype=dtype)
        column[:] = fill
        start = sum(len(v) for v in values_per_column[:j])
        for k, v in enumerate(values):
            column[start + k] = v
        cols.append(column)
    names = getattr(step, "feature_names_in_", None)
    if names is not None:
        return pd.DataFrame({str(n): c for n, c in zip(names, cols)})
    if all(c.dtype != object for c in cols):
        return np.column_stack(cols)
    out = np.empty((n_rows, len(cols)), dtype=object)
    for j, c in enumerate(cols):
        out[:, j] = c
    return out


def _unseen(cats: List[Any], dtype: Any) -> Any:
    """A value the column never saw in fitting, of the column's type."""
    import numpy as np

    if dtype == object:
        probe = "\x00unseen"
        while probe in cats:
            probe += "\x00"
        return probe
    finite = [c for c in cats if c is not None and not is_nan(c)]
    top = max(finite) if finite else 0
    return np.asarray(top + 1 if np.issubdtype(dtype, np.integer) else float(top) + 1.5, dtype=dtype)


def _lookup_tables(step: Any, columns: List[Program], where: str) -> List[Program]:
    """OneHotEncoder / TargetEncoder: one ``lookup`` step per output column.

    For each input column: its fitted categories (``categories_``, None and NaN taken
    off the end as for OrdinalEncoder: scikit-learn lists them last when fitting saw
    them), and for each output column of that input the value ``step.transform`` gives
    for each category, for NaN (``missing``) and None (``none``) when fitted, and for a
    value never seen (``unknown``; "error" when transform refuses it)."""
    import warnings

    import numpy as np
    from sklearn.preprocessing import OneHotEncoder

    if len(step.categories_) != len(columns):
        raise _unsupported(step, where, "it was fitted on %d columns, %d arrive" % (len(step.categories_),
                                                                                   len(columns)))
    if isinstance(step, OneHotEncoder):
        widths = [int(w) for w in step._n_features_outs]
    else:  # TargetEncoder: one column per class (multiclass) or one
        widths = [len(step.classes_) if step.target_type_ == "multiclass" else 1] * len(columns)
    dtypes = [np.asarray(c).dtype for c in step.categories_]
    cat_lists = [list(c) for c in step.categories_]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # unknown categories with drop set warn
        known = _dense(step.transform(_probe_frame(step, cat_lists, dtypes)))
        try:
            unseen = _dense(step.transform(_probe_frame(step, [[_unseen(c, d)] for c, d in
                                                               zip(cat_lists, dtypes)], dtypes)))
        except ValueError:
            unseen = None  # handle_unknown="error"
    if known.shape[1] != sum(widths) or known.shape[0] != sum(len(c) for c in cat_lists):
        raise _unsupported(step, where, "its output has %d columns, not the %d expected" % (known.shape[1],
                                                                                         sum(widths)))
    out: List[Program] = []
    row = 0
    for j, ((field, steps), cats) in enumerate(zip(columns, cat_lists)):
        values = [plain(c) for c in cats]
        block = known[row:row + len(cats), sum(widths[:j]):sum(widths[:j + 1])]
        row += len(cats)
        extra: Dict[str, int] = {}
        if values and is_nan(values[-1]):
            values = values[:-1]
            extra["missing"] = len(values)
        if values and values[-1] is None:
            values = values[:-1]
            extra["none"] = len(values)
        if any(v is None or is_nan(v) for v in values):
            raise _unsupported(step, where, "column %r lists None or NaN among its categories" % field)
        for k in range(widths[j]):
            op: Dict[str, Any] = {"op": "lookup", "categories": values,
                                  "values": [float(v) for v in block[:len(values), k]]}
            for key, at in extra.items():
                op[key] = float(block[at, k])
            op["unknown"] = "error" if unseen is None else float(unseen[j, sum(widths[:j]) + k])
            if any(not math.isfinite(v) for v in op["values"]) or (
                    op["unknown"] != "error" and not math.isfinite(op["unknown"])):
                raise _unsupported(step, where, "column %r encodes to a value that is not finite" % field)
            out.append((field, steps + [op]))
    return out


def _dense(a: Any) -> Any:
    import numpy as np
    return np.asarray(a.toarray() if hasattr(a, "toarray") else a, dtype=np.float64)


def _column_transformer(ct: Any, columns: List[Program], where: str) -> List[Program]:
    if getattr(ct, "sparse_output_", False):
        raise _unsupported(ct, where, "sparse output")
    indices = ct._transformer_to_input_indices  # fitted column selection, per transformer
    out: List[Program] = []
    for name, trans, _ in ct.transformers_:
        if isinstance(trans, str) and trans == "drop":
            continue
        selected = [columns[i] for i in indices[name]]
        if not selected:
            continue
        out.extend(_apply(trans, selected, "%s/%s" % (where, name)))
    return out


def read(model: Any, final_readers: Any = None) -> Optional[Ensemble]:
    """Return the Ensemble (with preprocessing) for a supported Pipeline, or None.
    ``final_readers`` (default FINAL_READERS) read its last step; sources/__init__.py adds
    the CalibratedClassifierCV reader, which itself reads pipelines (so no import here)."""
    from sklearn.pipeline import Pipeline

    if not isinstance(model, Pipeline):
        return None
    *pre, (last_name, final) = model.steps
    ensemble = next((e for e in (read(final) for read in (final_readers or FINAL_READERS)) if e is not None), None)
    if ensemble is None:
        raise UnsupportedModel("the pipeline's final step %r is %s, which is not a tree model boxwood reads"
                               % (last_name, type(final).__name__))
    names = getattr(model, "feature_names_in_", None)
    n_in = int(model.n_features_in_)
    fields = [str(n) for n in names] if names is not None else ["x%d" % i for i in range(n_in)]
    columns: List[Program] = [(f, []) for f in fields]
    columns = _apply_steps(pre, columns, "")
    if len(columns) != len(ensemble.features):
        raise UnsupportedModel("the preprocessing yields %d columns but %s takes %d"
                               % (len(columns), type(final).__name__, len(ensemble.features)))
    for feature, (field, steps) in zip(ensemble.features, columns):
        feature.source = {"field": field, "steps": steps}
        if any(s["op"] == "encode" for s in steps) and feature.is_categorical:
            # the codes reaching the model are floats; keep its category list as floats
            feature.categories = [float(c) for c in feature.categories]
    ensemble.fields = fields
    if any(s["op"] in ("impute", "arithmetic") for _, steps in columns for s in steps):
        # scikit-learn's imputers and scalers refuse infinite inputs; the policy is global,
        # so it refuses them everywhere (stricter than the source on passthrough columns)
        ensemble.accepts_infinity = False
    ensemble.provenance["estimator"] = "sklearn.pipeline.Pipeline[%s]" % ensemble.provenance["estimator"]
    ensemble.provenance.setdefault("parameters", {})["pipeline_steps"] = " -> ".join(
        "%s (%s)" % (n, type(s).__name__) for n, s in model.steps)
    return ensemble.check()
