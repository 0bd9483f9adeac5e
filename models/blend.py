"""Choosing or blending regressors by grouped cross-validation.

Out-of-fold predictions come from :class:`sklearn.model_selection.GroupKFold`
with groups = simulated specimen (or measured path), so one specimen never sits
on both sides of a split. The blend weights are the non-negative least-squares
fit of the target on the out-of-fold predictions, normalised to sum to one
(stacked regression, Breiman 1996, doi:10.1007/BF00117832). A single model is
kept whenever the blend does not beat the best single model's out-of-fold RMSE
by ``min_improvement`` (relative), so a blend has to earn its place.
"""
from __future__ import annotations

import numpy as np
from scipy.optimize import nnls
from sklearn.base import BaseEstimator, RegressorMixin, clone
from sklearn.utils.validation import check_is_fitted, validate_data

__all__ = ["grouped_folds", "oof_predictions", "blend_weights", "GroupedCVBlend"]


def grouped_folds(groups, n_splits: int, random_state=None) -> np.ndarray:
    """Fold index of every row; whole groups per fold, groups shuffled by ``random_state``."""
    groups = np.asarray(groups)
    uniq, inv = np.unique(groups, return_inverse=True)
    k = int(min(n_splits, len(uniq)))
    if k < 2:
        raise ValueError(f"grouped cross-validation needs at least 2 groups; got {len(uniq)}")
    rng = np.random.default_rng(random_state)
    perm = rng.permutation(len(uniq))
    # round-robin over shuffled groups keeps folds balanced in group count
    fold_of_group = np.empty(len(uniq), dtype=np.int64)
    fold_of_group[perm] = np.arange(len(uniq)) % k
    return fold_of_group[inv]


def oof_predictions(estimator, X, y, folds) -> np.ndarray:
    """Out-of-fold predictions of ``estimator`` for the given fold labels."""
    out = np.empty(len(y), dtype=float)
    for k in np.unique(folds):
        te = folds == k
        out[te] = clone(estimator).fit(X[~te], y[~te]).predict(X[te])
    return out


def blend_weights(P, y, *, min_improvement: float = 0.01) -> tuple[np.ndarray, dict]:
    """Convex weights for the columns of out-of-fold predictions ``P`` (n, m).

    Returns the weights and a dict of out-of-fold RMSE per column and for the blend.
    """
    P = np.asarray(P, dtype=float)
    y = np.asarray(y, dtype=float)
    rmse = np.sqrt(np.mean((P - y[:, None]) ** 2, axis=0))
    best = int(np.argmin(rmse))
    w, _ = nnls(P, y)
    if w.sum() > 0:
        w = w / w.sum()
    blend_rmse = float(np.sqrt(np.mean((P @ w - y) ** 2))) if w.sum() > 0 else np.inf
    info = {"rmse": rmse.tolist(), "blend_rmse": blend_rmse, "best": best}
    if not blend_rmse < rmse[best] * (1.0 - min_improvement):
        w = np.zeros(P.shape[1])
        w[best] = 1.0
        info["blend_rmse"] = float(rmse[best])
    return w, info


class GroupedCVBlend(RegressorMixin, BaseEstimator):
    """Weighted blend of regressors, weights chosen by grouped cross-validation.

    Parameters
    ----------
    estimators : list of (name, regressor)
    n_splits : int, default 5
    min_improvement : float, default 0.01
        Relative out-of-fold RMSE gain a blend needs over the best single model.
    random_state : int or None

    Attributes
    ----------
    estimators_ : list of fitted regressors (refitted on all rows; weight-0 ones skipped)
    weights_ : ndarray
    cv_rmse_ : dict name -> out-of-fold RMSE, plus "blend"
    """

    def __init__(self, estimators=None, *, n_splits=5, min_improvement=0.01, random_state=None):
        self.estimators = estimators
        self.n_splits = n_splits
        self.min_improvement = min_improvement
        self.random_state = random_state

    def _est(self):
        if self.estimators:
            return list(self.estimators)
        from sklearn.linear_model import Ridge
        from sklearn.neighbors import KNeighborsRegressor

        return [("ridge", Ridge(alpha=1.0)), ("knn", KNeighborsRegressor(n_neighbors=5))]

    def fit(self, X, y, groups=None):
        X, y = validate_data(self, X, y, y_numeric=True, dtype=np.float64, ensure_min_samples=2)
        groups = np.arange(len(y)) if groups is None else np.asarray(groups)
        folds = grouped_folds(groups, self.n_splits, self.random_state)
        ests = self._est()
        P = np.column_stack([oof_predictions(e, X, y, folds) for _, e in ests])
        self.weights_, info = blend_weights(P, y, min_improvement=self.min_improvement)
        self.cv_rmse_ = {name: r for (name, _), r in zip(ests, info["rmse"])}
        self.cv_rmse_["blend"] = info["blend_rmse"]
        self.estimators_ = [clone(e).fit(X, y) if w > 0 else None for (_, e), w in zip(ests, self.weights_)]
        return self

    def predict(self, X):
        check_is_fitted(self, "weights_")
        X = validate_data(self, X, reset=False, dtype=np.float64)
        out = np.zeros(len(X))
        for e, w in zip(self.estimators_, self.weights_):
            if w > 0:
                out += w * e.predict(X)
        return out
