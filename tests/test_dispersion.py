"""Rayleigh-Lamb engine against analytic limits, textbook special solutions and an independent SAFE model.

Sources
-------
Graff 1975: K. F. Graff, *Wave Motion in Elastic Solids*, Dover (ch. 4 plates, ch. 8 Lamb waves).
Viktorov 1967: I. A. Viktorov, *Rayleigh and Lamb Waves*, Plenum.
Rose 1999: J. L. Rose, *Ultrasonic Waves in Solid Media*, Cambridge University Press.
SAFE: semi-analytical finite elements through the thickness (Hayashi, Song, Rose 2003,
Ultrasonics 41:175, doi:10.1016/S0041-624X(03)00097-0), coded independently below with
SciPy's generalised Hermitian eigensolver as the reference.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.linalg

from waneguide.core.errors import InputError
from waneguide.features import (
    Material,
    cutoff_frequency_thickness,
    fundamental_dispersion,
    get_material,
    kirchhoff_a0_phase_velocity,
    lamb_dispersion,
    rayleigh_velocity,
    viktorov_rayleigh_velocity,
)
from waneguide.features._lamb_roots import cst_values

AL = get_material("al-6061-t6")


# --------------------------------------------------------------------------- limits
def test_s0_low_frequency_limit_is_plate_velocity():
    # Graff 1975 eq. 8.1.41 (extensional plate wave): c -> sqrt(E / (rho (1 - nu^2))) as fd -> 0.
    # At fd = 1e-3 MHz*mm the first dispersive correction is O((fd/c)^2) ~ 1e-8; rel 1e-6 is 100 times
    # that (common practice, no source).
    c = lamb_dispersion(AL, 1e-3, [1e3])
    cp = c.phase_velocity_m_s[0, c.mode_index("S0"), 0]
    expected = math.sqrt(AL.youngs_modulus_pa / (AL.density_kg_m3 * (1 - AL.poisson_ratio**2)))
    assert cp == pytest.approx(expected, rel=1e-6)
    # group velocity equals phase velocity in the non-dispersive limit
    assert c.group_velocity_m_s[0, c.mode_index("S0"), 0] == pytest.approx(expected, rel=1e-6)


@pytest.mark.parametrize("fd_mhz_mm", [0.002, 0.01, 0.03])
def test_a0_low_frequency_limit_is_kirchhoff(fd_mhz_mm):
    # Graff 1975 sec. 4.2, Kirchhoff flexure: c = sqrt(w) (D / (rho d))^(1/4), c_g = 2 c.
    # Shear and rotary inertia (Mindlin) lower both by a relative O((k d)^2) (Graff 1975 sec. 8.1.5).
    # Here k d = 0.09 to 0.35. Tolerance: max(1e-4, (k d)^2 / 2) for the phase velocity and twice that
    # for the group velocity; the coefficients 1/2 and 1 are loose bounds (common practice, no source):
    # this engine gives 0.09 and 0.27 (k d)^2 (regression values of this code).
    d = 1e-3
    f = fd_mhz_mm * 1e3 / d  # MHz*mm -> Hz*m is 1e3
    c = lamb_dispersion(AL, d, [f])
    a0 = c.mode_index("A0")
    cp = c.phase_velocity_m_s[0, a0, 0]
    ck = kirchhoff_a0_phase_velocity(AL, d, f)
    kd = 2 * math.pi * f / cp * d
    tol = max(1e-4, 0.5 * kd**2)
    assert cp == pytest.approx(float(ck), rel=tol)
    assert cp < ck  # shear and rotary inertia only ever slow the flexural wave (Graff 1975 sec. 8.1.5)
    assert c.group_velocity_m_s[0, a0, 0] == pytest.approx(2 * float(ck), rel=2 * tol)


def test_fundamentals_tend_to_rayleigh_velocity_at_large_fd():
    # Viktorov 1967 ch. 2: both fundamental modes approach c_R as fd -> inf, S0 from above, A0 from
    # below; the gap closes like exp(-k d sqrt(1 - c_R^2/c_T^2)), so at fd = 20 MHz*mm it is < 1e-4.
    cr = rayleigh_velocity(AL)
    c = lamb_dispersion(AL, 1e-3, [20e6], modes=("S0", "A0"))
    s0, a0 = c.phase_velocity_m_s[0, :, 0]
    assert a0 < cr < s0
    assert s0 == pytest.approx(cr, rel=1e-4)
    assert a0 == pytest.approx(cr, rel=1e-4)


@pytest.mark.parametrize("nu", [0.05, 0.2, 0.25, 0.3, 0.33, 0.4, 0.45, 0.49])
def test_rayleigh_velocity_matches_viktorov_approximation(nu):
    # Viktorov 1967 eq. 1.9: c_R/c_T ~ (0.87 + 1.12 nu)/(1 + nu), accurate to about 0.5 %
    # over 0 < nu < 0.5 (accuracy figure from memory). Exact root checked by substitution: the root is
    # solved to xtol 1e-15 and the function's slope is of order 1, so |residual| ~ 1e-15; 1e-12 is
    # common practice, no source.
    m = Material("probe", 70e9, nu, 2700.0)
    cr = rayleigh_velocity(m)
    assert cr == pytest.approx(viktorov_rayleigh_velocity(m), rel=5e-3)
    xi2 = (cr / m.ct_m_s) ** 2
    k2 = (m.ct_m_s / m.cl_m_s) ** 2
    residual = (2 - xi2) ** 2 - 4 * math.sqrt(1 - xi2) * math.sqrt(1 - k2 * xi2)
    assert abs(residual) < 1e-12


def test_rayleigh_velocity_at_poisson_quarter_is_closed_form():
    # Rayleigh (1885); Graff 1975 sec. 6.3: for nu = 1/4, c_R/c_T = sqrt(2 - 2/sqrt(3)) = 0.919402.
    # rel 1e-12: the root is solved to a relative 4 eps (common practice, no source).
    m = Material("poisson-quarter", 70e9, 0.25, 2700.0)
    assert rayleigh_velocity(m) / m.ct_m_s == pytest.approx(math.sqrt(2 - 2 / math.sqrt(3)), rel=1e-12)


# --------------------------------------------------------------------------- cut-offs
def test_cutoffs_equal_analytic_values_and_families():
    # Graff 1975 sec. 8.1.3: at k = 0, symmetric modes start at fd = n c_T and (2n+1) c_L/2,
    # antisymmetric ones at fd = (2n+1) c_T/2 and n c_L. The same products: round-off only (rel 1e-14).
    ct, cl = AL.ct_m_s, AL.cl_m_s
    cut = cutoff_frequency_thickness(AL, 10e3)
    assert cut["A"] == pytest.approx(sorted([0.5 * ct, 1.5 * ct, 2.5 * ct, cl]), rel=1e-14)
    assert cut["S"] == pytest.approx(sorted([ct, 2 * ct, 3 * ct, 0.5 * cl, 1.5 * cl]), rel=1e-14)


@pytest.mark.parametrize(
    "family, index, label, side",
    [("A", 0, "A1", +1), ("A", 1, "A2", +1), ("S", 1, "S2", +1), ("S", 0, "S1b", -1)],
)
def test_modes_leave_k_zero_at_their_cutoff(family, index, label, side):
    # At a cut-off a branch leaves k = 0 (infinite phase velocity). For most modes w(k) rises
    # from the cut-off, so the branch is found 0.2 % above it; the S1 branch of aluminium falls
    # first (backward wave, negative curvature at k = 0), so there it is found 0.2 % below, on
    # the backward branch S1b (Prada et al. 2008, doi:10.1121/1.2918543). Near a cut-off k grows like
    # sqrt(|f - f_c|), so the phase velocity is still far above c_L there: > 3 c_L is a loose bound
    # (common practice, no source; the lowest of the four here is 3.8 c_L, a regression value of this code).
    d = 1e-3
    cut = cutoff_frequency_thickness(AL, 6.0e3)[family][index]
    c = lamb_dispersion(AL, d, [cut * (1 + side * 0.002) / d])
    assert label in c.modes
    m = c.mode_index(label)
    assert c.phase_velocity_m_s[0, m, 0] > 3 * AL.cl_m_s


def test_near_coincident_s1_s2_cutoffs_both_resolved():
    # c_L/2 = 3074.5 and c_T = 3097.3 m/s in 6061-T6: cut-offs 0.74 % apart (analytic values).
    # Just above both, S1 and S2 must both be present, as well as the S1 backward branch below.
    d = 1e-3
    hi = max(AL.cl_m_s / 2, AL.ct_m_s)
    f = np.array([hi * 1.0005, hi * 1.001, hi * 1.003]) / d
    c = lamb_dispersion(AL, d, f)
    for name in ("S1", "S2"):
        assert np.all(np.isfinite(c.wavenumber_rad_m[0, c.mode_index(name)]))


def test_lame_modes_are_exact_roots():
    # Lame modes (Graff 1975 sec. 8.1.2): c = sqrt(2) c_T makes q = k, and the symmetric equation
    # is satisfied when cos(qh) = 0 or sin(ph) = 0. For the first cos(qh) = 0 solution:
    # q h = pi/2 with q = w / (sqrt(2) c_T) gives fd = c_T / sqrt(2). The roots are refined to machine
    # precision; 1e-9 relative is common practice, no source.
    fd = AL.ct_m_s / math.sqrt(2)
    d = 1e-3
    c = lamb_dispersion(AL, d, [fd / d])
    cps = c.phase_velocity_m_s[0, :, 0]
    sym = [i for i, m in enumerate(c.modes) if m.startswith("S")]
    assert np.nanmin(np.abs(cps[sym] / (math.sqrt(2) * AL.ct_m_s) - 1)) < 1e-9


def test_symmetric_mode_at_longitudinal_velocity_is_exact():
    # p = 0 (c = c_L): the symmetric equation reduces to sin(q h) = 0 with
    # q = w sqrt(1/c_T^2 - 1/c_L^2), i.e. fd = n / sqrt(1/c_T^2 - 1/c_L^2) (Graff 1975 eq. 8.1.29
    # evaluated at p = 0; closed form). Tolerance 1e-9 relative as for the Lame modes above.
    fd = 1.0 / math.sqrt(1 / AL.ct_m_s**2 - 1 / AL.cl_m_s**2)
    d = 1e-3
    c = lamb_dispersion(AL, d, [fd / d])
    cps = c.phase_velocity_m_s[0, :, 0]
    sym = [i for i, m in enumerate(c.modes) if m.startswith("S")]
    assert np.nanmin(np.abs(cps[sym] / AL.cl_m_s - 1)) < 1e-9


# --------------------------------------------------------------------------- derivatives
def test_group_velocity_matches_finite_difference_of_dispersion():
    # c_g = dw/dk (definition); the analytic implicit derivative must agree with a central
    # difference of w(k) taken from the solved curves. Step 1e-5 relative: truncation ~1e-10,
    # round-off ~1e-16/1e-5 = 1e-11 relative to c_g, so 1e-6 is a comfortable bound.
    d = 1e-3
    f0 = np.array([0.3e6, 1.0e6, 2.0e6, 3.5e6, 5.0e6])
    eps = 1e-5
    c = lamb_dispersion(AL, d, np.concatenate([f0 * (1 - eps), f0, f0 * (1 + eps)]))
    n = f0.size
    for m, name in enumerate(c.modes):
        k = c.wavenumber_rad_m[0, m]
        cg = c.group_velocity_m_s[0, m]
        for i in range(n):
            k_lo, k_0, k_hi = k[i], k[n + i], k[2 * n + i]
            if not np.all(np.isfinite([k_lo, k_0, k_hi])):
                continue
            fd_cg = 2 * np.pi * (2 * eps * f0[i]) / (k_hi - k_lo)
            assert cg[n + i] == pytest.approx(fd_cg, rel=1e-6, abs=1e-3), (name, f0[i])


def test_backward_branch_has_negative_group_velocity_and_joins_s1_at_zgv():
    # The S1 mode of aluminium has a zero-group-velocity point below its cut-off, with a
    # backward-wave branch between (Prada, Clorennec, Royer 2008, JASA 124:203,
    # doi:10.1121/1.2918543). Its f*d is about 0.91 c_T for nu near 1/3 (value from memory,
    # checked here loosely: within 3 %).
    d = 1e-3
    f = np.linspace(2.6e6, 3.2e6, 601)
    c = lamb_dispersion(AL, d, f)
    s1b = c.mode_index("S1b")
    cg_b = c.group_velocity_m_s[0, s1b]
    ok = np.isfinite(cg_b)
    assert ok.sum() > 10
    assert np.all(cg_b[ok] < 0)
    fd_zgv = f[ok].min() * d
    assert fd_zgv / AL.ct_m_s == pytest.approx(0.91, rel=0.03)
    # at the lowest frequency of the backward branch the forward S1 exists too, with small c_g (near the
    # zero-group-velocity point; below 0.15 c_T on this 1 kHz grid: common practice, no source)
    s1 = c.mode_index("S1")
    i0 = np.flatnonzero(ok)[0]
    assert np.isfinite(c.group_velocity_m_s[0, s1, i0])
    assert abs(c.group_velocity_m_s[0, s1, i0]) < 0.15 * AL.ct_m_s


# --------------------------------------------------------------------------- SAFE reference
def _safe_frequencies(material: Material, thickness_m: float, k: float, n_el: int = 30) -> np.ndarray:
    """Angular frequencies of all plane-strain modes at wavenumber k from quadratic SAFE elements.

    (K1 + i k K2 + k^2 K3 - w^2 M) q = 0, Hayashi et al. 2003
    reference only.
    """
    E, nu, rho = material.youngs_modulus_pa, material.poisson_ratio, material.density_kg_m3
    lam = E * nu / ((1 + nu) * (1 - 2 * nu))
    mu = E / (2 * (1 + nu))
    C = np.array([[lam + 2 * mu, lam, 0], [lam, lam + 2 * mu, 0], [0, 0, mu]])
    n_nodes = 2 * n_el + 1
    ndof = 2 * n_nodes
    K1 = np.zeros((ndof, ndof))
    K2 = np.zeros((ndof, ndof))
    K3 = np.zeros((ndof, ndof))
    M = np.zeros((ndof, ndof))
    le = thickness_m / n_el
    gp, gw = np.polynomial.legendre.leggauss(4)
    for e in range(n_el):
        dofs = np.array([[2 * n, 2 * n + 1] for n in (2 * e, 2 * e + 1, 2 * e + 2)]).ravel()
        k1 = np.zeros((6, 6))
        k2 = np.zeros((6, 6))
        k3 = np.zeros((6, 6))
        me = np.zeros((6, 6))
        for xi, w in zip(gp, gw):
            Nf = np.array([xi * (xi - 1) / 2, 1 - xi**2, xi * (xi + 1) / 2])
            dN = np.array([xi - 0.5, -2 * xi, xi + 0.5]) * (2 / le)
            N = np.zeros((2, 6))
            Nz = np.zeros((2, 6))
            N[0, 0::2] = Nf
            N[1, 1::2] = Nf
            Nz[0, 0::2] = dN
            Nz[1, 1::2] = dN
            Lx = np.array([[1, 0], [0, 0], [0, 1]])
            Lz = np.array([[0, 0], [0, 1], [1, 0]])
            B1 = Lx @ N
            B2 = Lz @ Nz
            jw = w * le / 2
            k1 += B2.T @ C @ B2 * jw
            k2 += (B1.T @ C @ B2 - B2.T @ C @ B1) * jw
            k3 += B1.T @ C @ B1 * jw
            me += rho * N.T @ N * jw
        ix = np.ix_(dofs, dofs)
        K1[ix] += k1
        K2[ix] += k2
        K3[ix] += k3
        M[ix] += me
    H = K1 + 1j * k * K2 + k * k * K3
    w2 = scipy.linalg.eigh(H, M, eigvals_only=True)
    return np.sqrt(np.clip(w2, 0, None))


@pytest.mark.slow
@pytest.mark.parametrize("kd", [0.5, 2.0, 4.0, 8.0])
def test_agrees_with_independent_safe_model(kd):
    # Every SAFE mode (k, w) with fd < 6 MHz*mm must be a root found by the Rayleigh-Lamb engine:
    # solving at that w returns a mode whose k matches. The comparison is made in frequency,
    # |dk| |c_g| / w < 2e-6, because SAFE's error is in w (60 quadratic elements: <2e-7 relative,
    # measured by doubling the mesh) and maps to k through the group velocity.
    d = 2e-3
    k = kd / d
    w = _safe_frequencies(AL, d, k, n_el=60)
    f = w / (2 * np.pi)
    f = f[(f * d > 1.0) & (f * d < 6e3)]  # drop rigid-body zeros; fd in Hz*m
    assert f.size >= 1
    c = lamb_dispersion(AL, d, f)
    for j in range(f.size):
        ks = c.wavenumber_rad_m[0, :, j]
        cg = c.group_velocity_m_s[0, :, j]
        err = np.abs(ks - k) * np.abs(cg) / (2 * np.pi * f[j])
        assert np.nanmin(err) < 2e-6, (kd, f[j] * d * 1e-3)


# --------------------------------------------------------------------------- textbook table
# Rounded values read off the aluminium dispersion curves of Rose 1999, ch. 8 figures, for
# c_L = 6.32 km/s, c_T = 3.13 km/s (values from memory; the tolerance of 3 % reflects reading
# a printed curve, not the engine's accuracy).
ROSE_AL = Material.from_velocities("rose-aluminium", cl_m_s=6320.0, ct_m_s=3130.0, density_kg_m3=2700.0)
ROSE_TABLE = [
    # mode, fd [MHz*mm], quantity, value [km/s]
    ("S0", 0.5, "phase", 5.40),
    ("A0", 0.5, "phase", 1.85),
    ("A0", 1.0, "phase", 2.35),
    ("A0", 1.0, "group", 3.10),
    ("S0", 2.5, "group", 1.80),
    ("A0", 4.0, "phase", 2.85),
]


@pytest.mark.parametrize("mode, fd, quantity, value", ROSE_TABLE)
def test_textbook_values_for_aluminium(mode, fd, quantity, value):
    d = 1e-3
    c = lamb_dispersion(ROSE_AL, d, [fd * 1e3 / d])
    m = c.mode_index(mode)
    arr = c.phase_velocity_m_s if quantity == "phase" else c.group_velocity_m_s
    assert arr[0, m, 0] / 1e3 == pytest.approx(value, rel=0.03)


# --------------------------------------------------------------------------- structure
def test_thickness_grid_matches_single_thickness_calls():
    # Curves depend on fd only (scaling of the frequency equations): a grid call must equal
    # separate calls (the same arithmetic: rtol 1e-12, round-off), and (d, f) must equal (2d, f/2) in
    # phase velocity to the root finder's precision: the scaled problem is refined by bisection, Illinois
    # and Newton steps that stop on tolerances, not on bit patterns, so the two roots agree only as far as
    # those take them (rtol 1e-7: common practice, no source).
    f = np.linspace(50e3, 1.5e6, 40)
    grid = lamb_dispersion(AL, [1e-3, 2e-3], f, modes=("S0", "A0"))
    single = lamb_dispersion(AL, 2e-3, f, modes=("S0", "A0"))
    np.testing.assert_allclose(grid.wavenumber_rad_m[1], single.wavenumber_rad_m[0], rtol=1e-12)
    scaled = lamb_dispersion(AL, 2e-3, f / 2, modes=("S0", "A0"))
    np.testing.assert_allclose(scaled.phase_velocity_m_s[0], grid.phase_velocity_m_s[0], rtol=1e-7)


def test_fundamental_fast_path_equals_full_solver():
    # two searches (different wavenumber ranges and grids) for the same roots: k to the root finder's
    # precision (rtol 1e-7), c_g one derivative further (rtol 1e-6); common practice, no source
    d = np.linspace(1e-3, 3e-3, 7)
    f = np.linspace(5e3, 1.2e6, 60)
    fast = fundamental_dispersion(AL, d, f)
    full = lamb_dispersion(AL, d, f, modes=("S0", "A0"))
    np.testing.assert_allclose(fast.wavenumber_rad_m, full.wavenumber_rad_m, rtol=1e-7)
    np.testing.assert_allclose(fast.group_velocity_m_s, full.group_velocity_m_s, rtol=1e-6)


def test_no_mode_hopping_fundamentals_are_smooth():
    # S0 phase velocity decreases monotonically and A0 increases monotonically with fd
    # (Rose 1999 ch. 8 curves; common practice, no source for the monotonicity statement).
    f = np.linspace(10e3, 8e6, 800)
    c = lamb_dispersion(AL, 1e-3, f, modes=("S0", "A0"))
    s0, a0 = c.phase_velocity_m_s[0]
    assert np.all(np.isfinite(s0)) and np.all(np.isfinite(a0))
    assert np.all(np.diff(s0) < 0)
    assert np.all(np.diff(a0) > 0)
    assert np.all(a0 < s0)


def test_every_point_passes_the_completeness_count():
    # Forward minus backward roots = 1 + cut-offs below (see module docstring of the engine):
    # checked on a dense sweep that crosses every cut-off below 8 MHz*mm.
    f = np.linspace(5e3, 8e6, 1600)
    with np.errstate(all="ignore"):
        import warnings

        with warnings.catch_warnings():
            warnings.simplefilter("error", RuntimeWarning)
            c = lamb_dispersion(AL, 1e-3, f)
    cut = cutoff_frequency_thickness(AL, 9e3)
    for fam in "SA":
        fwd = [i for i, m in enumerate(c.modes) if m[0] == fam and not m.endswith("b")]
        bwd = [i for i, m in enumerate(c.modes) if m[0] == fam and m.endswith("b")]
        net = np.isfinite(c.wavenumber_rad_m[0, fwd]).sum(0) - np.isfinite(c.wavenumber_rad_m[0, bwd]).sum(0)
        expected = 1 + np.searchsorted(np.asarray(cut[fam]), f * 1e-3, side="left")
        assert np.array_equal(net, expected), fam


# --------------------------------------------------------------------------- bad input
@pytest.mark.parametrize(
    "thickness, freq, needle",
    [
        (-1e-3, [1e5], "thickness_m must contain only positive"),
        (0.0, [1e5], "thickness_m must contain only positive"),
        (1e-3, [0.0], "frequency_hz must contain only positive"),
        (1e-3, [np.nan], "frequency_hz must contain only positive"),
        (np.nan, [1e5], "thickness_m must contain only positive"),
    ],
)
def test_impossible_requests_are_refused(thickness, freq, needle):
    with pytest.raises(InputError, match=needle):
        lamb_dispersion(AL, thickness, freq)


def test_internal_entire_functions_are_continuous_across_zero():
    # C, S, T of x must be continuous where x = p^2 or q^2 changes sign (phase velocity crossing
    # c_L or c_T): compare both sides of 0 with the Taylor series C = 1 - x h^2/2, S = h (1 - x h^2/6),
    # T = x h. With z = x h^2 = 1e-8 the first omitted terms are z^2/24 (C), z^2/120 (S) and z/6 = 2e-9 (T)
    # relative; the tolerances 1e-9 (C, S) and 1e-6 (T) sit above them (common practice, no source).
    h = np.array([1e-3])
    for x in (-1e-2, 1e-2):
        C, S, T = cst_values(np.array([x]), h)
        # negative x returns values scaled by exp(-sqrt(-x) h) (see the engine's docstring)
        scale = math.exp(-math.sqrt(-x) * h[0]) if x < 0 else 1.0
        C, S, T = C / scale, S / scale, T / scale
        assert C[0] == pytest.approx(1 - x * h[0] ** 2 / 2, rel=1e-9)
        assert S[0] == pytest.approx(h[0] * (1 - x * h[0] ** 2 / 6), rel=1e-9)
        assert T[0] == pytest.approx(x * h[0], rel=1e-6)
