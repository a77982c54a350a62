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
        for name, inner in step.steps:
            columns = _apply(inner, columns, "%s/%s" % (where, name))
        return columns
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
    if isinstance(step, SelectorMixin):
        keep = step.get_support()
        if len(keep) != len(columns):
            raise _unsupported(step, where, "its mask has %d columns, %d arrive" % (len(keep), len(columns)))
        return [c for c, k in zip(columns, keep) if k]
    raise _unsupported(step, where)


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


def read(model: Any) -> Optional[Ensemble]:
    """Return the Ensemble (with preprocessing) for a supported Pipeline, or None."""
    from sklearn.pipeline import Pipeline

    if not isinstance(model, Pipeline):
        return None
    *pre, (last_name, final) = model.steps
    ensemble = next((e for e in (read(final) for read in FINAL_READERS) if e is not None), None)
    if ensemble is None:
        raise UnsupportedModel("the pipeline's final step %r is %s, which is not a tree model boxwood reads"
                               % (last_name, type(final).__name__))
    names = getattr(model, "feature_names_in_", None)
    n_in = int(model.n_features_in_)
    fields = [str(n) for n in names] if names is not None else ["x%d" % i for i in range(n_in)]
    columns: List[Program] = [(f, []) for f in fields]
    for name, step in pre:
        columns = _apply(step, columns, name)
    if len(columns) != len(ensemble.features):
        raise UnsupportedModel("the preprocessing yields %d columns but %s takes %d"
                               % (len(columns), type(final).__name__, len(ensemble.features)))
    for feature, (field, steps) in zip(ensemble.features, columns):
        feature.source = {"field": field, "steps": steps}
        if any(s["op"] == "encode" for s in steps) and feature.is_categorical:
            # the codes reaching the model are floats; keep its category list as floats
            feature.categories = [float(c) for c in feature.categories]
    ensemble.fields = fields
    if any(s["op"] == "impute" for _, steps in columns for s in steps):
        # scikit-learn's imputers refuse infinite inputs; the artefact's policy is global,
        # so it refuses them everywhere (stricter than the source on passthrough columns)
        ensemble.accepts_infinity = False
    ensemble.provenance["estimator"] = "sklearn.pipeline.Pipeline[%s]" % ensemble.provenance["estimator"]
    ensemble.provenance.setdefault("parameters", {})["pipeline_steps"] = " -> ".join(
        "%s (%s)" % (n, type(s).__name__) for n, s in model.steps)
    return ensemble.check()
