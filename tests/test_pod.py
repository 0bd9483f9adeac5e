"""a-hat versus a POD (MIL-HDBK-1823A, 2009): parameters recovered from synthetic data of known truth.

The handbook's worked examples are not at hand here, so (as issue 14 allows) the check recovers
b0, b1, tau of data generated from the handbook's own model, with censoring at a noise floor and
at saturation, within their stated confidence bounds at the stated rate.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from waneguide.core.errors import InputError
from waneguide.models.pod import Z90, decision_threshold, fit_ahat_vs_a

B0, B1, TAU = 0.3, 1.05, 0.35
FLOOR, SAT, DEC = 1.0, 60.0, 2.0  # % of nominal


def _data(n, seed):
    rng = np.random.default_rng(seed)
    a = np.exp(rng.uniform(np.log(0.5), np.log(40.0), n))
    y = B0 + B1 * np.log(a) + rng.normal(0, TAU, n)
    a_hat = np.clip(np.exp(y), FLOOR, SAT)  # the estimator reads the floor / saturates
    return a, a_hat


def _truth_a90():
    mu, sigma = (math.log(DEC) - B0) / B1, TAU / B1
    return math.exp(mu + Z90 * sigma)


def test_parameters_are_recovered_within_their_confidence_bounds():
    fit = fit_ahat_vs_a(*_data(2000, 1), a_hat_dec=DEC, a_hat_floor=FLOOR, a_hat_saturation=SAT)
    se = np.sqrt(np.diag(fit.cov))
    # maximum likelihood is consistent: with n = 2000 the estimates lie within 4 standard errors
    # (normal approximation; a 4-sigma miss has probability 6e-5)
    for est, true, s in zip((fit.b0, fit.b1, fit.tau), (B0, B1, TAU), se):
        assert abs(est - true) < 4 * s, (est, true, s)
    assert fit.n_left > 0 and fit.n_right > 0  # both kinds of censoring were exercised
    assert fit.a90 == pytest.approx(_truth_a90(), rel=0.1)


def test_wald_bound_covers_the_true_a90_at_about_its_rate():
    # one-sided 95 % bound: over 120 independent data sets it should lie above the true a90 in about
    # 95 % of them; binomial(120, 0.95) puts fewer than 104 successes at probability < 0.1 %
    truth = _truth_a90()
    hits = sum(fit_ahat_vs_a(*_data(150, s), a_hat_dec=DEC, a_hat_floor=FLOOR, a_hat_saturation=SAT,
                             lr_bound=False).a90_95_wald
               >= truth for s in range(120))
    assert hits >= 104, hits
    assert stats.binomtest(hits, 120, 0.95).pvalue > 1e-3


def test_bounds_lie_above_a90_and_shrink_with_more_cases():
    small = fit_ahat_vs_a(*_data(80, 7), a_hat_dec=DEC, a_hat_floor=FLOOR, a_hat_saturation=SAT)
    large = fit_ahat_vs_a(*_data(2000, 7), a_hat_dec=DEC, a_hat_floor=FLOOR, a_hat_saturation=SAT)
    for f in (small, large):
        assert f.a90 < f.a90_95_wald and f.a90 < f.a90_95_lr
    # the bound's distance above a90 scales like 1/sqrt(n) (asymptotic normality): 25x the cases
    # should shrink it several-fold; require at least 2.5x
    assert (small.a90_95_wald / small.a90) > (large.a90_95_wald / large.a90) ** 2.5
    # Wald and likelihood-ratio bounds agree for a large sample (both asymptotically exact)
    assert large.a90_95_lr == pytest.approx(large.a90_95_wald, rel=0.03)


def test_pod_curve_and_decision_threshold():
    fit = fit_ahat_vs_a(*_data(500, 3), a_hat_dec=DEC, a_hat_floor=FLOOR, a_hat_saturation=SAT)
    assert fit.pod(fit.a90) == pytest.approx(0.90, abs=1e-9)  # by definition of a90
    p = fit.pod(np.linspace(0.5, 40, 50))
    assert np.all(np.diff(p) >= 0) and p[0] < 0.01 and p[-1] > 0.999  # a CDF in g(a): monotone, 0 to 1
    # decision threshold: the (1 - rate) quantile of sound-metal estimates
    sound = np.arange(1, 201, dtype=float)  # 200 sound cases reading 1..200
    assert decision_threshold(sound, 0.01) == 199.0
    with pytest.raises(InputError, match="needs at least 100 sound-metal cases"):
        decision_threshold(sound[:50], 0.01)
