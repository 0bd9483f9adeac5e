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

from waneguide.core.errors import InputError

__all__ = [
    "conformal_rank",
    "conformal_quantile",
    "grouped_split",
    "ConformalCalibrator",
    "coverage_by_group",
]


def conformal_rank(n: int, coverage: float) -> int:
    """k = ceil((n + 1) * coverage): the order statistic of split conformal (may exceed n)."""
    if not 0.0 < coverage < 1.0:
        raise InputError(f"coverage must lie strictly between 0 and 1; got {coverage!r}")
    # tiny epsilon: (n+1)*0.9 must not turn 900.0000000001 into 901
    return int(math.ceil((n + 1) * coverage - 1e-9))


def conformal_quantile(scores, coverage: float) -> float:
    """The k-th smallest score, k = ceil((n+1) coverage); +inf when k > n (no clipping)."""
    s = np.sort(np.asarray(scores, dtype=float).ravel())
    if s.size and not np.all(np.isfinite(s)):
        raise InputError("conformal scores must be finite; got NaN or inf (check the calibration data)")
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

    def __post_init__(self):
        self.residuals = np.asarray(self.residuals, dtype=float).ravel()
        if not np.all(np.isfinite(self.residuals)):
            raise InputError("calibration residuals contain NaN or inf; check the calibration targets and features")
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
    def from_predictions(cls, y, mu, sigma, folds=None) -> "ConformalCalibrator":
        sigma = np.asarray(sigma, dtype=float)
        if np.any(~(sigma > 0)):
            raise ValueError("scale sigma must be positive everywhere")
        return cls((np.asarray(y, float) - np.asarray(mu, float)) / sigma, folds)

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

