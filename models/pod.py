"""Model-assisted probability of detection: the "a-hat versus a" analysis of MIL-HDBK-1823A (2009).

Data: pairs of true wall loss ``a`` and estimated loss ``a_hat`` (simulated cases, full-wave ones
where they exist, or measured cases), in percent of nominal thickness. The handbook's model
(MIL-HDBK-1823A, section 3 and appendix G, "a-hat vs a"):

    y = b0 + b1 x + e,   e ~ N(0, tau^2),   x = g(a), y = g(a_hat),

with ``g`` the logarithm (``transform="log"``, the usual choice for a sizing response that grows
in proportion) or the identity (``"linear"``). Responses below the noise floor ``y_left`` and above
saturation ``y_right`` are censored (the likelihood uses the normal CDF for them: a Tobit
regression, fitted by maximum likelihood). With a decision threshold ``y_dec`` (set from the
in-family false-call rate on sound-metal cases, :func:`decision_threshold`), detection is
``y > y_dec``, so

    POD(a) = Phi((g(a) - mu) / sigma),   mu = (y_dec - b0) / b1,   sigma = tau / b1,

a90 = g^-1(mu + z_0.90 sigma). The 95 % confidence bound a90/95 follows the handbook in two ways:
the Wald (delta-method) bound g^-1(x90 + z_0.95 sqrt(J V J^T)), V the inverse observed information
of (b0, b1, tau) and J the Jacobian of x90 = mu + z_0.90 sigma; and the likelihood-ratio bound,
the largest x90 whose profile log-likelihood lies within chi^2_1(0.90) / 2 = 1.353 of the maximum
(one-sided 95 %).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize, stats

from waneguide.core.errors import InputError

__all__ = ["AhatFit", "fit_ahat_vs_a", "decision_threshold", "pod_curve"]

Z90 = float(stats.norm.ppf(0.90))
Z95 = float(stats.norm.ppf(0.95))
#: chi^2 with 1 degree of freedom at 0.90: the one-sided 95 % likelihood-ratio bound (MIL-HDBK-1823A)
CHI2_1_090 = float(stats.chi2.ppf(0.90, 1))


def _g(values, transform: str) -> np.ndarray:
    v = np.asarray(values, dtype=float)
    if transform == "log":
        return np.log(v)
    return v


def _g_inv(values, transform: str):
    return np.exp(values) if transform == "log" else values


def _loglik(theta, x, y, left, right, y_left, y_right) -> float:
    b0, b1, log_tau = theta
    tau = math.exp(log_tau)
    m = b0 + b1 * x
    ll = stats.norm.logpdf(y[~left & ~right], m[~left & ~right], tau).sum()
    if left.any():
        ll += stats.norm.logcdf((y_left - m[left]) / tau).sum()
    if right.any():
        ll += stats.norm.logsf((y_right - m[right]) / tau).sum()
    return float(ll)


def _hessian(f, theta, rel: float = 1e-4) -> np.ndarray:
    """Central-difference Hessian of ``f`` at ``theta`` (steps relative to each coordinate's scale)."""
    theta = np.asarray(theta, float)
    h = rel * np.maximum(np.abs(theta), 1.0)
    n = theta.size
    H = np.empty((n, n))
    for i in range(n):
        for j in range(i, n):
            e_i, e_j = np.eye(n)[i] * h[i], np.eye(n)[j] * h[j]
            val = (f(theta + e_i + e_j) - f(theta + e_i - e_j) - f(theta - e_i + e_j) + f(theta - e_i - e_j))
            H[i, j] = H[j, i] = val / (4 * h[i] * h[j])
    return H


@dataclass
class AhatFit:
    """Result of :func:`fit_ahat_vs_a` (all in the transformed units unless said otherwise).

    Attributes
    ----------
    b0, b1, tau : float
        Intercept, slope and residual standard deviation.
    cov : ndarray (3, 3)
        Covariance of (b0, b1, tau) from the observed information.
    y_dec : float
        Decision threshold (transformed); ``a_hat_dec`` the same in % of nominal.
    mu, sigma : float
        POD curve parameters.
    a90, a90_95_wald, a90_95_lr : float
        Loss [% of nominal] detected with 90 % probability, and its one-sided 95 % bounds.
    n, n_left, n_right : int
        Cases used and how many were censored below the noise floor and at saturation.
    """

    transform: str
    b0: float
    b1: float
    tau: float
    cov: np.ndarray
    y_dec: float
    mu: float
    sigma: float
    a90: float
    a90_95_wald: float
    a90_95_lr: float
    n: int
    n_left: int
    n_right: int
    loglik: float
    extra: dict = field(default_factory=dict)

    @property
    def a_hat_dec(self) -> float:
        return float(_g_inv(self.y_dec, self.transform))

    def pod(self, a) -> np.ndarray:
        """POD at loss ``a`` [% of nominal]."""
        return pod_curve(a, self.mu, self.sigma, self.transform)

    def summary(self) -> dict:
        return {"transform": self.transform, "b0": self.b0, "b1": self.b1, "tau": self.tau,
                "a_hat_decision_pct": self.a_hat_dec, "a90_pct": self.a90, "a90_95_wald_pct": self.a90_95_wald,
                "a90_95_lr_pct": self.a90_95_lr, "n": self.n, "n_censored_low": self.n_left,
                "n_censored_high": self.n_right}


def pod_curve(a, mu: float, sigma: float, transform: str = "log") -> np.ndarray:
    """POD(a) = Phi((g(a) - mu) / sigma)."""
    a = np.asarray(a, float)
    with np.errstate(divide="ignore"):
        return stats.norm.cdf((_g(a, transform) - mu) / sigma)


def decision_threshold(a_hat_sound, false_call_rate: float = 0.01) -> float:
    """The estimated loss [%] that sound-metal cases exceed with probability ``false_call_rate``.

    The empirical (1 - rate) quantile of the estimates on sound metal (MIL-HDBK-1823A: the decision
    threshold is set from the noise distribution at the false-call rate one accepts).
    """
    v = np.asarray(a_hat_sound, float)
    v = v[np.isfinite(v)]
    if not 0 < false_call_rate < 0.5:
        raise InputError(f"false_call_rate must lie in (0, 0.5); got {false_call_rate!r}")
    if v.size < math.ceil(1 / false_call_rate):
        raise InputError(f"a false-call rate of {false_call_rate:g} needs at least {math.ceil(1 / false_call_rate)} "
                         f"sound-metal cases; got {v.size}")
    return float(np.quantile(v, 1 - false_call_rate, method="higher"))


def fit_ahat_vs_a(a, a_hat, *, a_hat_dec: float, a_hat_floor: float | None = None,
                  a_hat_saturation: float | None = None, transform: str = "log",
                  lr_bound: bool = True) -> AhatFit:
    """Fit the censored a-hat versus a model and derive POD, a90 and a90/95 (see module docstring).

    Parameters
    ----------
    a, a_hat : array
        True and estimated loss [% of nominal]; cases with ``a <= 0`` are left out (no flaw to find).
    a_hat_dec : float
        Decision threshold [% of nominal] (e.g. from :func:`decision_threshold`).
    a_hat_floor, a_hat_saturation : float, optional
        Estimates at or below the floor (the noise floor, where the estimator clips) and at or above
        saturation are censored.
    """
    if transform not in ("log", "linear"):
        raise InputError(f"transform must be 'log' or 'linear'; got {transform!r}")
    a = np.asarray(a, float)
    a_hat = np.asarray(a_hat, float)
    if a.shape != a_hat.shape:
        raise InputError(f"a and a_hat must have the same length; got {a.shape} and {a_hat.shape}")
    keep = np.isfinite(a) & np.isfinite(a_hat) & (a > 0)
    a, a_hat = a[keep], a_hat[keep]
    # the estimator clips at 0 %: without a stated floor, estimates at 0 (log: at or below 1e-3 %)
    # are censored below the noise floor
    floor = float(a_hat_floor) if a_hat_floor is not None else (1e-3 if transform == "log" else 0.0)
    if transform == "log" and floor <= 0:
        raise InputError(f"with transform='log' the noise floor a_hat_floor must be positive; got {floor!r}")
    left = a_hat <= floor
    right = (a_hat >= a_hat_saturation) if a_hat_saturation is not None else np.zeros_like(left)
    n_exact = int((~left & ~right).sum())
    if n_exact < 10:
        raise InputError(f"a-hat versus a needs at least 10 uncensored cases with loss > 0; got {n_exact}")
    x = _g(a, transform)
    y = np.where(left | right, 0.0, _g(np.where(left | right, 1.0, a_hat), transform))
    y_left = float(_g(floor, transform))
    y_right = float(_g(a_hat_saturation, transform)) if a_hat_saturation is not None else math.inf
    y_dec = float(_g(a_hat_dec, transform))
    # start from least squares on the uncensored cases
    ex = ~left & ~right
    b1_0, b0_0 = np.polyfit(x[ex], y[ex], 1)
    s0 = max(float(np.std(y[ex] - (b0_0 + b1_0 * x[ex]), ddof=2)), 1e-6)

    def nll(theta):
        return -_loglik(theta, x, y, left, right, y_left, y_right)

    res = optimize.minimize(nll, np.array([b0_0, b1_0, math.log(s0)]), method="BFGS")
    b0, b1, log_tau = res.x
    tau = math.exp(log_tau)
    if not b1 > 0:
        raise InputError(f"the estimate does not grow with the true loss (fitted slope {b1:.3g}); POD is undefined")
    # observed information in (b0, b1, tau): Hessian of the negative log-likelihood
    H = _hessian(lambda t: nll(np.array([t[0], t[1], math.log(t[2])])), np.array([b0, b1, tau]))
    cov = np.linalg.inv(H)
    mu = (y_dec - b0) / b1
    sigma = tau / b1
    x90 = mu + Z90 * sigma
    # delta method (MIL-HDBK-1823A appendix G): J = d(x90)/d(b0, b1, tau)
    J = np.array([-1.0 / b1, -(y_dec - b0) / b1 ** 2 - Z90 * tau / b1 ** 2, Z90 / b1])
    se = math.sqrt(max(float(J @ cov @ J), 0.0))
    x90_wald = x90 + Z95 * se
    ll_max = -res.fun
    x90_lr = _lr_upper_bound(nll, ll_max, x90, se, y_dec, res.x) if lr_bound else math.nan
    return AhatFit(transform=transform, b0=float(b0), b1=float(b1), tau=tau, cov=cov, y_dec=y_dec, mu=float(mu),
                   sigma=float(sigma), a90=float(_g_inv(x90, transform)),
                   a90_95_wald=float(_g_inv(x90_wald, transform)), a90_95_lr=float(_g_inv(x90_lr, transform)),
                   n=int(a.size), n_left=int(left.sum()), n_right=int(right.sum()), loglik=float(ll_max))


def _lr_upper_bound(nll, ll_max: float, x90: float, se: float, y_dec: float, theta_hat) -> float:
    """Largest x90 with 2 (l_max - l_profile(x90)) <= chi^2_1(0.90) (profile likelihood)."""

    def profile(x90_fixed, start):
        # parametrise by (b1, log_tau); b0 follows from x90 = (y_dec - b0)/b1 + z90 tau/b1
        def f(p):
            b1, log_tau = p
            tau = math.exp(log_tau)
            b0 = y_dec - b1 * x90_fixed + Z90 * tau
            return nll(np.array([b0, b1, log_tau]))

        r = optimize.minimize(f, start, method="Nelder-Mead", options={"xatol": 1e-7, "fatol": 1e-9, "maxiter": 4000})
        return -r.fun, r.x

    start = np.array([theta_hat[1], theta_hat[2]])
    target = ll_max - CHI2_1_090 / 2.0

    def gap(xv):
        return profile(xv, start)[0] - target

    lo, step = x90, max(se, 1e-6)
    hi = lo + step
    for _ in range(60):
        if gap(hi) < 0:
            break
        lo, hi = hi, hi + step
        step *= 1.6
    else:  # pragma: no cover - a flat likelihood
        return math.inf
    return float(optimize.brentq(gap, lo, hi, xtol=1e-6 * max(1.0, abs(x90))))
