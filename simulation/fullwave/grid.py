"""Grid design and guard rails of the full-wave solver.

One square cell size ``dx = dz`` and one time step ``dt``. The rules (each refused with an
:class:`~waneguide.core.errors.InputError` by :func:`check_grid`, each obeyed by
:func:`design_grid`):

CFL limit
    The second-order velocity-stress staggered scheme in 2-D is stable for
    ``c_L dt sqrt(1/dx^2 + 1/dz^2) <= 1``, i.e. ``dt <= dx / (c_L sqrt(2))`` for ``dx = dz``
    (Virieux 1986, Geophysics 51, 889, stability condition of the P-SV scheme). The
    EFIT half-density surface nodes keep the same bound (a lumped half cell does not raise
    the largest eigenvalue of the discrete operator, Gershgorin). :func:`design_grid` runs at
    ``COURANT`` = 0.9 of the limit (common practice, no source).
Wall resolution
    At least ``MIN_WALL_CELLS`` = 15 cells through the nominal wall and ``MIN_LIGAMENT_CELLS``
    = 5 through the thinnest remaining ligament (issue 10: these keep A0 delays within
    1-2 %). The nominal wall must be a whole number of cells, so the free surfaces sit
    exactly on the nominal faces. Measured here (tests/test_fullwave.py, 2 mm 6061 plate,
    two receivers 40 mm apart): the A0 group velocity at 150 kHz errs by -0.60 % at 10
    cells, -0.31 % at 14 and -0.15 % at 20 (falling as dx^2); S0 by under 0.02 %.
Wavelength resolution (design rule, not refused)
    ``CELLS_PER_WAVELENGTH`` cells per shortest wavelength, the shortest wavelength being
    ``c_min / f_max`` with ``c_min`` the A0 phase velocity at ``f_max`` in the thinnest
    ligament (A0 is the slowest wave a free plate carries: its phase velocity lies below
    the Rayleigh and shear velocities, Graff 1975 sec. 8.1) and ``f_max`` the frequency
    above which the drive stays below -40 dB of its peak. Basis: the 1-D dispersion
    relation of the second-order staggered scheme, ``sin(w dt / 2) / dt = c sin(k dx / 2)
    / (dx / 2)``, gives a group-velocity error of about ``(k dx)^2 (1 - nu^2) / 8`` (nu the
    Courant number of that wave); at 12 cells per wavelength (``k dx = 0.52``) that is below
    3.5 % at ``f_max``, where the drive holds 1 % of its amplitude, and 4x smaller at half
    ``f_max`` where its energy is. For the walls and bands of the demo families the wall
    rule (15 cells) is the one that binds.

Absorbing ends
    Convolutional PML (CPML; Komatitsch and Martin 2007, Geophysics 72, SM155, eqs. 9-11)
    with ``kappa = 1``, damping ``d(s) = d0 (s / L)^2``, ``d0 = -3 c_L ln(R) / (2 L)``,
    ``R = 1e-6``, frequency shift ``alpha(s) = pi f_0 (1 - s / L)`` (their profiles;
    ``f_0`` the peak of the drive), over ``npml`` columns at each x-end: at least 40 and
    ``PML_WAVELENGTHS`` = 0.75 S0 wavelengths at the lowest burst frequency. A plain CPML
    on the x-derivatives alone is unstable in a plate here (a slow, short-wavelength
    symmetric disturbance grows deep in the layer, in float64 too, after a few thousand
    steps); damping the z-derivatives as well with ``MPML_RATIO`` = 0.05 of the profile
    (the multiaxial PML of Meza-Fajardo and Papageorgiou 2008, Bull. Seismol. Soc. Am. 98,
    1811) keeps it stable (150,000 steps tried; 0.02 was still unstable) at the cost of a
    small reflection, which the longer layer keeps down. Measured on a 2 mm plate with 15
    cells (5-cycle bursts, pin-force pair 30 mm apart, layers 10 mm beyond the discs,
    against an echo-free run): with the default layer for 100 kHz (306 columns, 41 mm)
    -81 dB at 100 kHz, -93 dB at 150 kHz, -100 dB at 250 kHz; 200 columns at one end gave
    -73, -86, -105 dB; 40 columns (5 mm) only -30 to -39 dB. tests/test_fullwave.py checks
    -60 dB.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from waneguide.core.errors import InputError
from waneguide.features.dispersion import fundamental_dispersion
from waneguide.features.materials import Material

__all__ = [
    "GridSpec",
    "design_grid",
    "check_grid",
    "cfl_limit_s",
    "cpml_coefficients",
    "MIN_WALL_CELLS",
    "MIN_LIGAMENT_CELLS",
    "CELLS_PER_WAVELENGTH",
    "COURANT",
    "NPML_MIN",
    "PML_WAVELENGTHS",
    "MPML_RATIO",
    "pml_columns",
    "PML_REFLECTION",
]

MIN_WALL_CELLS = 15
MIN_LIGAMENT_CELLS = 5
CELLS_PER_WAVELENGTH = 12.0
COURANT = 0.9
#: Absorbing layer: at least NPML_MIN columns and PML_WAVELENGTHS S0 wavelengths at the lowest
#: burst frequency per end; nominal reflection coefficient of the damping profile; ratio of the
#: z-damping to the x-damping (multiaxial PML). Chosen by measurement (module docstring).
NPML_MIN = 40
PML_WAVELENGTHS = 0.75
PML_REFLECTION = 1e-6
MPML_RATIO = 0.05
_WHOLE_CELL_TOL = 1e-6


@dataclass(frozen=True)
class GridSpec:
    """A full-wave grid.

    Attributes
    ----------
    dx_m : float
        Square cell size (dx = dz) [m].
    dt_s : float
        Time step [s].
    npml : int
        CPML columns at each absorbing x-end.
    basis : str
        What set ``dx_m`` (filled in by :func:`design_grid`).
    """

    dx_m: float
    dt_s: float
    npml: int = NPML_MIN
    basis: str = "given"

    def courant(self, cl_m_s: float) -> float:
        """``c_L dt sqrt(2) / dx``: 1 at the CFL limit."""
        return cl_m_s * self.dt_s * math.sqrt(2.0) / self.dx_m


def cfl_limit_s(dx_m: float, cl_m_s: float) -> float:
    """Largest stable time step ``dx / (c_L sqrt(2))`` of the 2-D staggered scheme (Virieux 1986) [s]."""
    return dx_m / (cl_m_s * math.sqrt(2.0))


def _shortest_wavelength_m(material: Material, thickness_m: float, f_max_hz: float) -> tuple[float, float]:
    curves = fundamental_dispersion(material, thickness_m, f_max_hz)
    cp_a0 = float(curves.phase_velocity_m_s[0, 1, 0])
    c_min = min(cp_a0, material.ct_m_s) if math.isfinite(cp_a0) else material.ct_m_s
    return c_min / f_max_hz, c_min


def design_grid(material: Material, nominal_thickness_m: float, f_max_hz: float, *,
                min_thickness_m: float | None = None, sample_rate_hz: float | None = None,
                cells_per_wavelength: float = CELLS_PER_WAVELENGTH, min_wall_cells: int = MIN_WALL_CELLS,
                courant: float = COURANT, f_low_hz: float | None = None,
                npml: int | None = None) -> GridSpec:
    """The coarsest grid that obeys every rule of the module docstring.

    Parameters
    ----------
    material : Material
        At the simulated temperature.
    nominal_thickness_m : float
        Nominal wall [m]; becomes a whole number of cells.
    f_max_hz : float
        Highest frequency to resolve [Hz] (drive below -40 dB above it).
    min_thickness_m : float, optional
        Thinnest remaining ligament [m] (default: the nominal wall).
    sample_rate_hz : float, optional
        Acquisition rate; ``dt`` is then made ``1 / (m fs)`` for a whole ``m``, so the
        records are every m-th step.
    cells_per_wavelength, min_wall_cells, courant
        The rules' constants (defaults of the module).
    f_low_hz : float, optional
        Lowest burst centre frequency: sets the absorbing layer (:func:`pml_columns`).
    npml : int, optional
        Absorbing columns per end (overrides ``f_low_hz``).
    """
    t = float(nominal_thickness_m)
    t_min = t if min_thickness_m is None else float(min_thickness_m)
    if not (t > 0 and 0 < t_min <= t * (1 + 1e-12)):
        raise InputError(f"design_grid: need 0 < min_thickness_m <= nominal_thickness_m; got {t_min!r} and {t!r} m.")
    if not f_max_hz > 0:
        raise InputError(f"design_grid: f_max_hz must be positive; got {f_max_hz!r}.")
    lam_min, c_min = _shortest_wavelength_m(material, t_min, f_max_hz)
    candidates = {
        f"{cells_per_wavelength:g} cells per shortest wavelength ({lam_min * 1e3:.3f} mm: A0 at "
        f"{f_max_hz / 1e3:.0f} kHz in {t_min * 1e3:.3f} mm, {c_min:.0f} m/s)": lam_min / cells_per_wavelength,
        f"{min_wall_cells} cells through the nominal wall": t / min_wall_cells,
        f"{MIN_LIGAMENT_CELLS} cells through the thinnest ligament ({t_min * 1e3:.3f} mm)": t_min / MIN_LIGAMENT_CELLS,
    }
    basis, h = min(candidates.items(), key=lambda kv: kv[1])
    n_wall = int(math.ceil(t / h * (1 - 1e-12)))
    dx = t / n_wall
    dt = courant * cfl_limit_s(dx, material.cl_m_s)
    if sample_rate_hz is not None:
        m = int(math.ceil(1.0 / (float(sample_rate_hz) * dt)))
        dt = 1.0 / (m * float(sample_rate_hz))
    if npml is None:
        npml = pml_columns(dx, material.plate_velocity_m_s, f_low_hz)
    return GridSpec(dx_m=dx, dt_s=dt, npml=int(npml), basis=f"{basis}: dx = wall / {n_wall}")


def check_grid(grid: GridSpec, material: Material, nominal_thickness_m: float, *,
               min_thickness_m: float | None = None, f_max_hz: float | None = None,
               sample_rate_hz: float | None = None) -> GridSpec:
    """Refuse a grid that breaks a rule of the module docstring (InputError naming the rule and a grid that works)."""
    t = float(nominal_thickness_m)
    t_min = t if min_thickness_m is None else float(min_thickness_m)
    dx, dt = float(grid.dx_m), float(grid.dt_s)

    def fix() -> str:
        if f_max_hz is None:
            return f"use dx_m <= {t / MIN_WALL_CELLS:.4g} m with dt_s <= dx_m / (c_L sqrt 2)"
        g = design_grid(material, t, f_max_hz, min_thickness_m=t_min, sample_rate_hz=sample_rate_hz)
        return f"design_grid would give dx_m={g.dx_m:.4g} m, dt_s={g.dt_s:.4g} s ({g.basis})"

    if not (math.isfinite(dx) and dx > 0 and math.isfinite(dt) and dt > 0):
        raise InputError(f"grid: dx_m and dt_s must be positive finite numbers; got dx_m={dx!r}, dt_s={dt!r}. {fix()}.")
    if grid.npml < 0:
        raise InputError(f"grid: npml must be 0 or more; got {grid.npml!r}.")
    limit = cfl_limit_s(dx, material.cl_m_s)
    if dt > limit * (1 + 1e-12):
        raise InputError(
            f"grid: dt_s={dt:.4g} s breaks the CFL limit of the 2-D staggered scheme dt <= dx/(c_L sqrt 2) "
            f"(Virieux 1986) = {limit:.4g} s for dx_m={dx:.4g} m and c_L={material.cl_m_s:.0f} m/s (Courant "
            f"{grid.courant(material.cl_m_s):.3f} > 1): the run would blow up. Use dt_s <= {limit:.4g} s; {fix()}."
        )
    cells = t / dx
    if cells < MIN_WALL_CELLS * (1 - 1e-9):
        raise InputError(
            f"grid: dx_m={dx:.4g} m puts {cells:.2f} cells through the nominal wall of {t * 1e3:.3f} mm; at least "
            f"{MIN_WALL_CELLS} are needed (fewer let the A0 delay err by more than 1-2 %). {fix()}."
        )
    if abs(cells - round(cells)) > _WHOLE_CELL_TOL * cells:
        n = int(round(cells))
        raise InputError(
            f"grid: the nominal wall of {t * 1e3:.4f} mm is {cells:.3f} cells of dx_m={dx:.4g} m; it must be a whole "
            f"number so the free surfaces sit on the nominal faces. Use dx_m = {t / n:.6g} or {t / (n + 1):.6g} m."
        )
    if t_min / dx < MIN_LIGAMENT_CELLS * (1 - 1e-9):
        raise InputError(
            f"grid: dx_m={dx:.4g} m puts {t_min / dx:.2f} cells through the thinnest remaining ligament of "
            f"{t_min * 1e3:.3f} mm; at least {MIN_LIGAMENT_CELLS} are needed. Use dx_m <= "
            f"{t_min / MIN_LIGAMENT_CELLS:.4g} m (a whole fraction of the wall); {fix()}."
        )
    if sample_rate_hz is not None:
        m = 1.0 / (float(sample_rate_hz) * dt)
        if abs(m - round(m)) > 1e-6 * m:
            raise InputError(
                f"grid: dt_s={dt:.6g} s must divide the acquisition sample period 1/{sample_rate_hz:g} Hz a whole number "
                f"of times (got {m:.4f}); use dt_s = {1.0 / (math.ceil(m) * sample_rate_hz):.6g} s."
            )
    return grid


def cpml_coefficients(nx: int, npml: int, dx_m: float, dt_s: float, cl_m_s: float, f0_hz: float,
                      reflection: float = PML_REFLECTION, ratio_z: float = MPML_RATIO, dtype=np.float64):
    """CPML recursion coefficients per column: ``(a, b)`` at faces and centres for x, then for z.

    Faces sit at ``x = (i + 1) dx``, centres at ``(i + 1/2) dx`` (column i). Inside the
    absorbing columns ``psi <- b psi + a dF`` (Komatitsch and Martin 2007, eqs. 9-11,
    kappa = 1): ``b = exp(-(d + alpha) dt)``, ``a = d (b - 1) / (d + alpha)``; the
    z-differences use ``ratio_z d`` (multiaxial PML). Elsewhere ``a = 0, b = 1``.
    """
    out = []
    width = max(npml, 1) * dx_m
    d0 = -3.0 * cl_m_s * math.log(reflection) / (2.0 * width) if npml > 0 else 0.0
    for ratio in (1.0, ratio_z):
        for shift in (1.0, 0.5):
            x = (np.arange(nx) + shift) * dx_m
            s = np.zeros(nx)
            if npml > 0:
                s = np.maximum(np.maximum(width - x, x - (nx - npml) * dx_m), 0.0) / width
            d = ratio * d0 * s**2
            alpha = np.where(s > 0, math.pi * f0_hz * (1.0 - s), 0.0)
            b = np.exp(-(d + alpha) * dt_s)
            with np.errstate(invalid="ignore", divide="ignore"):
                a = np.where(d > 0, d * (b - 1.0) / (d + alpha), 0.0)
            out += [a.astype(dtype), b.astype(dtype)]
    return tuple(out)


def pml_columns(dx_m: float, plate_velocity_m_s: float, f_low_hz: float | None) -> int:
    """Absorbing columns per end: ``PML_WAVELENGTHS`` S0 wavelengths at ``f_low_hz``, at least ``NPML_MIN``."""
    if f_low_hz is None:
        return NPML_MIN
    return max(NPML_MIN, int(math.ceil(PML_WAVELENGTHS * plate_velocity_m_s / f_low_hz / dx_m)))
