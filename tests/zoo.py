"""The model zoo: every supported estimator x task x option, fitted on open data.

Data sets are the ones scikit-learn ships (no download):
- diabetes: Efron, Hastie, Johnstone & Tibshirani (2004), "Least Angle Regression", Ann. Statist.
- breast cancer: Wisconsin Diagnostic Breast Cancer, UCI Machine Learning Repository (1995).
- iris: Fisher (1936), "The use of multiple measurements in taxonomic problems".
- wine: UCI Machine Learning Repository, Wine recognition data (Forina et al.).
- make_hastie_10_2: Hastie, Tibshirani & Friedman, The Elements of Statistical Learning, eq. 10.2.
- make_friedman1: Friedman (1991), "Multivariate Adaptive Regression Splines", Ann. Statist.
- linnerud: Tenenhaus (1998), "La regression PLS: theorie et pratique" (three exercise
  variables, three physiological targets; scikit-learn's multi-output regression set).

Each case is fitted once per test session (``fitted(name)`` caches) and kept small so
the whole zoo fits in seconds. ``CASES`` lists the names; ``kind(name)`` tells what a
case exercises.
"""
from __future__ import annotations

import functools
from dataclasses import dataclass
from typing import Any, Callable, Dict, List

import numpy as np


@dataclass
class Case:
    name: str
    model: Any
    X: Any  # what the model was fitted on (ndarray or DataFrame)
    rows: List[List[Any]]  # the same rows in feature order, None for missing
    task: str
    y: Any = None  # the training targets


def _rows(X: Any) -> List[List[Any]]:
    if hasattr(X, "columns"):
        out = []
        for rec in X.itertuples(index=False):
            out.append([None if (isinstance(v, float) and v != v) else
                        (v if isinstance(v, str) else float(v)) for v in rec])
        return out
    return [[None if v != v else float(v) for v in r] for r in np.asarray(X, dtype=np.float64)]


def _with_nan(X: np.ndarray, rate: float, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    X = np.array(X, dtype=np.float64)
    X[rng.random(X.shape) < rate] = np.nan
    return X


@functools.lru_cache(maxsize=None)
def _data(which: str):
    from sklearn import datasets

    if which == "diabetes":
        return datasets.load_diabetes(return_X_y=True)
    if which == "breast_cancer":
        return datasets.load_breast_cancer(return_X_y=True)
    if which == "iris":
        return datasets.load_iris(return_X_y=True)
    if which == "wine":
        return datasets.load_wine(return_X_y=True)
    if which == "hastie":
        X, y = datasets.make_hastie_10_2(n_samples=1200, random_state=1)
        return X, y
    if which == "linnerud":
        return datasets.load_linnerud(return_X_y=True)
    if which == "friedman1":
        return datasets.make_friedman1(n_samples=1200, noise=1.0, random_state=2)
    raise KeyError(which)


def _diabetes_frame(nan_rate: float = 0.0):
    """Diabetes as a DataFrame with two categorical columns: 'sex' (the data set's own
    two-valued column, as strings) and 'bmi_band' (bmi cut into five quantile bands)."""
    import pandas as pd
    from sklearn import datasets

    d = datasets.load_diabetes(as_frame=True)
    df = d.data.copy()
    sex_values = sorted(df["sex"].unique())
    df["sex"] = df["sex"].map({sex_values[0]: "female", sex_values[1]: "male"}).astype("category")
    bands = np.digitize(df["bmi"], np.quantile(df["bmi"], [0.2, 0.4, 0.6, 0.8]))
    df["bmi_band"] = pd.Categorical(np.array(["b%d" % b for b in bands], dtype=object))
    if nan_rate:
        rng = np.random.default_rng(5)
        for col in ["age", "bp", "s1", "s5"]:
            df.loc[rng.random(len(df)) < nan_rate, col] = np.nan
        df.loc[rng.random(len(df)) < nan_rate, "bmi_band"] = np.nan
    return df, d.target.to_numpy()


def _build(name: str) -> Case:
    from sklearn.dummy import DummyRegressor
    from sklearn.ensemble import AdaBoostClassifier as ADA
    from sklearn.ensemble import ExtraTreesClassifier as ETC
    from sklearn.ensemble import ExtraTreesRegressor as ETR
    from sklearn.ensemble import IsolationForest as IF
    from sklearn.ensemble import RandomForestClassifier as RFC
    from sklearn.ensemble import RandomForestRegressor as RFR
    from sklearn.tree import DecisionTreeClassifier as DTC
    from sklearn.tree import DecisionTreeRegressor as DTR
    from sklearn.tree import ExtraTreeRegressor as ETR1
    from sklearn.ensemble import (
        GradientBoostingClassifier as GBC,
        GradientBoostingRegressor as GBR,
        HistGradientBoostingClassifier as HGBC,
        HistGradientBoostingRegressor as HGBR,
    )

    from sklearn.compose import TransformedTargetRegressor as TTR
    from sklearn.impute import SimpleImputer
    from sklearn.multioutput import MultiOutputRegressor as MOR
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import (FunctionTransformer, MaxAbsScaler, MinMaxScaler, RobustScaler,
                                       StandardScaler)

    gb = dict(n_estimators=40, max_depth=3, random_state=0)
    hgb = dict(max_iter=40, random_state=0, early_stopping=False)
    spec: Dict[str, Callable[[], Any]] = {
        "gbr_squared_error": lambda: (GBR(**gb), "diabetes"),
        "gbr_absolute_error": lambda: (GBR(loss="absolute_error", **gb), "diabetes"),
        "gbr_huber": lambda: (GBR(loss="huber", alpha=0.8, **gb), "friedman1"),
        "gbr_quantile": lambda: (GBR(loss="quantile", alpha=0.9, **gb), "friedman1"),
        "gbr_init_zero": lambda: (GBR(init="zero", **gb), "friedman1"),
        "gbr_init_dummy_median": lambda: (GBR(init=DummyRegressor(strategy="median"), **gb), "diabetes"),
        "gbr_subsample": lambda: (GBR(subsample=0.7, max_features=0.5, **gb), "friedman1"),
        "gbc_binary": lambda: (GBC(**gb), "breast_cancer"),
        "gbc_multiclass": lambda: (GBC(**gb), "iris"),
        "gbc_wine": lambda: (GBC(**gb), "wine"),
        "gbc_exponential": lambda: (GBC(loss="exponential", **gb), "hastie"),
        "hgbr_squared_error": lambda: (HGBR(**hgb), "diabetes"),
        "hgbr_absolute_error": lambda: (HGBR(loss="absolute_error", **hgb), "friedman1"),
        "hgbr_gamma": lambda: (HGBR(loss="gamma", **hgb), "diabetes"),
        "hgbr_poisson": lambda: (HGBR(loss="poisson", **hgb), "diabetes"),
        "hgbr_quantile": lambda: (HGBR(loss="quantile", quantile=0.2, **hgb), "friedman1"),
        "hgbr_nan": lambda: (HGBR(**hgb), "friedman1+nan"),
        "hgbr_categorical": lambda: (HGBR(**hgb), "diabetes_frame"),
        "hgbr_categorical_nan": lambda: (HGBR(**hgb), "diabetes_frame+nan"),
        "hgbr_categorical_codes": lambda: (HGBR(categorical_features=[1], **hgb), "diabetes_codes"),
        "hgbc_binary": lambda: (HGBC(**hgb), "breast_cancer"),
        "hgbc_multiclass": lambda: (HGBC(**hgb), "wine"),
        "hgbc_nan": lambda: (HGBC(**hgb), "hastie+nan"),
        "hgbc_multiclass_nan": lambda: (HGBC(**hgb), "iris+nan"),
        "hgbc_categorical": lambda: (HGBC(**hgb), "diabetes_frame_class"),
        # trees, forests, isolation forests, AdaBoost
        "dtr_single": lambda: (DTR(max_depth=6, random_state=0), "diabetes"),
        "dtr_multioutput": lambda: (DTR(max_depth=5, random_state=0), "friedman1_multi"),
        "dtc_multiclass": lambda: (DTC(max_depth=5, random_state=0), "wine"),
        "dtc_nan": lambda: (DTC(max_depth=6, random_state=0), "breast_cancer+nan"),
        "etr_single_tree": lambda: (ETR1(max_depth=6, random_state=0), "friedman1"),
        "rfr": lambda: (RFR(n_estimators=20, max_depth=6, random_state=0), "diabetes"),
        "rfr_nan": lambda: (RFR(n_estimators=15, max_depth=6, random_state=0), "friedman1+nan"),
        "rfr_multioutput": lambda: (RFR(n_estimators=10, max_depth=5, random_state=0), "friedman1_multi"),
        "rfc_binary": lambda: (RFC(n_estimators=20, max_depth=6, random_state=0), "breast_cancer"),
        "rfc_multiclass": lambda: (RFC(n_estimators=20, max_depth=5, random_state=0), "iris"),
        "etr": lambda: (ETR(n_estimators=15, max_depth=6, random_state=0), "friedman1"),
        "etc_multiclass": lambda: (ETC(n_estimators=15, max_depth=6, random_state=0), "wine"),
        "iforest": lambda: (IF(n_estimators=30, random_state=0), "diabetes"),
        "iforest_subsets": lambda: (IF(n_estimators=30, max_features=0.5, max_samples=128, random_state=0),
                                    "breast_cancer+nan"),
        "ada_binary": lambda: (ADA(DTC(max_depth=2), n_estimators=20, random_state=0), "breast_cancer"),
        "ada_multiclass": lambda: (ADA(DTC(max_depth=2), n_estimators=20, random_state=0), "wine"),
        # pipelines: raw DataFrame records with string categories and missing values
        "pipe_hgbr_encoded": lambda: (_pipe_hgbr_encoded(), "diabetes_strings"),
        "pipe_gbc_strict_encoder": lambda: (_pipe_gbc_strict(), "diabetes_strings_class"),
        "pipe_rfr_constant_impute": lambda: (_pipe_rfr_constant(), "diabetes_strings"),
        # CalibratedClassifierCV (issue 15): folds of calibrated copies, or one prefit classifier
        "cal_rfc_isotonic_binary": lambda: (_cal(RFC(n_estimators=8, max_depth=4, random_state=0), "isotonic"),
                                            "breast_cancer"),
        "cal_rfc_sigmoid_multiclass_single": lambda: (
            _cal(RFC(n_estimators=6, max_depth=4, random_state=0), "sigmoid", ensemble=False), "wine"),
        "cal_gbc_sigmoid_multiclass": lambda: (_cal(GBC(n_estimators=10, max_depth=2, random_state=0), "sigmoid"),
                                               "iris"),
        "cal_gbc_isotonic_binary_prefit": lambda: (
            _Prefit(GBC(n_estimators=10, max_depth=2, random_state=0), "isotonic"), "breast_cancer"),
        "cal_hgbc_isotonic_multiclass": lambda: (_cal(HGBC(max_iter=10, random_state=0, early_stopping=False),
                                                      "isotonic"), "wine"),
        "cal_hgbc_sigmoid_binary_prefit": lambda: (
            _Prefit(HGBC(max_iter=10, random_state=0, early_stopping=False), "sigmoid"), "breast_cancer+nan"),
        "cal_ada_isotonic_multiclass": lambda: (_cal(ADA(DTC(max_depth=2), n_estimators=6, random_state=0),
                                                     "isotonic"), "iris"),
        "cal_last_step_onehot_hgbc_isotonic": lambda: (_pipe_onehot_then_calibrated(), "diabetes_strings_class"),
        "cal_pipe_hgbc_isotonic_prefit": lambda: (_Prefit(_pipe_impute_hgbc(), "isotonic"),
                                                  "breast_cancer_frame+nan"),
        # wrappers (issue 15): per-target regressors and transformed targets
        "mor_gbr": lambda: (MOR(GBR(n_estimators=30, max_depth=2, random_state=0)), "linnerud"),
        "mor_hgbr": lambda: (MOR(HGBR(max_iter=30, min_samples_leaf=3, random_state=0, early_stopping=False)),
                             "linnerud"),
        "mor_rfr_pipeline": lambda: (MOR(make_pipeline(SimpleImputer(strategy="median"),
                                                       RFR(n_estimators=8, max_depth=4, random_state=0))),
                                     "linnerud+nan"),
        "ttr_hgbr_log": lambda: (TTR(HGBR(**hgb), func=np.log, inverse_func=np.exp), "diabetes"),
        "ttr_gbr_standard": lambda: (TTR(GBR(**gb), transformer=StandardScaler()), "diabetes"),
        "ttr_hgbr_log1p": lambda: (TTR(HGBR(**hgb), transformer=FunctionTransformer(np.log1p, np.expm1)),
                                   "diabetes"),
        "ttr_hgbr_minmax": lambda: (TTR(HGBR(**hgb), transformer=MinMaxScaler()), "friedman1"),
        "ttr_pipeline_maxabs": lambda: (TTR(make_pipeline(SimpleImputer(strategy="median"), GBR(**gb)),
                                            transformer=MaxAbsScaler()), "diabetes+nan"),
        "ttr_mor_robust": lambda: (TTR(MOR(HGBR(max_iter=30, min_samples_leaf=3, random_state=0,
                                                early_stopping=False)), transformer=RobustScaler()), "linnerud"),
        "pipe_ttr_hgbr_log": lambda: (make_pipeline(SimpleImputer(strategy="mean"),
                                                    TTR(HGBR(**hgb), func=np.log, inverse_func=np.exp)),
                                      "diabetes+nan"),
        "pipe_hgbc_onehot_scaled": lambda: (_pipe_hgbc_onehot_scaled(), "diabetes_strings_class"),
        "pipe_gbr_target_encoded": lambda: (_pipe_gbr_target(), "diabetes_strings"),
        "pipe_hgbc_target_multiclass": lambda: (_pipe_hgbc_target_multiclass(), "diabetes_strings_3class"),
        "pipe_gbc_onehot_infrequent": lambda: (_pipe_gbc_onehot_infrequent(), "diabetes_strings_class"),
        "pipe_etr_onehot_strict": lambda: (_pipe_etr_onehot_strict(), "diabetes_strings"),
    }
    model, data = spec[name]()
    if data == "diabetes_frame":
        X, y = _diabetes_frame()
    elif data == "diabetes_frame+nan":
        X, y = _diabetes_frame(nan_rate=0.08)
    elif data == "diabetes_frame_class":
        X, y = _diabetes_frame(nan_rate=0.05)
        y = np.digitize(y, np.quantile(y, [0.33, 0.66]))
    elif data == "diabetes_codes":
        X, y = _data("diabetes")
        X = np.array(X)
        X[:, 1] = (X[:, 1] > 0).astype(float)  # 'sex' as category codes 0.0 / 1.0
    elif data in ("diabetes_strings", "diabetes_strings_class", "diabetes_strings_3class"):
        X, y = _diabetes_frame(nan_rate=0.06)
        for col in ("sex", "bmi_band"):  # raw string columns, NaN for missing
            X[col] = X[col].astype(object).where(X[col].notna(), np.nan)
        if data.endswith("_class"):
            y = np.digitize(y, np.quantile(y, [0.5]))
        elif data.endswith("_3class"):
            y = np.digitize(y, np.quantile(y, [0.33, 0.66]))
    elif data == "friedman1_multi":
        X, y = _data("friedman1")
        y = np.c_[y, np.sin(X[:, 0] * 3.0) + X[:, 3]]  # a second target for multi-output
    elif data == "breast_cancer_frame+nan":  # named columns, as a DataFrame user has them
        import pandas as pd
        from sklearn import datasets

        X, y = _data("breast_cancer")
        X = pd.DataFrame(_with_nan(X, 0.1, seed=3), columns=[str(c) for c in datasets.load_breast_cancer().feature_names])
    elif data.endswith("+nan"):
        X, y = _data(data[:-4])
        X = _with_nan(X, 0.1, seed=3)
    else:
        X, y = _data(data)
    if isinstance(model, _Prefit):  # the classifier fitted on half the rows, calibrated on the rest
        model = model.make(X, y)
    if name.startswith("iforest"):
        model.fit(X)
        task = "outlier_detection"
    else:
        model.fit(X, y)
        task = "classification" if hasattr(model, "classes_") else "regression"
    return Case(name, model, X, _rows(X), task, np.asarray(y))


CASES = [
    "gbr_squared_error", "gbr_absolute_error", "gbr_huber", "gbr_quantile", "gbr_init_zero",
    "gbr_init_dummy_median", "gbr_subsample", "gbc_binary", "gbc_multiclass", "gbc_wine",
    "gbc_exponential", "hgbr_squared_error", "hgbr_absolute_error", "hgbr_gamma", "hgbr_poisson",
    "hgbr_quantile", "hgbr_nan", "hgbr_categorical", "hgbr_categorical_nan", "hgbr_categorical_codes",
    "hgbc_binary", "hgbc_multiclass", "hgbc_nan", "hgbc_multiclass_nan", "hgbc_categorical",
]

# Trees, forests, isolation forests and AdaBoost (issue 5). Kept in their own list while
# the suites that predate them (batch, ONNX, MicroPython) learn their post-transforms;
# ALL_CASES is what the conformance suite runs.
FOREST_CASES = [
    "dtr_single", "dtr_multioutput", "dtc_multiclass", "dtc_nan", "etr_single_tree", "rfr", "rfr_nan",
    "rfr_multioutput", "rfc_binary", "rfc_multiclass", "etr", "etc_multiclass", "iforest",
    "iforest_subsets", "ada_binary", "ada_multiclass",
]
# Pipelines whose preprocessing the artefact carries (issue 5): records are raw fields.
PIPELINE_CASES = ["pipe_hgbr_encoded", "pipe_gbc_strict_encoder", "pipe_rfr_constant_impute",
                  # issue 15: one-hot, affine scalers, target encoding
                  "pipe_hgbc_onehot_scaled", "pipe_gbr_target_encoded", "pipe_hgbc_target_multiclass",
                  "pipe_gbc_onehot_infrequent", "pipe_etr_onehot_strict"]
# CalibratedClassifierCV (issue 15): cv=3 (one calibrated copy per fold), ensemble=False,
# and prefit classifiers (sklearn.frozen.FrozenEstimator), isotonic and sigmoid.
CALIBRATION_CASES = [
    "cal_rfc_isotonic_binary", "cal_rfc_sigmoid_multiclass_single", "cal_gbc_sigmoid_multiclass",
    "cal_gbc_isotonic_binary_prefit", "cal_hgbc_isotonic_multiclass", "cal_hgbc_sigmoid_binary_prefit",
    "cal_ada_isotonic_multiclass", "cal_pipe_hgbc_isotonic_prefit", "cal_last_step_onehot_hgbc_isotonic",
]
# Cases the C target refuses by design (text categories: one-hot of strings runs on the host).
C_REFUSED = ["cal_last_step_onehot_hgbc_isotonic"]
# MultiOutputRegressor and TransformedTargetRegressor (issue 15, item 5; tests/test_wrappers.py).
WRAPPER_CASES = ["mor_gbr", "mor_hgbr", "mor_rfr_pipeline", "ttr_hgbr_log", "ttr_gbr_standard", "ttr_hgbr_log1p",
                 "ttr_hgbr_minmax", "ttr_pipeline_maxabs", "ttr_mor_robust", "pipe_ttr_hgbr_log"]
ALL_CASES = CASES + FOREST_CASES + PIPELINE_CASES + CALIBRATION_CASES + WRAPPER_CASES
# Cases the ONNX writer refuses by design (numpy.expm1 has no exact ONNX operator);
# tests/test_wrappers.py checks the refusal.
ONNX_REFUSED = ["ttr_hgbr_log1p"]


NUMERIC_DIABETES = ["age", "bmi", "bp", "s1", "s2", "s3", "s4", "s5", "s6"]


def _pipe_hgbr_encoded():
    """Impute then ordinal-encode the string columns (unknown -> -1), impute numerics by
    median, histogram boosting with the encoded columns as native categoricals."""
    from sklearn.compose import ColumnTransformer
    from sklearn.ensemble import HistGradientBoostingRegressor
    from sklearn.impute import SimpleImputer
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import OrdinalEncoder

    ct = ColumnTransformer([
        ("cat", make_pipeline(SimpleImputer(strategy="most_frequent"),
                              OrdinalEncoder(handle_unknown="use_encoded_value", unknown_value=-1)),
         ["sex", "bmi_band"]),
        ("num", SimpleImputer(strategy="median"), ["age", "bmi", "bp", "s1", "s5"]),
    ], remainder="passthrough")
    return make_pipeline(ct, HistGradientBoostingRegressor(categorical_features=[0, 1], max_iter=30,
                                                           random_state=0, early_stopping=False))


def _pipe_gbc_strict():
    """An encoder that refuses unknown categories (missing encoded as -1), numerics
    imputed by mean, a column-dropping selector, classic boosting."""
    from sklearn.compose import ColumnTransformer
    from sklearn.ensemble import GradientBoostingClassifier
    from sklearn.feature_selection import SelectKBest, f_classif
    from sklearn.impute import SimpleImputer
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import OrdinalEncoder

    ct = ColumnTransformer([
        ("cat", OrdinalEncoder(handle_unknown="error", encoded_missing_value=-1), [10]),  # bmi_band by index
        ("num", SimpleImputer(strategy="mean"), NUMERIC_DIABETES),
    ], remainder="drop")
    return make_pipeline(ct, SelectKBest(f_classif, k=6),
                         GradientBoostingClassifier(n_estimators=30, max_depth=3, random_state=0))


def _pipe_rfr_constant():
    """Constant imputation of numerics and of a string column, then encoding; forest."""
    from sklearn.compose import ColumnTransformer
    from sklearn.ensemble import RandomForestRegressor
    from sklearn.impute import SimpleImputer
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import OrdinalEncoder

    ct = ColumnTransformer([
        ("num", SimpleImputer(strategy="constant", fill_value=0.0), ["age", "bmi", "bp", "s5"]),
        ("cat", make_pipeline(SimpleImputer(strategy="constant", fill_value="unknown_band"),
                              OrdinalEncoder()), ["bmi_band"]),
        ("drop_sex", "drop", ["sex"]),
    ], remainder="drop")
    return make_pipeline(ct, RandomForestRegressor(n_estimators=10, max_depth=6, random_state=0))


def _cal(estimator: Any, method: str, ensemble: Any = True) -> Any:
    from sklearn.calibration import CalibratedClassifierCV

    return CalibratedClassifierCV(estimator, method=method, cv=3, ensemble=ensemble)


class _Prefit:
    """A classifier to fit on the even rows, wrapped in FrozenEstimator (scikit-learn 1.9's
    way of saying "prefit") and calibrated on all rows by ``fit``."""

    def __init__(self, estimator: Any, method: str):
        self.estimator, self.method = estimator, method

    def make(self, X: Any, y: Any) -> Any:
        from sklearn.calibration import CalibratedClassifierCV
        from sklearn.frozen import FrozenEstimator

        self.estimator.fit(X[::2], y[::2])
        return CalibratedClassifierCV(FrozenEstimator(self.estimator), method=self.method)


def _pipe_onehot_then_calibrated():
    """As a data scientist ships it: one-hot the text columns, impute and standardise the
    numbers, and calibrate a histogram booster as the pipeline's last step (cv=3: the
    preprocessing is fitted once, each fold refits only the booster)."""
    from sklearn.calibration import CalibratedClassifierCV
    from sklearn.compose import ColumnTransformer
    from sklearn.ensemble import HistGradientBoostingClassifier
    from sklearn.impute import SimpleImputer
    from sklearn.pipeline import Pipeline, make_pipeline
    from sklearn.preprocessing import OneHotEncoder, StandardScaler

    pre = ColumnTransformer([("cat", OneHotEncoder(handle_unknown="ignore"), ["sex", "bmi_band"]),
                             ("num", make_pipeline(SimpleImputer(strategy="median"), StandardScaler()),
                              NUMERIC_DIABETES)])
    clf = HistGradientBoostingClassifier(max_iter=15, random_state=0, early_stopping=False)
    return Pipeline([("pre", pre), ("calibrated", CalibratedClassifierCV(clf, method="isotonic", cv=3))])


def _pipe_impute_hgbc():
    """Median imputation, then histogram boosting (the imputer's statistics are fitted once:
    a prefit pipeline; refitted per fold they would differ, see tests/test_calibration.py)."""
    from sklearn.ensemble import HistGradientBoostingClassifier
    from sklearn.impute import SimpleImputer
    from sklearn.pipeline import make_pipeline

    return make_pipeline(SimpleImputer(strategy="median"),
                         HistGradientBoostingClassifier(max_iter=10, random_state=0, early_stopping=False))
def _pipe_hgbc_onehot_scaled():
    """As a data scientist writes it: one-hot the text columns (unseen -> all zeros),
    standardise the numbers (NaN passes through), histogram boosting."""
    from sklearn.compose import ColumnTransformer
    from sklearn.ensemble import HistGradientBoostingClassifier
    from sklearn.pipeline import Pipeline
    from sklearn.preprocessing import OneHotEncoder, StandardScaler

    pre = ColumnTransformer([("cat", OneHotEncoder(handle_unknown="ignore"), ["sex", "bmi_band"]),
                             ("num", StandardScaler(), NUMERIC_DIABETES)])
    return Pipeline([("pre", pre), ("model", HistGradientBoostingClassifier(max_iter=30, random_state=0,
                                                                             early_stopping=False))])


def _pipe_gbr_target():
    """Target-encode the text columns (continuous target; NaN is a category), impute and
    robust-scale the numbers, classic boosting."""
    from sklearn.compose import ColumnTransformer
    from sklearn.ensemble import GradientBoostingRegressor
    from sklearn.impute import SimpleImputer
    from sklearn.pipeline import make_pipeline
    from sklearn.model_selection import KFold
    from sklearn.preprocessing import RobustScaler, TargetEncoder

    pre = ColumnTransformer([("cat", TargetEncoder(target_type="continuous", cv=KFold(5, shuffle=True, random_state=0)),
                              ["sex", "bmi_band"]),
                             ("num", make_pipeline(SimpleImputer(strategy="median"), RobustScaler()),
                              ["age", "bmi", "bp", "s1", "s5"])])
    return make_pipeline(pre, GradientBoostingRegressor(n_estimators=30, max_depth=3, random_state=0))


def _pipe_hgbc_target_multiclass():
    """Multiclass target encoding (one column per class and feature), MinMaxScaler with
    clip on the numbers (NaN passes through), histogram boosting (which routes NaN)."""
    from sklearn.compose import ColumnTransformer
    from sklearn.ensemble import HistGradientBoostingClassifier
    from sklearn.model_selection import StratifiedKFold
    from sklearn.preprocessing import MinMaxScaler, TargetEncoder

    pre = ColumnTransformer([("cat", TargetEncoder(target_type="multiclass",
                                                   cv=StratifiedKFold(5, shuffle=True, random_state=0)),
                              ["bmi_band", "sex"]),
                             ("num", MinMaxScaler(feature_range=(-1, 2), clip=True), ["age", "bmi", "bp", "s5"])])
    return make_pipeline_(pre, HistGradientBoostingClassifier(max_iter=20, random_state=0, early_stopping=False))


def _pipe_gbc_onehot_infrequent():
    """One-hot with infrequent categories grouped (unseen -> the infrequent column), the
    first category dropped, dense output; imputed and max-abs-scaled numbers; boosting."""
    from sklearn.compose import ColumnTransformer
    from sklearn.ensemble import GradientBoostingClassifier
    from sklearn.impute import SimpleImputer
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import MaxAbsScaler, OneHotEncoder

    pre = ColumnTransformer([
        ("cat", OneHotEncoder(handle_unknown="infrequent_if_exist", min_frequency=60, drop="first",
                              sparse_output=False), ["bmi_band", "sex"]),
        ("num", make_pipeline(SimpleImputer(strategy="mean"), MaxAbsScaler()), NUMERIC_DIABETES)])
    return make_pipeline(pre, GradientBoostingClassifier(n_estimators=30, max_depth=3, random_state=0))


def _pipe_etr_onehot_strict():
    """One-hot that refuses unseen values, drop="if_binary" (sex keeps one column),
    StandardScaler without centring then RobustScaler on the numbers; extra trees."""
    from sklearn.compose import ColumnTransformer
    from sklearn.ensemble import ExtraTreesRegressor
    from sklearn.impute import SimpleImputer
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import OneHotEncoder, RobustScaler, StandardScaler

    pre = ColumnTransformer([
        ("cat", make_pipeline(SimpleImputer(strategy="most_frequent"),
                              OneHotEncoder(handle_unknown="error", drop="if_binary")), ["sex", "bmi_band"]),
        ("num", make_pipeline(SimpleImputer(strategy="median"), StandardScaler(with_mean=False),
                              RobustScaler(quantile_range=(10.0, 90.0))), ["age", "bmi", "bp", "s1", "s5"])],
        sparse_threshold=0.0)
    return make_pipeline(pre, ExtraTreesRegressor(n_estimators=10, max_depth=6, random_state=0))


def make_pipeline_(*steps):
    from sklearn.pipeline import make_pipeline
    return make_pipeline(*steps)


@functools.lru_cache(maxsize=None)
def fitted(name: str) -> Case:
    """The fitted case ``name`` (cached for the test session)."""
    return _build(name)


@functools.lru_cache(maxsize=None)
def exported(name: str):
    """(case, ensemble, artefact bytes) for ``name`` (cached: do not mutate them)."""
    from boxwood.export import build
    from boxwood.formats.json.writer import to_bytes

    case = fitted(name)
    ensemble = build(case.model)
    return case, ensemble, to_bytes(ensemble)
