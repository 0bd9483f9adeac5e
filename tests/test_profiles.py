"""Thinning profiles: shapes and ground truth against closed-form integrals."""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from waneguide.simulation.profiles import (
    EXTENT_THRESHOLD,
    PatchSpec,
    ThinningProfile,
    flat_patch_profile,
    multi_patch_profile,
    build_profile,
    pit_profile,
    pristine_profile,
    rough_profile,
    sample_site,
    segment_centres_m,
)

L = 0.300
T0 = 2.0e-3
X = segment_centres_m(L, 0.1e-3)  # 0.1 mm grid: midpoint-rule error far below the tolerances used


def test_pristine_truth_is_zero():
    p = pristine_profile(X, T0, path_length_m=L)
    assert p.truth() == {"max_loss_pct": 0.0, "max_loss_mm": 0.0, "mean_loss_pct": 0.0, "lost_area_mm2": 0.0,
                         "patch_count": 0, "extent_mm": 0.0, "loss_under_tx_mm": 0.0, "loss_under_rx_mm": 0.0}


def test_flat_patch_truth_matches_closed_form():
    # footprint 60 mm, tapers of 15 mm (a quarter): a raised-cosine taper removes half its
    # rectangle, so area = depth * (flat + taper) = depth * (30 + 15) mm (analytic integral).
    p = flat_patch_profile(X, T0, centre_m=0.15, length_m=0.060, max_loss_pct=40.0, path_length_m=L)
    depth_mm = 0.4 * 2.0
    assert p.max_loss_mm == pytest.approx(depth_mm, rel=1e-12)
    assert p.max_loss_pct == pytest.approx(40.0, rel=1e-12)
    assert p.lost_area_mm2 == pytest.approx(depth_mm * 45.0, rel=1e-5)
    assert p.mean_loss_pct == pytest.approx(100 * depth_mm * 45.0 / 300.0 / 2.0, rel=1e-5)
    # extent: loss = 0.4 t0 (0.5 - 0.5 cos(pi u)) exceeds thr * t0 for u > acos(1 - 2 thr / 0.4) / pi
    u = math.acos(1 - 2 * EXTENT_THRESHOLD / 0.4) / math.pi
    assert p.extent_mm == pytest.approx(60.0 - 2 * 15.0 * u, abs=0.2)  # 0.1 mm grid, both ends
    assert p.patch_count == 1
    # the flat bottom is flat: 30 mm at exactly the target depth
    bottom = np.abs(X - 0.15) < 0.0149
    np.testing.assert_allclose(p.thickness_m[bottom], T0 * 0.6, rtol=1e-12)


def test_gaussian_and_elliptical_pit_areas():
    g = pit_profile(X, T0, centre_m=0.15, length_m=0.040, max_loss_pct=30.0, kind="gaussian", path_length_m=L)
    sigma_mm = 10.0
    # integral of d exp(-x^2 / 2 sigma^2) = d sigma sqrt(2 pi) (Gaussian integral)
    assert g.lost_area_mm2 == pytest.approx(0.6 * sigma_mm * math.sqrt(2 * math.pi), rel=1e-4)
    e = pit_profile(X, T0, centre_m=0.15, length_m=0.040, max_loss_pct=30.0, kind="elliptical", path_length_m=L)
    # half ellipse with semi-axes 20 mm and 0.6 mm: area pi a b / 2
    assert e.lost_area_mm2 == pytest.approx(math.pi * 20.0 * 0.6 / 2, rel=1e-3)
    assert e.extent_mm == pytest.approx(2 * 20.0 * math.sqrt(1 - EXTENT_THRESHOLD**2 / 0.3**2), abs=0.2)


def test_two_sided_loss_adds_and_is_scaled_to_the_target():
    rng = np.random.default_rng(4)
    p = flat_patch_profile(X, T0, centre_m=0.12, length_m=0.05, max_loss_pct=35.0, sides="two", split=0.5,
                           rng=rng, path_length_m=L)
    assert p.sides == "two"
    assert p.patch_count == 1  # one site thinned from both faces
    assert p.max_loss_pct == pytest.approx(35.0, rel=1e-12)
    top = [q for q in p.patches if q.side == "top"]
    bottom = [q for q in p.patches if q.side == "bottom"]
    assert len(top) == len(bottom) == 1
    assert bottom[0].length_m < top[0].length_m  # the back-face patch is 0.6-1x as long


def test_rough_patch_depth_distribution_and_reproducibility():
    a = rough_profile(X, T0, centre_m=0.15, length_m=0.12, max_loss_pct=45.0, rng=11, path_length_m=L)
    b = rough_profile(X, T0, centre_m=0.15, length_m=0.12, max_loss_pct=45.0, rng=11, path_length_m=L)
    c = rough_profile(X, T0, centre_m=0.15, length_m=0.12, max_loss_pct=45.0, rng=12, path_length_m=L)
    np.testing.assert_array_equal(a.thickness_m, b.thickness_m)
    assert not np.array_equal(a.thickness_m, c.thickness_m)
    assert a.max_loss_pct == pytest.approx(45.0, rel=1e-12)
    # outside the footprint: pristine
    outside = np.abs(X - 0.15) > 0.0601
    np.testing.assert_array_equal(a.thickness_m[outside], T0)
    # skewed depth: the field is mapped to U ~ uniform(0, 1) by its normal CDF and squared, so
    # pooled over many fields the core loss / maximum behaves like U^2 / max(U^2): median near
    # 0.25 / 0.9 and P(> 0.5) near 1 - sqrt(0.45) = 0.33 (probability integral transform; the
    # 0.9 is the typical maximum of U^2 over ~8 correlation lengths). Bands allow for the
    # correlation of samples within a field (50 fields of ~4 independent values each).
    core = np.abs(X - 0.15) < 0.03
    ratios = np.concatenate([
        (q := rough_profile(X, T0, centre_m=0.15, length_m=0.12, max_loss_pct=45.0, rng=s,
                            path_length_m=L)).loss_m[core] / q.loss_m.max()
        for s in range(50)
    ])
    assert 0.15 < np.median(ratios) < 0.45
    assert 0.2 < np.mean(ratios > 0.5) < 0.45


def test_multi_patch_counts_sites_and_keeps_the_deepest():
    p = multi_patch_profile(X, T0, shapes=["flat", "gaussian"], centres_m=[0.06, 0.22], lengths_m=[0.03, 0.04],
                            relative_depths=[1.0, 0.5], max_loss_pct=20.0, rng=3, path_length_m=L)
    assert p.patch_count == 2
    assert p.shape == "mixed"
    assert p.max_loss_pct == pytest.approx(20.0, rel=1e-12)
    # the second patch peaks at half the depth of the first (relative depths 1 and 0.5)
    assert p.loss_m[np.abs(X - 0.22) < 5e-5].max() == pytest.approx(0.5 * p.loss_m.max(), rel=1e-3)


def test_profile_validation_messages():
    with pytest.raises(ValueError, match=r"max_loss_pct must lie in \[0, 90\)"):
        flat_patch_profile(X, T0, centre_m=0.1, length_m=0.02, max_loss_pct=95.0)
    with pytest.raises(ValueError, match="strictly increasing"):
        ThinningProfile(np.array([0.0, 0.0]), np.array([T0, T0]), T0, L)
    with pytest.raises(ValueError, match="positive and finite"):
        ThinningProfile(np.array([0.0, 0.1]), np.array([T0, 0.0]), T0, L)
    with pytest.raises(ValueError, match="pit kind"):
        pit_profile(X, T0, centre_m=0.1, length_m=0.02, max_loss_pct=10.0, kind="conical")


def test_mean_loss_uses_segment_lengths_on_an_uneven_grid():
    # trapezoid-like midpoint weights: a loss only on the last sample counts its half-cell
    x = np.array([0.0, 0.1, 0.3])
    t = np.array([T0, T0, T0 / 2])
    p = ThinningProfile(x, t, T0, 0.3)
    # cells: [0, 0.05], [0.05, 0.2], [0.2, 0.3] -> the thinned cell is 0.1 m of 0.3 m
    assert p.mean_loss_pct == pytest.approx(100 * 0.5 * 0.1 / 0.3)
    assert p.lost_area_mm2 == pytest.approx(1.0 * 100.0)
    assert stats.describe(p.segment_lengths_m).nobs == 3


def test_loss_under_each_transducer_is_read_on_its_footprint():
    # Flat 40 mm patch centred on the transmitter (x = 0): its flat bottom (|x| <= 10 mm) covers
    # the whole 3.5 mm disc, so the loss under it is the full depth (exact); the receiver at
    # L = 300 mm is 280 mm from the patch: no loss. A Gaussian pit centred 8 mm before the
    # receiver with sigma = 5 mm: the deepest footprint point is the node nearest the pit, the
    # outermost Gauss-Chebyshev node at a cos(pi / 16) = 3.43 mm from the disc centre, with the
    # loss d exp(-(8 - 3.43)^2 / 50) (Gaussian, closed form; 1e-3 relative covers the linear
    # interpolation on the 0.1 mm grid). With radius 0 the footprint is the disc centre, read
    # as the profile's end sample (end value held), 0.05 mm before L.
    a = 3.5e-3
    p = build_profile(X, T0, [PatchSpec("flat", 0.0, 0.040)], max_loss_pct=30.0, path_length_m=L,
                      transducer_radius_m=a)
    assert p.loss_under_tx_mm == pytest.approx(0.6, rel=1e-12)
    assert p.loss_under_rx_mm == 0.0
    g = build_profile(X, T0, [PatchSpec("gaussian", L - 0.008, 0.020)], max_loss_pct=30.0, path_length_m=L,
                      transducer_radius_m=a)
    u_outer = np.cos(np.pi / 16)  # outermost Gauss-Chebyshev node of 15, in units of the radius
    assert g.loss_under_rx_mm == pytest.approx(0.6 * math.exp(-((8.0 - 3.5 * u_outer) ** 2) / 50.0), rel=1e-3)
    g0 = build_profile(X, T0, [PatchSpec("gaussian", L - 0.008, 0.020)], max_loss_pct=30.0, path_length_m=L)
    # the profile is scaled to its deepest sample, 0.05 mm off the pit centre: d / exp(-0.05^2 / 50)
    assert g0.loss_under_rx_mm == pytest.approx(0.6 * math.exp(-(7.95**2 - 0.05**2) / 50.0), rel=1e-9)
    for q in (p, g, g0):
        assert max(q.loss_under_tx_mm, q.loss_under_rx_mm) <= q.max_loss_mm + 1e-12


@pytest.mark.parametrize("at", ["transmitter", "receiver"])
def test_a_site_at_a_transducer_may_reach_past_the_disc(at):
    # The first patch of a site placed at a transducer keeps its centre (a tenth of a patch from
    # the path end here) instead of being pulled a half-length into the path; a path site is.
    rng = np.random.default_rng(0)
    frac = 0.005 / L if at == "transmitter" else 1 - 0.005 / L
    site = sample_site(rng, path_length_m=L, shape="flat", sides="one", n_patches=1, length_m=0.05,
                       position_fraction=frac, position_range=(0.1, 0.9), at=at)
    assert site[0].centre_m == pytest.approx(frac * L, abs=1e-15)
    path = sample_site(np.random.default_rng(0), path_length_m=L, shape="flat", sides="one", n_patches=1,
                       length_m=0.05, position_fraction=frac, position_range=(0.1, 0.9))
    assert path[0].centre_m == pytest.approx(0.025 if at == "transmitter" else L - 0.025, abs=1e-15)
    with pytest.raises(ValueError, match="at must be one of path, transmitter, receiver"):
        sample_site(rng, path_length_m=L, shape="flat", sides="one", n_patches=1, length_m=0.05,
                    position_fraction=0.5, position_range=(0.1, 0.9), at="web")
