"""Rayleigh-Lamb dispersion of a free, isotropic, traction-free plate.

Plate of thickness d = 2h. With p^2 = w^2/c_L^2 - k^2 and q^2 = w^2/c_T^2 - k^2
the Rayleigh-Lamb frequency equations are (Graff 1975, eq. 8.1.29; Rose 1999, eq. 8.20)

    symmetric:      tan(qh)/tan(ph) = -4 k^2 p q / (q^2 - k^2)^2
    antisymmetric:  tan(qh)/tan(ph) = -(q^2 - k^2)^2 / (4 k^2 p q)

They are solved (:mod:`features._lamb_roots`) in a form free of poles and of complex
arithmetic. Clearing the tangents and dividing by q (symmetric) or p (antisymmetric) gives

    G_S = (q^2 - k^2)^2 C(p^2) S(q^2) + 4 k^2 T(p^2) C(q^2) = 0
    G_A = (q^2 - k^2)^2 S(p^2) C(q^2) + 4 k^2 C(p^2) T(q^2) = 0

with the entire, real functions of x = p^2 or q^2

    C(x) = cos(sqrt(x) h),  S(x) = sin(sqrt(x) h)/sqrt(x),  T(x) = sqrt(x) sin(sqrt(x) h),

which turn into cosh/sinh when x < 0 (p or q imaginary: phase velocity below c_L
or c_T). Each term carries one function of p^2 and one of q^2, so the whole
expression is scaled by exp(-(|Im p| + |Im q|) h) to stay finite at large
frequency-thickness without changing its sign.

Algorithm, for every (thickness, frequency) point at once:

1. sample G_S and G_A on a wavenumber grid 0 <= k <= k_max (k = 0 included, so
   roots just above a cut-off are bracketed);
2. refine every sign change by vectorised bisection to machine precision;
3. group velocity from the implicit-function theorem, c_g = -dG/dk / dG/dw,
   with the analytic partial derivatives;
4. check completeness: at each frequency the number of forward roots (c_g > 0)
   minus backward roots (c_g < 0) of a family equals one plus the number of
   that family's cut-offs below the frequency. Points that fail (two roots in
   one grid cell, e.g. the near-coincident S1/S2 cut-offs of aluminium) are
   re-sampled on finer grids;
5. label: within a family the branches w_n(k) never cross, so at a fixed
   frequency the n-th forward root in decreasing k is mode n. A backward root
   (c_g < 0, between a zero-group-velocity point and its cut-off) belongs to
   the forward root just above it in k and is labelled with a trailing ``b``
   (``S1b``).

Cut-offs (k = 0) in closed form: symmetric at fd = n c_T (n = 1, 2, ...) and
fd = (2n + 1) c_L / 2; antisymmetric at fd = (2n + 1) c_T / 2 and fd = n c_L
(Graff 1975, sec. 8.1; i.e. fd = m c_T / 2 and m c_L / 2 shared between families).
The closed-form pieces (cut-offs, Rayleigh and Kirchhoff velocities) are in
:mod:`features._lamb_closed_form`; this module holds the curves' container and the two
public solvers.

References
----------
K. F. Graff, *Wave Motion in Elastic Solids*, Dover, 1975, ch. 8.
J. L. Rose, *Ultrasonic Waves in Solid Media*, Cambridge University Press, 1999, ch. 8.
I. A. Viktorov, *Rayleigh and Lamb Waves*, Plenum, 1967.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Iterable, Sequence

import numpy as np
import pandas as pd

from waneguide.core.errors import InputError
from waneguide.core.validation import validate_positive_array
from waneguide.features._lamb_closed_form import (
    cutoff_frequency_thickness,
    kirchhoff_a0_phase_velocity,
    rayleigh_velocity,
    viktorov_rayleigh_velocity,
)
from waneguide.features._lamb_roots import k_upper, mode_labels, mode_sort_key, polish_roots, scan_roots, solve_family
from waneguide.features.materials import Material

__all__ = [
    "DispersionCurves",
    "lamb_dispersion",
    "fundamental_dispersion",
    "rayleigh_velocity",
    "viktorov_rayleigh_velocity",
    "cutoff_frequency_thickness",
    "kirchhoff_a0_phase_velocity",
    "DISPERSION_COLUMNS",
]

DISPERSION_COLUMNS = (
    "mode",
    "frequency_hz",
    "fd_mhz_mm",
    "phase_velocity_m_s",
    "group_velocity_m_s",
    "wavenumber_rad_m",
)


@dataclass(frozen=True)
class DispersionCurves:
    """Lamb-wave dispersion curves on a thickness x frequency grid.

    Attributes
    ----------
    material : Material
    thickness_m : ndarray, shape (T,)
    frequency_hz : ndarray, shape (F,)
    modes : tuple of str, length M
        ``S0, A0, S1, A1, ...``; backward-wave branches end in ``b``.
    wavenumber_rad_m, phase_velocity_m_s, group_velocity_m_s : ndarray, shape (T, M, F)
        NaN where the mode does not propagate.
    """

    material: Material
    thickness_m: np.ndarray
    frequency_hz: np.ndarray
    modes: tuple[str, ...]
    wavenumber_rad_m: np.ndarray
    phase_velocity_m_s: np.ndarray
    group_velocity_m_s: np.ndarray

    def mode_index(self, mode: str) -> int:
        """Index of ``mode`` in :attr:`modes`."""
        try:
            return self.modes.index(mode)
        except ValueError:
            raise InputError(f"mode {mode!r} is not among the computed modes {list(self.modes)}; "
                             "ask for one of those (or widen the frequency range).") from None

    def to_frame(self, thickness_index: int = 0):
        """Long table with :data:`DISPERSION_COLUMNS`, one row per mode and frequency."""
        d = self.thickness_m[thickness_index]
        rows = []
        for m, name in enumerate(self.modes):
            k = self.wavenumber_rad_m[thickness_index, m]
            ok = np.isfinite(k)
            if not ok.any():
                continue
            f = self.frequency_hz[ok]
            rows.append(
                pd.DataFrame(
                    {
                        "mode": name,
                        "frequency_hz": f,
                        "fd_mhz_mm": f * d * 1e-3,  # Hz*m -> MHz*mm is a factor 1e-6 * 1e3
                        "phase_velocity_m_s": self.phase_velocity_m_s[thickness_index, m, ok],
                        "group_velocity_m_s": self.group_velocity_m_s[thickness_index, m, ok],
                        "wavenumber_rad_m": k[ok],
                    }
                )
            )
        if not rows:
            return pd.DataFrame(columns=list(DISPERSION_COLUMNS))
        return pd.concat(rows, ignore_index=True)[list(DISPERSION_COLUMNS)]


def _prepare(material, thickness_m, frequency_hz):
    if not isinstance(material, Material):
        raise TypeError(f"material must be a Material; got {type(material).__name__}.")
    d = validate_positive_array(thickness_m, "thickness_m", unit="m")
    f = validate_positive_array(frequency_hz, "frequency_hz", unit="Hz",
                                hint="Frequencies must be above 0 Hz.")
    return d, f


def lamb_dispersion(
    material: Material,
    thickness_m: float | Sequence[float] | np.ndarray,
    frequency_hz: float | Sequence[float] | np.ndarray,
    *,
    modes: Iterable[str] | None = None,
    grid_points: int = 192,
) -> DispersionCurves:
    """Every Lamb mode of a free plate at the given thicknesses and frequencies.

    Parameters
    ----------
    material : Material
    thickness_m : float or array, shape (T,)
        Plate thickness(es) [m].
    frequency_hz : float or array, shape (F,)
        Frequencies [Hz], all > 0.
    modes : iterable of str, optional
        Keep only these labels (e.g. ``("S0", "A0")``); default all found.
    grid_points : int, default 192
        Wavenumber samples per point before refinement.

    Returns
    -------
    DispersionCurves
        Arrays of shape (T, M, F), NaN where a mode does not propagate.

    Examples
    --------
    >>> from features import get_material, lamb_dispersion
    >>> al = get_material("al-6061-t6")
    >>> c = lamb_dispersion(al, 2e-3, [100e3, 500e3])
    >>> c.modes[:2]
    ('S0', 'A0')
    """
    d, f = _prepare(material, thickness_m, frequency_hz)
    grid_points = int(grid_points)
    if grid_points < 16:
        raise InputError(f"grid_points must be at least 16 (wavenumber samples per point); got {grid_points}.")
    T, F = d.size, f.size
    D, FF = np.meshgrid(d, f, indexing="ij")
    w = 2.0 * np.pi * FF.ravel()
    h = 0.5 * D.ravel()
    cr = rayleigh_velocity(material)

    found: dict[str, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}
    chunk = max(1, 2_000_000 // (grid_points + 1))
    for family in ("S", "A"):
        parts = []
        for start in range(0, w.size, chunk):
            sl = slice(start, start + chunk)
            p, k, cg = solve_family(family, material, w[sl], h[sl], cr, grid_points)
            parts.append((p + start, k, cg))
        p = np.concatenate([x[0] for x in parts])
        k = np.concatenate([x[1] for x in parts])
        cg = np.concatenate([x[2] for x in parts])
        lab = mode_labels(family, p, k, cg)
        for name in np.unique(lab):
            sel = lab == name
            found[str(name)] = (p[sel], k[sel], cg[sel])

    names = sorted(found, key=mode_sort_key)
    if modes is not None:
        wanted = list(modes)
        names = [n for n in wanted if n in found] + [n for n in wanted if n not in found]
    M = len(names)
    K = np.full((M, T * F), np.nan)
    CG = np.full((M, T * F), np.nan)
    for m, name in enumerate(names):
        if name not in found:
            continue
        p, k, cg = found[name]
        K[m, p] = k
        CG[m, p] = cg
    with np.errstate(divide="ignore", invalid="ignore"):
        CP = np.where(K > 0, w[None, :] / K, np.inf)
    CP = np.where(np.isnan(K), np.nan, CP)
    shape = lambda a: a.reshape(M, T, F).transpose(1, 0, 2).copy()  # noqa: E731
    return DispersionCurves(material, d, f, tuple(names), shape(K), shape(CP), shape(CG))


def fundamental_dispersion(
    material: Material,
    thickness_m: float | Sequence[float] | np.ndarray,
    frequency_hz: float | Sequence[float] | np.ndarray,
    *,
    grid_points: int = 48,
) -> DispersionCurves:
    """S0 and A0 only, on a thickness x frequency grid (fast path for the simulator).

    Searches only the band of phase velocity that S0 and A0 can occupy
    (below the plate velocity) and keeps the largest-wavenumber root of each
    family, which is always the fundamental mode.
    """
    d, f = _prepare(material, thickness_m, frequency_hz)
    T, F = d.size, f.size
    D, FF = np.meshgrid(d, f, indexing="ij")
    w = 2.0 * np.pi * FF.ravel()
    h = 0.5 * D.ravel()
    cl, ct = material.cl_m_s, material.ct_m_s
    cr = rayleigh_velocity(material)
    k_lo = w / (material.plate_velocity_m_s * 1.001)
    k_hi = k_upper(material, cr, w, 2 * h)
    K = np.full((2, w.size), np.nan)
    CG = np.full((2, w.size), np.nan)
    for m, family in enumerate(("S", "A")):
        grid = grid_points
        todo = np.arange(w.size)
        for _ in range(4):
            pi, k = scan_roots(family, w[todo], h[todo], cl, ct, k_lo[todo], k_hi[todo], grid)
            if pi.size:
                # largest k per point: roots come ordered by grid cell within a point
                last = np.r_[np.flatnonzero(np.diff(pi)), pi.size - 1]
                K[m, todo[pi[last]]] = k[last]
            missing = todo[np.isnan(K[m, todo])]
            if missing.size == 0:
                break
            todo, grid = missing, grid * 4
        ok = np.isfinite(K[m])
        K[m, ok], CG[m, ok] = polish_roots(family, K[m, ok], w[ok], h[ok], cl, ct)
        if not ok.all():
            warnings.warn(f"{family}0 root not found at {np.sum(~ok)} point(s).", RuntimeWarning, stacklevel=2)
    CP = w[None, :] / K
    shape = lambda a: a.reshape(2, T, F).transpose(1, 0, 2).copy()  # noqa: E731
    return DispersionCurves(material, d, f, ("S0", "A0"), shape(K), shape(CP), shape(CG))
