"""Grouped cross-validation folds and the blend weights of out-of-fold predictions.

Folds keep whole groups (simulated specimen or measured path) together, so one specimen
never sits on both sides of a split. The blend weights are the non-negative least-squares
fit of the target on the out-of-fold predictions, normalised to sum to one (stacked
regression, Breiman 1996, doi:10.1007/BF00117832). A single model is kept whenever the
blend does not beat the best single model's out-of-fold RMSE by ``min_improvement``
(relative), so a blend has to earn its place.
"""
from __future__ import annotations

import numpy as np
from scipy.optimize import nnls

from waneguide.core.errors import InputError

__all__ = ["grouped_folds", "blend_weights"]


def grouped_folds(groups, n_splits: int, random_state=None) -> np.ndarray:
    """Fold index of every row; whole groups per fold, groups shuffled by ``random_state``."""
    groups = np.asarray(groups)
    uniq, inv = np.unique(groups, return_inverse=True)
    k = int(min(n_splits, len(uniq)))
    if k < 2:
        raise InputError(f"grouped cross-validation needs at least 2 groups (specimens or paths); got {len(uniq)}. "
                         "Use a campaign or measured set with more specimens")
    rng = np.random.default_rng(random_state)
    perm = rng.permutation(len(uniq))
    # round-robin over shuffled groups keeps folds balanced in group count
    fold_of_group = np.empty(len(uniq), dtype=np.int64)
    fold_of_group[perm] = np.arange(len(uniq)) % k
    return fold_of_group[inv]


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
