"""Rayleigh-Lamb root finding: the pole-free frequency functions, bracketing, refinement, labels.

The arithmetic behind :func:`features.dispersion.lamb_dispersion` and
:func:`features.dispersion.fundamental_dispersion`; the equations and the algorithm are
stated in the :mod:`features.dispersion` module docstring.
"""
from __future__ import annotations

import warnings

import numpy as np

from waneguide.features._lamb_closed_form import cutoff_frequency_thickness, kirchhoff_a0_phase_velocity
from waneguide.features.materials import Material

__all__ = ["cst_values", "k_upper", "scan_roots", "polish_roots", "solve_family", "mode_labels", "mode_sort_key"]

_SERIES_Z = 1e-2  # |x h^2| below which dS/dx uses its Taylor series


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


def cst_values(x: np.ndarray, h: np.ndarray):
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
        Ca, Sa, Ta = cst_values(a, h)
        Cb, Sb, Tb = cst_values(b, h)
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
def k_upper(material: Material, cr: float, w: np.ndarray, d: np.ndarray) -> np.ndarray:
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


def scan_roots(family, w, h, cl, ct, k_lo, k_hi, n_grid):
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


def polish_roots(family, k, w, h, cl, ct, steps=2):
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


def solve_family(family, material, w, h, cr, n_grid, max_refine=3):
    """Roots of one family at all points; returns lists (point, k, cg)."""
    cl, ct = material.cl_m_s, material.ct_m_s
    d = 2.0 * h
    k_hi = k_upper(material, cr, w, d)
    k_lo = np.zeros_like(w)
    fd = w / (2 * np.pi) * d
    cut = np.asarray(cutoff_frequency_thickness(material, float(fd.max()) * 1.0001 + 1.0)[family])
    expected_net = 1 + np.searchsorted(cut, fd, side="left")

    todo = np.arange(w.size)
    grid = n_grid
    out_p, out_k, out_cg = [], [], []
    for attempt in range(max_refine + 1):
        pi, k = scan_roots(family, w[todo], h[todo], cl, ct, k_lo[todo], k_hi[todo], grid)
        k, cg = polish_roots(family, k, w[todo][pi], h[todo][pi], cl, ct)
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


def mode_labels(family, p, k, cg):
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


def mode_sort_key(name: str):
    back = name.endswith("b")
    n = int(name[1:-1] if back else name[1:])
    return (n, 0 if name[0] == "S" else 1, back)
