"""Sources (front ends): each module turns one family of fitted scikit-learn models into an
:class:`~boxwood.ir.Ensemble`; a source never writes files.

To add an estimator, write a module here with a ``read(model)`` function that returns
an Ensemble for the models it knows and None otherwise, add it to ``READERS`` and to
``SUPPORTED``, and add it to the conformance suite in tests/ (DEVELOPERS.md walks through it).
"""
from __future__ import annotations

from typing import Any

from ..ir import Ensemble
from . import boosting, calibration, forests, pipeline, wrappers
from .common import UnsupportedModel
from .loading import PICKLE_WARNING, ModelFileError, load_model_file


def _pipeline_read(model: Any) -> Any:
    """A Pipeline ending in a tree model, a wrapper or a CalibratedClassifierCV."""
    return pipeline.read(model, pipeline.FINAL_READERS + (calibration.read,))


READERS = (boosting.read, forests.read, _pipeline_read,
           wrappers.reader((boosting.read, forests.read, pipeline.read)), calibration.read)

SUPPORTED = (
    "sklearn.ensemble.GradientBoostingRegressor (loss: squared_error, absolute_error, huber, quantile)",
    "sklearn.ensemble.GradientBoostingClassifier (loss: log_loss, exponential; binary and multiclass)",
    "sklearn.ensemble.HistGradientBoostingRegressor (loss: squared_error, absolute_error, gamma, poisson, quantile)",
    "sklearn.ensemble.HistGradientBoostingClassifier (binary and multiclass)",
    "sklearn.ensemble.RandomForestRegressor / ExtraTreesRegressor (single and multi-output)",
    "sklearn.ensemble.RandomForestClassifier / ExtraTreesClassifier (binary and multiclass)",
    "sklearn.tree.DecisionTreeRegressor / ExtraTreeRegressor (single and multi-output)",
    "sklearn.tree.DecisionTreeClassifier / ExtraTreeClassifier (binary and multiclass)",
    "sklearn.ensemble.IsolationForest (score_samples, decision_function, predict)",
    "sklearn.ensemble.AdaBoostClassifier (SAMME, decision-tree base learners)",
    "sklearn.pipeline.Pipeline ending in one of the above, with steps: " + "; ".join(pipeline.SUPPORTED_STEPS),
    "sklearn.calibration.CalibratedClassifierCV (isotonic, sigmoid; cv folds, ensemble=False, FrozenEstimator; "
    "also as a Pipeline's last step) "
    "over one of the classifiers or pipelines above",
    "sklearn.multioutput.MultiOutputRegressor around any regressor above (or a Pipeline ending in one)",
    "sklearn.compose.TransformedTargetRegressor around any regressor above, with func/inverse_func "
    "numpy.log/numpy.exp or numpy.log1p/numpy.expm1, or transformer: " + "; ".join(wrappers.SUPPORTED_TRANSFORMERS),
)


def read_model(model: Any) -> Ensemble:
    """Read a fitted estimator into the hub, or raise :class:`UnsupportedModel`."""
    from sklearn.base import BaseEstimator
    from sklearn.exceptions import NotFittedError
    from sklearn.utils.validation import check_is_fitted

    if isinstance(model, BaseEstimator):
        try:
            check_is_fitted(model)
        except NotFittedError:
            raise UnsupportedModel("%s is not fitted; fit it before exporting" % public_name(model))
    for read in READERS:
        ensemble = read(model)
        if ensemble is not None:
            return ensemble
    raise UnsupportedModel(
        "cannot export %s; supported models:\n  - %s" % (public_name(model), "\n  - ".join(SUPPORTED)))


def public_name(obj: Any) -> str:
    """The name users import a class by (``sklearn.svm.SVC``), not its private module path."""
    module = type(obj).__module__
    parts = [p for p in module.split(".") if not p.startswith("_")]
    return "%s.%s" % (".".join(parts) or module, type(obj).__name__)


__all__ = ["read_model", "UnsupportedModel", "SUPPORTED", "load_model_file", "ModelFileError", "PICKLE_WARNING"]
