"""Conformal intervals against their finite-sample theory.

Sources: Vovk, Gammerman & Shafer 2005 (split/inductive conformal, rank k = ceil((n+1)(1-alpha)));
Lei et al. 2018, doi:10.1080/01621459.2017.1307116 (coverage in [1-alpha, 1-alpha+1/(n+1)]);
Romano, Patterson & Candes 2019 (CQR); Barber, Candes, Ramdas & Tibshirani 2021,
doi:10.1214/20-AOS1965 (CV+/jackknife+ formula and the 1-2alpha guarantee).
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from waneguide.models.conformal import (
    ConformalCalibrator,
    CQRRegressor,
    NormalisedConformalRegressor,
    conformal_quantile,
    conformal_rank,
    coverage_by_group,
)
from waneguide.models.gbm import MonotoneGBMRegressor


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


def test_split_conformal_coverage_large_synthetic():
    """Coverage within +-2 points of nominal on 20,000 test points (Lei et al. 2018, thm. 2.2).

    With n_cal = 2,500 the coverage given the calibration set fluctuates with sd
    sqrt(0.09/2500) = 0.006 and the test estimate with sd 0.002: +-2 points is > 3 sd.
    """
    rng = np.random.default_rng(0)
    X, y = _homoscedastic(10_000, rng)
    model = NormalisedConformalRegressor(
        MonotoneGBMRegressor(n_estimators=150, random_state=0),
        MonotoneGBMRegressor(n_estimators=50, num_leaves=7, monotone_rules=(), random_state=0),
        coverage=0.9, random_state=0,
    ).fit(X, y)
    Xt, yt = _homoscedastic(20_000, rng)
    lo, hi = model.predict_interval(Xt)
    cov = np.mean((yt >= lo) & (yt <= hi))
    assert abs(cov - 0.9) <= 0.02
    # oracle 90 % band for N(0, 0.5^2) noise is 2 * 1.645 * 0.5 = 1.645 wide; model error and the
    # scale model's own noise widen it a little (within 20 %, a judgement, not a theorem)
    assert np.mean(hi - lo) == pytest.approx(2 * stats.norm.ppf(0.95) * 0.5, rel=0.2)


def test_normalised_band_follows_heteroscedastic_noise():
    rng = np.random.default_rng(1)

    def draw(n):
        X = rng.uniform(0, 2, size=(n, 1))
        return X, X[:, 0] + (0.05 + 0.5 * X[:, 0]) * rng.normal(size=n)

    X, y = draw(8000)
    model = NormalisedConformalRegressor(coverage=0.9, random_state=1).fit(X, y)
    Xt, yt = draw(8000)
    lo, hi = model.predict_interval(Xt)
    bands = np.digitize(Xt[:, 0], [0.5, 1.0, 1.5])
    rep = coverage_by_group(yt, lo, hi, bands)
    # locally weighted conformal keeps each x band near nominal (Lei et al. 2018, sec. 5.2);
    # 4 bands of ~2,000 points: sd 0.007, tolerance 0.05 allows the scale model's error
    assert rep["coverage"].iloc[1:].between(0.85, 0.95).all(), rep
    w = rep["mean_width"].to_numpy()[1:]
    assert w[-1] > 4 * w[0]  # width grows with the noise sd (0.05 + 0.5 x: ~ 8x across the range)


def test_cqr_coverage_and_no_crossing():
    rng = np.random.default_rng(2)
    X, y = _homoscedastic(8000, rng)
    model = CQRRegressor(coverage=0.9, n_estimators=150, random_state=0).fit(X, y)
    Xt, yt = _homoscedastic(20_000, rng)
    lo, hi = model.predict_interval(Xt)
    med = model.predict(Xt)
    assert np.all(lo <= med) and np.all(med <= hi)
    # Romano et al. 2019, thm. 1: same finite-sample guarantee as split conformal
    assert abs(np.mean((yt >= lo) & (yt <= hi)) - 0.9) <= 0.02


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
            np.testing.assert_allclose(lo, blo, rtol=0, atol=1e-12)
            np.testing.assert_allclose(hi, bhi, rtol=0, atol=1e-12)
        covered.append(np.mean((y[n:] >= lo) & (y[n:] <= hi)))
    # guarantee >= 1 - 2 alpha = 0.8 (Barber et al. 2021, thm. 4); in practice ~ 1 - alpha.
    # 150 trials x 50 points: sd of the mean ~ 0.005
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
    # conservative end: never below 1/(n+1), even far above every residual
    assert cal.exceedance(np.zeros(1), np.ones(1), 100.0)[0] == pytest.approx(1 / 5001)
    # the fold (CV+) path gives the same numbers when every fold centre is equal
    cal2 = ConformalCalibrator(r, folds=np.arange(5000) % 4)
    p2 = cal2.exceedance(np.zeros((6, 4)), np.ones(6), limits)
    np.testing.assert_allclose(p2, p, atol=1e-12)
