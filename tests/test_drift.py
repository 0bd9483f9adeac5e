"""Drift detectors checked against published behaviour.

Page-Hinkley / CUSUM (Page 1954; Basseville and Nikiforov 1993, ch. 2 and 5): run lengths on
Gaussian streams, in control and after a known step, by simulation, against

(a) the Markov-chain run-length distribution of Brook and Evans (1972), "An approach to the
    probability distribution of CUSUM run length", Biometrika 59(3), 539-549,
    doi:10.1093/biomet/59.3.539, written out below independently of the project, for the
    two-sided scheme on the joint (up, down) state. Its grid error falls as 1/m^2 (m states per
    side); Richardson extrapolation from m = 30 and 40 leaves about 1e-4 of the ARL;
(b) the tabulated two-sided CUSUM ARLs for k = 0.5 (Montgomery, Introduction to Statistical
    Quality Control, CUSUM chapter; values quoted from memory: h = 4: 168 in control, 8.38 at a
    1-sigma shift; h = 5: 465 and 10.4), which the chain must reproduce to their last digit;
(c) Siegmund's approximation (Siegmund 1985, ch. X), the project's formula for its settings.

Simulated means are held to 4 standard errors of the simulation (normal-theory false-failure
rate 6e-5 per check; common practice, no source).

Feature drift: KS against its definition and scipy's exact two-sample test, BH against the
definition in Benjamini and Hochberg (1995), PSI on a hand-computed example.
"""
from __future__ import annotations

import functools

import numpy as np
import pandas as pd
import pytest
from scipy import sparse, stats
from scipy.sparse.linalg import spsolve

from waneguide.operations.drift import (
    PageHinkley,
    cusum_arl_siegmund,
    feature_drift,
    population_stability_index,
    two_sided_arl,
)

N_RUNS = 4000
K = 0.5
TABLE = {(4.0, 0.0): 168.0, (5.0, 0.0): 465.0, (4.0, 1.0): 8.38, (5.0, 1.0): 10.4}  # (b), from memory
SE4 = 4.0  # standard errors allowed to a simulated mean or share (module docstring)


@functools.lru_cache(maxsize=None)
def _chain(h: float, shift: float, m: int = 40):
    """Two-sided CUSUM on N(shift, 1) data as a Markov chain (Brook and Evans 1972).

    Each side's statistic sits on the grid i w, i = 0..m-1, w = 2h / (2m - 1); grid state i holds
    [(i - 1/2) w, (i + 1/2) w) (state 0 also the atom at 0) and values >= (m - 1/2) w = h alarm.
    Both sides move with the same x: up' = max(0, up + x - k), down' = max(0, down - x - k), so the
    x-line splits where either side changes state. Returns the sparse transition matrix among the
    m^2 non-alarm states (rows lose the alarm probability); state 0 is (0, 0).
    """
    w = 2.0 * h / (2 * m - 1)
    i, j = np.divmod(np.arange(m * m), m)
    levels = np.arange(1, m + 1)
    # x where the up side enters level l, and where the down side does
    cuts = np.sort(np.concatenate([(levels[None] - i[:, None] - 0.5) * w + K,
                                   (j[:, None] - levels[None] + 0.5) * w - K], axis=1), axis=1)
    cdf = stats.norm.cdf(cuts - shift)
    p = np.diff(np.pad(cdf, ((0, 0), (1, 1)), constant_values=(0.0, 1.0)), axis=1)
    x = np.concatenate([cuts[:, :1] - 1.0, (cuts[:, 1:] + cuts[:, :-1]) / 2, cuts[:, -1:] + 1.0], axis=1)
    up = np.clip(np.floor((i[:, None] * w + x - K) / w + 0.5), 0, m).astype(int)
    dn = np.clip(np.floor((j[:, None] * w - x - K) / w + 0.5), 0, m).astype(int)
    keep = (up < m) & (dn < m) & (p > 0)
    rows = np.broadcast_to(np.arange(m * m)[:, None], p.shape)[keep]
    return sparse.csr_matrix((p[keep], (rows, (up * m + dn)[keep])), shape=(m * m, m * m))


def _arls(h, shift, m=40):
    """Expected run length from every state: (I - R) v = 1."""
    r = _chain(h, shift, m)
    return spsolve((sparse.identity(r.shape[0], format="csc") - r).tocsc(), np.ones(r.shape[0]))


@functools.lru_cache(maxsize=None)
def chain_arl(h, shift):
    """Zero-state two-sided ARL, Richardson-extrapolated in 1/m^2 from m = 30 and 40."""
    a30, a40 = _arls(h, shift, 30)[0], _arls(h, shift, 40)[0]
    return (40**2 * a40 - 30**2 * a30) / (40**2 - 30**2)


def chain_state_after(h, n, m=40):
    """P(alarm within n in-control observations) and the state distribution given no alarm."""
    r_t = _chain(h, 0.0, m).T.tocsr()
    s = np.zeros(m * m)
    s[0] = 1.0
    for _ in range(n):
        s = r_t @ s
    return 1.0 - s.sum(), s / s.sum()


def one_sided_chain_arl(h, shift, m=200):
    """Zero-state ARL of the upper CUSUM alone, same discretisation on one side (Brook and Evans 1972)."""
    w = 2.0 * h / (2 * m - 1)
    d = np.arange(m)[None, :] - np.arange(m)[:, None]
    r = stats.norm.cdf((d + 0.5) * w + K - shift) - stats.norm.cdf((d - 0.5) * w + K - shift)
    r[:, 0] = stats.norm.cdf((0.5 - np.arange(m)) * w + K - shift)
    return np.linalg.solve(np.eye(m) - r, np.ones(m))[0]


def _run_lengths(detector, rng, *, shift=0.0, n=2500, runs=N_RUNS, chunk=1000):
    out = []
    for _ in range(runs // chunk):
        x = rng.standard_normal((chunk, n)) + shift
        out.append(detector.first_alarm(x) + 1)  # run length counts the alarming observation
    rl = np.concatenate(out)
    assert np.all(rl > 0), "some streams never alarmed: make them longer"
    return rl


def test_page_hinkley_equals_textbook_cusum_recursion():
    # U_n - min_j U_j (Page-Hinkley form) == max(0, g_{n-1} + x_n - delta) (CUSUM form), B&N 1993 sec. 2.2;
    # atol 1e-12 on sums of order 10: float rounding is ~1e-14 (common practice, no source)
    rng = np.random.default_rng(3)
    x = rng.normal(0.2, 1.0, 500)
    up, dn = PageHinkley(delta=0.5, lambda_=5).statistics(x)
    U = np.cumsum(x - 0.5)
    np.testing.assert_allclose(up, U - np.minimum(np.minimum.accumulate(U), 0.0), atol=1e-12)
    D = np.cumsum(-x - 0.5)
    np.testing.assert_allclose(dn, D - np.minimum(np.minimum.accumulate(D), 0.0), atol=1e-12)


@pytest.mark.parametrize("h, shift", sorted(TABLE))
def test_markov_chain_reproduces_the_table_and_the_two_sided_rule(h, shift):
    # the reference (a) against the quoted table (b): within half a unit of the table's last digit
    # (168 -> 0.5, 8.38 -> 0.005, 10.4 -> 0.05) plus 1e-3 of the value for the chain's residual grid error
    table = TABLE[(h, shift)]
    half_unit = {168.0: 0.5, 465.0: 0.5, 8.38: 0.005, 10.4: 0.05}[table]
    assert abs(chain_arl(h, shift) - table) <= half_unit + 1e-3 * table
    # the project's 1/ARL = 1/ARL+ + 1/ARL- (from memory in its docstring; approximate, since for h > 2k
    # both sides can be above zero at once) against the joint chain: rel 1e-3 (common practice, no source;
    # both chains carry ~1e-4 of grid error)
    one_up, one_dn = one_sided_chain_arl(h, shift), one_sided_chain_arl(h, -shift)
    assert two_sided_arl(one_up, one_dn) == pytest.approx(chain_arl(h, shift), rel=1e-3)


@pytest.mark.parametrize("h", [4.0, 5.0])
def test_in_control_arl_matches_markov_chain_and_siegmund(h):
    rng = np.random.default_rng(11)
    ref = chain_arl(h, 0.0)                       # 167.69 (h = 4), 465.47 (h = 5)
    rl = _run_lengths(PageHinkley(delta=0.5, lambda_=h), rng, n=int(ref * 14))  # P(no alarm) ~ e^-14
    se = rl.std(ddof=1) / np.sqrt(rl.size)        # run lengths are near geometric: se ~ 1.6 % of the mean
    assert abs(rl.mean() - ref) < SE4 * se
    # Siegmund's formula (project code) by hand, one side: (exp(2 k b) - 2 k b - 1) / (2 k^2), b = h + 1.166:
    # h = 4 -> (175.2126 - 6.166) / 0.5 = 338.093; h = 5 -> 938.222 (abs 1e-3: the quoted decimals)
    one = cusum_arl_siegmund(0.5, h)
    assert one == pytest.approx({4.0: 338.093, 5.0: 938.222}[h], abs=1e-3)
    # as an approximation it is 0.8 % above the chain here (169.05 vs 167.69, 469.11 vs 465.47); 2 % is
    # the margin allowed to it (common practice, no source)
    assert two_sided_arl(one, one) == pytest.approx(ref, rel=0.02)
    # the share of streams alarming within 100 observations, from the chain's run-length distribution
    # (not the geometric law, which is 0.005-0.01 off for a zero-state start): 4 binomial standard
    # errors, plus 1e-3 for the chain's grid error at m = 40 (5e-4 at h = 4, 8e-4 at h = 5)
    p100, _ = chain_state_after(h, 100)
    share = np.mean(rl <= 100)
    assert abs(share - p100) < SE4 * np.sqrt(p100 * (1 - p100) / rl.size) + 1e-3


@pytest.mark.parametrize("h", [4.0, 5.0])
def test_detection_delay_for_one_sigma_step(h):
    rng = np.random.default_rng(12)
    ph = PageHinkley(delta=0.5, lambda_=h)
    # zero-state: the step is there from the start (the tabulated ARL; chain 8.383 and 10.376)
    ref = chain_arl(h, 1.0)
    rl = _run_lengths(ph, rng, shift=1.0, n=200)
    se = rl.std(ddof=1) / np.sqrt(rl.size)        # delay sd ~0.4 x mean at this shift: se ~0.06
    assert abs(rl.mean() - ref) < SE4 * se
    # Siegmund by hand (d = 0.5, b = h + 1.166): 8.343 and 10.336, 0.5 % and 0.4 % below the chain;
    # the 2 % margin as above
    assert cusum_arl_siegmund(0.5, h, 1.0) == pytest.approx({4.0: 8.343, 5.0: 10.336}[h], abs=1e-3)
    assert cusum_arl_siegmund(0.5, h, 1.0) == pytest.approx(ref, rel=0.02)

    # step after tau = 150 in-control observations; delay among streams with no false alarm before it.
    # Chain: the state distribution after 150 in-control steps given no alarm, then the expected run
    # length from each state under the shift.
    tau = 150
    x = rng.standard_normal((N_RUNS, tau + 200))
    x[:, tau:] += 1.0
    first = ph.first_alarm(x)
    ok = first >= tau
    delay = first[ok] - tau + 1
    p_false, state = chain_state_after(h, tau)
    cond = float(state @ _arls(h, 1.0))           # 7.71 (h = 4), 9.65 (h = 5)
    # CUSUM's worst-case conditional delay is the zero-state one (Lorden 1971; B&N 1993 sec. 5.2)
    assert cond < ref
    assert abs(delay.mean() - cond) < SE4 * delay.std(ddof=1) / np.sqrt(delay.size)
    # the fraction alarming before the step is P(RL <= tau) in control (0.592 and 0.270 from the chain):
    # 4 binomial standard errors plus 1e-3 for the chain's grid error
    assert abs(np.mean(~ok) - p_false) < SE4 * np.sqrt(p_false * (1 - p_false) / N_RUNS) + 1e-3


def test_downward_step_and_change_point_estimate():
    rng = np.random.default_rng(1)
    x = np.r_[rng.normal(0, 1, 300), rng.normal(-2.0, 1, 60)]
    res = PageHinkley(delta=0.5, lambda_=5).run(x)
    # seeded: this stream has no false alarm in its first 300 points (for a random seed the chance of
    # one is 1 - exp(-300 / 465) = 0.48, chain ARL above)
    assert res.direction == "down"
    # 2-sigma step: Siegmund ARL is (exp(-2*1.5*6.166) + 2*1.5*6.166 - 1)/(2*1.5^2) ~ 3.9. The down
    # statistic gains 1.5 +- 1 per point, so after 13 points it sits near 19.5 +- 3.6 and has missed
    # 5 with probability below Phi(-4) = 3e-5: the bound 300 + 12
    assert 300 <= res.alarm_index <= 300 + 12
    # Page's change-point estimate (the last zero of the alarming side) within 5 points: common practice,
    # no source (the in-control statistic returns to zero every few points)
    assert abs(res.change_index - 300) <= 5


def test_one_sided_ignores_decrease():
    x = np.r_[np.zeros(20), -3 * np.ones(20)]
    # up side: increments -0.5 then -3.5, it never leaves zero
    assert PageHinkley(delta=0.5, lambda_=5, two_sided=False).run(x).alarm is False
    # down side by hand: 0 for the first 20 points, then 2.5 at index 20 and 5.0 >= lambda at index 21;
    # its last zero is at index 19, so the change is put at index 20
    res = PageHinkley(delta=0.5, lambda_=5).run(x)
    assert (res.alarm, res.direction, res.alarm_index, res.change_index) == (True, "down", 21, 20)
    np.testing.assert_array_equal(res.statistic_down[19:23], [0.0, 2.5, 5.0, 7.5])


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
    # rel 1e-9: the same ten terms summed in another order (common practice, no source)
    assert psi == pytest.approx(expected, rel=1e-9)
    # by hand: recent shares 0.5 in the first bin, then 6, 5, 6, 5, 6, 5, 6, 5, 6 of the 50 spread values:
    # 0.4 ln 5 + 5 (0.06 - 0.1) ln 0.6 + 4 (0.05 - 0.1) ln 0.5 = 0.643775 + 0.102165 + 0.138629 = 0.884570
    assert psi == pytest.approx(0.884570, abs=1e-6)   # 6 quoted decimals
    assert population_stability_index(ref, ref) == pytest.approx(0.0, abs=1e-12)   # p = q term by term


def test_feature_drift_ks_and_bh():
    rng = np.random.default_rng(5)
    ref = pd.DataFrame({f"f{i}": rng.normal(0, 1, 400) for i in range(6)})
    new = pd.DataFrame({f"f{i}": rng.normal(0, 1, 120) for i in range(6)})
    new["f0"] += 1.0        # a real shift
    new["f1"] *= 1.8        # a spread change
    table = feature_drift(ref, new, alpha=0.05).set_index("feature")
    for c in ref:
        # KS statistic by its definition, sup |F_ref - F_new| over the pooled sample (Kolmogorov 1933,
        # Smirnov 1939): a difference of two fractions k/400 - l/120, exact to float rounding (abs 1e-12)
        grid = np.sort(np.r_[ref[c], new[c]])
        f_ref = np.searchsorted(np.sort(ref[c]), grid, side="right") / len(ref)
        f_new = np.searchsorted(np.sort(new[c]), grid, side="right") / len(new)
        assert table.loc[c, "ks_statistic"] == pytest.approx(np.max(np.abs(f_ref - f_new)), abs=1e-12)
        # its p-value is scipy's exact two-sample distribution; rel 1e-12: the same call, so a plumbing check
        ks = stats.ks_2samp(ref[c], new[c])
        assert table.loc[c, "p_value"] == pytest.approx(ks.pvalue, rel=1e-12)
    # BH adjusted p-values by the definition: q_(i) = min_{j>=i} m p_(j) / j (Benjamini and Hochberg 1995)
    p = table["p_value"].to_numpy()
    order = np.argsort(p)
    m = p.size
    q_def = np.minimum.accumulate((m * p[order] / np.arange(1, m + 1))[::-1])[::-1]
    # rtol 1e-12: the same products and minima in another order (common practice, no source)
    np.testing.assert_allclose(table["q_value"].to_numpy()[order], np.minimum(q_def, 1.0), rtol=1e-12)
    assert table.loc["f0", "drifted"] and table.loc["f1", "drifted"]
    # population PSI of a 1-sigma mean shift over the reference deciles, from the normal CDF: 0.926. With
    # 120 against 400 points sampling noise scatters it by ~0.35 and only adds to it on average (PSI is a
    # divergence), so the 0.25 "major" edge lies two spreads below the population value
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
    # Under the global null BH's FDR is the chance of any discovery, <= 5 % (Benjamini and Hochberg 1995,
    # theorem 1), so hits is at most binomial(40, 0.05): P(X >= 6) = 1.4 % (scipy.stats.binom.sf(5, 40,
    # 0.05)) for a seed drawn at random
    assert hits <= 5
