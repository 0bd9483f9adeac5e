"""Synthetic S0/A0 captures for the feature tests, built from the Rayleigh-Lamb curves.

Test helper only (the simulator proper lives in training/, which features tests do
not import). A Hann tone burst is propagated along each mode with
U(w) = F(w) exp(-i k(w) L) (features.compensation.dispersive_propagate); temperature
enters through Material.at_temperature and the expansion of path and thickness.
"""
from __future__ import annotations

import numpy as np

from waneguide.features.capture import Capture
from waneguide.features.compensation import dispersive_propagate
from waneguide.features.dispersion import fundamental_dispersion
from waneguide.features.signals import tone_burst

F_GRID = np.linspace(5e3, 800e3, 800)


def synth_record(family, *, thickness_m=None, temperature_c=20.0, amplitudes=(0.3, 1.0), noise_v=0.0,
                 rng=None, path_length_m=None, n_samples=None):
    """Record [V] on the family's time axis: S0 and A0 over the path, plus white noise."""
    mat = family.build_material()
    fs = family.acquisition.sample_rate_hz
    pre = family.acquisition.pretrigger_s
    n = n_samples or family.acquisition.record_length
    d = family.nominal_thickness_m if thickness_m is None else thickness_m
    e = mat.expansion_factor(temperature_c)
    m = mat.at_temperature(temperature_c)
    c = fundamental_dispersion(m, [d * e], F_GRID)
    b = tone_burst(family.excitation.centre_frequency_hz, family.excitation.cycles, fs, n_samples=n,
                   pretrigger_s=pre)
    L = (family.path_length_m if path_length_m is None else path_length_m) * e
    y = np.zeros(n)
    for j, amp in enumerate(amplitudes):
        if amp:
            y += amp * dispersive_propagate(b, fs, F_GRID, c.wavenumber_rad_m[0, j], L)
    if noise_v:
        y = y + np.random.default_rng(rng).normal(scale=noise_v, size=n)
    return y


def synth_capture(family, *, path_id="P01", source=None, **kwargs) -> Capture:
    t = kwargs.get("temperature_c", 20.0)
    return Capture(
        amplitude_v=synth_record(family, **kwargs),
        sample_rate_hz=family.acquisition.sample_rate_hz,
        pretrigger_s=family.acquisition.pretrigger_s,
        path_id=path_id,
        captured_at="2026-03-01T10:15:00Z",
        temperature_c=t,
        excitation_khz=family.excitation.centre_frequency_khz,
        cycles=family.excitation.cycles,
        source=source,
    )
