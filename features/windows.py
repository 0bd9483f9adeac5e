"""Mode windows: where each fundamental mode's direct packet can arrive in a family's record.

One statement of the windows for everyone who needs them: the feature extractor gates
them, the quality gate checks that a record holds them, and the family schema refuses an
``acquisition.record_length`` that cannot (:func:`samples_needed`).

The functions take the family duck-typed (``excitation``, ``path``, ``acquisition``,
``domain``, ``nominal_thickness_m``, ``build_material()``, ``fingerprint``), so
:mod:`features.family` can call them from its own validator.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from waneguide.features.dispersion import fundamental_dispersion

__all__ = ["ModeWindow", "mode_windows", "excitation_band_hz", "samples_needed", "MODES"]

#: The modes the extractor gates, in record order.
MODES = ("S0", "A0")


@dataclass(frozen=True)
class ModeWindow:
    """Time window [s after trigger] in which one mode's direct packet can arrive."""

    mode: str
    start_s: float
    stop_s: float
    fastest_m_s: float
    slowest_m_s: float

    def end_sample(self, sample_rate_hz: float, pretrigger_s: float) -> int:
        """Number of samples a record needs to hold the whole window: ceil((stop + pretrigger) fs)."""
        return int(math.ceil((self.stop_s + pretrigger_s) * sample_rate_hz))

    def indices(self, sample_rate_hz: float, pretrigger_s: float, n_samples: int) -> tuple[int, int]:
        """[start, stop) sample indices, clipped to the record."""
        i0 = int(np.floor((self.start_s + pretrigger_s) * sample_rate_hz))
        i1 = self.end_sample(sample_rate_hz, pretrigger_s)
        return max(0, min(i0, n_samples)), max(0, min(i1, n_samples))


def excitation_band_hz(family) -> tuple[float, float]:
    """Main lobe of the excitation spectrum, f0 (1 -+ 2 / cycles) (Hann burst of N cycles:
    first spectral zeros at f0 +- 2 f0 / N; Harris 1978, Proc. IEEE 66(1), 51, Hann main-lobe
    half-width 2 bins of the window length), floored at 0.2 f0."""
    f0 = family.excitation.centre_frequency_hz
    half = 2.0 / family.excitation.cycles
    return max(0.2 * f0, f0 * (1.0 - half)), f0 * (1.0 + half)


_WINDOW_CACHE: dict = {}


def mode_windows(family, *, velocity_margin: float = 0.03) -> dict[str, ModeWindow]:
    """S0 and A0 arrival windows from the dispersion curves, the path length and the excitation band.

    Fastest arrival: the largest group velocity in the band at nominal thickness,
    raised by ``velocity_margin`` (temperature span and curve error). Slowest: the
    smallest group velocity in the band over thicknesses from nominal down to
    nominal x (1 - max_loss/2) (the deepest path-averaged loss of the domain, taken as
    half the deepest local loss), lowered by the margin. The window then runs from
    the fastest arrival of the burst start to the slowest arrival of its end, with a
    quarter of the burst duration added on each side; S0's end is cut where A0's
    window starts if they would overlap.
    """
    key = (family.fingerprint, float(velocity_margin))
    if key not in _WINDOW_CACHE:
        _WINDOW_CACHE[key] = _mode_windows(family, velocity_margin)
    return dict(_WINDOW_CACHE[key])


def _mode_windows(family, velocity_margin):
    mat = family.build_material()
    d0 = family.nominal_thickness_m
    lo, hi = excitation_band_hz(family)
    f = np.linspace(lo, hi, 41)
    loss = family.domain.max_loss_pct[1] / 100.0
    d = d0 * np.linspace(1.0 - 0.5 * loss, 1.0, 6)
    curves = fundamental_dispersion(mat, d, f)
    burst = family.excitation.cycles / family.excitation.centre_frequency_hz
    L = family.path_length_m
    out: dict[str, ModeWindow] = {}
    for mode in MODES:
        vg = curves.group_velocity_m_s[:, curves.mode_index(mode), :]
        v_fast = float(np.nanmax(vg[-1])) * (1.0 + velocity_margin)
        v_slow = float(np.nanmin(vg)) * (1.0 - velocity_margin)
        out[mode] = ModeWindow(mode, L / v_fast - 0.25 * burst, L / v_slow + 1.25 * burst, v_fast, v_slow)
    s0, a0 = out["S0"], out["A0"]
    if s0.stop_s > a0.start_s:
        cut = max(a0.start_s, s0.start_s + 1.5 * burst)
        out["S0"] = ModeWindow("S0", s0.start_s, cut, s0.fastest_m_s, s0.slowest_m_s)
    return out


def samples_needed(family, sample_rate_hz: float | None = None, pretrigger_s: float | None = None) -> dict[str, int]:
    """Samples a record needs to hold each mode's whole window (default: the family's acquisition)."""
    acq = family.acquisition
    fs = acq.sample_rate_hz if sample_rate_hz is None else float(sample_rate_hz)
    pre = acq.pretrigger_s if pretrigger_s is None else float(pretrigger_s)
    return {mode: w.end_sample(fs, pre) for mode, w in mode_windows(family).items()}
