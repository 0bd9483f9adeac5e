"""Temperature: thermal model, baseline signal stretch, optimal baseline selection."""
from __future__ import annotations

import numpy as np
import pytest

from waneguide.features.extractor import FeatureExtractor
from waneguide.features.signals import mode_windows
from waneguide.features.temperature import (
    ThermalModel,
    baseline_stretch,
    s0_low_frequency_coefficient_per_k,
    select_baseline,
)

from _feature_synth import synth_record


def _bandlimited_stretch(x, fs, pre, a, origin, start, stop):
    """x(origin + (t - origin) / a) on samples [start, stop) (zero elsewhere), evaluated from
    the record's DFT terms (bins above 1e-7 of the peak): exact for a band-limited record."""
    n = x.size
    X = np.fft.rfft(x)
    f = np.fft.rfftfreq(n, 1 / fs)
    keep = np.abs(X) > 1e-7 * np.abs(X).max()
    t = np.arange(start, stop) / fs - pre
    ts = origin + (t - origin) / a + pre  # time since the first sample
    terms = X[keep][None, :] * np.exp(2j * np.pi * f[keep][None, :] * ts[:, None])
    w = np.where((f[keep] == 0) | (f[keep] == fs / 2), 1.0, 2.0)
    out = np.zeros(n)
    out[start:stop] = (terms * w).real.sum(-1) / n
    return out


def test_thermal_model_matches_low_frequency_s0_coefficient(family_fb2):
    # S0 well below the first cut-off moves at the plate velocity sqrt(E/(rho(1-nu^2)))
    # (Graff 1975, sec. 8.1), so (1/t) dt/dT -> -(alpha + E'/E)/2 (temperature module
    # docstring). At 0.3 MHz mm S0 is slightly dispersive: 5 % tolerance (common practice, no source;
    # this code is 0.8 % off, a regression value).
    tm = ThermalModel(family_fb2)
    expected = s0_low_frequency_coefficient_per_k(family_fb2.build_material())
    # 2024-T3 (ASM Handbook vol. 2, from memory): alpha = 23.2e-6 /K, E = 73.1 GPa, E' = -36 MPa/K, so
    # -(23.2e-6 - 36e6 / 73.1e9) / 2 = 2.346e-4 /K by hand; rel 1e-3 covers the quoted digits
    assert expected == pytest.approx(2.346e-4, rel=1e-3)
    assert tm.relative_coefficient_per_k("S0") == pytest.approx(expected, rel=0.05)
    # warmer is slower for both modes
    assert tm.shift_per_k("S0") > 0 and tm.shift_per_k("A0") > 0


def test_stretch_removes_uniform_temperature_change(family_fb2):
    # issue 4 check: a uniform temperature change applied as a stretch is removed to a
    # residual well below what a 10 % thinning leaves (issue 4 asks for "well below"; the factor 1/20 is
    # common practice, no source). The stretch factor is recovered to 2e-5, the S0 thermal stretch of
    # 0.1 K (2.35e-4 /K x 0.1 K; the 0.1 K is common practice, no source); the unstretched residual above
    # 0.05 shows the stretch mattered and the stretched one below 1e-3 that it is removed (both common
    # practice, no source).
    fam = family_fb2
    fs, pre = fam.acquisition.sample_rate_hz, fam.acquisition.pretrigger_s
    base = synth_record(fam)
    coeff = s0_low_frequency_coefficient_per_k(fam.build_material())
    a_true = 1.0 + coeff * 15.0  # +15 K
    t_c = fam.excitation.cycles / (2 * fam.excitation.centre_frequency_hz)
    w = mode_windows(fam)
    i0 = w["S0"].indices(fs, pre, base.size)[0]
    i1 = w["A0"].indices(fs, pre, base.size)[1]
    warm = _bandlimited_stretch(base, fs, pre, a_true, t_c, i0, i1)
    thin = synth_record(fam, thickness_m=0.9 * fam.nominal_thickness_m)
    kw = dict(sample_rate_hz=fs, pretrigger_s=pre, start=i0, stop=i1, max_stretch=0.025, origin_s=t_c)
    r = baseline_stretch(np.stack([warm, thin]), np.stack([base, base]), **kw)
    assert r.factor[0] == pytest.approx(a_true, abs=2e-5)
    assert r.unstretched_residual[0] > 0.05  # the stretch mattered
    assert r.residual[0] < r.residual[1] / 20
    assert r.residual[0] < 1e-3


def test_physical_temperature_change_sign_and_size(family_fb2):
    # issue 4 check: an S0-only record built at T and T + 20 K from the material model
    # (E(T), rho(T), expansion of path and thickness) stretches by the S0 coefficient
    # per kelvin: sign positive (slower when warmer), size within 5 % (S0 dispersion at 0.3 MHz mm;
    # common practice, no source)
    fam = family_fb2
    fs, pre = fam.acquisition.sample_rate_hz, fam.acquisition.pretrigger_s
    base = synth_record(fam, temperature_c=10.0, amplitudes=(1.0, 0.0))
    warm = synth_record(fam, temperature_c=30.0, amplitudes=(1.0, 0.0))
    w = mode_windows(fam)
    i0, i1 = w["S0"].indices(fs, pre, base.size)
    t_c = fam.excitation.cycles / (2 * fam.excitation.centre_frequency_hz)  # stretch about the burst centre
    r = baseline_stretch(warm[None], base[None], sample_rate_hz=fs, pretrigger_s=pre, start=i0, stop=i1,
                         max_stretch=0.02, origin_s=t_c)
    per_k = (r.factor[0] - 1.0) / 20.0
    coeff = s0_low_frequency_coefficient_per_k(fam.build_material())
    assert per_k > 0
    assert per_k == pytest.approx(coeff, rel=0.05)


def test_optimal_baseline_selection_picks_nearest_temperature_state(family_fb2):
    # Croxford et al. 2010 (OBS): among baselines at 0, 20, 40 degC the one whose
    # stretched residual is smallest is chosen; for a 22 degC capture that is 20 degC (no threshold:
    # the ordering of the residuals is checked)
    fam = family_fb2
    fs, pre = fam.acquisition.sample_rate_hz, fam.acquisition.pretrigger_s
    temps = [0.0, 20.0, 40.0]
    baselines = np.stack([synth_record(fam, temperature_c=t) for t in temps])
    cap = synth_record(fam, temperature_c=22.0)
    w = mode_windows(fam)
    i0 = w["S0"].indices(fs, pre, cap.size)[0]
    i1 = w["A0"].indices(fs, pre, cap.size)[1]
    idx, res = select_baseline(cap, baselines, temps, 22.0, sample_rate_hz=fs, pretrigger_s=pre, start=i0,
                               stop=i1, max_stretch=0.025)
    assert idx == 1
    assert res[1] < res[0] and res[1] < res[2]


def test_differential_shift_cancels_temperature(family_fb2):
    # A0 - r S0 (r from the thermal model) cancels a pure temperature change to a small
    # fraction of what 10 % thinning gives (thinning moves A0, S0 barely: S0 is nearly
    # blind to thickness at low frequency-thickness, Rose 1999 ch. 8). Limits: a fifth of the raw
    # thermal A0 shift, a twentieth of the thinning signal, a tenth for the model-corrected shift
    # (common practice, no source; this code gives 0.08, 0.007 and 0.06, regression values)
    fam = family_fb2
    base = synth_record(fam, temperature_c=20.0, noise_v=1e-3, rng=1)
    warm = synth_record(fam, temperature_c=35.0, noise_v=1e-3, rng=2)
    thin = synth_record(fam, thickness_m=0.9 * fam.nominal_thickness_m, noise_v=1e-3, rng=3)
    df = FeatureExtractor(fam).extract_batch(np.stack([warm, thin]), base, temperature_c=[35.0, 20.0],
                                             baseline_temperature_c=20.0)
    d_warm, d_thin = df["a0_s0_differential_shift_s"]
    raw_warm = df["a0_shift_envelope_s"][0]
    assert abs(d_warm) < 0.2 * abs(raw_warm)
    assert abs(d_warm) < 0.05 * abs(d_thin)
    # the material-model correction also removes the temperature part of the A0 shift
    assert abs(df["a0_shift_corrected_s"][0]) < 0.1 * abs(raw_warm)
