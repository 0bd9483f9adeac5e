"""Residual correction on measured data, on top of the simulation-trained model.

Multi-fidelity in its simplest honest form (Kennedy & O'Hagan 2000,
doi:10.1093/biomet/87.1.1, with the scale factor fixed to one): measured target
= simulated-model prediction + discrepancy g(x), where g is learned from the
few measured cases. Three candidates are compared by grouped cross-validation
(groups = measured path, so a path is never on both sides):

* ``none``  -- g = 0 (trust the simulation),
* ``bias``  -- g = constant (mean residual of the training folds),
* ``model`` -- g = a GP on the standardised features (default
  :class:`models.gp.StandardisedGPRegressor`).

The one with the lowest out-of-fold mean absolute error wins; ties go to the
simpler one. The fold models are kept, because the CV+ band (Barber et al.
2021, see :mod:`models.conformal`) needs g_{-k(i)} for every measured case i.
"""
from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator, RegressorMixin, clone
from sklearn.utils.validation import check_is_fitted, validate_data

from waneguide.models.blend import grouped_folds
from waneguide.models.gp import StandardisedGPRegressor

__all__ = ["ResidualCorrector", "CORRECTION_CANDIDATES"]

CORRECTION_CANDIDATES = ("none", "bias", "model")


class _Const:
    """A constant predictor (the 'bias' candidate); plain attributes only."""

    def __init__(self, value: float = 0.0):
        self.value = float(value)

    def fit(self, X, y):
        self.value = float(np.mean(y)) if len(y) else 0.0
        return self

    def predict(self, X):
        return np.full(len(X), self.value)


class ResidualCorrector(RegressorMixin, BaseEstimator):
    """Discrepancy model g(x) chosen among none / bias / model by grouped CV.

    Parameters
    ----------
    estimator : regressor or None
        The 'model' candidate (default: GP with Matern 5/2 ARD, all points).
    candidates : tuple of str, default ("none", "bias", "model")
    n_splits : int, default 5
        Folds (capped at the number of groups).
    min_samples_model : int, default 8
        The 'model' candidate is considered only with at least this many cases.
    random_state : int or None

    Attributes
    ----------
    choice_ : str
    cv_mae_ : dict candidate -> out-of-fold MAE of the corrected residual
    folds_ : ndarray, fold of every training case
    fold_values_ : ndarray (n_folds,), for 'none'/'bias' the constant of each fold model
    fold_models_ : list, the fold models (only for 'model')
    final_ : the model fitted on all cases
    """

    def __init__(self, estimator=None, *, candidates=CORRECTION_CANDIDATES, n_splits=5, min_samples_model=8,
                 random_state=None):
        self.estimator = estimator
        self.candidates = candidates
        self.n_splits = n_splits
        self.min_samples_model = min_samples_model
        self.random_state = random_state

    def _make(self, kind):
        if kind == "none":
            return _Const(0.0)
        if kind == "bias":
            return _Const()
        if self.estimator is None:
            return StandardisedGPRegressor(max_points=2000, random_state=self.random_state)
        return clone(self.estimator)

    def fit(self, X, y, groups=None):
        X, y = validate_data(self, X, y, y_numeric=True, dtype=np.float64)
        bad = [c for c in self.candidates if c not in CORRECTION_CANDIDATES]
        if bad or not self.candidates:
            raise ValueError(f"candidates must be among {CORRECTION_CANDIDATES}; got {list(self.candidates)}")
        groups = np.arange(len(y)) if groups is None else np.asarray(groups)
        n_groups = len(np.unique(groups))
        self.folds_ = (grouped_folds(groups, self.n_splits, self.random_state) if n_groups >= 2
                       else np.zeros(len(y), dtype=np.int64))
        K = int(self.folds_.max()) + 1
        cands = [c for c in self.candidates if c != "model" or len(y) >= self.min_samples_model]
        cands = cands or ["none"]
        self.cv_mae_ = {}
        fold_store = {}
        for c in cands:
            oof = np.zeros(len(y))
            models = []
            for k in range(K):
                te = self.folds_ == k
                if K == 1 or c == "none":
                    m = _Const(0.0)
                else:
                    m = self._make(c)
                    m.fit(X[~te], y[~te])
                models.append(m)
                oof[te] = m.predict(X[te])
            self.cv_mae_[c] = float(np.mean(np.abs(y - oof)))
            fold_store[c] = models
        # ties (within 1e-12) go to the simpler candidate, in CORRECTION_CANDIDATES order
        order = [c for c in CORRECTION_CANDIDATES if c in self.cv_mae_]
        best = min(order, key=lambda c: (round(self.cv_mae_[c], 12), order.index(c)))
        self.choice_ = best
        models = fold_store[best]
        if best == "model":
            self.fold_models_ = models
            self.fold_values_ = np.zeros(K)
            self.final_ = self._make("model").fit(X, y)
        else:
            self.fold_models_ = []
            self.fold_values_ = np.array([m.value for m in models])
            self.final_ = _Const(0.0 if best == "none" else float(np.mean(y)))
        return self

    def predict(self, X):
        check_is_fitted(self, "choice_")
        X = validate_data(self, X, reset=False, dtype=np.float64)
        return np.asarray(self.final_.predict(X), dtype=float)

    def predict_folds(self, X) -> np.ndarray:
        """(n, n_folds) corrections of each fold model (for the CV+ band)."""
        check_is_fitted(self, "choice_")
        X = validate_data(self, X, reset=False, dtype=np.float64)
        if self.choice_ == "model":
            return np.column_stack([np.asarray(m.predict(X), dtype=float) for m in self.fold_models_])
        return np.broadcast_to(self.fold_values_[None, :], (len(X), len(self.fold_values_))).copy()
