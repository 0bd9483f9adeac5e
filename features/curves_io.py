"""Dispersion curves for people: the CSV table and the plot behind ``waneguide dispersion``."""
from __future__ import annotations

import math
from pathlib import Path

import matplotlib
import numpy as np
from matplotlib.figure import Figure

from waneguide.core.atomic import atomic_path
from waneguide.core.errors import InputError
from waneguide.core.validation import validate_positive_scalar
from waneguide.features.dispersion import DISPERSION_COLUMNS, DispersionCurves, lamb_dispersion
from waneguide.features.materials import Material, resolve_material

__all__ = ["compute_dispersion_table", "write_dispersion_csv", "plot_dispersion"]

MAX_POINTS = 20_000
#: Highest frequency-thickness product traced [MHz mm]. About one new mode pair per
#: (c_T / 2) ~ 1.5 MHz mm in aluminium (cut-offs n c_T / 2, Graff 1975 sec. 8.1), so 100 MHz mm is
#: already ~130 modes; guided-wave monitoring works below ~10 MHz mm (common practice, no source).
MAX_FD_MHZ_MM = 100.0


def compute_dispersion_table(
    material: str | Path | Material,
    *,
    thickness_mm: float,
    fmax_khz: float,
    points: int = 500,
    temperature_c: float | None = None,
) -> DispersionCurves:
    """All Lamb modes of a plate from ``fmax/points`` up to ``fmax`` [edge units: mm, kHz, degC].

    Raises
    ------
    InputError
        For a non-positive or non-finite thickness or fmax, fewer than 2 or more than
        20,000 points, or a temperature outside the material's validity range.
    """
    mat = resolve_material(material)
    t_mm = validate_positive_scalar(thickness_mm, "--thickness-mm", unit="mm", hint="Give the plate thickness, e.g. 2.0.")
    f_khz = validate_positive_scalar(fmax_khz, "--fmax-khz", unit="kHz", hint="Give the highest frequency, e.g. 1000.")
    if f_khz * 1e-3 * t_mm > MAX_FD_MHZ_MM:
        raise InputError(f"--fmax-khz x --thickness-mm = {f_khz * 1e-3 * t_mm:g} MHz mm is above the {MAX_FD_MHZ_MM:g} "
                         "MHz mm traced here; give a lower --fmax-khz (e.g. 1000 for a 2 mm plate).")
    if isinstance(points, bool) or not isinstance(points, (int, np.integer)) or not 2 <= points <= MAX_POINTS:
        raise InputError(f"--points must be a whole number from 2 to {MAX_POINTS}; got {points!r}.")
    thickness_m = t_mm * 1e-3
    if temperature_c is not None:
        if not math.isfinite(float(temperature_c)):
            raise InputError(f"--temperature-c must be a finite number; got {temperature_c!r}.")
        thickness_m *= mat.expansion_factor(temperature_c)
        mat = mat.at_temperature(temperature_c)
    fmax_hz = f_khz * 1e3
    freqs = np.linspace(fmax_hz / points, fmax_hz, int(points))
    return lamb_dispersion(mat, thickness_m, freqs)


def write_dispersion_csv(curves: DispersionCurves, path: str | Path) -> Path:
    """CSV with exactly :data:`DISPERSION_COLUMNS`, one row per mode and frequency (atomic)."""
    frame = curves.to_frame(0)
    with atomic_path(path) as tmp:
        frame.to_csv(tmp, index=False, columns=list(DISPERSION_COLUMNS), float_format="%.10g", lineterminator="\n")
    return Path(path)


def plot_dispersion(curves: DispersionCurves, path: str | Path, *, thickness_index: int = 0) -> Path:
    """PNG with phase and group velocity against frequency-thickness, every mode labelled.

    Drawn on a bare :class:`matplotlib.figure.Figure` (no pyplot, no global backend change).
    """
    frame = curves.to_frame(thickness_index)
    fig = Figure(figsize=(11, 4.5))
    axes = fig.subplots(1, 2, sharex=True)
    colors = matplotlib.rcParams["axes.prop_cycle"].by_key()["color"]
    for i, (mode, g) in enumerate(frame.groupby("mode", sort=False)):
        style = "-" if mode.startswith("S") else "--"
        c = colors[i % len(colors)]
        for ax, col in zip(axes, ("phase_velocity_m_s", "group_velocity_m_s")):
            ax.plot(g.fd_mhz_mm, g[col] / 1e3, style, color=c, label=mode, lw=1.4)
            j = len(g) // 2
            ax.annotate(mode, (g.fd_mhz_mm.iloc[j], g[col].iloc[j] / 1e3), fontsize=8, color=c)
    m = curves.material
    axes[0].set_ylim(0, min(12.0, 2.2 * m.cl_m_s / 1e3))
    axes[1].set_ylim(min(0.0, float(np.nanmin(frame.group_velocity_m_s)) / 1e3 * 1.1), 1.1 * m.cl_m_s / 1e3)
    axes[0].set_ylabel("phase velocity [km/s]")
    axes[1].set_ylabel("group velocity [km/s]")
    for ax in axes:
        ax.set_xlabel("frequency x thickness [MHz mm]")
        ax.grid(alpha=0.3)
    axes[1].legend(fontsize=8, ncol=2, loc="lower right")
    fig.suptitle(f"Rayleigh-Lamb dispersion, {m.name}, d = {curves.thickness_m[thickness_index] * 1e3:.3f} mm")
    fig.tight_layout()
    with atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=110, format="png")
    return Path(path)
