"""Wilcox (2003) dispersion compensation and the sharpest-thickness search.

A Hann burst is propagated along A0 over a known distance with the Rayleigh-Lamb
wavenumbers (U = F exp(-i k L)); compensation must give the excitation back.
"""
from __future__ import annotations

import numpy as np
import pytest

from waneguide.features.compensation import dispersive_propagate, measure_packets, wilcox_compensate
from waneguide.features.dispersion import fundamental_dispersion
from waneguide.features.extractor import FeatureExtractor
from waneguide.features.signals import hilbert_envelope, tone_burst

from _feature_synth import F_GRID, synth_record


def _fwhm_s(env, fs):
    return np.sum(env >= 0.5 * env.max()) / fs


@pytest.fixture(scope="module")
def a0_case(family_fb2):
    fam = family_fb2
    fs, pre = fam.acquisition.sample_rate_hz, fam.acquisition.pretrigger_s
    f0, cyc = fam.excitation.centre_frequency_hz, fam.excitation.cycles
    c = fundamental_dispersion(fam.build_material(), [fam.nominal_thickness_m], F_GRID)
    k = c.wavenumber_rad_m[0, 1]
    burst = tone_burst(f0, cyc, fs, n_samples=fam.acquisition.record_length, pretrigger_s=pre)
    L = fam.path_length_m
    y = dispersive_propagate(burst, fs, F_GRID, k, L)
    vg0 = float(np.interp(f0, F_GRID, c.group_velocity_m_s[0, 1]))
    return fam, fs, pre, f0, cyc, k, burst, y, L, vg0


def test_a0_packet_is_dispersed_before_compensation(a0_case):
    fam, fs, pre, f0, cyc, k, burst, y, L, vg0 = a0_case
    # sanity of the synthetic case: A0 at 0.3 MHz mm over 300 mm widens the 5-cycle
    # burst's envelope by about 11 % (regression value of this code), so the 10 % recompression check
    # below is not void; 8 % leaves room below it
    assert _fwhm_s(hilbert_envelope(y), fs) > 1.08 * _fwhm_s(hilbert_envelope(burst), fs)


@pytest.mark.parametrize("distance_m", [0.3, 1.0])
def test_wilcox_recompresses_to_excitation_duration(a0_case, distance_m):
    # issue 4 check (Wilcox 2003, IEEE Trans. UFFC 50(4) 419): the compensated packet
    # has the excitation's duration (distance width / group velocity at f0) within 10 %,
    # and sits at the propagation distance + v_g x burst centre (module docstring, eq. 2).
    # At 1 m the raw A0 packet is far wider than 10 % over the excitation. The 10 % is the acceptance
    # figure of issue 4 (a project requirement); recompression must also remove at least two thirds of
    # the widening, and the position holds to 1 % (common practice, no source; this code gives 0.6 % in
    # width and 1e-4 in position, regression values).
    fam, fs, pre, f0, cyc, k, burst, _, _, vg0 = a0_case
    L = distance_m
    y = dispersive_propagate(burst, fs, F_GRID, k, L)
    raw_ratio = _fwhm_s(hilbert_envelope(y), fs) / _fwhm_s(hilbert_envelope(burst), fs)
    x, h = wilcox_compensate(y, fs, F_GRID, k, pretrigger_s=pre, band_hz=(0.4 * f0, 1.6 * f0))
    m = measure_packets(np.abs(h)[None, :], x)
    width_s = m.width_m[0] / vg0
    excitation_s = _fwhm_s(hilbert_envelope(burst), fs)
    assert abs(width_s / excitation_s - 1) < 0.10
    assert abs(width_s / excitation_s - 1) < abs(raw_ratio - 1) / 3
    # position: within 1 % of L + v_g t_c (t_c = cycles / (2 f0))
    assert m.position_m[0] == pytest.approx(L + vg0 * cyc / (2 * f0), rel=0.01)


def test_extractor_operator_agrees_with_literal_wilcox(family_fb2):
    # the extractor's direct evaluation of eq. (2) and the FFT/interpolation form of the
    # paper must give the same packet: position within 1 mm, width within 3 % (the literal form
    # interpolates the spectrum linearly; both limits common practice, no source); this code gives
    # 0.24 mm and 0.2 % (regression values). The packet sits at the path length to 2 mm (0.7 % of
    # 300 mm; common practice, no source).
    fam = family_fb2
    y = synth_record(fam, amplitudes=(0.0, 1.0))
    ex = FeatureExtractor(fam)
    row = ex.extract_batch(y[None], y[None], temperature_c=20.0, baseline_temperature_c=20.0).iloc[0]
    c = fundamental_dispersion(fam.build_material(), [fam.nominal_thickness_m], F_GRID)
    x, h = wilcox_compensate(y, fam.acquisition.sample_rate_hz, F_GRID, c.wavenumber_rad_m[0, 1],
                             pretrigger_s=fam.acquisition.pretrigger_s, band_hz=(90e3, 210e3))
    m = measure_packets(np.abs(h)[None, :], x)
    vg0 = float(np.interp(150e3, F_GRID, c.group_velocity_m_s[0, 1]))
    literal_position = m.position_m[0] - vg0 * 5 / (2 * 150e3)
    assert row["a0_comp_position_m"] == pytest.approx(literal_position, abs=1e-3)
    assert row["a0_comp_width_m"] == pytest.approx(m.width_m[0], rel=0.03)
    assert row["a0_comp_position_m"] == pytest.approx(fam.path_length_m, abs=2e-3)


@pytest.mark.parametrize("true_fraction", [1.0, 0.9, 0.8, 0.7])
def test_sharpest_thickness_search_returns_true_thickness(family_fb2, true_fraction):
    # issue 4 check: a packet dispersed along A0 of a plate of known thickness over the
    # known path is refocused best by that thickness's curve -- within 1 % (the acceptance figure of
    # issue 4, a project requirement), with a focus above 0.95 (1 = perfectly recompressed; common
    # practice, no source; this code gives > 0.9999, a regression value)
    fam = family_fb2
    d_true = fam.nominal_thickness_m * true_fraction
    y = synth_record(fam, thickness_m=d_true, amplitudes=(0.3, 1.0), noise_v=1e-3, rng=5)
    base = synth_record(fam, amplitudes=(0.3, 1.0), noise_v=1e-3, rng=6)
    row = FeatureExtractor(fam).extract_batch(y[None], base[None], temperature_c=20.0,
                                              baseline_temperature_c=20.0).iloc[0]
    assert row["a0_sharpest_thickness_m"] == pytest.approx(d_true, rel=0.01)
    assert row["a0_comp_focus"] > 0.95
