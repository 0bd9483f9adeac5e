"""The flange cross-section on the grid: metal and void cells, EFIT coefficients, surface nodes.

Coordinates: ``x`` along the path (0 at the transmitter centre, as in
:mod:`waneguide.simulation.profiles`), ``z`` through the thickness (0 on the bottom
surface, the nominal top surface at ``z = t``; the transducers sit on the top surface).
Cell faces lie on whole multiples of ``dx`` in both directions, so ``x = 0`` and both
nominal surfaces are faces.

A cell is metal when its centre lies inside ``bottom_loss(x) < z < t - top_loss(x)``
(the loss surfaces are resolved to the nearest face: a staircase, as in any EFIT grid).
Outside the metal the cells are void: zero density and stiffness.

Material averaging (Fellinger et al. 1995, Wave Motion 21, 47): the density at a
velocity node is the arithmetic mean of the two cells sharing the face; the shear modulus
at a corner is the harmonic mean of the four cells around it (0 as soon as one is void);
lambda and mu at a cell centre are the cell's own. A velocity node with two void cells
and a stress node in a void cell never move, so the metal's boundary is stress-free
(vacuum formulation).

Rows: two void rows below the metal and one above (the kernel leaves the outermost row
and column untouched; the top-surface vz nodes belong to the last metal row, the
bottom-surface ones to the void row under the metal). Columns: absorbing ends run the nominal plate through ``npml`` CPML
columns; free ends put two void columns beyond the flange end.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from waneguide.core.errors import InputError
from waneguide.features.materials import Material

from .grid import MIN_LIGAMENT_CELLS, GridSpec, cpml_coefficients

__all__ = ["Plate", "build_plate", "loss_on_columns"]

_PAD_ROWS_BELOW = 2  # ring row + one void row (the bottom-surface vz nodes sit between them and the metal)
_PAD_ROWS_ABOVE = 1  # ring row only: the top-surface vz nodes sit on the last metal row
_PAD_VOID_COLUMNS = 2


@dataclass(frozen=True, eq=False)
class Plate:
    """A discretised flange (see module docstring). Built by :func:`build_plate`.

    Attributes
    ----------
    material : Material
    grid : GridSpec
    nominal_thickness_m : float
    x0_m : float
        x of the left edge of column 0 [m]; column i spans ``x0 + [i, i + 1] dx``.
    metal : ndarray of bool, shape (nz, nx)
    npml : int
        Absorbing columns per end (0 for free ends).
    ends : {"absorbing", "free"}
    coeffs : tuple of 5 float64 arrays (nz, nx)
        ``bx, bz, l2m, lam, mu`` pre-multiplied by ``dt / dx``.
    """

    material: Material
    grid: GridSpec
    nominal_thickness_m: float
    x0_m: float
    metal: np.ndarray
    npml: int
    ends: str
    coeffs: tuple = field(repr=False)

    @property
    def shape(self) -> tuple[int, int]:
        return self.metal.shape

    @property
    def dx_m(self) -> float:
        return self.grid.dx_m

    @property
    def n_cells(self) -> int:
        """Cells the kernel updates per step (rows x columns inside the untouched outer ring)."""
        nz, nx = self.shape
        return (nz - 2) * (nx - 2)

    @property
    def n_metal_cells(self) -> int:
        return int(self.metal.sum())

    def top_row(self) -> np.ndarray:
        """Highest metal row per column (-1 where a column holds no metal)."""
        nz = self.shape[0]
        has = self.metal.any(axis=0)
        top = nz - 1 - np.argmax(self.metal[::-1, :], axis=0)
        return np.where(has, top, -1)

    def bottom_row(self) -> np.ndarray:
        """Lowest metal row per column (-1 where a column holds no metal)."""
        has = self.metal.any(axis=0)
        return np.where(has, np.argmax(self.metal, axis=0), -1)

    def cpml(self, f0_hz: float, dtype) -> tuple:
        return cpml_coefficients(self.shape[1], self.npml, self.dx_m, self.grid.dt_s, self.material.cl_m_s,
                                 f0_hz, dtype=dtype)

    # -- energy (tests) -----------------------------------------------------------------
    def energy(self, v_a: tuple, v_b: tuple, stress: tuple) -> float:
        """Discrete energy ``1/2 v_a . M v_b + 1/2 sigma . S sigma`` per unit width [J/m].

        With ``v_a, v_b`` the velocities (vx, vz) at two consecutive half steps and
        ``stress`` = (sxx, szz, sxz) at the step between them this is exactly conserved by
        the leapfrog scheme in a closed lossless grid (summation by parts of the staggered
        differences; the EFIT weights make the difference operators adjoint).
        """
        mat = self.material
        h2 = self.dx_m**2
        rho = np.where(self.metal, mat.density_kg_m3, 0.0)
        rho_x = 0.5 * (rho[:, :-1] + rho[:, 1:])
        rho_z = 0.5 * (rho[:-1, :] + rho[1:, :])
        kin = 0.5 * h2 * (np.sum(rho_x * v_a[0][:, :-1] * v_b[0][:, :-1])
                          + np.sum(rho_z * v_a[1][:-1, :] * v_b[1][:-1, :]))
        lam, mu = _lame(mat)
        sxx, szz, sxz = (np.asarray(s, dtype=float) for s in stress)
        det = 4.0 * mu * (lam + mu)
        w_n = ((lam + 2 * mu) * (sxx**2 + szz**2) - 2 * lam * sxx * szz) / (2 * det)
        w_n = np.where(self.metal, w_n, 0.0)
        corner = self.metal[:-1, :-1] & self.metal[:-1, 1:] & self.metal[1:, :-1] & self.metal[1:, 1:]
        w_s = np.where(corner, sxz[:-1, :-1] ** 2 / (2 * mu), 0.0)
        return float(kin + h2 * (w_n.sum() + w_s.sum()))


def _lame(mat: Material) -> tuple[float, float]:
    mu = mat.density_kg_m3 * mat.ct_m_s**2
    lam = mat.density_kg_m3 * mat.cl_m_s**2 - 2 * mu
    return lam, mu


def loss_on_columns(x_cols_m: np.ndarray, x_m, loss_m, name: str) -> np.ndarray:
    """Loss [m] at the column centres: linear interpolation of ``loss_m`` over ``x_m``, 0 outside its range."""
    if loss_m is None:
        return np.zeros_like(x_cols_m)
    loss = np.asarray(loss_m, dtype=float)
    x = np.asarray(x_m, dtype=float)
    if loss.ndim != 1 or x.shape != loss.shape or loss.size == 0:
        raise InputError(f"{name} and x_m must be 1-D arrays of one length; got shapes {loss.shape} and {x.shape}.")
    if not (np.all(np.isfinite(loss)) and np.all(np.isfinite(x))):
        raise InputError(f"{name} and x_m must be finite.")
    if np.any(loss < 0):
        raise InputError(f"{name} must not be negative (loss depth [m] from the surface); got min {loss.min():.4g} m.")
    order = np.argsort(x, kind="stable")
    return np.interp(x_cols_m, x[order], loss[order], left=0.0, right=0.0)


def build_plate(material: Material, grid: GridSpec, nominal_thickness_m: float, *, x_start_m: float, x_end_m: float,
                x_m=None, top_loss_m=None, bottom_loss_m=None, ends: str = "absorbing") -> Plate:
    """Discretise the flange between ``x_start_m`` and ``x_end_m`` (see module docstring).

    With ``ends="absorbing"`` the span is widened to whole cells and ``grid.npml`` CPML
    columns of nominal plate follow at each end; with ``ends="free"`` the flange ends at the
    faces nearest ``x_start_m`` and ``x_end_m`` (stress-free end faces). Losses [m] are given
    at ``x_m`` (linear in between, 0 outside).
    """
    if ends not in ("absorbing", "free"):
        raise InputError(f"ends must be 'absorbing' or 'free'; got {ends!r}.")
    h = grid.dx_m
    t = float(nominal_thickness_m)
    n_wall = int(round(t / h))
    if ends == "absorbing":
        m0, m1 = math.floor(x_start_m / h + 1e-9), math.ceil(x_end_m / h - 1e-9)
        npml = int(grid.npml)
        if npml < 2:
            raise InputError(f"absorbing ends need grid.npml >= 2 CPML columns; got {grid.npml}.")
        pad = npml
    else:
        m0, m1 = round(x_start_m / h), round(x_end_m / h)
        npml, pad = 0, _PAD_VOID_COLUMNS
    if m1 - m0 < 4:
        raise InputError(f"the plate span [{x_start_m:.4g}, {x_end_m:.4g}] m is under 4 cells of {h:.4g} m.")
    nx = (m1 - m0) + 2 * pad
    nz = n_wall + _PAD_ROWS_BELOW + _PAD_ROWS_ABOVE
    x0 = m0 * h - pad * h
    xc = x0 + (np.arange(nx) + 0.5) * h
    top = loss_on_columns(xc, x_m, top_loss_m, "top_loss_m")
    bottom = loss_on_columns(xc, x_m, bottom_loss_m, "bottom_loss_m")
    zc = (np.arange(nz) - _PAD_ROWS_BELOW + 0.5) * h
    metal = (zc[:, None] > bottom[None, :]) & (zc[:, None] < t - top[None, :])
    if ends == "free":
        metal[:, :pad] = False
        metal[:, nx - pad:] = False
    inner = metal[:, pad:nx - pad]
    cells = inner.sum(axis=0)
    if cells.min() < MIN_LIGAMENT_CELLS:
        i = int(np.argmin(cells)) + pad
        raise InputError(
            f"the remaining ligament at x = {xc[i] * 1e3:.2f} mm is {cells.min()} cells of {h * 1e3:.4f} mm "
            f"(top loss {top[i] * 1e3:.3f} mm, bottom loss {bottom[i] * 1e3:.3f} mm of {t * 1e3:.3f} mm); at least "
            f"{MIN_LIGAMENT_CELLS} are needed: use a finer grid (dx_m <= {(t - top[i] - bottom[i]) / MIN_LIGAMENT_CELLS:.4g} m)"
            " or a shallower loss."
        )
    return Plate(material=material, grid=grid, nominal_thickness_m=t, x0_m=x0, metal=metal, npml=npml, ends=ends,
                 coeffs=_coefficients(material, metal, h, grid.dt_s))


def _coefficients(mat: Material, metal: np.ndarray, h: float, dt: float) -> tuple:
    lam, mu = _lame(mat)
    rho = np.where(metal, mat.density_kg_m3, 0.0)
    r = dt / h
    bx = np.zeros_like(rho)
    bz = np.zeros_like(rho)
    with np.errstate(divide="ignore"):
        rx = 0.5 * (rho[:, :-1] + rho[:, 1:])
        rz = 0.5 * (rho[:-1, :] + rho[1:, :])
        bx[:, :-1] = np.where(rx > 0, r / np.where(rx > 0, rx, 1.0), 0.0)
        bz[:-1, :] = np.where(rz > 0, r / np.where(rz > 0, rz, 1.0), 0.0)
    l2m = np.where(metal, (lam + 2 * mu) * r, 0.0)
    lm = np.where(metal, lam * r, 0.0)
    mu_c = np.zeros_like(rho)
    corner = metal[:-1, :-1] & metal[:-1, 1:] & metal[1:, :-1] & metal[1:, 1:]
    # harmonic mean of four equal moduli is the modulus; 0 when any cell is void
    mu_c[:-1, :-1] = np.where(corner, mu * r, 0.0)
    return bx, bz, l2m, lm, mu_c
