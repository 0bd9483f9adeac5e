"""LightGBM regressor with physics sign constraints, persisted in LightGBM's own text format.

Physics fixes the sign of some dependencies: a larger A0 arrival delay (the
flexural mode slows down as the plate thins, its phase velocity scaling roughly
with sqrt(f d) at low frequency-thickness; Graff 1975, sec. 8.1) never means
less wall loss. Such signs are declared per feature *name* with shell-style
patterns (:data:`DEFAULT_MONOTONE_RULES`), resolved against the feature names
seen in ``fit``. LightGBM enforces them exactly on every split.

The estimator keeps a native LightGBM ``Booster`` and persists it as LightGBM's
own text format (:meth:`MonotoneGBMRegressor.to_text` / ``from_text``), never
as a pickle.
"""
from __future__ import annotations

import fnmatch
from typing import Iterable, Mapping, Sequence

import lightgbm as lgb
import numpy as np
import pandas as pd
from sklearn.base import BaseEstimator, RegressorMixin
from sklearn.utils.validation import _check_sample_weight, check_is_fitted, validate_data

__all__ = [
    "DEFAULT_MONOTONE_RULES",
    "MonotoneGBMRegressor",
    "resolve_monotone_constraints",
    "monotonicity_audit",
]

#: Feature-name patterns (fnmatch, case-insensitive) and the sign physics fixes for
#: every loss target: +1 = loss never decreases when the feature grows.
#: A0 slows down on a thinner plate, so its arrival delay / time-of-flight shift
#: against the baseline grows with loss (Graff 1975, sec. 8.1; Rose 1999, ch. 8).
DEFAULT_MONOTONE_RULES: tuple[tuple[str, int], ...] = (
    ("a0_shift_*", +1),                   # A0 arrival shifts against the baseline (features.schema)
    ("a0_s0_differential_shift_s", +1),   # A0 shift minus the temperature-matched S0 share
    ("a0_delay*", +1),                    # generic names (synthetic tables, user features)
)


def resolve_monotone_constraints(
    feature_names: Sequence[str] | None,
    rules: Iterable[tuple[str, int]] | Mapping[str, int] | None,
    n_features: int,
) -> list[int]:
    """One constraint (+1, -1 or 0) per feature: the first rule whose pattern matches.

    Parameters
    ----------
    feature_names : sequence of str or None
        Column names (``None``: no names, so no constraints).
    rules : mapping or iterable of (pattern, sign)
        Shell-style patterns matched case-insensitively against each name.
    n_features : int
    """
    out = [0] * n_features
    if feature_names is None or not rules:
        return out
    items = list(rules.items()) if isinstance(rules, Mapping) else list(rules)
    for pat, sign in items:
        if int(sign) not in (-1, 0, 1):
            raise ValueError(f"monotone rule {pat!r}: sign must be +1, -1 or 0; got {sign!r}")
    for j, name in enumerate(feature_names):
        for pat, sign in items:
            if fnmatch.fnmatch(str(name).lower(), str(pat).lower()):
                out[j] = int(sign)
                break
    return out


def _threads(n_jobs, n_rows: int) -> int:
    """One thread for small batches (thread start-up costs more than it saves), else n_jobs."""
    return 1 if n_rows < 2000 else max(1, int(n_jobs or 1))


class MonotoneGBMRegressor(RegressorMixin, BaseEstimator):
    """LightGBM least-squares regressor with physics sign constraints.

    Parameters
    ----------
    n_estimators : int, default 300
    learning_rate : float, default 0.05
    num_leaves : int, default 31
    min_child_samples : int, default 20
    colsample_bytree : float, default 1.0
    reg_lambda : float, default 0.0
    monotone_rules : mapping or sequence of (pattern, sign), default DEFAULT_MONOTONE_RULES
        Resolved against the column names of ``X`` in ``fit`` (a plain array has none,
        so no constraint applies).
    monotone_method : {"basic", "intermediate", "advanced"}, default "intermediate"
        LightGBM's ``monotone_constraints_method``.
    objective : str, default "regression"
        Any LightGBM objective except the quantile one when constraints are active.
    n_jobs : int, default 1
    random_state : int or None, default None

    Attributes
    ----------
    booster_ : lightgbm.Booster
    monotone_constraints_ : list of int, one per feature
    n_features_in_, feature_names_in_ (when fitted on a DataFrame)
    """

    def __init__(self, *, n_estimators=300, learning_rate=0.05, num_leaves=31, min_child_samples=20,
                 colsample_bytree=1.0, reg_lambda=0.0, monotone_rules=DEFAULT_MONOTONE_RULES,
                 monotone_method="intermediate", objective="regression", n_jobs=1, random_state=None):
        self.n_estimators = n_estimators
        self.learning_rate = learning_rate
        self.num_leaves = num_leaves
        self.min_child_samples = min_child_samples
        self.colsample_bytree = colsample_bytree
        self.reg_lambda = reg_lambda
        self.monotone_rules = monotone_rules
        self.monotone_method = monotone_method
        self.objective = objective
        self.n_jobs = n_jobs
        self.random_state = random_state

    def _params(self) -> dict:
        return {
            "objective": self.objective,
            "learning_rate": self.learning_rate,
            "num_leaves": self.num_leaves,
            "min_data_in_leaf": self.min_child_samples,
            "feature_fraction": self.colsample_bytree,
            "lambda_l2": self.reg_lambda,
            "max_bin": 255,
            "num_threads": self.n_jobs,
            "seed": int(np.random.default_rng(self.random_state).integers(2**31 - 1)),
            "deterministic": True,
            "force_row_wise": True,
            "verbosity": -1,
            "min_data_in_bin": 1,
        }

    def _check(self):
        if int(self.n_estimators) < 1:
            raise ValueError(f"n_estimators must be >= 1; got {self.n_estimators!r}")
        if not 0 < float(self.learning_rate) <= 1:
            raise ValueError(f"learning_rate must lie in (0, 1]; got {self.learning_rate!r}")

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.input_tags.allow_nan = True
        return tags

    def fit(self, X, y, sample_weight=None):
        self._check()
        X, y = validate_data(self, X, y, ensure_all_finite="allow-nan", y_numeric=True, dtype=np.float64)
        names = getattr(self, "feature_names_in_", None)
        cons = resolve_monotone_constraints(names, self.monotone_rules, X.shape[1])
        if any(cons) and self.objective == "quantile":
            raise ValueError("LightGBM does not support monotone constraints with the quantile objective; "
                             "set monotone_rules=() for a quantile model")
        params = self._params()
        if any(cons):
            params["monotone_constraints"] = cons
            params["monotone_constraints_method"] = self.monotone_method
        self.monotone_constraints_ = cons
        if sample_weight is not None:
            sample_weight = _check_sample_weight(sample_weight, X, dtype=np.float64)
        ds = lgb.Dataset(X, label=y, weight=sample_weight, params={"verbosity": -1, "min_data_in_bin": 1},
                         free_raw_data=True)
        self.booster_ = lgb.train(params, ds, num_boost_round=int(self.n_estimators))
        return self

    def predict(self, X):
        check_is_fitted(self, "booster_")
        X = validate_data(self, X, reset=False, ensure_all_finite="allow-nan", dtype=np.float64)
        return self.booster_.predict(X, num_threads=_threads(self.n_jobs, len(X)))

    def predict_array(self, X: np.ndarray) -> np.ndarray:
        """Fast path without input validation: ``X`` is a float array in the fitted column order."""
        return self.booster_.predict(X, num_threads=_threads(self.n_jobs, len(X)))

    # -- native persistence -----------------------------------------------------
    def to_text(self) -> str:
        """The fitted booster in LightGBM's native text format."""
        check_is_fitted(self, "booster_")
        return self.booster_.model_to_string()

    @classmethod
    def from_text(cls, text: str, *, params: Mapping | None = None, feature_names: Sequence[str] | None = None):
        """Rebuild a fitted estimator from :meth:`to_text` output (no pickle involved)."""
        est = cls(**dict(params or {}))
        est.booster_ = lgb.Booster(model_str=text)
        est.n_features_in_ = est.booster_.num_feature()
        if feature_names is not None:
            est.feature_names_in_ = np.asarray(list(feature_names), dtype=object)
        est.monotone_constraints_ = resolve_monotone_constraints(feature_names, est.monotone_rules,
                                                                 est.n_features_in_)
        return est


def monotonicity_audit(predict, X_ref, feature: int | str, sign: int, *, n_grid: int = 25,
                       n_rows: int = 200, rng=None) -> float:
    """Largest violation of a declared sign on a probe grid (0 when the sign always holds).

    For ``n_rows`` reference rows, sweep ``feature`` over ``n_grid`` values spanning its
    observed range (others held fixed) and return ``max(-sign * diff(prediction))``.
    """
    rng = np.random.default_rng(rng)
    is_df = isinstance(X_ref, pd.DataFrame)
    Xr = X_ref.to_numpy(dtype=float) if is_df else np.asarray(X_ref, dtype=float)
    j = list(X_ref.columns).index(feature) if (is_df and isinstance(feature, str)) else int(feature)
    rows = Xr[rng.choice(len(Xr), size=min(n_rows, len(Xr)), replace=False)]
    col = Xr[:, j]
    grid = np.linspace(np.nanmin(col), np.nanmax(col), n_grid)
    probe = np.repeat(rows, n_grid, axis=0)
    probe[:, j] = np.tile(grid, len(rows))
    if is_df:
        probe = pd.DataFrame(probe, columns=X_ref.columns)
    pred = np.asarray(predict(probe), dtype=float).reshape(len(rows), n_grid)
    return float(max(0.0, np.max(-sign * np.diff(pred, axis=1))))
