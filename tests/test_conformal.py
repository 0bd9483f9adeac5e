"""Conformal intervals against their finite-sample theory.

Sources: Vovk, Gammerman & Shafer 2005 (split/inductive conformal, rank k = ceil((n+1)(1-alpha)));
Lei et al. 2018, doi:10.1080/01621459.2017.1307116 (coverage in [1-alpha, 1-alpha+1/(n+1)],
locally weighted residuals); Barber, Candes, Ramdas & Tibshirani 2021, doi:10.1214/20-AOS1965
(CV+/jackknife+ formula and the 1-2alpha guarantee); Vovk et al. 2019 (conformal predictive
distributions). The centre and scale fed to the calibrator are the data-generating ones, so the
band can be held to the normal distribution's own quantiles (scipy.stats).
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from waneguide.models.conformal import (
    ConformalCalibrator,
    conformal_quantile,
    conformal_rank,
    coverage_by_group,
)


def test_rank_and_infinite_band():
    # k = ceil((n+1)(1-alpha)) (Vovk et al. 2005): n = 9 at 90 % -> k = 9; n = 8 -> k = 9 > n
    assert conformal_rank(9, 0.9) == 9
    assert conformal_rank(8, 0.9) == 9
    assert conformal_rank(99, 0.95) == 95
    assert conformal_quantile(np.arange(1, 10), 0.9) == 9.0
    assert math.isinf(conformal_quantile(np.arange(1, 9), 0.9))  # no order statistic: whole line
    cal = ConformalCalibrator(np.ones(8))
    lo, hi = cal.interval(np.zeros(3), np.ones(3), 0.9)
    assert np.all(np.isneginf(lo)) and np.all(np.isposinf(hi))
    with pytest.raises(ValueError, match="coverage must lie strictly between 0 and 1"):
        conformal_rank(10, 1.0)


def _homoscedastic(n, rng, sigma=0.5):
    X = rng.uniform(-3, 3, size=(n, 2))
    return X, np.sin(X[:, 0]) + 0.3 * X[:, 1] + sigma * rng.normal(size=n)


def _mean(X):
    return np.sin(X[:, 0]) + 0.3 * X[:, 1]


def test_split_conformal_coverage_and_width_against_the_normal():
    """Split conformal around the true mean: coverage and width of the normal's 90 % band.

    Coverage within +-2 points of nominal on 20,000 test points (Lei et al. 2018, thm. 2.2): with
    n_cal = 2,500 the coverage given the calibration set has sd sqrt(0.09/2500) = 0.006 and the
    test estimate sd 0.002, so +-2 points is > 3 sd.
    """
    rng = np.random.default_rng(0)
    X, y = _homoscedastic(2500, rng)
    cal = ConformalCalibrator.from_predictions(y, _mean(X), np.ones(len(y)))
    Xt, yt = _homoscedastic(20_000, rng)
    lo, hi = cal.interval(_mean(Xt), np.ones(len(yt)), 0.9)
    assert abs(np.mean((yt >= lo) & (yt <= hi)) - 0.9) <= 0.02
    # half-width = the k-th smallest |residual| of N(0, 0.5^2) -> 0.5 * Phi^-1(0.95) = 0.822. The sample
    # quantile's sd is sqrt(0.09 / 2500) / f(q) = 0.006 / 0.41 = 0.015 (1.8 %); 6 % is > 3 sd
    assert np.mean(hi - lo) / 2 == pytest.approx(0.5 * stats.norm.ppf(0.95), rel=0.06)


def test_normalised_band_follows_heteroscedastic_noise():
    """Locally weighted residuals (Lei et al. 2018, sec. 5.2) with the true noise sd as the scale."""
    rng = np.random.default_rng(1)

    def sd(x):
        return 0.05 + 0.5 * x

    def draw(n):
        x = rng.uniform(0, 2, size=n)
        return x, x + sd(x) * rng.normal(size=n)

    x, y = draw(8000)
    cal = ConformalCalibrator.from_predictions(y, x, sd(x))
    xt, yt = draw(8000)
    lo, hi = cal.interval(xt, sd(xt), 0.9)
    bands = np.digitize(xt, [0.5, 1.0, 1.5])
    rep = coverage_by_group(yt, lo, hi, bands)
    # each x band keeps nominal coverage: 4 bands of ~2,000 points, sd 0.007 each (plus 0.003 from the
    # calibration set); +-0.03 is > 3 sd
    assert rep["coverage"].iloc[1:].between(0.87, 0.93).all(), rep
    # the width is 2 q sd(x): its band means scale with the mean sd of the band, 0.175 in [0, 0.5)
    # and 0.925 in [1.5, 2) (analytic); the band means of x carry ~1 % sampling error, hence 5 %
    w = rep["mean_width"].to_numpy()[1:]
    assert w[-1] / w[0] == pytest.approx(0.925 / 0.175, rel=0.05)


def _cv_plus_bruteforce(mu_folds_test, folds, resid_abs, alpha):
    """Barber et al. 2021, eq. (6)-(7), written out literally with a loop."""
    n = len(resid_abs)
    lo, hi = [], []
    for row in mu_folds_test:
        lower_vals = sorted(row[folds[i]] - resid_abs[i] for i in range(n))
        upper_vals = sorted(row[folds[i]] + resid_abs[i] for i in range(n))
        k_lo = math.floor(alpha * (n + 1))
        k_hi = math.ceil((1 - alpha) * (n + 1))
        lo.append(lower_vals[k_lo - 1] if k_lo >= 1 else -math.inf)
        hi.append(upper_vals[k_hi - 1] if k_hi <= n else math.inf)
    return np.array(lo), np.array(hi)


def test_cv_plus_matches_formula_and_covers():
    from sklearn.linear_model import LinearRegression

    rng = np.random.default_rng(3)
    covered = []
    for trial in range(150):
        n, K = 30, 5
        X = rng.uniform(-1, 1, size=(n + 50, 1))
        y = 2 * X[:, 0] + rng.standard_t(4, size=n + 50)  # heavy-ish tails
        folds = np.arange(n) % K
        mu_test = np.empty((50, K))
        oof = np.empty(n)
        for k in range(K):
            m = LinearRegression().fit(X[:n][folds != k], y[:n][folds != k])
            oof[folds == k] = m.predict(X[:n][folds == k])
            mu_test[:, k] = m.predict(X[n:])
        cal = ConformalCalibrator.from_predictions(y[:n], oof, np.ones(n), folds=folds)
        lo, hi = cal.interval(mu_test, np.ones(50), 0.9)
        if trial < 3:
            blo, bhi = _cv_plus_bruteforce(mu_test, folds, np.abs(y[:n] - oof), 0.1)
            # same arithmetic in another order: float round-off only (common practice, no source)
            np.testing.assert_allclose(lo, blo, rtol=0, atol=1e-12)
            np.testing.assert_allclose(hi, bhi, rtol=0, atol=1e-12)
        covered.append(np.mean((y[n:] >= lo) & (y[n:] <= hi)))
    # guarantee >= 1 - 2 alpha = 0.8 (Barber et al. 2021, thm. 4); in practice ~ 1 - alpha (from memory
    # of the paper's simulations). 150 trials x 50 points: sd of the mean ~ 0.005, so 0.87 sits 6 sd
    # below 0.9
    assert np.mean(covered) >= 0.87


def test_exceedance_matches_known_distribution():
    rng = np.random.default_rng(4)
    r = rng.normal(size=5000)  # residuals of a perfectly specified model, sigma = 1
    cal = ConformalCalibrator(r)
    limits = np.array([-2.0, -1.0, 0.0, 0.5, 1.0, 2.0])
    p = cal.exceedance(np.zeros(6), np.ones(6), limits)
    # conformal predictive distribution -> P(N(0,1) > L) (Vovk et al. 2019); DKW bound at n = 5000,
    # 99.9 %: sqrt(ln(2/0.001)/(2*5000)) = 0.028
    np.testing.assert_allclose(p, stats.norm.sf(limits), atol=0.028)
    assert np.all(np.diff(p) <= 0)
    # conservative end: never below 1/(n+1), even far above every residual (Vovk et al. 2019, exact)
    assert cal.exceedance(np.zeros(1), np.ones(1), 100.0)[0] == pytest.approx(1 / 5001, rel=1e-12)
    # the fold (CV+) path gives the same numbers when every fold centre is equal (round-off only,
    # common practice, no source)
    cal2 = ConformalCalibrator(r, folds=np.arange(5000) % 4)
    p2 = cal2.exceedance(np.zeros((6, 4)), np.ones(6), limits)
    np.testing.assert_allclose(p2, p, atol=1e-12)
