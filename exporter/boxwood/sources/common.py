"""Helpers shared by the readers: names, plain Python values, provenance."""
from __future__ import annotations

import math
import platform
from typing import Any, Dict, List


class UnsupportedModel(ValueError):
    """The object is not a model boxwood can read; the message says what is supported."""


def feature_names(model: Any) -> List[str]:
    """The training column names, or scikit-learn's default ``x0, x1, ...``."""
    names = getattr(model, "feature_names_in_", None)
    if names is not None:
        return [str(n) for n in names]
    return ["x%d" % i for i in range(int(model.n_features_in_))]


def is_nan(v: Any) -> bool:
    """True for a float NaN (scikit-learn's usual marker of a missing value)."""
    return isinstance(v, float) and math.isnan(v)


def plain(value: Any) -> Any:
    """A numpy scalar (or Python value) as a plain JSON-friendly Python value."""
    if hasattr(value, "item") and not isinstance(value, (str, bytes)):
        value = value.item()
    if isinstance(value, bool) or value is None or isinstance(value, (int, float, str)):
        return value
    return str(value)


def provenance(model: Any, params: Dict[str, Any]) -> Dict[str, Any]:
    """Where the ensemble came from: estimator, the parameters that matter, versions.

    Deliberately holds no timestamp or host name, so that the same fitted model
    always exports to the same bytes.
    """
    import numpy
    import sklearn

    from .. import __version__

    return {
        "estimator": "%s.%s" % (type(model).__module__.split("._")[0], type(model).__name__),
        "parameters": {k: plain(v) for k, v in params.items()},
        "versions": {
            "boxwood": __version__,
            "scikit-learn": sklearn.__version__,
            "numpy": numpy.__version__,
            "python": platform.python_version(),
        },
    }
