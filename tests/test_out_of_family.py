"""Out of family on simulated data (issue 16): each failure of the issue as a test on the fast model.

A slower alloy must not read as corrosion, a thicker plate must not pass, in-family heavy loss and
baselines at the ends of the temperature range must not raise false alarms beyond the stated rate,
and a capture reading thicker than its baseline must be flagged, not clipped silently to 0 %.

Outside references: the plate velocity sqrt(E / (rho (1 - nu^2))) and the elastic relations
between (E, nu, rho) and the bulk speeds (Graff 1975, *Wave Motion in Elastic Solids*, sec. 8.1
and ch. 5); the binomial distribution for the false-alarm tolerances (scipy.stats.binom).
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy.stats import binom

from waneguide.features.extractor import FeatureExtractor
from waneguide.features.family import family_from_mapping
from waneguide.models._plate_physics import relative_delay_change, s0_delay_sensitivity, shifted_material
from waneguide.models.mismatch import (
    NEGATIVE_LOSS_REASON,
    MismatchDetector,
    PhysicsChecker,
    combine_mismatch,
    degenerate_features,
    feature_resolution,
    has_negative_loss,
)
from waneguide.simulation.campaign import run_campaign
from waneguide.training._data import campaign_features
from waneguide.training._evaluate import EDGE_CAMPAIGNS, edge_family, shifted_family

#: Stated false-alarm rates of the bundle defaults: statistical 0.01, each physics check 0.005.
STAT_RATE, PHYS_RATE = 0.01, 0.005


def _variant(family, **domain):
    """``family`` with simulation-domain fields replaced (the plate, hence the physics, unchanged)."""
    data = family.model_dump(mode="json", exclude_none=True)
    data["domain"].update(domain)
    return family_from_mapping(data, where="test family")


def _features(fam_sim, family, n, seed, path):
    camp = run_campaign(fam_sim, n, path, seed=seed, progress=False)
    return campaign_features(family, camp, progress=False), camp


def _tolerance(n: int, rate: float) -> int:
    """Most flags a detector at ``rate`` shows in ``n`` cases except with probability 0.001 (binomial)."""
    return int(binom.ppf(0.999, n, rate))


@pytest.fixture(scope="module")
def trained(tmp_path_factory, family_fb2):
    """Physics checker and statistical detector fitted on an in-family campaign (two states per path)."""
    d = tmp_path_factory.mktemp("oof")
    feats, camp = _features(_variant(family_fb2, states_per_specimen=2), family_fb2, 240, 5, d / "in")
    cases = camp.cases.reset_index(drop=True)
    chk = PhysicsChecker(family_fb2).fit(feats, targets=cases)
    cols = [c for c in feats.columns if pd.api.types.is_float_dtype(feats[c])]
    cols = [c for c in cols if c not in degenerate_features(feats[cols])]
    det = MismatchDetector(n_estimators=50, scale_floor=feature_resolution(cols, family_fb2),
                           random_state=0).fit(feats[cols], groups=cases["specimen_id"])
    return {"checker": chk, "detector": det, "columns": cols, "dir": d, "features": feats, "camp": camp}


def _pristine_shift(family, what, factor, d, n=40, seed=9):
    """Pristine captures of a shifted plate (each its own path), processed with ``family``."""
    fam = _variant(shifted_family(family, what, factor, states_per_specimen=1), pristine_fraction=0.99)
    feats, camp = _features(fam, family, n, seed, d / f"{what}_{factor}")
    return feats, camp.cases


def test_plate_velocity_of_shifted_plates_follows_graff(family_fb2):
    mat = family_fb2.build_material()

    def c_plate(m):  # Graff 1975 sec. 8.1, from the constants alone
        return math.sqrt(m.youngs_modulus_pa / (m.density_kg_m3 * (1 - m.poisson_ratio ** 2)))

    slow = shifted_material(mat, shear=0.97)
    # the shifted alloy keeps c_L and rho and has c_T x 0.97 (Graff ch. 5 relations, round trip to 1e-12)
    assert slow.ct_m_s == pytest.approx(0.97 * mat.ct_m_s, rel=1e-12)
    assert slow.cl_m_s == pytest.approx(mat.cl_m_s, rel=1e-12)
    graff = c_plate(mat) / c_plate(slow) - 1.0  # relative S0 delay change in the fd -> 0 limit
    k = (mat.ct_m_s / mat.cl_m_s) ** 2
    assert graff == pytest.approx((1 - 2 * k) / (1 - k) * 0.03, rel=0.05)  # linearised closed form, 3 % step
    rl = relative_delay_change(family_fb2, shear=0.97)
    # Rayleigh-Lamb at fd = 0.3 MHz mm against the low-frequency limit: S0 is within 1 % of the plate
    # velocity there, so the delay ratio agrees to 5 % of the change (from memory of the S0 curve's
    # flatness below 0.5 MHz mm; measured: 2.14 % against 2.07 %)
    assert rl["S0"] == pytest.approx(graff, rel=0.05)
    assert rl["A0"] > 0.01  # A0 slows too: a slower shear speed moves both
    # thickness: c_plate has no thickness in it; the Rayleigh-Lamb S0 delay moves < 0.2 % for +15 %,
    # while A0 (c_g ~ sqrt(f d), Graff sec. 4.2) arrives > 2.5 % earlier (Kirchhoff bound: 7 %)
    thick = relative_delay_change(family_fb2, thickness=1.15)
    assert abs(thick["S0"]) < 0.002 and -0.07 < thick["A0"] < -0.025
    sens = s0_delay_sensitivity(family_fb2)
    assert sens["shear"] == pytest.approx(-(1 - 2 * k) / (1 - k), rel=0.05)
    assert sens["longitudinal"] == pytest.approx(-k / (1 - k), rel=0.1)
    assert sens["path"] == pytest.approx(1.0, abs=1e-9)


def test_pristine_plate_of_slower_shear_speed_is_flagged(trained, family_fb2):
    feats, _ = _pristine_shift(family_fb2, "shear", 0.97, trained["dir"])
    a = trained["checker"].assess(feats)
    # issue 16: a 3 % slower alloy read 7-8 % loss "in family"; now every path is flagged, in words
    assert a["plate_out"].all()
    assert all(any("baseline S0 is" in r and "slower" in r and "check the alloy" in r for r in rs)
               for rs in a["reasons"])
    # the measured S0 deviation is the Rayleigh-Lamb one (2.1 % later): the median of 40 paths with an
    # in-family scatter of ~0.15 % is within 0.3 % of it (model-form bias of the estimators included;
    # regression value of this code)
    expected = relative_delay_change(family_fb2, shear=0.97)["S0"]
    assert float(np.median(a["s0_deviation"])) == pytest.approx(expected, abs=0.003)


def test_pristine_thicker_plate_is_flagged(trained, family_fb2):
    feats, _ = _pristine_shift(family_fb2, "thickness", 1.15, trained["dir"])
    a = trained["checker"].assess(feats)
    assert a["plate_out"].all()
    assert all(any("thickness gauge reads 2." in r and "no wall loss makes a plate read thicker" in r for r in rs)
               for rs in a["reasons"])
    # the gauge reads the plate (1.15 of nominal) to one candidate step, 0.01 (tests/test_thickness_gauge.py)
    assert float(np.median(a["thickness_ratio"])) == pytest.approx(1.15, abs=0.015)
    # S0 is thickness-blind (Graff sec. 8.1): its deviation stays inside the in-family tolerance box
    assert float(np.median(np.abs(a["s0_deviation"]))) < trained["checker"]._x_tolerance()


@pytest.mark.parametrize("edge", [e[0] for e in EDGE_CAMPAIGNS])
def test_in_family_edges_stay_within_the_stated_rate(trained, family_fb2, edge):
    overrides = dict(EDGE_CAMPAIGNS)[edge]
    feats, _ = _features(edge_family(family_fb2, edge, overrides), family_fb2, 48, 13,
                         trained["dir"] / f"edge{list(dict(EDGE_CAMPAIGNS)).index(edge)}")
    mm = combine_mismatch(trained["detector"], trained["checker"], feats, trained["columns"])
    flagged = int((~mm["in_family"]).sum())
    # heavy loss (40-50 % max) and baselines at -10..-4 / 44..50 degC: at most the stated rates
    # (0.01 + 2 x 0.005) except with probability 0.001 (binomial, n = 48: at most 4 flags)
    assert flagged <= _tolerance(len(feats), STAT_RATE + 2 * PHYS_RATE), mm.loc[~mm["in_family"], "mismatch_reasons"]


def test_negative_apparent_loss_is_flagged_not_clipped(trained, family_fb2):
    """A baseline recorded on thinned metal: the sound capture reads thicker than it."""
    camp, chk = trained["camp"], trained["checker"]
    ex = FeatureExtractor(family_fb2)
    rows = []
    for cases, waves, bases in camp.iter_chunks():
        # swap roles: the thinned state serves as "baseline", the sound baseline as "capture"
        f = ex.extract_batch(bases, waves, temperature_c=cases["baseline_temperature_c"].to_numpy(float),
                             baseline_temperature_c=cases["temperature_c"].to_numpy(float),
                             path_id=cases["specimen_id"].astype(str).to_numpy())
        f["mean_loss_pct"] = cases["mean_loss_pct"].to_numpy(float)
        rows.append(f)
    swapped = pd.concat(rows, ignore_index=True)
    a = chk.assess(swapped)
    deep = swapped["mean_loss_pct"].to_numpy() >= 8.0
    assert deep.sum() >= 20
    # physics: the sound capture is thicker than a baseline with >= 8 % mean loss; regression value of
    # this code: 90 % of such pairs are flagged (the rest have the loss in short, deep pits)
    assert a.loc[deep, "negative_loss"].mean() >= 0.9
    text = "; ".join(a.loc[deep & a["negative_loss"], "reasons"].iloc[0])
    assert text.startswith(NEGATIVE_LOSS_REASON) or f"; {NEGATIVE_LOSS_REASON}" in text
    assert "thicker than its baseline" in text and "clipped to 0 %" in text
    assert has_negative_loss([text, "", None]).tolist() == [True, False, False]
    # the ordinary direction (thinned capture against its sound baseline) never is
    assert not chk.assess(trained["features"])["negative_loss"].any()


@pytest.fixture(scope="module")
def small_bundle(tmp_path_factory, family_fb2):
    from waneguide.training.pipeline import TrainConfig, fit_bundle

    d = tmp_path_factory.mktemp("oof_bundle")
    feats, camp = _features(family_fb2, family_fb2, 400, 21, d / "in")
    bundle, _ = fit_bundle(family_fb2, feats, camp.cases[["max_loss_pct", "max_loss_mm", "mean_loss_pct"]],
                           camp.cases["specimen_id"].to_numpy(),
                           config=TrainConfig(n_estimators=80, gp_points=0, mismatch_estimators=50))
    return bundle, d


@pytest.mark.slow
def test_pristine_slower_alloy_never_reads_over_one_percent_without_a_flag(small_bundle, family_fb2):
    bundle, d = small_bundle
    for what, factor in (("shear", 0.97), ("shear", 0.985), ("alloy", None)):
        f, _ = _pristine_shift(family_fb2, what, factor, d, n=32)
        pred = bundle.predict_frame(f)
        reads = np.maximum(pred["mean_loss_pct"], pred["max_loss_pct"]) > 1.0
        # the target, no tolerance: a reading above 1 % on sound metal of another alloy is flagged
        assert not (reads & pred["in_family"]).any(), (what, factor)
        assert (~pred["in_family"]).mean() >= 0.95, (what, factor)


@pytest.mark.slow
def test_scores_carry_the_negative_apparent_loss_column(small_bundle, family_fb2, tmp_path):
    from waneguide.operations.scoring import SCORE_OUTPUT_COLUMNS, score_captures
    from waneguide.simulation.forward import simulate_capture

    bundle, _ = small_bundle
    x = np.linspace(0.0, family_fb2.path_length_m, 301)
    d0 = family_fb2.nominal_thickness_m
    # the baseline of path P was recorded after 12 % of the wall had gone along the whole path
    base = simulate_capture(family_fb2, x_m=x, thickness_m=np.full_like(x, 0.88 * d0), temperature_c=20.0, rng=1,
                            path_id="P", captured_at="2025-01-01T00:00:00+00:00")
    caps = [simulate_capture(family_fb2, x_m=x, thickness_m=np.full_like(x, d0), temperature_c=20.0, rng=2 + i,
                             path_id="P", captured_at=f"2025-01-0{2 + i}T00:00:00+00:00") for i in range(3)]
    path = bundle.save(tmp_path / "bundle")
    out = score_captures(path, caps, baselines=[base], db_url=f"sqlite:///{tmp_path}/h.db")
    assert list(out.columns[: len(SCORE_OUTPUT_COLUMNS)]) == list(SCORE_OUTPUT_COLUMNS)  # the CSV contract kept
    assert out["negative_apparent_loss"].all() and not out["in_family"].any()
    assert out["mismatch_reasons"].str.contains("negative apparent loss: the capture reads").all()
