"""The conventional estimate: what a practitioner does without machine learning.

1. Measure the arrival-time shift of one mode (A0 by default) against the baseline
   (envelope peak: a group delay, the quantity the group-velocity inversion needs;
   the cross-correlation follows the carrier, i.e. the phase velocity).
2. Correct it for temperature with the material's coefficients: subtract the shift
   that the temperature difference alone would cause on the sound plate
   (:class:`features.temperature.ThermalModel`: expansion of path and thickness,
   dE/dT and density).
3. Invert through the dispersion curve: if the whole path had one effective
   thickness d, its arrival would be L / v_g(f0, d), so

       L / v_g(f0, d) = L / v_g(f0, d0) + corrected shift

   is solved for d on a table of v_g(f0, d) (Rayleigh-Lamb, reference temperature),
   and the path-averaged loss is 100 (1 - d / d0) %.

The estimate assumes uniform thinning along the path; a short deep patch shows as
a shallow path-averaged loss. It is the reference the models are benchmarked
against, on the same captures.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from waneguide.core.errors import InputError
from waneguide.features.dispersion import fundamental_dispersion
from waneguide.features.family import Family
from waneguide.features.temperature import ThermalModel

__all__ = ["ConventionalInversion", "conventional_estimate", "conventional_estimate_frame", "CONVENTIONAL_COLUMNS"]

CONVENTIONAL_COLUMNS = ("mean_loss_pct", "effective_thickness_m", "corrected_shift_s", "thermal_shift_s", "in_table")


@dataclass
class ConventionalInversion:
    """Precomputed slowness table of one mode for a family (vectorised inversion).

    Parameters
    ----------
    family : Family
    mode : {"A0", "S0"}
    thickness_range : (lo, hi)
        Table span as fractions of nominal thickness.
    """

    family: Family
    mode: str = "A0"
    thickness_range: tuple[float, float] = (0.3, 1.2)

    def __post_init__(self):
        if self.mode not in ("A0", "S0"):
            raise InputError(f"mode must be 'A0' or 'S0'; got {self.mode!r}.")
        fam = self.family
        self.thermal = ThermalModel(fam)
        d0 = fam.nominal_thickness_m
        self.d_table = d0 * np.linspace(self.thickness_range[0], self.thickness_range[1], 181)
        curves = fundamental_dispersion(fam.build_material(), self.d_table, [fam.excitation.centre_frequency_hz])
        vg = curves.group_velocity_m_s[:, curves.mode_index(self.mode), 0]
        self.slowness_table = 1.0 / vg
        self.path_length_m = fam.path_length_m
        slow0 = 1.0 / float(np.interp(d0, self.d_table, vg))
        self.nominal_slowness = slow0
        ds = np.diff(self.slowness_table)
        if not (np.all(ds < 0) or np.all(ds > 0)):
            raise InputError(
                f"{self.mode} group slowness at {fam.excitation.centre_frequency_khz:g} kHz is not monotone in "
                "thickness over the table; the single-mode inversion is ambiguous for this family."
            )

    def invert(self, shift_s, temperature_c, baseline_temperature_c) -> pd.DataFrame:
        """Path-averaged loss for arrays of shifts [s] and temperatures [degC]."""
        shift = np.asarray(shift_s, dtype=float)
        thermal = self.thermal.thermal_shift_s(self.mode, temperature_c, baseline_temperature_c)
        corrected = shift - thermal
        slow = self.nominal_slowness + corrected / self.path_length_m
        tab_s, tab_d = self.slowness_table, self.d_table
        if tab_s[0] > tab_s[-1]:
            tab_s, tab_d = tab_s[::-1], tab_d[::-1]
        inside = (slow >= tab_s[0]) & (slow <= tab_s[-1])
        d = np.interp(slow, tab_s, tab_d)
        d = np.where(np.isfinite(slow), d, np.nan)
        d0 = self.family.nominal_thickness_m
        return pd.DataFrame({
            "mean_loss_pct": 100.0 * (1.0 - d / d0),
            "effective_thickness_m": d,
            "corrected_shift_s": corrected,
            "thermal_shift_s": np.broadcast_to(thermal, corrected.shape),
            "in_table": inside,
        })


def conventional_estimate(family: Family, *, shift_s: float, temperature_c: float,
                          baseline_temperature_c: float, mode: str = "A0") -> dict:
    """Conventional path-averaged loss of one capture (dict with :data:`CONVENTIONAL_COLUMNS`).

    ``in_table`` is False when the corrected shift falls outside the table (the loss
    is then clamped to the table's edge: 120 % or 30 % of nominal thickness).
    """
    inv = ConventionalInversion(family, mode)
    row = inv.invert(np.atleast_1d(shift_s), np.atleast_1d(temperature_c),
                     np.atleast_1d(baseline_temperature_c)).iloc[0]
    return {k: (bool(v) if k == "in_table" else float(v)) for k, v in row.items()}


def conventional_estimate_frame(family: Family, features: pd.DataFrame, *, mode: str = "A0",
                                shift_column: str | None = None) -> pd.DataFrame:
    """The conventional estimate for every row of a feature table (same index)."""
    col = shift_column or f"{mode.lower()}_shift_envelope_s"
    for c in (col, "capture_temperature_c", "baseline_temperature_c"):
        if c not in features.columns:
            raise InputError(f"feature table has no column {c!r} (the conventional estimate reads {col!r} and "
                             "the capture and baseline temperatures); build it with features.extractor.")
    inv = ConventionalInversion(family, mode)
    out = inv.invert(features[col].to_numpy(float), features["capture_temperature_c"].to_numpy(float),
                     features["baseline_temperature_c"].to_numpy(float))
    out.index = features.index
    return out
