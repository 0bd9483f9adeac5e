"""Conformal prediction intervals and predictive distributions.

Split conformal (Vovk, Gammerman, Shafer 2005; Lei, G'Sell, Rinaldo, Tibshirani,
Wasserman 2018, doi:10.1080/01621459.2017.1307116): with n exchangeable
calibration scores s_1..s_n and miscoverage alpha, the band

    C(x) = { y : s(x, y) <= s_(k) },   k = ceil((n + 1)(1 - alpha))

covers a new exchangeable point with probability >= 1 - alpha. When k > n the
order statistic does not exist and the band is the whole real line: this module
returns +-inf then, never a clipped finite band.

Scores used here:

* normalised residual (locally weighted, Lei et al. 2018, sec. 5.2):
  s = |y - mu(x)| / sigma(x), band mu(x) -+ s_(k) sigma(x);
* CQR (Romano, Patterson, Candes 2019, arXiv:1905.03222):
  s = max(q_lo(x) - y, y - q_hi(x)), band [q_lo - s_(k), q_hi + s_(k)];
* CV+ / jackknife+ (Barber, Candes, Ramdas, Tibshirani 2021, doi:10.1214/20-AOS1965):
  with K fold models mu_{-k} and out-of-fold residuals R_i,
  lower = the floor(alpha (n+1))-th smallest of mu_{-k(i)}(x) - R_i sigma(x),
  upper = the ceil((1-alpha)(n+1))-th smallest of mu_{-k(i)}(x) + R_i sigma(x)
  (coverage >= 1 - 2 alpha in theory, about 1 - alpha in practice).
  With a single fold this is exactly split conformal.

The *conformal predictive distribution* (Vovk et al. 2019, doi:10.1007/s10994-018-5755-8)
built from signed scores r_i gives exceedance probabilities; we report its
conservative (upper) end, P(Y > L) <= (1 + #{v_i >= L}) / (n + 1), with
v_i = mu_{-k(i)}(x) + r_i sigma(x).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from sklearn.base import BaseEstimator, RegressorMixin, clone
from sklearn.utils.validation import check_is_fitted, validate_data

__all__ = [
    "conformal_rank",
    "conformal_quantile",
    "grouped_split",
    "ConformalCalibrator",
    "NormalisedConformalRegressor",
    "CQRRegressor",
    "coverage_by_group",
]


def conformal_rank(n: int, coverage: float) -> int:
    """k = ceil((n + 1) * coverage): the order statistic of split conformal (may exceed n)."""
    if not 0.0 < coverage < 1.0:
        raise ValueError(f"coverage must lie strictly between 0 and 1; got {coverage!r}")
    # tiny epsilon: (n+1)*0.9 must not turn 900.0000000001 into 901
    return int(math.ceil((n + 1) * coverage - 1e-9))


def conformal_quantile(scores, coverage: float) -> float:
    """The k-th smallest score, k = ceil((n+1) coverage); +inf when k > n (no clipping)."""
    s = np.sort(np.asarray(scores, dtype=float).ravel())
    if s.size and not np.all(np.isfinite(s)):
        raise ValueError("conformal scores must be finite; got NaN or inf (check the calibration data)")
    k = conformal_rank(s.size, coverage)
    return float(s[k - 1]) if k <= s.size else math.inf


def grouped_split(groups, fraction: float, rng=None) -> np.ndarray:
    """Boolean mask choosing about ``fraction`` of the rows, whole groups at a time."""
    rng = np.random.default_rng(rng)
    g = pd.factorize(np.asarray(groups))[0]
    n_groups = g.max() + 1
    order = rng.permutation(n_groups)
    take = max(1, int(round(fraction * n_groups)))
    if n_groups > 1:
        take = min(take, n_groups - 1)
    chosen = np.zeros(n_groups, dtype=bool)
    chosen[order[:take]] = True
    return chosen[g]


@dataclass
class ConformalCalibrator:
    """Signed normalised calibration residuals, with their CV fold (0 for split conformal).

    ``r_i = (y_i - m_i) / s_i`` where ``m_i`` is the prediction of the model that did
    not see case i (fold ``folds[i]``) and ``s_i`` the scale at ``x_i``.
    """

    residuals: np.ndarray
    folds: np.ndarray = field(default=None)  # type: ignore[assignment]
    groups: np.ndarray | None = None

    def __post_init__(self):
        self.residuals = np.asarray(self.residuals, dtype=float).ravel()
        if not np.all(np.isfinite(self.residuals)):
            raise ValueError("calibration residuals contain NaN or inf; check the calibration targets and features")
        self.folds = (np.zeros(self.residuals.size, dtype=np.int64) if self.folds is None
                      else np.asarray(self.folds, dtype=np.int64).ravel())
        if self.folds.size != self.residuals.size:
            raise ValueError("folds must have one entry per residual")

    @property
    def n(self) -> int:
        return int(self.residuals.size)

    @property
    def n_folds(self) -> int:
        return int(self.folds.max()) + 1 if self.n else 1

    @classmethod
    def from_predictions(cls, y, mu, sigma, folds=None, groups=None) -> "ConformalCalibrator":
        sigma = np.asarray(sigma, dtype=float)
        if np.any(~(sigma > 0)):
            raise ValueError("scale sigma must be positive everywhere")
        return cls((np.asarray(y, float) - np.asarray(mu, float)) / sigma, folds, groups)

    def _centres(self, mu) -> np.ndarray:
        """(n_test, K) fold-wise centres from mu of shape (n_test,) or (n_test, K)."""
        mu = np.asarray(mu, dtype=float)
        if mu.ndim == 1:
            mu = mu[:, None]
        if mu.shape[1] not in (1, self.n_folds):
            raise ValueError(f"need one centre per fold ({self.n_folds}); got {mu.shape[1]}")
        return mu

    def quantile(self, coverage: float) -> float:
        """Split-conformal quantile of |r| (inf when k > n)."""
        return conformal_quantile(np.abs(self.residuals), coverage)

    def interval(self, mu, sigma, coverage: float) -> tuple[np.ndarray, np.ndarray]:
        """(lower, upper) arrays; +-inf where the finite-sample rank exceeds n."""
        m = self._centres(mu)
        sigma = np.asarray(sigma, dtype=float).ravel()
        n = self.n
        k_hi = conformal_rank(n, coverage)
        k_lo = n + 1 - k_hi  # = floor(alpha (n+1)), Barber et al. 2021, eq. (6)
        if m.shape[1] == 1:
            q = self.quantile(coverage)
            return m[:, 0] - q * sigma, m[:, 0] + q * sigma
        a = np.abs(self.residuals)
        # CV+: per test row, values from each calibration point's own fold model
        lo_vals = m[:, self.folds] - a[None, :] * sigma[:, None]
        hi_vals = m[:, self.folds] + a[None, :] * sigma[:, None]
        lo = (np.partition(lo_vals, k_lo - 1, axis=1)[:, k_lo - 1] if k_lo >= 1
              else np.full(len(m), -np.inf))
        hi = (np.partition(hi_vals, k_hi - 1, axis=1)[:, k_hi - 1] if k_hi <= n
              else np.full(len(m), np.inf))
        return lo, hi

    def exceedance(self, mu, sigma, limit) -> np.ndarray:
        """Conservative P(Y > limit) from the conformal predictive distribution."""
        m = self._centres(mu)
        sigma = np.asarray(sigma, dtype=float).ravel()
        limit = np.broadcast_to(np.asarray(limit, dtype=float), (len(m),))
        if m.shape[1] == 1:
            # v_i >= L  <=>  r_i >= (L - m) / s
            z = (limit - m[:, 0]) / sigma
            r = np.sort(self.residuals)
            count = self.n - np.searchsorted(r, z, side="left")
        else:
            v = m[:, self.folds] + self.residuals[None, :] * sigma[:, None]
            count = np.sum(v >= limit[:, None], axis=1)
        return (1.0 + count) / (self.n + 1.0)

    def to_arrays(self, prefix: str) -> dict[str, np.ndarray]:
        return {f"{prefix}residuals": self.residuals, f"{prefix}folds": self.folds}

    @classmethod
    def from_arrays(cls, arrays, prefix: str) -> "ConformalCalibrator":
        return cls(np.asarray(arrays[f"{prefix}residuals"]), np.asarray(arrays[f"{prefix}folds"]))


def coverage_by_group(y, lower, upper, labels=None) -> pd.DataFrame:
    """Coverage and mean width overall and per group label.

    Returns a DataFrame with columns group, n, coverage, mean_width (infinite widths
    count as inf, so an infinite band is visible rather than averaged away).
    """
    y, lo, hi = (np.asarray(a, dtype=float).ravel() for a in (y, lower, upper))
    hit = (y >= lo) & (y <= hi)
    width = hi - lo
    rows = [{"group": "all", "n": y.size, "coverage": float(hit.mean()) if y.size else math.nan,
             "mean_width": float(width.mean()) if y.size else math.nan}]
    if labels is not None:
        lab = pd.Series(np.asarray(labels)).astype(str)
        for name, idx in lab.groupby(lab).groups.items():
            idx = np.asarray(idx)
            rows.append({"group": name, "n": idx.size, "coverage": float(hit[idx].mean()),
                         "mean_width": float(width[idx].mean())})
    return pd.DataFrame(rows)


# ---------------------------------------------------------------------------
# scikit-learn estimators
# ---------------------------------------------------------------------------
class _ConformalBase(RegressorMixin, BaseEstimator):
    def _split(self, X, y, groups):
        n = len(y)
        groups = np.arange(n) if groups is None else np.asarray(groups)
        cal = grouped_split(groups, self.calibration_fraction, self.random_state)
        return ~cal, cal

    def predict_interval(self, X, coverage: float | None = None):
        """(lower, upper) for ``coverage`` (default: the fitted one)."""
        check_is_fitted(self, "calibrator_")
        cov = self.coverage if coverage is None else coverage
        mu, s = self._centre_scale(X)
        return self.calibrator_.interval(mu, s, cov) if not self._cqr else self._cqr_interval(X, cov)

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.input_tags.allow_nan = True
        return tags


class NormalisedConformalRegressor(_ConformalBase):
    """Centre model + scale model, calibrated by split conformal on normalised residuals.

    Parameters
    ----------
    estimator : regressor or None
        Centre model mu(x) (default :class:`models.gbm.MonotoneGBMRegressor`).
    scale_estimator : regressor or None
        Model of |y - mu(x)| fitted on out-of-fold residuals of the training part
        (default: a small LightGBM).
    coverage : float, default 0.9
    calibration_fraction : float, default 0.25
        Share of the groups held out for calibration.
    scale_floor : float, default 1e-3
        Lower limit of sigma as a fraction of the spread (std) of the training targets.
    random_state : int or None

    Attributes
    ----------
    estimator_, scale_estimator_, calibrator_, sigma_floor_
    """

    _cqr = False

    def __init__(self, estimator=None, scale_estimator=None, *, coverage=0.9, calibration_fraction=0.25,
                 scale_floor=1e-3, random_state=None):
        self.estimator = estimator
        self.scale_estimator = scale_estimator
        self.coverage = coverage
        self.calibration_fraction = calibration_fraction
        self.scale_floor = scale_floor
        self.random_state = random_state

    def _defaults(self):
        from waneguide.models.gbm import MonotoneGBMRegressor

        est = MonotoneGBMRegressor(random_state=self.random_state) if self.estimator is None else self.estimator
        sc = (MonotoneGBMRegressor(n_estimators=100, num_leaves=15, monotone_rules=(), random_state=self.random_state)
              if self.scale_estimator is None else self.scale_estimator)
        return est, sc

    def fit(self, X, y, groups=None):
        conformal_rank(1, self.coverage)  # validates coverage
        X, y = validate_data(self, X, y, ensure_all_finite="allow-nan", y_numeric=True, dtype=np.float64,
                             ensure_min_samples=4)
        tr, cal = self._split(X, y, groups)
        est, sc = self._defaults()
        self.estimator_ = clone(est).fit(X[tr], y[tr])
        # out-of-fold residuals for the scale model (2 folds; in-sample residuals of boosting are too small)
        half = grouped_split((np.arange(len(y)) if groups is None else np.asarray(groups))[tr], 0.5,
                             self.random_state)
        resid = np.empty(tr.sum())
        for part in (half, ~half):
            if part.all() or not part.any():
                resid[:] = np.abs(y[tr] - self.estimator_.predict(X[tr]))
                break
            m = clone(est).fit(X[tr][~part], y[tr][~part])
            resid[part] = np.abs(y[tr][part] - m.predict(X[tr][part]))
        self.sigma_floor_ = max(float(self.scale_floor) * float(np.std(y[tr]) or 1.0), 1e-12)
        self.scale_estimator_ = clone(sc).fit(X[tr], resid)
        mu, s = self._centre_scale(X[cal])
        self.calibrator_ = ConformalCalibrator.from_predictions(y[cal], mu, s)
        return self

    def _centre_scale(self, X):
        X = validate_data(self, X, reset=False, ensure_all_finite="allow-nan", dtype=np.float64)
        mu = self.estimator_.predict(X)
        s = np.maximum(self.scale_estimator_.predict(X), self.sigma_floor_)
        return mu, s

    def predict(self, X):
        check_is_fitted(self, "calibrator_")
        return self._centre_scale(X)[0]

    def exceedance_probability(self, X, limit):
        """Conservative P(Y > limit) from the conformal predictive distribution."""
        check_is_fitted(self, "calibrator_")
        mu, s = self._centre_scale(X)
        return self.calibrator_.exceedance(mu, s, limit)


class CQRRegressor(_ConformalBase):
    """Conformalized quantile regression (Romano et al. 2019) on LightGBM quantile models.

    Parameters
    ----------
    coverage : float, default 0.9
    calibration_fraction : float, default 0.25
    n_estimators, learning_rate, num_leaves, min_child_samples : passed to
        :class:`models.gbm.QuantileGBMRegressor`.
    random_state : int or None

    ``predict`` is the rearranged median; ``predict_interval`` the conformalized bounds,
    re-sorted per row so lower <= median <= upper.

    Attributes
    ----------
    quantile_model_, q_hat_ (the conformal correction), calibrator_
    """

    _cqr = True

    def __init__(self, *, coverage=0.9, calibration_fraction=0.25, n_estimators=200, learning_rate=0.05,
                 num_leaves=31, min_child_samples=20, random_state=None):
        self.coverage = coverage
        self.calibration_fraction = calibration_fraction
        self.n_estimators = n_estimators
        self.learning_rate = learning_rate
        self.num_leaves = num_leaves
        self.min_child_samples = min_child_samples
        self.random_state = random_state

    def fit(self, X, y, groups=None):
        from waneguide.models.gbm import QuantileGBMRegressor

        conformal_rank(1, self.coverage)
        X, y = validate_data(self, X, y, ensure_all_finite="allow-nan", y_numeric=True, dtype=np.float64,
                             ensure_min_samples=4)
        tr, cal = self._split(X, y, groups)
        a = 1.0 - self.coverage
        self.quantile_model_ = QuantileGBMRegressor(
            quantiles=(a / 2, 0.5, 1 - a / 2), n_estimators=self.n_estimators, learning_rate=self.learning_rate,
            num_leaves=self.num_leaves, min_child_samples=self.min_child_samples, random_state=self.random_state,
        ).fit(X[tr], y[tr])
        q = self.quantile_model_.predict_quantiles(X[cal])
        scores = np.maximum(q[:, 0] - y[cal], y[cal] - q[:, 2])  # Romano et al. 2019, eq. (6)
        # stored as signed residuals with unit scale so the calibrator's order statistic applies
        self.calibrator_ = ConformalCalibrator(scores)
        self.q_hat_ = conformal_quantile(scores, self.coverage)
        return self

    def _centre_scale(self, X):
        X = validate_data(self, X, reset=False, ensure_all_finite="allow-nan", dtype=np.float64)
        q = self.quantile_model_.predict_quantiles(X)
        return q[:, 1], np.ones(len(X))

    def _cqr_interval(self, X, coverage):
        X = validate_data(self, X, reset=False, ensure_all_finite="allow-nan", dtype=np.float64)
        q = self.quantile_model_.predict_quantiles(X)
        # scores are not symmetric |r|, so take their order statistic directly
        qh = conformal_quantile(self.calibrator_.residuals, coverage)
        lo, hi = q[:, 0] - qh, q[:, 2] + qh
        # a negative q_hat can shrink the band past the median: re-sort so no crossing reaches the user
        b = np.sort(np.column_stack([lo, q[:, 1], hi]), axis=1)
        return b[:, 0], b[:, 2]

    def predict(self, X):
        check_is_fitted(self, "calibrator_")
        return self._centre_scale(X)[0]
