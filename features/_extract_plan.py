"""What the feature extractor precomputes for one record layout (sample rate, pre-trigger, length).

A plan holds, per mode, the gate of the mode window, the FFT length, the excitation-band
bins and sub-bands, the single-bin DFT row at the centre frequency and the Wilcox
compensation operator for the candidate thicknesses; and, across the S0-to-A0 window,
the gate and FFT length of the stretch and spectral-peak features, the stretch limit and
the envelope decimation. Built once per layout by :func:`build_plan` and reused for every
chunk (:mod:`features._extract_core` does the per-capture arithmetic).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.fft as sfft

from waneguide.core.errors import InputError
from waneguide.features.compensation import CompensationOperator, candidate_thicknesses
from waneguide.features.dispersion import fundamental_dispersion
from waneguide.features.family import Family
from waneguide.features.signals import tukey_gate
from waneguide.features.temperature import ThermalModel
from waneguide.features.thickness_gauge import BaselineThicknessGauge
from waneguide.features.windows import MODES, ModeWindow, excitation_band_hz

__all__ = ["ModePlan", "Plan", "build_plan"]

#: Points of the compensated-distance grid of each mode.
COMP_POINTS = 128
#: Fraction of a window given to each raised-cosine taper of its gate.
TAPER_FRACTION = 0.1
#: Shortest mode window the features are computed on [samples].
MIN_WINDOW_SAMPLES = 16


@dataclass
class ModePlan:
    mode: str
    start: int
    stop: int
    gate: np.ndarray
    n_fft: int
    band_bins: np.ndarray
    sub_bands: tuple[np.ndarray, np.ndarray, np.ndarray]
    dft: np.ndarray
    max_lag: int
    operator: CompensationOperator
    vg_candidates: np.ndarray
    step_m: float


@dataclass
class Plan:
    sample_rate_hz: float
    pretrigger_s: float
    n_samples: int
    modes: dict[str, ModePlan]
    sig_start: int
    sig_stop: int
    sig_gate: np.ndarray
    sig_n_fft: int
    max_stretch: float
    burst_centre_s: float
    peak_half_width: int
    edge_half_width: int
    stride: int
    centre_frequency_hz: float
    s0_coefficient_per_k: float
    a0_over_s0_ratio: float
    a0_gauge: BaselineThicknessGauge | None = None


def _mode_plan(family: Family, mode: str, w: ModeWindow, fs: float, pre: float, n: int, stride: int,
               thickness_grid: tuple[float, float, float]) -> ModePlan:
    f0 = family.excitation.centre_frequency_hz
    cycles = family.excitation.cycles
    lo, hi = excitation_band_hz(family)
    cand, j_nom = candidate_thicknesses(family.nominal_thickness_m, *thickness_grid)
    burst_centre = cycles / (2.0 * f0)
    i0, i1 = w.indices(fs, pre, n)
    length = i1 - i0
    if length < MIN_WINDOW_SAMPLES:
        raise InputError(
            f"the {mode} window ({w.start_s * 1e6:.1f} to {w.stop_s * 1e6:.1f} us) holds only {length} "
            f"samples of a {n}-sample record at {fs:g} Hz (at least {MIN_WINDOW_SAMPLES} needed); the record is "
            f"too short for family {family.name!r}. Record at least {family.acquisition.record_length} samples."
        )
    gate = tukey_gate(length, 0, length, taper_samples=int(TAPER_FRACTION * length))
    n_fft = stride * sfft.next_fast_len(-(-2 * length // stride), real=True)
    f_bins = np.arange(n_fft // 2 + 1) * fs / n_fft
    band = np.flatnonzero((f_bins >= lo) & (f_bins <= hi))
    half = 1.0 / cycles
    subs = tuple(
        np.flatnonzero((f_bins >= f0 * (1 + a * half)) & (f_bins < f0 * (1 + b * half)))
        for a, b in ((-1.5, -0.5), (-0.5, 0.5), (0.5, 1.5))
    )
    t_seg0 = i0 / fs - pre
    dft = np.exp(-2j * np.pi * (f0 / fs) * (i0 + np.arange(length)))
    curves = fundamental_dispersion(family.build_material(), cand, np.r_[f_bins[band], f0])
    m = curves.mode_index(mode)
    k = curves.wavenumber_rad_m[:, m, :-1]
    vg = curves.group_velocity_m_s[:, m, -1]
    x = vg[j_nom] * (np.linspace(w.start_s, w.stop_s, COMP_POINTS) - burst_centre)
    op = CompensationOperator.build(
        band_frequency_hz=f_bins[band], wavenumber_rad_m=k, thickness_m=cand, distance_m=x,
        path_length_m=family.path_length_m, segment_start_s=t_seg0, burst_centre_s=burst_centre,
        nominal_index=j_nom,
    )
    return ModePlan(mode, i0, i1, gate, n_fft, band, subs, dft, max(1, length // 2), op, vg,
                    float(cand[1] - cand[0]))


def build_plan(family: Family, windows: dict[str, ModeWindow], thermal: ThermalModel, fs: float, pre: float,
               n: int, *, thickness_grid: tuple[float, float, float]) -> Plan:
    """The plan of records with ``n`` samples at ``fs`` [Hz] and pre-trigger ``pre`` [s]."""
    f0 = family.excitation.centre_frequency_hz
    cycles = family.excitation.cycles
    burst_centre = cycles / (2.0 * f0)
    # envelope decimation D: the analytic signal is evaluated every D samples by folding
    # its spectrum below fs / D (exact for content below fs / D; D keeps fs / D >= 8 f0)
    stride = max(1, int(fs / (8.0 * f0)))
    modes = {mode: _mode_plan(family, mode, windows[mode], fs, pre, n, stride, thickness_grid) for mode in MODES}
    s0, a0 = modes["S0"], modes["A0"]
    f_a0 = np.arange(a0.n_fft // 2 + 1) * fs / a0.n_fft
    gauge = BaselineThicknessGauge(family, thermal, f_a0[a0.band_bins], a0.start / fs - pre)
    sig_start, sig_stop = s0.start, max(s0.stop, a0.stop)
    sig_len = sig_stop - sig_start
    sig_gate = tukey_gate(sig_len, 0, sig_len, taper_samples=int(TAPER_FRACTION * sig_len / 2))
    env = family.environment
    s0_coeff = thermal.relative_coefficient_per_k("S0")
    # stretch search limit: the S0 thermal stretch over the environment span, with 25 % margin
    max_stretch = 1.25 * abs(s0_coeff) * (env.max_temperature_c - env.min_temperature_c)
    burst_samples = cycles / f0 * fs
    return Plan(fs, pre, n, modes, sig_start, sig_stop, sig_gate,
                sfft.next_fast_len(2 * sig_len, real=True), max(max_stretch, 0.004), burst_centre,
                max(1, int(burst_samples / 8 / stride)), max(0, int(burst_samples / 14 / stride)), stride,
                f0, s0_coeff, thermal.a0_over_s0_ratio, gauge)
