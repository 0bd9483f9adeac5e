"""Audit arithmetic on a small example computed by hand (numbers worked out in the comments).

Sources of the formulas: Student-t interval for a mean (any statistics handbook;
t_{0.975, 3} = 3.1824 and t_{0.975, 4} = 2.7764 from the t table, e.g. NIST/SEMATECH
e-Handbook of Statistical Methods, table 1.3.6.7.2, and scipy.stats.t); Clopper and Pearson
(1934) exact binomial interval, i.e. Beta quantiles (scipy.stats.beta, and in closed form where
a Beta CDF is a polynomial); the trapezoid rule for the mean thickness along the path;
Page-Hinkley / CUSUM recursion g_n = max(0, g_{n-1} + z_n - delta) (Page 1954).

Tolerances: a bare ``pytest.approx(x)`` is pytest's default relative 1e-6. The values it
guards are exact decimal arithmetic done in floating point (error a few 1e-16 relative), so
the default is loose by design (common practice, no source). Where a tolerance follows
from the digits a hand value is quoted to, the comment says so.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from waneguide.operations.audit import (
    AuditSettings,
    audit_frames,
    calibration_curve,
    decide,
    format_audit,
    reading_targets,
    residual_summary,
    run_audit,
    standardised_residuals,
)
from waneguide.operations.history import sqlite_file
from waneguide.operations.readings import read_readings

NOMINAL_MM = 2.0
PATH_MM = 300.0

READINGS = """path_id,date,position_mm,remaining_thickness_mm,method,uncertainty_mm
P1,2024-01-10,150,1.80,UT gauge,0.02
P1,2024-02-10,150,1.60,UT gauge,
P2,2024-01-12,100,1.90,UT gauge,0.02
P2,2024-02-12,100,1.50,caliper,0.05
P3,2024-02-12,100,1.50,caliper,0.05
P1,2024-03-01,0,2.00,UT gauge,0.02
P1,2024-03-01,100,1.80,UT gauge,0.02
P1,2024-03-01,300,2.00,UT gauge,0.02
P2,2024-03-01,350,1.90,UT gauge,0.02
"""


def _scores():
    # capture estimates; band = [lower, upper]
    return pd.DataFrame({
        "content_hash": list("abcdefg"),
        "path_id": ["P1", "P1", "P2", "P2", "P1", "P1", "P2"],
        "captured_at": ["2024-01-11T00:00:00+00:00", "2024-02-09T12:00:00+00:00", "2024-01-12T06:00:00Z",
                        "2024-02-14T00:00:00", "2024-03-03T00:00:00", "2024-04-30T00:00:00", "2024-03-02"],
        "status": ["scored"] * 6 + ["rejected"],
        "max_loss_pct": [12.0, 18.0, 9.0, 24.0, 11.0, 30.0, 50.0],
        "max_loss_pct_lower": [8.0, 15.0, 7.0, 20.0, 9.0, 25.0, 40.0],
        "max_loss_pct_upper": [16.0, 21.0, 11.0, 28.0, 13.0, 35.0, 60.0],
        "mean_loss_pct": [3.0, 4.0, 1.0, 5.0, 4.0, 9.0, 9.0],
        "mean_loss_pct_lower": [1.0, 2.0, 0.0, 3.0, 3.0, 8.0, 8.0],
        "mean_loss_pct_upper": [5.0, 6.0, 2.0, 7.0, 6.0, 10.0, 10.0],
        "in_family": [True] * 7,
    })


@pytest.fixture()
def readings(tmp_path):
    p = tmp_path / "readings.csv"
    p.write_text(READINGS)
    return read_readings(p)


def test_targets_from_readings(readings):
    surveys, kept, excluded = reading_targets(readings, nominal_thickness_mm=NOMINAL_MM, path_length_mm=PATH_MM)
    # the reading at 350 mm lies beyond the 300 mm path
    assert list(excluded["line"]) == [10]
    s = surveys.set_index(["path_id", surveys["date"].dt.strftime("%Y-%m-%d")])
    # max loss from the thinnest reading: 100 (1 - 1.8/2) = 10 %
    assert s.loc[("P1", "2024-01-10"), "max_loss_pct"] == pytest.approx(10.0)
    assert s.loc[("P1", "2024-01-10"), "u_max_loss_pct"] == pytest.approx(1.0)     # 100 * 0.02 / 2
    assert np.isnan(s.loc[("P1", "2024-02-10"), "u_max_loss_pct"])                   # blank uncertainty
    # survey of 2024-03-01 on P1: points (0, 2.0), (100, 1.8), (300, 2.0) span the whole path.
    # trapezoid: [(2.0+1.8)/2 * 100 + (1.8+2.0)/2 * 200] / 300 = (190 + 380) / 300 = 1.9 mm -> 5 % mean loss
    srv = s.loc[("P1", "2024-03-01")]
    assert srv["n_readings"] == 3 and srv["max_loss_pct"] == pytest.approx(10.0)
    # abs 1e-12: a dozen float operations on numbers of order 100 round to ~1e-13 (common practice, no source)
    assert srv["mean_loss_pct"] == pytest.approx(5.0, abs=1e-12)
    # u(mean): weights w = (50, 150, 100)/300 of 0.02 mm each -> 0.02 sqrt(50^2+150^2+100^2)/300 = 0.012472 mm
    assert srv["u_mean_loss_pct"] == pytest.approx(100 * 0.02 * np.sqrt(50**2 + 150**2 + 100**2) / 300 / 2.0)
    # single-point surveys give no mean-loss target
    assert surveys["mean_loss_pct"].notna().sum() == 1


def test_hand_computed_audit(readings):
    res = audit_frames(_scores(), readings, nominal_thickness_mm=NOMINAL_MM, path_length_mm=PATH_MM,
                       coverage_nominal=0.9)
    m = res.surveys
    by = m.set_index(["path_id", m["date"].dt.strftime("%Y-%m-%d")])
    # nearest capture within 7 days: P1 01-10 -> a (+1 d); P1 02-10 -> b (-0.5 d); P2 01-12 -> c (+0.25 d);
    # P2 02-12 -> d (+2 d); P1 03-01 -> e (+2 d); P3 -> nothing; the rejected P2 capture g is never used.
    assert by.loc[("P1", "2024-01-10"), "est_content_hash"] == "a"
    assert by.loc[("P1", "2024-02-10"), "est_content_hash"] == "b"
    assert by.loc[("P2", "2024-01-12"), "est_content_hash"] == "c"
    assert by.loc[("P2", "2024-02-12"), "est_content_hash"] == "d"
    assert by.loc[("P1", "2024-03-01"), "est_content_hash"] == "e"
    assert by.loc[("P1", "2024-02-10"), "dt_days"] == pytest.approx(-0.5)
    assert not by.loc[("P3", "2024-02-12"), "matched"]
    assert "no scored capture of path P3" in by.loc[("P3", "2024-02-12"), "match_reason"]

    sm = res.summaries["max_loss_pct"]
    # truths 10, 20, 5, 25, 10; estimates 12, 18, 9, 24, 11 -> residuals 2, -2, 4, -1, 1
    r = np.array([2.0, -2.0, 4.0, -1.0, 1.0])
    assert sm["n"] == 5
    assert sm["bias"] == pytest.approx(0.8)                       # 4 / 5
    sd = np.sqrt(np.sum((r - 0.8) ** 2) / 4)                      # = sqrt(22.8 / 4) = 2.387467
    # rel 1e-6: the hand value is quoted to 7 significant digits (sqrt 5.7 = 2.38746728)
    assert sm["sd"] == pytest.approx(2.387467, rel=1e-6) and sd == pytest.approx(sm["sd"])
    # t_{0.975, 4} = 2.7764 (t table); half-width 2.7764 * 2.3875 / sqrt 5 = 2.9644. abs 2e-4: the
    # table value and the half-width are quoted to 4 decimals, each worth up to 5e-5 here
    assert sm["bias_lower"] == pytest.approx(0.8 - 2.9644, abs=2e-4)
    assert sm["bias_upper"] == pytest.approx(0.8 + 2.9644, abs=2e-4)
    # the same interval from scipy's Student-t: the arithmetic is the same up to its order, so rel 1e-12
    # (an identity in floating point; common practice, no source)
    t_lo, t_hi = stats.t.interval(0.95, df=4, loc=0.8, scale=sd / np.sqrt(5))
    assert (sm["bias_lower"], sm["bias_upper"]) == pytest.approx((t_lo, t_hi), rel=1e-12)
    assert sm["rmse"] == pytest.approx(np.sqrt(26 / 5))           # sum r^2 = 4+4+16+1+1 = 26
    assert sm["mae"] == pytest.approx(2.0)                         # (2+2+4+1+1) / 5
    assert sm["mean_band_width"] == pytest.approx(6.0)             # widths 8, 6, 4, 8, 4
    # inside the band: 10 in [8,16] yes, 20 in [15,21] yes, 5 in [7,11] no, 25 in [20,28] yes, 10 in [9,13] yes
    assert (sm["covered"], sm["coverage"]) == (4, 0.8)
    # Clopper-Pearson 95 %: [Beta(0.025; 4, 2), Beta(0.975; 5, 1)] = [0.2836, 0.9949]. rel 1e-9: two
    # evaluations of one Beta quantile (ppf against the library's isf route; common practice, no source)
    assert sm["coverage_lower"] == pytest.approx(stats.beta.ppf(0.025, 4, 2), rel=1e-9)
    assert sm["coverage_upper"] == pytest.approx(stats.beta.ppf(0.975, 5, 1), rel=1e-9)
    # closed forms: Beta(5, 1) has CDF x^5, so the upper end is 0.975^(1/5) = 0.994949 (rel 1e-12, a
    # floating-point identity); Beta(4, 2) has CDF 5x^4 - 4x^5, which equals 0.025 at x = 0.283582, the
    # lower end (rel 1e-9 on the CDF: a quantile solver's accuracy; abs 1e-6: the 6 quoted decimals;
    # both common practice, no source)
    assert sm["coverage_upper"] == pytest.approx(0.975 ** 0.2, rel=1e-12)
    x = sm["coverage_lower"]
    assert 5 * x**4 - 4 * x**5 == pytest.approx(0.025, rel=1e-9)
    assert x == pytest.approx(0.283582, abs=1e-6)

    # standardised residuals in date order a, c, b, d, e: z = r / sqrt((h / z_0.95)^2 + u^2), h the band's
    # half-width on the truth's side, u the reading's uncertainty in % (0.02 mm -> 1 %, 0.05 mm -> 2.5 %,
    # blank -> 0): a 2/sqrt((4/z)^2+1), c 4/sqrt((2/z)^2+1), b -2/(3/z), d -1/sqrt((4/z)^2+2.5^2),
    # e 1/sqrt((2/z)^2+1) = 0.7606, 2.5408, -1.0966, -0.2867, 0.6352
    z95 = stats.norm.ppf(0.95)
    z_hand = [2 / np.hypot(4 / z95, 1), 4 / np.hypot(2 / z95, 1), -2 / (3 / z95), -1 / np.hypot(4 / z95, 2.5),
              1 / np.hypot(2 / z95, 1)]
    d = res.drift["max_loss_pct"]
    np.testing.assert_allclose(d["z"], z_hand, rtol=1e-12)   # same formula, float rounding only
    # Page-Hinkley up side, delta 0.5: g = 0.2606, 2.3014, 0.7049, 0, 0.1352; its largest value 2.30 is
    # below lambda = 5, and the down side peaks at 0.597 (-z_b - 0.5): no alarm
    g, prev = [], 0.0
    for zi in z_hand:
        prev = max(0.0, prev + zi - 0.5)
        g.append(prev)
    np.testing.assert_allclose(d["result"].statistic_up, g, rtol=1e-12, atol=1e-15)
    assert d["result"].statistic_up.max() == pytest.approx(2.3014, abs=1e-4)   # 4 quoted decimals
    assert not d["result"].alarm

    mean = res.summaries["mean_loss_pct"]
    assert mean["n"] == 1 and mean["bias"] == pytest.approx(4.0 - 5.0)   # capture e says 4 %, survey 5 %
    # no rule fires: the bias CI [-2.16, +3.76] holds 0, the coverage CI's upper end 0.995 is above 0.9,
    # no Page-Hinkley alarm, and mean_loss_pct has 1 reading (< 3): the verdict is "in control"
    assert res.verdict == "in control"
    assert any("fewer than 3" in n for n in res.notes)
    # unmatched list: P3 survey and the off-path reading, each with its reason
    reasons = " | ".join(res.unmatched["reason"])
    assert "P3" in reasons and "outside the path" in reasons
    text = format_audit(res)
    assert "IN CONTROL" in text and "Decision support only" in text


def test_t_interval_small_case():
    # n = 4, residuals 2, -2, 4, -1: mean 0.75, s = sqrt(22.75 / 3) = 2.7538; t_{0.975,3} = 3.1824
    # -> [-3.632, 5.132]. abs 1e-3: the quoted 4-5 digit factors carry up to 1.5e-4 here
    sm = residual_summary([12, 18, 9, 24], [8, 15, 7, 20], [16, 21, 11, 28], [10, 20, 5, 25],
                          coverage_nominal=0.9)
    assert sm["bias_lower"] == pytest.approx(0.75 - 3.1824 * 2.7538 / 2, abs=1e-3)
    assert sm["bias_upper"] == pytest.approx(0.75 + 3.1824 * 2.7538 / 2, abs=1e-3)
    # scipy's Student-t interval for the same four residuals; rel 1e-12: a floating-point identity
    t_lo, t_hi = stats.t.interval(0.95, df=3, loc=0.75, scale=np.sqrt(22.75 / 3) / 2)
    assert (sm["bias_lower"], sm["bias_upper"]) == pytest.approx((t_lo, t_hi), rel=1e-12)


def test_standardised_residuals_and_calibration():
    z90 = stats.norm.ppf(0.95)                       # 1.6449
    # estimate 10, band [8, 14]; truth 13 lies on the upper side: s = 4 / 1.6449; u = 0.0
    z = standardised_residuals([10.0], [8.0], [14.0], [13.0], [np.nan], coverage_nominal=0.9)
    assert z[0] == pytest.approx(-3.0 / (4.0 / z90))
    # with a reading uncertainty of 1 %: sqrt(s^2 + 1)
    z = standardised_residuals([10.0], [8.0], [14.0], [13.0], [1.0], coverage_nominal=0.9)
    assert z[0] == pytest.approx(-3.0 / np.hypot(4.0 / z90, 1.0))
    # calibration: at the nominal level the curve is the plain band coverage
    c = calibration_curve([10, 10, 10], [8, 8, 8], [14, 14, 14], [9, 13.9, 16], coverage_nominal=0.9)
    assert c.set_index("level").loc[0.9, "empirical"] == pytest.approx(2 / 3)
    # at 50 %: sides scaled by z(0.75)/z(0.95) = 0.6745/1.6449 = 0.41: 9 -> |1| <= 0.82 no; 13.9 -> 3.9 <= 1.64 no
    assert c.set_index("level").loc[0.5, "empirical"] == pytest.approx(0.0)


def test_rules_fire_as_written():
    s = AuditSettings()
    biased = residual_summary(np.arange(10) + 5.0, np.arange(10) + 3.0, np.arange(10) + 7.0,
                              np.arange(10) + 0.0, coverage_nominal=0.9)
    verdict, reasons, _ = decide({"max_loss_pct": biased}, {}, None, oof_share_observed=0.0, settings=s)
    # every residual is +5 with zero spread, so the bias CI is [5, 5]; no reading lies in its band
    # (|5| > 2), k = 0 of 10, Clopper-Pearson upper end 1 - 0.025^(1/10) = 0.308 < 0.9
    assert biased["coverage_upper"] == pytest.approx(1 - 0.025 ** 0.1, rel=1e-9)   # as above
    assert verdict == "recalibrate"
    assert any("bias +5.00" in r for r in reasons) and any("below nominal 90%" in r for r in reasons)
    ft = pd.DataFrame({"feature": ["f"], "drifted": [True], "psi": [0.6], "q_value": [1e-6], "outside_share": [0.3]})
    verdict, reasons, _ = decide({"max_loss_pct": biased}, {}, ft, oof_share_observed=0.0, settings=s)
    assert verdict == "retrain" and "left the training domain" in reasons[0]
    verdict, _, notes = decide({}, {}, ft.assign(outside_share=0.0), oof_share_observed=0.0, settings=s)
    assert verdict == "in control" and "stay within its range" in notes[0]
    verdict, reasons, _ = decide({}, {}, None, oof_share_observed=0.5, settings=s)
    assert verdict == "retrain" and "out of family" in reasons[0]


def test_drift_alarm_in_audit(tmp_path):
    # 30 monthly surveys on one path; from survey 15 on the model underestimates by ~3 sigma
    rng = np.random.default_rng(2)
    dates = pd.date_range("2022-01-01", periods=30, freq="30D", tz="UTC")
    truth = np.linspace(0, 20, 30)
    est = truth + rng.normal(0, 1.0, 30)
    est[15:] -= 5.0
    half = 1.6449 * 1.0        # 90 % band of a unit-sigma Gaussian error
    scores = pd.DataFrame({
        "content_hash": [f"h{i}" for i in range(30)], "path_id": "P1",
        "captured_at": [d.isoformat() for d in dates], "status": "scored",
        "max_loss_pct": est, "max_loss_pct_lower": est - half, "max_loss_pct_upper": est + half,
        "mean_loss_pct": est / 2, "mean_loss_pct_lower": est / 2 - 1, "mean_loss_pct_upper": est / 2 + 1,
        "in_family": True,
    })
    lines = ["path_id,date,position_mm,remaining_thickness_mm,method"]
    lines += [f"P1,{d.date()},150,{2.0 * (1 - t / 100):.6f},UT gauge" for d, t in zip(dates, truth)]
    p = tmp_path / "r.csv"
    p.write_text("\n".join(lines) + "\n")
    res = audit_frames(scores, read_readings(p), nominal_thickness_mm=2.0, path_length_mm=300.0,
                       coverage_nominal=0.9)
    d = res.drift["max_loss_pct"]
    assert d["result"].alarm and d["result"].direction == "down"
    # After the step the standardised residuals are N(-5, 1): the down statistic grows by 4.5 +- 1 per
    # reading, so it passes lambda = 5 within two readings with probability Phi(4 / sqrt 2) = 0.998 and
    # within the four readings 15..18 with 1 - Phi(-13 / 2) = 1 - 4e-11 (Siegmund's ARL at a 5-sigma
    # shift: 1.35 readings). The lower end 15
    # says no false alarm came first: for a seed drawn at random that has probability exp(-15 / 465) = 0.97
    # (in-control ARL 465, tests/test_drift.py); this seed has none.
    assert 15 <= d["result"].alarm_index <= 18
    assert res.verdict == "recalibrate"


def test_no_match_is_a_clear_error(readings):
    sc = _scores().assign(path_id="Q9")
    with pytest.raises(ValueError, match="no survey matched a scored capture within 7 days"):
        audit_frames(sc, readings, nominal_thickness_mm=2.0, path_length_mm=300.0, coverage_nominal=0.9)


@pytest.mark.parametrize("body, needle", [
    ("path_id,date,position_mm,method\nP1,2024-01-01,1,UT\n", "missing column\\(s\\) remaining_thickness_mm"),
    ("path_id,date,position_mm,remaining_thickness_mm,method\nP1,2024-13-45,1,1.9,UT\n", "line 2, column date"),
    ("path_id,date,position_mm,remaining_thickness_mm,method\nP1,2024-01-01,1,1.9,UT\nP1,2024-01-01,x,1.9,UT\n",
     "line 3, column position_mm: must be a number >= 0"),
    ("path_id,date,position_mm,remaining_thickness_mm,method\nP1,2024-01-01,1,-1.9,UT\n",
     "column remaining_thickness_mm: must be a positive number"),
    ("path_id,date,position_mm,remaining_thickness_mm,method\n,2024-01-01,1,1.9,UT\n", "column path_id"),
    ("path_id,date,position_mm,remaining_thickness_mm,method,uncertainty_mm\nP1,2024-01-01,1,1.9,UT,-0.1\n",
     "column uncertainty_mm"),
    ("", "the readings file is empty"),
])
def test_readings_errors_name_file_line_column(tmp_path, body, needle):
    p = tmp_path / "bad.csv"
    p.write_text(body)
    with pytest.raises(ValueError, match=needle) as exc:
        read_readings(p)
    assert "bad.csv" in str(exc.value)


def test_reading_in_another_unit_is_refused(readings):
    r = readings.copy()
    r.loc[0, "remaining_thickness_mm"] = 1800.0     # micrometres by mistake
    with pytest.raises(ValueError, match="line 2: remaining_thickness_mm 1800"):
        reading_targets(r, nominal_thickness_mm=2.0, path_length_mm=300.0)


def test_reading_uncertainty_widens_the_band_in_quadrature():
    # estimate 10, band [9, 11] at 90 %; reading 11.5: outside the plain band.
    # With u = 0.5: reach = sqrt(1^2 + (1.6449 * 0.5)^2) = 1.2948 >= 1.5? no -> still outside;
    # with u = 1.0: reach = sqrt(1 + 1.6449^2) = 1.9251 >= 1.5 -> inside.
    plain = residual_summary([10.0], [9.0], [11.0], [11.5], coverage_nominal=0.9)
    small = residual_summary([10.0], [9.0], [11.0], [11.5], [0.5], coverage_nominal=0.9)
    large = residual_summary([10.0], [9.0], [11.0], [11.5], [1.0], coverage_nominal=0.9)
    assert (plain["covered"], small["covered"], large["covered"]) == (0, 0, 1)
    c = calibration_curve([10.0], [9.0], [11.0], [11.5], [1.0], coverage_nominal=0.9).set_index("level")
    # at 50 %: z = 0.6745 -> reach = sqrt((0.6745/1.6449)^2 + 0.6745^2) = 0.7894 < 1.5 -> outside
    assert c.loc[0.5, "empirical"] == 0.0 and c.loc[0.9, "empirical"] == 1.0


def test_infinite_band_counts_as_matched_and_covering():
    # Split conformal with k = ceil((n+1)(1-alpha)) > n gives an infinite band (Vovk et al. 2005;
    # Lei et al. 2018): such a band covers every reading by definition, and the pair still has a
    # finite residual. Hand-computed: residuals (+2, -1); bias 0.5; coverage 1/2.
    sm = residual_summary([12.0, 9.0], [-np.inf, 8.5], [np.inf, 9.5], [10.0, 10.0], coverage_nominal=0.9)
    assert sm["n"] == 2
    assert sm["bias"] == pytest.approx(0.5)
    assert sm["covered"] == 1  # the finite band [8.5, 9.5] misses 10; the infinite one covers
    assert sm["coverage"] == pytest.approx(0.5)
    assert sm["mean_band_width"] == np.inf


def test_audit_refuses_a_missing_history_file_without_creating_it(tmp_path):
    # Auditing only reads the history: a mistyped SQLite path must be refused, not created empty.
    assert sqlite_file("sqlite:////tmp/x/h.db").as_posix() == "/tmp/x/h.db"
    assert sqlite_file("sqlite:///:memory:") is None
    assert sqlite_file("postgresql://u@127.0.0.1/db") is None
    readings = tmp_path / "r.csv"
    readings.write_text("path_id,date,position_mm,remaining_thickness_mm,method\nP01,2025-05-01,0,1.9,UT\n")
    missing = tmp_path / "nope.db"

    class _Bundle:  # run_audit reads the identity only after the database check
        pass

    with pytest.raises(ValueError, match="does not exist"):
        run_audit(_Bundle(), readings, db_url=f"sqlite:///{missing}")
    assert not missing.exists()
