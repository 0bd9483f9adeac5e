"""Drift detectors checked against published behaviour.

Page-Hinkley / CUSUM (Page 1954; Basseville and Nikiforov 1993, ch. 2 and 5): average run
lengths (ARL) on Gaussian streams, in control and after a known step, by simulation,
against (a) Siegmund's approximation (Siegmund 1985) and (b) the tabulated two-sided
CUSUM ARLs for k = 0.5 (Montgomery, Introduction to Statistical Quality Control, CUSUM
chapter; values quoted from memory: h = 4: 168 in control, 8.38 at a 1-sigma shift;
h = 5: 465 and 10.4).

Feature drift: KS against scipy's exact two-sample test, BH against the definition in
Benjamini and Hochberg (1995), PSI on a hand-computed example.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from waneguide.operations.drift import (
    PageHinkley,
    cusum_arl_siegmund,
    feature_drift,
    population_stability_index,
    two_sided_arl,
)

N_RUNS = 4000


def _run_lengths(detector, rng, *, shift=0.0, n=2500, runs=N_RUNS, chunk=1000):
    out = []
    for _ in range(runs // chunk):
        x = rng.standard_normal((chunk, n)) + shift
        out.append(detector.first_alarm(x) + 1)  # run length counts the alarming observation
    rl = np.concatenate(out)
    assert np.all(rl > 0), "some streams never alarmed: make them longer"
    return rl


def test_page_hinkley_equals_textbook_cusum_recursion():
    # U_n - min_j U_j (Page-Hinkley form) == max(0, g_{n-1} + x_n - delta) (CUSUM form), B&N 1993 sec. 2.2
    rng = np.random.default_rng(3)
    x = rng.normal(0.2, 1.0, 500)
    up, dn = PageHinkley(delta=0.5, lambda_=5).statistics(x)
    U = np.cumsum(x - 0.5)
    np.testing.assert_allclose(up, U - np.minimum(np.minimum.accumulate(U), 0.0), atol=1e-12)
    D = np.cumsum(-x - 0.5)
    np.testing.assert_allclose(dn, D - np.minimum(np.minimum.accumulate(D), 0.0), atol=1e-12)


@pytest.mark.parametrize("h, table_arl0", [(4.0, 168.0), (5.0, 465.0)])
def test_in_control_arl_matches_table_and_siegmund(h, table_arl0):
    rng = np.random.default_rng(11)
    rl = _run_lengths(PageHinkley(delta=0.5, lambda_=h), rng, n=int(table_arl0 * 14))
    one = cusum_arl_siegmund(0.5, h)
    siegmund = two_sided_arl(one, one)
    # Run lengths are close to geometric (sd ~ mean): 4000 runs give a standard error of
    # ~1.6 % of the mean; 6 % is ~4 standard errors plus the table's rounding.
    se = rl.std(ddof=1) / np.sqrt(rl.size)
    assert abs(rl.mean() - table_arl0) < max(0.06 * table_arl0, 4 * se)
    # Siegmund's approximation is within ~2 % of exact ARLs at these settings (Siegmund 1985, table)
    assert siegmund == pytest.approx(table_arl0, rel=0.03)
    # false-alarm rate per observation is 1/ARL0: in 100 observations about 100/ARL0 streams alarm
    p100 = np.mean(rl <= 100)
    assert p100 == pytest.approx(1 - (1 - 1 / table_arl0) ** 100, abs=0.035)


@pytest.mark.parametrize("h, table_arl1", [(4.0, 8.38), (5.0, 10.4)])
def test_detection_delay_for_one_sigma_step(h, table_arl1):
    rng = np.random.default_rng(12)
    ph = PageHinkley(delta=0.5, lambda_=h)
    # zero-state: the step is there from the start (the tabulated ARL)
    rl = _run_lengths(ph, rng, shift=1.0, n=200)
    se = rl.std(ddof=1) / np.sqrt(rl.size)
    # delay sd is ~0.4 x mean at this shift: se ~0.06; 4 % covers 4 se and table rounding
    assert rl.mean() == pytest.approx(table_arl1, abs=max(0.04 * table_arl1, 4 * se))
    assert rl.mean() == pytest.approx(cusum_arl_siegmund(0.5, h, 1.0), rel=0.05)

    # step after 150 in-control observations; delay among streams with no false alarm before it
    tau = 150
    x = rng.standard_normal((N_RUNS, tau + 200))
    x[:, tau:] += 1.0
    first = ph.first_alarm(x)
    ok = first >= tau
    delay = first[ok] - tau + 1
    # CUSUM's worst-case conditional delay is the zero-state one (Lorden 1971; B&N 1993 sec. 5.2):
    # from a non-zero state it is shorter, but not by more than the head start is worth (~2 obs here)
    assert delay.mean() <= table_arl1 * 1.04
    assert delay.mean() >= table_arl1 - 3.0
    # the fraction alarming before the step is the false-alarm probability over tau observations
    assert np.mean(~ok) == pytest.approx(1 - np.exp(-tau / (168.0 if h == 4 else 465.0)), abs=0.04)


def test_downward_step_and_change_point_estimate():
    rng = np.random.default_rng(1)
    x = np.r_[rng.normal(0, 1, 300), rng.normal(-2.0, 1, 60)]
    res = PageHinkley(delta=0.5, lambda_=5).run(x)
    assert res.direction == "down"
    # 2-sigma step: Siegmund ARL is (exp(-2*1.5*6.166) + 2*1.5*6.166 - 1)/(2*1.5^2) ~ 3.9
    assert 300 <= res.alarm_index <= 300 + 12
    assert abs(res.change_index - 300) <= 5


def test_one_sided_ignores_decrease():
    x = np.r_[np.zeros(20), -3 * np.ones(20)]
    assert PageHinkley(delta=0.5, lambda_=5, two_sided=False).run(x).alarm is False
    assert PageHinkley(delta=0.5, lambda_=5).run(x).alarm is True


def test_bad_settings_are_refused():
    with pytest.raises(ValueError, match="lambda_ must be a positive"):
        PageHinkley(lambda_=0).run(np.zeros(3))
    with pytest.raises(ValueError, match="NaN or inf"):
        PageHinkley().run(np.array([0.0, np.nan]))


def test_psi_hand_example():
    # reference uniform over 10 quantile bins; recent: half of the values in the lowest bin
    ref = np.arange(1000) / 1000.0
    new = np.r_[np.full(50, 0.05), np.linspace(0.1, 0.999, 50)]
    psi = population_stability_index(ref, new, bins=10)
    q = np.full(10, 0.1)
    p = np.histogram(new, bins=np.linspace(0, 1, 11))[0] / new.size
    expected = np.sum((p - q) * np.log(p / q))  # definition (Yurdakul 2018)
    assert psi == pytest.approx(expected, rel=1e-9)
    assert population_stability_index(ref, ref) == pytest.approx(0.0, abs=1e-12)


def test_feature_drift_ks_and_bh():
    rng = np.random.default_rng(5)
    ref = pd.DataFrame({f"f{i}": rng.normal(0, 1, 400) for i in range(6)})
    new = pd.DataFrame({f"f{i}": rng.normal(0, 1, 120) for i in range(6)})
    new["f0"] += 1.0        # a real shift
    new["f1"] *= 1.8        # a spread change
    table = feature_drift(ref, new, alpha=0.05).set_index("feature")
    for c in ref:
        ks = stats.ks_2samp(ref[c], new[c])
        assert table.loc[c, "p_value"] == pytest.approx(ks.pvalue, rel=1e-12)
    # BH adjusted p-values by the definition: q_(i) = min_{j>=i} m p_(j) / j (Benjamini and Hochberg 1995)
    p = table["p_value"].to_numpy()
    order = np.argsort(p)
    m = p.size
    q_def = np.minimum.accumulate((m * p[order] / np.arange(1, m + 1))[::-1])[::-1]
    np.testing.assert_allclose(table["q_value"].to_numpy()[order], np.minimum(q_def, 1.0), rtol=1e-12)
    assert table.loc["f0", "drifted"] and table.loc["f1", "drifted"]
    assert table.loc["f0", "psi_band"] == "major"
    assert not table.loc[["f2", "f3", "f4", "f5"], "drifted"].any()


def test_feature_drift_false_discoveries_are_controlled():
    # 40 features, no drift at all: with BH at 5 % the chance of any discovery is <= 5 %
    rng = np.random.default_rng(9)
    hits = 0
    for _ in range(40):
        ref = pd.DataFrame(rng.normal(size=(200, 40)), columns=[f"f{i}" for i in range(40)])
        new = pd.DataFrame(rng.normal(size=(60, 40)), columns=ref.columns)
        hits += feature_drift(ref, new, alpha=0.05)["drifted"].any()
    # binomial(40, 0.05): P(X >= 6) ~ 1.4 %
    assert hits <= 5
