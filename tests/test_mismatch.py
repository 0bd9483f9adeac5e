"""Mismatch detector: exact IsolationForest scores, stated false-alarm rate, physics reasons.

References: scikit-learn's IsolationForest.score_samples (the packed traversal must reproduce it);
Vovk et al. 2005 / Laxhammar & Falkman 2015 (a conformal p-value is super-uniform on exchangeable
in-family data, so P(p <= eps) <= eps); Graff 1975 sec. 8.1 (S0 at low frequency-thickness travels at
the plate velocity sqrt(E / (rho (1 - nu^2)))).
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import roc_auc_score

from waneguide.models.mismatch import (
    MismatchDetector,
    PhysicsChecker,
    _forest_score,
    combine_mismatch,
    degenerate_features,
    feature_resolution,
    has_negative_loss,
)


@pytest.fixture(scope="module")
def detector():
    rng = np.random.default_rng(0)
    cov = np.array([[1.0, 0.8, 0.0], [0.8, 1.0, 0.3], [0.0, 0.3, 1.0]])
    X = rng.multivariate_normal(np.zeros(3), cov, size=4000)
    return MismatchDetector(false_alarm_rate=0.05, n_estimators=100, random_state=0).fit(X), cov


def test_packed_forest_reproduces_sklearn(detector):
    det, _ = detector
    rng = np.random.default_rng(1)
    Z = det._standardise(rng.normal(size=(2000, 3)) * 2.0)
    # the same sums in another order: float round-off only (common practice, no source)
    np.testing.assert_allclose(_forest_score(det.forest_, Z), -det.iforest_.score_samples(Z), rtol=0, atol=1e-12)


def test_false_alarm_rate_holds_in_family(detector):
    det, cov = detector
    rng = np.random.default_rng(2)
    X = rng.multivariate_normal(np.zeros(3), cov, size=20_000)
    rate = np.mean(det.predict(X) == -1)
    # P(p <= 0.05) <= 0.05 + 1/(n_cal+1) given exchangeability; n_cal = 1,200 leaves a calibration
    # sd of sqrt(0.05*0.95/1200) = 0.006, so 0.05 +- 0.02 is > 3 sd
    assert abs(rate - 0.05) <= 0.02


def test_correlation_break_is_detected(detector):
    det, cov = detector
    rng = np.random.default_rng(3)
    inn = rng.multivariate_normal(np.zeros(3), cov, size=2000)
    # same marginals, broken correlation: only a covariance-aware score (MCD) sees it
    out = rng.normal(size=(2000, 3))
    out[:, 1] = -0.8 * out[:, 0] + 0.6 * out[:, 1]
    y = np.r_[np.zeros(2000), np.ones(2000)]
    auroc = roc_auc_score(y, -np.r_[det.p_value(inn), det.p_value(out)])
    marginal = roc_auc_score(y, np.r_[np.sum(inn**2, axis=1), np.sum(out**2, axis=1)])
    # many broken-correlation points still sit near the centre, so perfect separation is impossible;
    # a marginal-only score is at chance (AUROC sd 0.009 for 2,000 + 2,000 points, Hanley & McNeil
    # 1982: 0.56 is > 6 sd), the detector well above it (0.7: a regression value of this code)
    assert marginal < 0.56
    assert auroc > 0.7


def _in_family_table(family, n, rng, *, s0_noise_s=5e-8, gauge_sd=0.006):
    """Synthetic in-family baselines: Rayleigh-Lamb S0 delay at each temperature plus the extractor's
    offset and noise, the A0 gauge with its small bias, the excitation and the sample rate."""
    from waneguide.features.temperature import ThermalModel

    temps = rng.uniform(-10, 50, n)
    t_s0 = ThermalModel(family).arrival_time_s("S0", temps)
    return pd.DataFrame({
        "path_id": [f"P{i}" for i in range(n)],
        "baseline_temperature_c": temps,
        "baseline_s0_arrival_s": t_s0 + 22e-6 + s0_noise_s * rng.normal(size=n),
        "baseline_a0_thickness_ratio": 1.01 + gauge_sd * rng.normal(size=n),
        "capture_peak_frequency_hz": 150e3 * (1 + 0.02 * rng.normal(size=n)),
        "sample_rate_hz": np.full(n, 10e6)})


def _probe(family, rows):
    """Probe baselines: (path, recorded temperature, true plate temperature, S0 delay factor, gauge)."""
    from waneguide.features.temperature import ThermalModel

    th = ThermalModel(family)
    return pd.DataFrame({
        "path_id": [r[0] for r in rows],
        "baseline_temperature_c": [r[1] for r in rows],
        "baseline_s0_arrival_s": [float(th.arrival_time_s("S0", r[2])) * r[3] + 22e-6 for r in rows],
        "baseline_a0_thickness_ratio": [r[4] for r in rows],
        "capture_peak_frequency_hz": [150e3] * len(rows), "sample_rate_hz": [10e6] * len(rows)})


def test_physics_reasons(family_fb2):
    chk = PhysicsChecker(family_fb2)
    mat = family_fb2.build_material()
    # Graff 1975 sec. 8.1: S0 at fd -> 0 travels at the plate velocity; at 150 kHz x 2 mm
    # (fd = 0.3 MHz mm) the dispersion correction is below 1 %
    t_plate = family_fb2.path_length_m / mat.plate_velocity_m_s
    assert chk.expected_s0_arrival_s() == pytest.approx(t_plate, rel=0.01)
    chk.fit(_in_family_table(family_fb2, 300, np.random.default_rng(4)))
    probe = _probe(family_fb2, [("A", 20.0, 20.0, 1.0, 1.01), ("B", 20.0, 20.0, 1.03, 1.01),
                                ("C", 20.0, 20.0, 1.0, 1.01), ("D", 20.0, 20.0, 1.0, 1.01)])
    probe.loc[2, "capture_peak_frequency_hz"] = 260e3
    probe.loc[3, "sample_rate_hz"] = 25e6
    reasons = chk.reasons(probe)
    assert reasons[0] == []
    # 3 % later S0: 2.9 % slower, beyond what 40 K of the environment range explain (0.94 %)
    assert len(reasons[1]) == 1 and "baseline S0 is 2.9 % slower" in reasons[1][0]
    assert "300 mm path" in reasons[1][0] and "at any temperature of -20 to 60 degC" in reasons[1][0]
    assert "check the alloy" in reasons[1][0] and "no wall loss slows S0" in reasons[1][0]
    assert any("peak frequency 260.0 kHz" in r for r in reasons[2])
    assert any("sample rate 25 MHz differs from the family's 10 MHz" in r for r in reasons[3])


def test_physics_plate_check_compensates_temperature_and_pools_a_path(family_fb2):
    rng = np.random.default_rng(6)
    chk = PhysicsChecker(family_fb2).fit(_in_family_table(family_fb2, 400, rng, s0_noise_s=1e-8))
    k = chk.state["s0_coefficient_per_k"]
    # -(alpha + E'/E) / 2 of the low-frequency S0 (features.temperature): about +2.3e-4 / K for aluminium
    assert k == pytest.approx(2.36e-4, rel=0.05)
    rows = [("hot", 45.0, 45.0, 1.0, 1.01),              # a hot baseline read at its own temperature
            ("misread", 20.0, 45.0, 1.0, 1.01),          # the same record, thermometer saying 20 degC
            ("unknown", np.nan, 50.0, 1.0, 1.01),        # no temperature: any of the environment range
            ("thick", 20.0, 20.0, 1.0, 1.01 * 1.15)]     # 15 % thicker flange, S0 on time
    # four baselines of one path 0.355 % slow: 0.04 % beyond the 0.314 % box, 2.4 in-family sd (1e-8 s
    # on 55 us) each, under the 3.26 threshold (chi-square, 2 dof, 0.005); their mean is 4.8 sd out
    rows += [("P", t, t, 1.00355, 1.01) for t in (0.0, 10.0, 30.0, 40.0)]
    probe = _probe(family_fb2, rows)
    r = chk.reasons(probe)
    assert r[0] == [] and r[2] == []
    # 25 K x 2.36e-4 / K = 0.59 %, beyond the 0.31 % tolerance box plus the scatter: read as slower
    assert any("at the recorded 20.0 degC (a plate at 45 degC would fit: check the temperature reading)" in m
               for m in r[1])
    assert any("thickness gauge reads 2.30 mm" in m and "no wall loss makes a plate read thicker" in m for m in r[3])
    assert all(any("mean over the 4 baselines of path P" in m for m in r[i]) for i in range(4, 8))
    single = chk.reasons(probe.iloc[4:5])
    assert single == [[]]


def test_physics_state_round_trip_and_old_parameters(family_fb2):
    chk = PhysicsChecker(family_fb2).fit(_in_family_table(family_fb2, 200, np.random.default_rng(7)))
    probe = _probe(family_fb2, [("a", 20.0, 20.0, 1.02, 1.01), ("b", 20.0, 20.0, 1.0, 1.2)])
    # a bundle of an older version stored parameters this one no longer has: ignored, not an error
    again = PhysicsChecker.from_state(family_fb2, chk.state, arrival_rel_tol=0.0075, **chk.params())
    assert again.reasons(probe) == chk.reasons(probe) and all(again.reasons(probe))


def test_negative_apparent_loss_needs_agreeing_evidence(family_fb2):
    rng = np.random.default_rng(8)
    n = 600
    loss = np.where(rng.random(n) < 0.2, 0.0, rng.uniform(0, 30, n))
    tab = pd.DataFrame({  # in family: loss moves the compensated A0 packet later and refocuses it thinner
        "a0_comp_position_shift_m": 4e-4 * loss + 1e-3 * rng.normal(size=n),
        "a0_sharpest_thickness_ratio": 1.0 - 0.01 * loss + 0.01 * rng.normal(size=n)})
    chk = PhysicsChecker(family_fb2).fit(tab, targets=pd.DataFrame({"max_loss_pct": loss}))
    assert chk.state["negative_loss"]["threshold"] >= 3.0  # never below negative_loss_z robust sd
    probe = pd.DataFrame({"a0_comp_position_shift_m": [-8e-3, -8e-3, 0.0],
                          "a0_sharpest_thickness_ratio": [1.10, 1.0, 1.10]})
    a = chk.assess(probe)
    # only the row where both say "thicker than its baseline" (8 sd and 10 sd) is flagged
    assert a["negative_loss"].tolist() == [True, False, False]
    centre = chk.state["negative_loss"]["centre"][1]  # pristine sharpest-thickness ratio, about 1
    assert a["reasons"][0][0].startswith(f"negative apparent loss: the capture reads {100 * (1.10 / centre - 1):.1f} "
                                         "% thicker than its baseline")
    assert has_negative_loss(["; ".join(x) for x in a["reasons"]]).tolist() == [True, False, False]
    # in-family rows (fresh draws) at the stated 0.5 % at most: binomial(600, 0.005) exceeds 9 flags
    # with probability < 0.001 (scipy.stats.binom)
    fresh = pd.DataFrame({"a0_comp_position_shift_m": 4e-4 * loss + 1e-3 * rng.normal(size=n),
                          "a0_sharpest_thickness_ratio": 1.0 - 0.01 * loss + 0.01 * rng.normal(size=n)})
    assert chk.assess(fresh)["negative_loss"].sum() <= 9


def test_scale_floor_bounds_z_of_a_collapsed_feature_and_degenerate_ones_are_named(family_fb2):
    rng = np.random.default_rng(9)
    n = 800
    X = pd.DataFrame({"a0_comp_focus": 0.998 + 1e-5 * rng.normal(size=n),  # collapsed spread in the campaign
                      "a0_shift_xcorr_s": 1e-7 * rng.normal(size=n)})
    floor = feature_resolution(X.columns, family_fb2)
    # a tenth of a sample at 10 MHz; 1e-3 for a dimensionless ratio (feature_resolution's table)
    assert floor.tolist() == pytest.approx([1e-3, 1e-8])
    det = MismatchDetector(n_estimators=30, scale_floor=floor, random_state=0).fit(X)
    probe = pd.DataFrame({"a0_comp_focus": [0.95], "a0_shift_xcorr_s": [0.0]})
    z = dict(det.top_deviations(probe, k=2)[0])
    # (0.95 - 0.998) / 1e-3 = -48: large, but not the -4800 the collapsed spread alone would give
    assert z["a0_comp_focus"] == pytest.approx(-48.0, rel=0.01)
    pinned = pd.DataFrame({"s0_sharpest_thickness_m": np.r_[np.full(n - 3, 2.3e-3), [2.25e-3] * 3],
                           "constant": np.ones(n), "fine": rng.normal(size=n)})
    bad = degenerate_features(pinned)
    assert set(bad) == {"s0_sharpest_thickness_m", "constant"}
    assert "only 2 distinct values" in bad["s0_sharpest_thickness_m"] and "constant" in bad["constant"]


def test_combined_verdict_keeps_rows_and_explains(detector, family_fb2):
    det, cov = detector
    rng = np.random.default_rng(5)
    X = pd.DataFrame(rng.multivariate_normal(np.zeros(3), cov, size=6), columns=["x0", "x1", "x2"])
    X.loc[0, "x0"] = 25.0
    X.loc[1, "x2"] = np.nan
    det2 = MismatchDetector(false_alarm_rate=0.05, n_estimators=50, random_state=0).fit(
        pd.DataFrame(rng.multivariate_normal(np.zeros(3), cov, size=2000), columns=["x0", "x1", "x2"]))
    out = combine_mismatch(det2, None, X, ["x0", "x1", "x2"])
    assert len(out) == 6
    assert not out.loc[0, "in_family"] and "furthest: x0" in out.loc[0, "mismatch_reasons"]
    assert "feature(s) x2 could not be computed" in out.loc[1, "mismatch_reasons"]
    # a row far beyond every calibration score gets the smallest conformal p-value, 1 / (n_cal + 1)
    # (Vovk et al. 2005: p = (1 + #{s_i >= s}) / (n_cal + 1)), exactly
    assert out.loc[0, "mismatch_p_value"] == pytest.approx(1 / (len(det2.cal_scores_) + 1), rel=1e-12)


