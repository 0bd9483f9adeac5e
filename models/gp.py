"""Gaussian-process regressor on standardised features (scikit-learn GPR).

Kernel: ``C * Matern(length_scale=[l_1..l_d], nu) + WhiteKernel`` (anisotropic,
i.e. automatic relevance determination) on features scaled to zero mean and unit
variance, with ``normalize_y=True`` (Rasmussen & Williams 2006, ch. 4-5).

Cost and strategy. Exact GP inference costs O(n^3) time and O(n^2) memory per
likelihood evaluation (Rasmussen & Williams 2006, Alg. 2.1); with ARD the
optimiser needs a few hundred of them. On two cores about 1,000-2,000 points is
the practical ceiling, so:

* on small sets (measured captures, residual correction) the GP uses every point;
* on a campaign it fits on a *space-filling subset* of ``max_points`` rows,
  chosen by greedy farthest-point (max-min distance) selection in standardised
  feature space, which covers the corners of the domain a random subset misses;
* ``max_features`` optionally keeps only the most relevant columns (chosen by the
  caller, e.g. from LightGBM gain) so that ARD stays well posed.

Length scales that end at a bound of their search box (an irrelevant feature
goes to the upper bound; a noise-fitting one to the lower) are *reported*
(:attr:`StandardisedGPRegressor.bound_hits_`, and a ``logging`` warning), not
silenced: scikit-learn's ConvergenceWarnings are captured and turned into that
record.
"""
from __future__ import annotations

import logging
import warnings

import numpy as np
from sklearn.base import BaseEstimator, RegressorMixin
from sklearn.exceptions import ConvergenceWarning
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import ConstantKernel, Matern, WhiteKernel
from sklearn.utils.validation import check_is_fitted, validate_data
from threadpoolctl import threadpool_limits

__all__ = ["StandardisedGPRegressor", "farthest_point_subset"]

log = logging.getLogger(__name__)


def farthest_point_subset(X: np.ndarray, m: int, rng=None) -> np.ndarray:
    """Indices of ``m`` rows chosen greedily to maximise the minimum pairwise distance.

    Gonzalez (1985) 2-approximation of the k-centre problem; O(n m) time.
    """
    X = np.asarray(X, dtype=float)
    n = len(X)
    if m >= n:
        return np.arange(n)
    rng = np.random.default_rng(rng)
    idx = np.empty(m, dtype=np.int64)
    idx[0] = rng.integers(n)
    d2 = np.sum((X - X[idx[0]]) ** 2, axis=1)
    for i in range(1, m):
        idx[i] = int(np.argmax(d2))
        d2 = np.minimum(d2, np.sum((X - X[idx[i]]) ** 2, axis=1))
    return idx


class StandardisedGPRegressor(RegressorMixin, BaseEstimator):
    """Exact GP with anisotropic Matern + white noise on standardised features.

    Parameters
    ----------
    nu : float, default 2.5
        Matern smoothness (1.5, 2.5 or inf).
    length_scale_bounds : (float, float), default (1e-2, 1e3)
        Search box of every length scale, in standardised-feature units.
    noise_level_bounds : (float, float), default (1e-6, 1.0)
        Search box of the white-noise variance, in units of the normalised target variance.
    max_points : int, default 1000
        Largest training set; above it a space-filling subset is used.
    subset : {"farthest", "random"}, default "farthest"
    n_restarts_optimizer : int, default 0
    optimize : bool, default True
        False keeps the initial kernel (used to refit fold models with fixed hyperparameters).
    kernel_init : dict or None
        Initial ``length_scale`` (array), ``constant`` and ``noise`` (used with optimize=False).
    random_state : int or None

    Attributes
    ----------
    gpr_ : sklearn.gaussian_process.GaussianProcessRegressor
    x_mean_, x_scale_ : standardisation of the features
    length_scales_ : ndarray, fitted length scales in standardised units
    length_scales_original_ : ndarray, the same in the feature's own units
    noise_std_ : float, fitted noise standard deviation in target units
    bound_hits_ : list of str, one readable line per parameter at a bound
    subset_index_ : ndarray, rows used for fitting
    feature_labels_ : list of str, when ``fit`` got ``feature_labels``
    """

    def __init__(self, *, nu=2.5, length_scale_bounds=(1e-2, 1e3), noise_level_bounds=(1e-6, 1.0),
                 max_points=1000, subset="farthest", n_restarts_optimizer=0, optimize=True, kernel_init=None,
                 random_state=None):
        self.nu = nu
        self.length_scale_bounds = length_scale_bounds
        self.noise_level_bounds = noise_level_bounds
        self.max_points = max_points
        self.subset = subset
        self.n_restarts_optimizer = n_restarts_optimizer
        self.optimize = optimize
        self.kernel_init = kernel_init
        self.random_state = random_state

    def _kernel(self, d: int):
        init = dict(self.kernel_init or {})
        ls = np.broadcast_to(np.asarray(init.get("length_scale", 1.0), dtype=float), (d,)).copy()
        fixed = not self.optimize
        return (ConstantKernel(float(init.get("constant", 1.0)), "fixed" if fixed else (1e-3, 1e3))
                * Matern(length_scale=ls, length_scale_bounds="fixed" if fixed else self.length_scale_bounds,
                         nu=self.nu)
                + WhiteKernel(float(init.get("noise", 0.1)), "fixed" if fixed else self.noise_level_bounds))

    def fit(self, X, y, feature_labels=None):
        """Fit; ``feature_labels`` (optional) name the columns in the bound-hit report."""
        X, y = validate_data(self, X, y, y_numeric=True, dtype=np.float64)
        if self.subset not in ("farthest", "random"):
            raise ValueError(f"subset must be 'farthest' or 'random'; got {self.subset!r}")
        if int(self.max_points) < 2:
            raise ValueError(f"max_points must be >= 2; got {self.max_points!r}")
        rng = np.random.default_rng(self.random_state)
        self.x_mean_ = X.mean(axis=0)
        sc = X.std(axis=0)
        self.x_scale_ = np.where(sc > 0, sc, 1.0)
        Z = (X - self.x_mean_) / self.x_scale_
        m = int(self.max_points)
        if len(Z) > m:
            idx = (farthest_point_subset(Z, m, rng) if self.subset == "farthest"
                   else np.sort(rng.choice(len(Z), m, replace=False)))
        else:
            idx = np.arange(len(Z))
        self.subset_index_ = idx
        gpr = GaussianProcessRegressor(kernel=self._kernel(X.shape[1]), normalize_y=True,
                                       n_restarts_optimizer=int(self.n_restarts_optimizer),
                                       optimizer="fmin_l_bfgs_b" if self.optimize else None,
                                       random_state=int(rng.integers(2**31 - 1)), copy_X_train=False)
        # one BLAS thread: on a shared 2-core machine OpenBLAS's spinning threads made small GP fits
        # 25x slower (measured); the n <= 2,000 Cholesky factorisations gain little from a second core
        with warnings.catch_warnings(record=True) as caught, threadpool_limits(limits=1, user_api="blas"):
            warnings.simplefilter("always", ConvergenceWarning)
            gpr.fit(Z[idx], y[idx])
        self.gpr_ = gpr
        if feature_labels is not None:
            self.feature_labels_ = [str(x) for x in feature_labels]
        k = gpr.kernel_
        self.constant_ = float(k.k1.k1.constant_value)
        self.length_scales_ = np.atleast_1d(np.asarray(k.k1.k2.length_scale, dtype=float)).copy()
        if self.length_scales_.size == 1 and X.shape[1] > 1:
            self.length_scales_ = np.repeat(self.length_scales_, X.shape[1])
        self.length_scales_original_ = self.length_scales_ * self.x_scale_
        y_std = float(gpr._y_train_std) if np.ndim(gpr._y_train_std) == 0 else float(np.ravel(gpr._y_train_std)[0])
        self.noise_variance_ = float(k.k2.noise_level)
        self.noise_std_ = float(np.sqrt(self.noise_variance_) * y_std)
        self.bound_hits_ = self._bound_hits(caught)
        for line in self.bound_hits_:
            log.warning("GP: %s", line)
        return self

    def _bound_hits(self, caught) -> list[str]:
        hits = []
        if self.optimize:
            lo, hi = self.length_scale_bounds
            names = [str(n) for n in getattr(self, "feature_labels_",
                                             getattr(self, "feature_names_in_", range(len(self.length_scales_))))]
            for name, ls in zip(names, self.length_scales_):
                if ls <= lo * 1.01:
                    hits.append(f"length scale of feature {name} at its lower bound {lo:g} "
                                f"(the GP may be fitting noise on it)")
                elif ls >= hi * 0.99:
                    hits.append(f"length scale of feature {name} at its upper bound {hi:g} "
                                f"(the feature looks irrelevant to the GP)")
            nlo, nhi = self.noise_level_bounds
            if self.noise_variance_ <= nlo * 1.01:
                hits.append(f"noise level at its lower bound {nlo:g} (near-interpolation)")
            elif self.noise_variance_ >= nhi * 0.99:
                hits.append(f"noise level at its upper bound {nhi:g} (the GP explains little)")
        for w in caught:
            if issubclass(w.category, ConvergenceWarning) and "bound" not in str(w.message):
                hits.append(f"optimiser: {w.message}")
        return hits

    def predict(self, X, return_std: bool = False):
        check_is_fitted(self, "gpr_")
        X = validate_data(self, X, reset=False, dtype=np.float64)
        Z = (X - self.x_mean_) / self.x_scale_
        return self.gpr_.predict(Z, return_std=return_std)

    def predict_array(self, X: np.ndarray) -> np.ndarray:
        """Fast path without input validation (float array in the fitted column order)."""
        return self.gpr_.predict((np.asarray(X, dtype=float) - self.x_mean_) / self.x_scale_)

    def hyperparameters(self) -> dict:
        """Fitted kernel in plain numbers (JSON-ready)."""
        check_is_fitted(self, "gpr_")
        return {"constant": self.constant_, "length_scale": self.length_scales_.tolist(),
                "noise": self.noise_variance_, "noise_std": self.noise_std_,
                "length_scale_original": self.length_scales_original_.tolist(), "bound_hits": list(self.bound_hits_)}
