"""Read scikit-learn's regressor wrappers into the hub: MultiOutputRegressor and
TransformedTargetRegressor (docs/wrappers.md).

- ``MultiOutputRegressor`` fits one regressor per target; ``predict`` stacks their
  predictions as columns. Each fitted regressor is read on its own and the ensembles are
  merged into one: target ``j``'s trees get ``output = j`` (after the outputs of the
  targets before it) and its base value(s). They must agree on everything that is
  ensemble-wide (task, compare precision, missing-value policy, infinity, post-transform
  and its parameters, combine, input features with their categories and preprocessing,
  the raw fields, the kinds of target steps); the first difference is named in the refusal.
- ``TransformedTargetRegressor`` predicts ``inverse(regressor_.predict(X))``: the inner
  regressor is read as usual and the inverse becomes the ensemble's target steps
  (``ir.TARGET_OPS``), with scikit-learn's own float64 operations in its order:
  ``numpy.exp`` / ``numpy.expm1`` as ``inverse_func`` (directly, or in a
  ``FunctionTransformer``), or a fitted scaler's ``inverse_transform``:
  StandardScaler ``y *= scale_; y += mean_``, MinMaxScaler ``y -= min_; y /= scale_``,
  MaxAbsScaler ``y *= scale_``, RobustScaler ``y *= scale_; y += center_`` (each part
  only when the scaler was told to scale / centre). Anything else is refused by name.

The inner regressor may be any supported tree model, a Pipeline (when ``inner`` holds its
reader: sources/__init__.py passes it), or another wrapper. :func:`raw_scores` gives the
inner regressors' raw scores (before any inverse link and before the target steps), which
is what the device must reproduce bit for bit.
"""
from __future__ import annotations

from typing import Any, Callable, Dict, List, Optional, Sequence

import numpy as np

from ..ir import Ensemble
from . import boosting, forests
from .common import UnsupportedModel

Reader = Callable[[Any], Optional[Ensemble]]
# What the wrapped regressor may be, besides another wrapper (a Pipeline's reader is added
# by sources/__init__.py; a wrapper at the end of a pipeline reads tree models only).
TREE_READERS: Sequence[Reader] = (boosting.read, forests.read)

INVERSE_FUNCTIONS = {"exp": "exp", "expm1": "expm1"}  # numpy ufunc name -> target step op
SUPPORTED_TRANSFORMERS = ("FunctionTransformer (inverse_func numpy.exp or numpy.expm1, no kw_args)",
                          "StandardScaler", "MinMaxScaler", "MaxAbsScaler", "RobustScaler")


def read(model: Any, inner: Sequence[Reader] = TREE_READERS) -> Optional[Ensemble]:
    """The Ensemble for a MultiOutputRegressor or TransformedTargetRegressor, or None."""
    from sklearn.compose import TransformedTargetRegressor
    from sklearn.multioutput import MultiOutputRegressor

    if isinstance(model, MultiOutputRegressor):
        return _multi_output(model, inner)
    if isinstance(model, TransformedTargetRegressor):
        return _transformed_target(model, inner)
    return None


def reader(inner: Sequence[Reader]) -> Reader:
    """``read`` with the given inner readers (for sources/__init__.py's READERS)."""
    def read_wrapper(model: Any) -> Optional[Ensemble]:
        return read(model, inner)
    return read_wrapper


def _read_inner(est: Any, inner: Sequence[Reader], where: str) -> Ensemble:
    for r in tuple(inner) + (lambda m: read(m, inner),):
        ensemble = r(est)
        if ensemble is not None:
            if ensemble.task != "regression":
                raise UnsupportedModel("%s: the wrapped estimator %s is not a regressor"
                                       % (where, type(est).__name__))
            return ensemble
    raise UnsupportedModel("%s wraps %s, which is not a tree model boxwood reads"
                           % (where, type(est).__name__))


# --------------------------------------------------------------------------- multi-output
_SAME = ("task", "compare_precision", "missing_values", "accepts_infinity", "post_transform",
         "post_transform_params", "combine", "softmax_sum", "fields")


def _feature_key(f: Any) -> Any:
    return (f.name, f.kind, f.categories, f.source)


def _multi_output(model: Any, inner: Sequence[Reader]) -> Ensemble:
    where = "MultiOutputRegressor"
    parts = [_read_inner(est, inner, "%s (target %d)" % (where, j)) for j, est in enumerate(model.estimators_)]
    return merge_outputs(parts, where, estimator="sklearn.multioutput.MultiOutputRegressor")


def merge_outputs(parts: List[Ensemble], where: str, estimator: str) -> Ensemble:
    """One Ensemble whose outputs are the outputs of ``parts`` in order; refuses (naming the
    first difference) unless they agree on everything ensemble-wide."""
    first = parts[0]
    for j, e in enumerate(parts[1:], start=1):
        for name in _SAME:
            if getattr(e, name) != getattr(first, name):
                raise UnsupportedModel("%s: target %d's regressor differs from target 0's in %s (%r, not %r); "
                                       "the targets must share it to become one artefact"
                                       % (where, j, name, getattr(e, name), getattr(first, name)))
        if len(e.features) != len(first.features):
            raise UnsupportedModel("%s: target %d's regressor reads %d features, target 0's %d"
                                   % (where, j, len(e.features), len(first.features)))
        for a, b in zip(e.features, first.features):
            if _feature_key(a) != _feature_key(b):
                raise UnsupportedModel("%s: target %d's regressor differs from target 0's in feature %r "
                                       "(name, kind, categories or preprocessing)" % (where, j, b.name))
        if [s["op"] for s in e.target_steps] != [s["op"] for s in first.target_steps]:
            raise UnsupportedModel("%s: target %d's target steps %s differ from target 0's %s"
                                   % (where, j, [s["op"] for s in e.target_steps],
                                      [s["op"] for s in first.target_steps]))
    trees, base, steps = [], [], [dict(s) for s in first.target_steps]
    for e in parts:
        offset = len(base)
        for t in e.trees:
            t.output += offset
            trees.append(t)
        base.extend(e.base_values)
        for merged, s in zip(steps, e.target_steps):
            if "values" in s:
                merged["values"] = (merged["values"] if e is first else merged["values"] + list(s["values"]))
    names = ["target_%d" % j for j in range(len(base))]
    provenance = dict(first.provenance)
    provenance["estimator"] = "%s[%s]" % (estimator, first.provenance.get("estimator", "unknown"))
    params = dict(first.provenance.get("parameters") or {})
    params["n_targets"] = len(base)
    provenance["parameters"] = params
    return Ensemble(
        task=first.task, features=first.features, trees=trees, base_values=base,
        post_transform=first.post_transform, combine=first.combine,
        compare_precision=first.compare_precision, missing_values=first.missing_values,
        classes=None, binary_rule=None, output_names=names, accepts_infinity=first.accepts_infinity,
        post_transform_params=dict(first.post_transform_params), softmax_sum=first.softmax_sum,
        fields=first.fields, target_steps=steps, provenance=provenance,
    ).check()


# --------------------------------------------------------------------------- target transform
def _floats(values: Any, n: int, what: str) -> List[float]:
    out = [float(v) for v in np.asarray(values, dtype=np.float64).ravel()]
    if len(out) != n:
        raise UnsupportedModel("TransformedTargetRegressor: %s holds %d values for %d outputs" % (what, len(out), n))
    return out


def inverse_steps(transformer: Any, n_outputs: int) -> List[Dict[str, Any]]:
    """The fitted transformer's ``inverse_transform`` as target steps, or a refusal by name."""
    from sklearn.preprocessing import FunctionTransformer, MaxAbsScaler, MinMaxScaler, RobustScaler, StandardScaler

    kind = type(transformer)
    name = kind.__name__
    if kind is FunctionTransformer:
        if transformer.inv_kw_args:
            raise UnsupportedModel("TransformedTargetRegressor: inverse_func with inv_kw_args=%r is not supported"
                                   % (transformer.inv_kw_args,))
        f = transformer.inverse_func
        if f is None:
            return []  # the identity
        op = INVERSE_FUNCTIONS.get(getattr(f, "__name__", "")) if isinstance(f, np.ufunc) else None
        if op is None or getattr(np, op) is not f:
            raise UnsupportedModel(
                "TransformedTargetRegressor: inverse_func %s is not supported; supported: numpy.exp "
                "(func=numpy.log), numpy.expm1 (func=numpy.log1p), or a transformer: %s"
                % (_function_name(f), "; ".join(SUPPORTED_TRANSFORMERS)))
        return [{"op": op}]
    if kind is StandardScaler:
        steps = []
        if transformer.with_std:
            steps.append({"op": "mul", "values": _floats(transformer.scale_, n_outputs, "StandardScaler.scale_")})
        if transformer.with_mean:
            steps.append({"op": "add", "values": _floats(transformer.mean_, n_outputs, "StandardScaler.mean_")})
        return steps
    if kind is MinMaxScaler:
        return [{"op": "sub", "values": _floats(transformer.min_, n_outputs, "MinMaxScaler.min_")},
                {"op": "div", "values": _floats(transformer.scale_, n_outputs, "MinMaxScaler.scale_")}]
    if kind is MaxAbsScaler:
        return [{"op": "mul", "values": _floats(transformer.scale_, n_outputs, "MaxAbsScaler.scale_")}]
    if kind is RobustScaler:
        steps = []
        if transformer.with_scaling:
            steps.append({"op": "mul", "values": _floats(transformer.scale_, n_outputs, "RobustScaler.scale_")})
        if transformer.with_centering:
            steps.append({"op": "add", "values": _floats(transformer.center_, n_outputs, "RobustScaler.center_")})
        return steps
    raise UnsupportedModel("TransformedTargetRegressor: transformer %s is not supported; supported: %s"
                           % (name, "; ".join(SUPPORTED_TRANSFORMERS)))


def _function_name(f: Any) -> str:
    module = getattr(f, "__module__", None) or ("numpy" if isinstance(f, np.ufunc) else "")
    return "%s.%s" % (module, getattr(f, "__name__", repr(f))) if module else getattr(f, "__name__", repr(f))


def _transformed_target(model: Any, inner: Sequence[Reader]) -> Ensemble:
    ensemble = _read_inner(model.regressor_, inner, "TransformedTargetRegressor")
    steps = inverse_steps(model.transformer_, ensemble.n_outputs)
    ensemble.target_steps = list(ensemble.target_steps) + steps
    prov = ensemble.provenance
    prov["estimator"] = "sklearn.compose.TransformedTargetRegressor[%s]" % prov.get("estimator", "unknown")
    params = dict(prov.get("parameters") or {})
    params["target_transformer"] = type(model.transformer_).__name__
    if type(model.transformer_).__name__ == "FunctionTransformer" and model.transformer_.inverse_func is not None:
        params["inverse_func"] = _function_name(model.transformer_.inverse_func)
    prov["parameters"] = params
    return ensemble.check()


# --------------------------------------------------------------------------- source values
def is_wrapper(model: Any) -> bool:
    """True for the wrappers this module reads, and a Pipeline ending in one."""
    from sklearn.compose import TransformedTargetRegressor
    from sklearn.multioutput import MultiOutputRegressor
    from sklearn.pipeline import Pipeline

    if isinstance(model, Pipeline):
        return is_wrapper(model.steps[-1][1])
    return isinstance(model, (MultiOutputRegressor, TransformedTargetRegressor))


def tree_models(model: Any) -> List[Any]:
    """The tree models inside a wrapper or pipeline (the model itself for anything else)."""
    if hasattr(model, "steps"):
        return tree_models(model.steps[-1][1])
    if is_wrapper(model) and hasattr(model, "regressor_"):
        return tree_models(model.regressor_)
    if is_wrapper(model):
        return [m for e in model.estimators_ for m in tree_models(e)]
    return [model]


def raw_scores(model: Any, X: Any) -> np.ndarray:
    """The raw scores (n, outputs) of a regressor as scikit-learn computes them: a wrapper's
    inner regressors' (before their inverse link and the wrapper's target transform), a
    histogram booster's ``_raw_predict``, any other tree model's ``predict``."""
    from sklearn.compose import TransformedTargetRegressor
    from sklearn.ensemble import HistGradientBoostingRegressor
    from sklearn.multioutput import MultiOutputRegressor
    from sklearn.pipeline import Pipeline

    if isinstance(model, Pipeline):
        Xt = model[:-1].transform(X) if len(model.steps) > 1 else X
        return raw_scores(model.steps[-1][1], Xt)
    if isinstance(model, TransformedTargetRegressor):
        return raw_scores(model.regressor_, X)
    if isinstance(model, MultiOutputRegressor):
        return np.column_stack([raw_scores(e, X) for e in model.estimators_])
    if isinstance(model, HistGradientBoostingRegressor):
        out = model._raw_predict(X)  # predict is the loss's inverse link of this
    else:
        out = model.predict(X)
    out = np.asarray(out, dtype=np.float64)
    return out.reshape(len(out), -1)
