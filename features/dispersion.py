"""Rayleigh-Lamb dispersion of a free, isotropic, traction-free plate.

Plate of thickness d = 2h. With p^2 = w^2/c_L^2 - k^2 and q^2 = w^2/c_T^2 - k^2
the Rayleigh-Lamb frequency equations are (Graff 1975, eq. 8.1.29; Rose 1999, eq. 8.20)

    symmetric:      tan(qh)/tan(ph) = -4 k^2 p q / (q^2 - k^2)^2
    antisymmetric:  tan(qh)/tan(ph) = -(q^2 - k^2)^2 / (4 k^2 p q)

They are solved here in a form free of poles and of complex arithmetic. Clearing
the tangents and dividing by q (symmetric) or p (antisymmetric) gives

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

References
----------
K. F. Graff, *Wave Motion in Elastic Solids*, Dover, 1975, ch. 8.
J. L. Rose, *Ultrasonic Waves in Solid Media*, Cambridge University Press, 1999, ch. 8.
I. A. Viktorov, *Rayleigh and Lamb Waves*, Plenum, 1967.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import Iterable, Sequence

import numpy as np
from scipy.optimize import brentq

from waneguide.core.validation import validate_positive_array, validate_positive_scalar
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

_SERIES_Z = 1e-2  # |x h^2| below which dS/dx uses its Taylor series


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
            raise ValueError(f"mode {mode!r} is not among the computed modes {list(self.modes)}.") from None

    def to_frame(self, thickness_index: int = 0):
        """Long table with :data:`DISPERSION_COLUMNS`, one row per mode and frequency."""
        import pandas as pd

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


# ---------------------------------------------------------------------------
# Closed-form pieces
# ---------------------------------------------------------------------------
def rayleigh_velocity(material: Material) -> float:
    """Exact Rayleigh surface-wave velocity [m/s].

    Root xi = c_R / c_T in (0, 1) of the Rayleigh equation
    (2 - xi^2)^2 - 4 sqrt(1 - xi^2) sqrt(1 - kappa^2 xi^2) = 0, kappa = c_T / c_L
    (Viktorov 1967, eq. 1.6; Graff 1975, eq. 6.3.8).
    """
    kappa2 = (material.ct_m_s / material.cl_m_s) ** 2

    def f(xi: float) -> float:
        x2 = xi * xi
        return (2.0 - x2) ** 2 - 4.0 * math.sqrt(1.0 - x2) * math.sqrt(1.0 - kappa2 * x2)

    xi = brentq(f, 0.5, 1.0 - 1e-15, xtol=1e-15, rtol=4 * np.finfo(float).eps)
    return xi * material.ct_m_s


def viktorov_rayleigh_velocity(material: Material) -> float:
    """Viktorov's approximation c_R ~ c_T (0.87 + 1.12 nu) / (1 + nu) [m/s].

    Viktorov 1967, eq. 1.9; stated there as accurate to better than 0.5 % for
    0 < nu < 0.5 (accuracy figure quoted from memory).
    """
    nu = material.poisson_ratio
    return material.ct_m_s * (0.87 + 1.12 * nu) / (1.0 + nu)


def kirchhoff_a0_phase_velocity(material: Material, thickness_m, frequency_hz) -> np.ndarray:
    """Kirchhoff thin-plate flexural phase velocity (w^2 D / (rho d))^(1/4) [m/s].

    Graff 1975, sec. 4.2: c = sqrt(w) (D / (rho d))^(1/4), D = E d^3 / (12 (1 - nu^2)).
    """
    d = np.asarray(thickness_m, dtype=float)
    w = 2.0 * np.pi * np.asarray(frequency_hz, dtype=float)
    stiff = material.youngs_modulus_pa * d**2 / (12.0 * (1.0 - material.poisson_ratio**2) * material.density_kg_m3)
    return np.sqrt(w) * stiff**0.25


def cutoff_frequency_thickness(material: Material, fd_max_hz_m: float) -> dict[str, list[float]]:
    """Cut-off frequency-thickness products [Hz*m] below ``fd_max_hz_m``, per family.

    Symmetric: n c_T and (2n + 1) c_L / 2; antisymmetric: (2n + 1) c_T / 2 and n c_L
    (Graff 1975, sec. 8.1.3). Sorted ascending; entry i is the cut-off of mode i + 1.
    """
    ct, cl = material.ct_m_s, material.cl_m_s
    sym: list[float] = []
    anti: list[float] = []
    n = 1
    while n * ct / 2.0 < fd_max_hz_m or n * cl / 2.0 < fd_max_hz_m:
        for c in (ct, cl):
            fd = n * c / 2.0
            if fd >= fd_max_hz_m:
                continue
            # qh = n pi/2 (shear, c = ct) or ph = n pi/2 (longitudinal, c = cl):
            # even n on the shear root and odd n on the longitudinal root are symmetric.
            is_sym = (n % 2 == 0) if c is ct else (n % 2 == 1)
            (sym if is_sym else anti).append(fd)
        n += 1
    return {"S": sorted(sym), "A": sorted(anti)}


# ---------------------------------------------------------------------------
# Entire-function form of the frequency equations
# ---------------------------------------------------------------------------
def _cst(x: np.ndarray, h: np.ndarray):
    """Scaled C, S, T of x (see module docstring) and their x-derivatives.

    Returns (C, S, T, dC, dS, dT, e) with all values multiplied by exp(-e),
    e = sqrt(-x) h for x < 0 and 0 otherwise.
    """
    neg = x < 0
    r = np.sqrt(np.abs(x))
    y = r * h
    # oscillatory branch
    cos_y = np.cos(y)
    sin_y = np.sin(y)
    # decaying-scaled hyperbolic branch: cosh(y) e^-y, sinh(y) e^-y
    em2 = np.exp(-2.0 * np.where(neg, y, 0.0))
    ch = 0.5 * (1.0 + em2)
    sh = 0.5 * (1.0 - em2)
    C = np.where(neg, ch, cos_y)
    with np.errstate(divide="ignore", invalid="ignore"):
        sinc_pos = np.where(y > 1e-8, sin_y / np.where(y > 1e-8, y, 1.0), 1.0 - y * y / 6.0)
        # sinh(y) e^-y / y = -expm1(-2y) / (2y)
        sinc_neg = np.where(y > 1e-8, -np.expm1(-2.0 * y) / (2.0 * np.where(y > 1e-8, y, 1.0)), 1.0 - y)
    S = h * np.where(neg, sinc_neg, sinc_pos)
    T = np.where(neg, -r * sh, r * sin_y)
    dC = -0.5 * h * S
    dT = 0.5 * S + 0.5 * h * C
    z = x * h * h
    small = np.abs(z) < _SERIES_Z
    scale_small = np.where(neg, np.exp(-np.where(neg, y, 0.0)), 1.0)
    series = h**3 * (-1.0 / 6.0 + z / 60.0 - z * z / 1680.0 + z**3 / 90720.0) * scale_small
    with np.errstate(divide="ignore", invalid="ignore"):
        general = (h * C - S) / (2.0 * np.where(small, 1.0, x))
    dS = np.where(small, series, general)
    e = np.where(neg, y, 0.0)
    return C, S, T, dC, dS, dT, e


def _cst_values(x: np.ndarray, h: np.ndarray):
    """Scaled C, S, T of x without derivatives (the hot path of the grid scan)."""
    x, h = np.broadcast_arrays(x, h)
    neg = x < 0
    r = np.sqrt(np.abs(x))
    y = r * h
    C = np.empty_like(y)
    S = np.empty_like(y)
    T = np.empty_like(y)
    pos = ~neg
    yp, rp, hp = y[pos], r[pos], h[pos]
    cp, sp = np.cos(yp), np.sin(yp)
    C[pos] = cp
    with np.errstate(divide="ignore", invalid="ignore"):
        S[pos] = np.where(yp > 1e-8, sp / np.where(rp > 0, rp, 1.0), hp)
    T[pos] = rp * sp
    yn, rn, hn = y[neg], r[neg], h[neg]
    em2 = np.exp(-2.0 * yn)
    C[neg] = 0.5 * (1.0 + em2)
    with np.errstate(divide="ignore", invalid="ignore"):
        S[neg] = np.where(yn > 1e-8, -np.expm1(-2.0 * yn) / (2.0 * np.where(rn > 0, rn, 1.0)), hn)
    T[neg] = -rn * 0.5 * (1.0 - em2)
    return C, S, T


def _frequency_function(family: str, k, w, h, cl, ct, *, derivatives: bool = False):
    """G_S or G_A (scaled) at wavenumber k, angular frequency w, half-thickness h.

    With ``derivatives=True`` also returns dG/dk and dG/dw (same scaling).
    """
    s = k * k
    a = (w / cl) ** 2 - s  # p^2
    b = (w / ct) ** 2 - s  # q^2
    m = b - s
    m2 = m * m
    if not derivatives:
        Ca, Sa, Ta = _cst_values(a, h)
        Cb, Sb, Tb = _cst_values(b, h)
        if family == "S":
            return m2 * Ca * Sb + 4.0 * s * Ta * Cb
        return m2 * Sa * Cb + 4.0 * s * Ca * Tb
    Ca, Sa, Ta, dCa, dSa, dTa, _ = _cst(a, h)
    Cb, Sb, Tb, dCb, dSb, dTb, _ = _cst(b, h)
    if family == "S":
        g = m2 * Ca * Sb + 4.0 * s * Ta * Cb
        g_a = m2 * dCa * Sb + 4.0 * s * dTa * Cb
        g_b = 2.0 * m * Ca * Sb + m2 * Ca * dSb + 4.0 * s * Ta * dCb
        g_s = -2.0 * m * Ca * Sb + 4.0 * Ta * Cb
    else:
        g = m2 * Sa * Cb + 4.0 * s * Ca * Tb
        g_a = m2 * dSa * Cb + 4.0 * s * dCa * Tb
        g_b = 2.0 * m * Sa * Cb + m2 * Sa * dCb + 4.0 * s * Ca * dTb
        g_s = -2.0 * m * Sa * Cb + 4.0 * Ca * Tb
    # chain rule: a = w^2/cl^2 - k^2, b = w^2/ct^2 - k^2, s = k^2
    g_k = -2.0 * k * (g_a + g_b) + 2.0 * k * g_s
    g_w = 2.0 * w * (g_a / cl**2 + g_b / ct**2)
    return g, g_k, g_w


# ---------------------------------------------------------------------------
# Root finding
# ---------------------------------------------------------------------------
def _k_upper(material: Material, cr: float, w: np.ndarray, d: np.ndarray) -> np.ndarray:
    """Upper bound of the wavenumber of any propagating mode (A0 is the slowest).

    A0 stays below both the Kirchhoff flexural velocity and c_R; half of their
    minimum is a safe floor (the completeness check catches a failure).
    """
    c_floor = 0.5 * np.minimum(kirchhoff_a0_phase_velocity(material, d, w / (2 * np.pi)), cr)
    return w / c_floor


def _bisect(family, lo, hi, glo, w, h, cl, ct, *, bisections=4, illinois=16):
    """Refine brackets [lo, hi] (G(lo) = glo, sign change inside) to machine precision.

    A few bisection steps, then the Illinois variant of regula falsi, which keeps
    the bracket and converges superlinearly (Dowell and Jarratt 1971, BIT 11, 168,
    doi:10.1007/BF01934364).
    """
    for _ in range(bisections):
        mid = 0.5 * (lo + hi)
        gm = _frequency_function(family, mid, w, h, cl, ct)
        left = np.sign(gm) == np.sign(glo)
        lo = np.where(left, mid, lo)
        glo = np.where(left, gm, glo)
        hi = np.where(left, hi, mid)
    ghi = _frequency_function(family, hi, w, h, cl, ct)
    a, ga, b, gb = lo, glo, hi, ghi
    for _ in range(illinois):
        denom = gb - ga
        with np.errstate(divide="ignore", invalid="ignore"):
            x = b - gb * (b - a) / denom
        bad = ~np.isfinite(x) | (x <= np.minimum(a, b)) | (x >= np.maximum(a, b))
        x = np.where(bad, 0.5 * (a + b), x)
        gx = _frequency_function(family, x, w, h, cl, ct)
        opposite = np.sign(gx) != np.sign(gb)
        # bracket [b, x] if the sign flipped, else keep a and halve its value (Illinois)
        a_new = np.where(opposite, b, a)
        ga_new = np.where(opposite, gb, 0.5 * ga)
        a, ga, b, gb = a_new, ga_new, x, gx
        done = gx == 0
        if np.all(done | (np.abs(b - a) <= 4 * np.finfo(float).eps * np.abs(b))):
            break
    return b


def _scan_roots(family, w, h, cl, ct, k_lo, k_hi, n_grid):
    """All sign changes of G on [k_lo, k_hi] per point; returns (point_idx, k_root)."""
    u = np.linspace(0.0, 1.0, n_grid + 1)
    K = k_lo[:, None] + (k_hi - k_lo)[:, None] * u[None, :]
    W = w[:, None]
    H = h[:, None]
    G = _frequency_function(family, K, W, H, cl, ct)
    sg = np.sign(G)
    # an exact zero on a grid node counts once, with the cell to its right
    sg[sg == 0] = 1.0
    change = sg[:, :-1] != sg[:, 1:]
    pi, ci = np.nonzero(change)
    if pi.size == 0:
        return pi, np.empty(0)
    lo = K[pi, ci]
    hi = K[pi, ci + 1]
    glo = G[pi, ci]
    k = _bisect(family, lo, hi, glo, w[pi], h[pi], cl, ct)
    return pi, k


def _group_velocity(family, k, w, h, cl, ct):
    _, g_k, g_w = _frequency_function(family, k, w, h, cl, ct, derivatives=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        return -g_k / g_w


def _polish(family, k, w, h, cl, ct, steps=2):
    """Newton steps k <- k - G/G_k from the bracketed root, accepted only when tiny.

    The bracketing already holds the root to ~1e-9 relative; Newton's quadratic convergence
    takes it to round-off. A step larger than 1e-6 k (never expected) is refused. Returns
    (k, c_g) with c_g = -G_k / G_w from the same derivative evaluation.
    """
    cg = np.full_like(k, np.nan)
    for _ in range(steps):
        g, g_k, g_w = _frequency_function(family, k, w, h, cl, ct, derivatives=True)
        with np.errstate(divide="ignore", invalid="ignore"):
            step = g / g_k
            cg = -g_k / g_w
        ok = np.isfinite(step) & (np.abs(step) < 1e-6 * np.abs(k))
        k = np.where(ok, k - np.where(ok, step, 0.0), k)
    g, g_k, g_w = _frequency_function(family, k, w, h, cl, ct, derivatives=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        cg = -g_k / g_w
    return k, cg


def _solve_family(family, material, w, h, cr, n_grid, max_refine=3):
    """Roots of one family at all points; returns lists (point, k, cg)."""
    cl, ct = material.cl_m_s, material.ct_m_s
    d = 2.0 * h
    k_hi = _k_upper(material, cr, w, d)
    k_lo = np.zeros_like(w)
    fd = w / (2 * np.pi) * d
    cut = np.asarray(cutoff_frequency_thickness(material, float(fd.max()) * 1.0001 + 1.0)[family])
    expected_net = 1 + np.searchsorted(cut, fd, side="left")

    todo = np.arange(w.size)
    grid = n_grid
    out_p, out_k, out_cg = [], [], []
    for attempt in range(max_refine + 1):
        pi, k = _scan_roots(family, w[todo], h[todo], cl, ct, k_lo[todo], k_hi[todo], grid)
        k, cg = _polish(family, k, w[todo][pi], h[todo][pi], cl, ct)
        net = np.zeros(todo.size, dtype=int)
        np.add.at(net, pi, np.where(cg > 0, 1, -1))
        good = net == expected_net[todo]
        if attempt == max_refine:
            good[:] = True
        keep = good[pi]
        out_p.append(todo[pi[keep]])
        out_k.append(k[keep])
        out_cg.append(cg[keep])
        failed = todo[~good]
        if failed.size == 0:
            break
        if attempt == max_refine - 1:
            pass
        todo = failed
        grid *= 8
    if attempt == max_refine and np.any(~(net == expected_net[todo])):
        bad = todo[net != expected_net[todo]]
        warnings.warn(
            f"Rayleigh-Lamb {family}: completeness check failed at {bad.size} point(s) even after "
            f"grid refinement (first fd = {fd[bad[0]] * 1e3:.4f} MHz*mm); curves there may miss a root.",
            RuntimeWarning,
            stacklevel=3,
        )
    return np.concatenate(out_p), np.concatenate(out_k), np.concatenate(out_cg)


def _labels(family, p, k, cg):
    """Mode label per root: the n-th forward root in decreasing k is mode n."""
    order = np.lexsort((-k, p))
    p_s, cg_s = p[order], cg[order]
    forward = (cg_s > 0).astype(int)
    # cumulative forward count within each point
    csum = np.cumsum(forward)
    starts = np.r_[0, np.flatnonzero(np.diff(p_s)) + 1]
    seg_offset = np.repeat(csum[starts] - forward[starts], np.diff(np.r_[starts, p_s.size]))
    idx = csum - seg_offset - 1
    idx = np.maximum(idx, 0)
    labels = np.empty(p.size, dtype=object)
    labels[order] = [f"{family}{i}" + ("" if f else "b") for i, f in zip(idx, forward)]
    return labels


def _mode_sort_key(name: str):
    back = name.endswith("b")
    n = int(name[1:-1] if back else name[1:])
    return (n, 0 if name[0] == "S" else 1, back)


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
        raise ValueError(f"grid_points must be at least 16; got {grid_points}.")
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
            p, k, cg = _solve_family(family, material, w[sl], h[sl], cr, grid_points)
            parts.append((p + start, k, cg))
        p = np.concatenate([x[0] for x in parts])
        k = np.concatenate([x[1] for x in parts])
        cg = np.concatenate([x[2] for x in parts])
        lab = _labels(family, p, k, cg)
        for name in np.unique(lab):
            sel = lab == name
            found[str(name)] = (p[sel], k[sel], cg[sel])

    names = sorted(found, key=_mode_sort_key)
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
    k_hi = _k_upper(material, cr, w, 2 * h)
    K = np.full((2, w.size), np.nan)
    CG = np.full((2, w.size), np.nan)
    for m, family in enumerate(("S", "A")):
        grid = grid_points
        todo = np.arange(w.size)
        for _ in range(4):
            pi, k = _scan_roots(family, w[todo], h[todo], cl, ct, k_lo[todo], k_hi[todo], grid)
            if pi.size:
                # largest k per point: roots come ordered by grid cell within a point
                last = np.r_[np.flatnonzero(np.diff(pi)), pi.size - 1]
                K[m, todo[pi[last]]] = k[last]
            missing = todo[np.isnan(K[m, todo])]
            if missing.size == 0:
                break
            todo, grid = missing, grid * 4
        ok = np.isfinite(K[m])
        K[m, ok], CG[m, ok] = _polish(family, K[m, ok], w[ok], h[ok], cl, ct)
        if not ok.all():
            warnings.warn(f"{family}0 root not found at {np.sum(~ok)} point(s).", RuntimeWarning, stacklevel=2)
    CP = w[None, :] / K
    shape = lambda a: a.reshape(2, T, F).transpose(1, 0, 2).copy()  # noqa: E731
    return DispersionCurves(material, d, f, ("S0", "A0"), shape(K), shape(CP), shape(CG))


def validate_fmax(fmax_hz: float) -> float:
    """Maximum frequency [Hz], positive and finite."""
    return validate_positive_scalar(fmax_hz, "fmax", unit="Hz", hint="Give a maximum frequency above 0 kHz.")
