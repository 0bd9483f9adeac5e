"""The one excitation and transducer model (features.excitation) against outside facts.

References: exact rational arithmetic (sample counts), scipy.signal.windows (window shapes),
F. J. Harris, Proc. IEEE 66(1), 51, 1978 (Hann main lobe), the Fourier transform of a
Gaussian, second-order resonator algebra, the Bessel-function tables (first zero of J1,
Abramowitz and Stegun 1964, table 9.5) and Poisson's integral (eq. 9.1.20), Rayleigh-Lamb
mode shapes with their power flux (Auld 1990) and classical plate theory (Graff 1975).
"""
from __future__ import annotations

import dataclasses
import math
from fractions import Fraction

import numpy as np
import pytest
from scipy.optimize import brentq
from scipy.signal import windows

from waneguide.core.errors import InputError
from waneguide.features.dispersion import fundamental_dispersion
from waneguide.features.excitation import (
    ExcitationModel,
    burst_n_samples,
    disc_aperture,
    disc_footprint,
    disc_response,
    sampled_spectrum,
    strain_excitability,
    tone_burst,
)

FS = 10e6


@pytest.mark.parametrize("fc, cycles, fs", [("150e3", "5", "10e6"), ("100e3", "5", "10e6"), ("120e3", "3", "10e6"),
                                            ("130e3", "3", "10e6"), ("60e3", "3.5", "10e6"), ("250e3", "7", "5e6"),
                                            ("33e3", "10", "2.5e6")])
def test_sample_count_is_every_sample_in_the_closed_support(fc, cycles, fs):
    # rule: samples t_i = i / fs with 0 <= t_i <= T = N / fc; counted here in exact rational
    # arithmetic on the decimal values (the outside reference), floor(N fs / fc) + 1
    exact = math.floor(Fraction(cycles) * Fraction(fs) / Fraction(fc)) + 1
    assert burst_n_samples(float(fc), float(cycles), float(fs)) == exact
    assert tone_burst(float(fc), float(cycles), float(fs)).size == exact


@pytest.mark.parametrize("window, reference", [
    ("hann", lambda n: windows.hann(n, sym=True)),
    ("tukey", lambda n: windows.tukey(n, 0.5, sym=True)),
    ("gaussian", lambda n: windows.gaussian(n, std=(n - 1) / 6.0, sym=True)),  # sigma = T / 6
    ("rect", lambda n: np.ones(n)),
])
def test_window_shapes_match_scipy(window, reference):
    # 5 cycles at 100 kHz, 10 MHz: N fs / fc = 500 exactly, so the 501 samples are u = i / 500,
    # the grid of scipy's symmetric windows of 501 points; agreement to round-off (1e-12)
    fc, cycles = 100e3, 5
    b = tone_burst(fc, cycles, FS, window=window)
    t = np.arange(b.size) / FS
    np.testing.assert_allclose(b, reference(b.size) * np.sin(2 * np.pi * fc * t), rtol=0, atol=1e-12)


def test_fractional_delay_on_a_record_is_the_analytic_burst():
    # closed form w((t - d) / T) sin(2 pi f (t - d)) on t_i = i / fs - pretrigger, written out here
    fc, cycles, n, pre, d = 150e3, 5, 2048, 20e-6, 13.37e-6
    x = tone_burst(fc, cycles, FS, n_samples=n, delay_s=d, pretrigger_s=pre)
    t = np.arange(n) / FS - pre - d
    T = cycles / fc
    ref = np.where((t >= 0) & (t <= T), (0.5 - 0.5 * np.cos(2 * np.pi * t / T)) * np.sin(2 * np.pi * fc * t), 0.0)
    np.testing.assert_allclose(x, ref, rtol=0, atol=1e-12)  # unit amplitude: float64 round-off of the phases
    # the bare burst is the record with no delay and no pretrigger, cut to its length
    bare = tone_burst(fc, cycles, FS)
    np.testing.assert_allclose(tone_burst(fc, cycles, FS, n_samples=bare.size), bare, rtol=0, atol=0)


@pytest.mark.parametrize("cycles", [3, 5, 10])
def test_hann_burst_spectrum_peaks_at_fc_with_the_main_lobe_width(cycles):
    # The spectrum of w(t) sin(2 pi fc t) is the window's transform centred on fc (plus the
    # negative-frequency image, small for N >= 3): peak at fc within one bin of an FFT of the
    # 8192-sample record (common practice, no source), and a -6 dB full width of 2.00 bins
    # of the window length T = N / fc, i.e. 2 fc / N (Harris 1978, table 1, Hann 6-dB bandwidth
    # 2.00 bins). 2 %: the image and the 152 Hz resolution of the zero-padded FFT (from memory
    # of the image's size; observed 0.3 %).
    fc = 150e3
    b = tone_burst(fc, cycles, FS)
    n_pad = 1 << 16
    X = np.abs(np.fft.rfft(b, n_pad))
    f = np.fft.rfftfreq(n_pad, 1 / FS)
    assert abs(f[np.argmax(X)] - fc) <= FS / 8192
    above = f[X >= 0.5 * X.max()]
    assert above[-1] - above[0] == pytest.approx(2 * fc / cycles, rel=0.02)


def test_gaussian_burst_spectrum_is_the_gaussian_transform():
    # A Gaussian envelope of standard deviation sigma_t has a Gaussian spectrum of standard
    # deviation sigma_f = 1 / (2 pi sigma_t) (Fourier transform of a Gaussian), here around fc
    # with sigma_t = T / 6. The +-3 sigma truncation (1.1 % steps at the ends) and the image
    # perturb it by about 1 % of the peak; tolerance 2 % of the peak over the -20 dB band.
    fc, cycles = 150e3, 5
    b = tone_burst(fc, cycles, FS, window="gaussian")
    sigma_f = 1.0 / (2 * np.pi * (cycles / fc) / 6.0)
    f = np.linspace(fc - 2.1 * sigma_f, fc + 2.1 * sigma_f, 201)
    X = np.abs(sampled_spectrum(b, FS, f))
    expected = X.max() * np.exp(-0.5 * ((f - fc) / sigma_f) ** 2)
    np.testing.assert_allclose(X, expected, rtol=0, atol=0.02 * X.max())


def test_sampled_spectrum_equals_numpy_rfft_at_its_bins():
    # reference: numpy's FFT; a start time multiplies by exp(-i 2 pi f t0) (shift theorem).
    # 1e-9: round-off of sums of ~300 unit-size terms (|X| up to ~170) in float64
    b = tone_burst(150e3, 5, FS, window="tukey")
    n = 4096
    f = np.fft.rfftfreq(n, 1 / FS)[:300]
    np.testing.assert_allclose(sampled_spectrum(b, FS, f), np.fft.rfft(b, n)[:300], rtol=0, atol=1e-9)
    t0 = 20e-6
    np.testing.assert_allclose(sampled_spectrum(b, FS, f, start_s=t0),
                               np.fft.rfft(b, n)[:300] * np.exp(-2j * np.pi * f * t0), rtol=0, atol=1e-9)


@pytest.mark.parametrize("q", [0.8, 1.5, 6.0])
def test_disc_response_is_a_second_order_resonator(q):
    # 1 / (1 + i Q (f/fr - fr/f)): magnitude 1 and phase 0 at fr; |H|^2 = 1/2 where
    # Q (f/fr - fr/f) = -+1, i.e. f = fr (sqrt(1 + 1/(4 Q^2)) -+ 1/(2 Q)): bandwidth fr / Q
    # and f1 f2 = fr^2 (analytic; root-finding tolerance 1e-9 relative)
    fr = 150e3
    h = disc_response(fr, fr, q)
    assert abs(h) == pytest.approx(1.0, abs=1e-15) and np.angle(h) == pytest.approx(0.0, abs=1e-15)
    half = lambda f: abs(disc_response(f, fr, q)) ** 2 - 0.5  # noqa: E731
    f1 = brentq(half, 1e-3 * fr, fr, xtol=1e-9 * fr)
    f2 = brentq(half, fr, 1e3 * fr, xtol=1e-9 * fr)
    assert f2 - f1 == pytest.approx(fr / q, rel=1e-8)
    assert f1 * f2 == pytest.approx(fr**2, rel=1e-8)
    assert f1 == pytest.approx(fr * (math.sqrt(1 + 1 / (4 * q**2)) - 1 / (2 * q)), rel=1e-8)
    # finite at DC (evaluated at 1 mHz), tending to 0
    assert abs(disc_response(0.0, fr, q)) < 1e-6


def test_disc_aperture_limits_and_first_zero():
    # 2 J1(z) / z = 1 - z^2 / 8 + z^4 / 192 - ... (series of J1), and its first zero is the
    # first zero of J1, z = 3.8317059702 (Abramowitz and Stegun 1964, table 9.5). 1e-9: the
    # omitted series term z^6 / 9216 is 1e-10 at z = 0.1; the tabulated zero has 10 decimals
    a = 3.5e-3
    z = np.array([0.0, 1e-6, 1e-3, 0.1])
    np.testing.assert_allclose(disc_aperture(z / a, a), 1 - z**2 / 8 + z**4 / 192, rtol=0, atol=1e-9)
    assert abs(disc_aperture(3.8317059702 / a, a)) < 1e-9


def test_excitation_model_of_a_family(family_fb2):
    em = ExcitationModel.from_family(family_fb2)
    exc, trd = family_fb2.excitation, family_fb2.transducer
    # resonance defaults to the centre frequency; the aperture radius is half the disc diameter
    assert em.resonance_hz == exc.centre_frequency_hz and trd.resonance_khz is None
    assert em.aperture_radius_m == pytest.approx(family_fb2.path.transducer_diameter_mm / 2 * 1e-3)
    assert em.burst().size == burst_n_samples(exc.centre_frequency_hz, exc.cycles, em.sample_rate_hz)
    f = np.linspace(50e3, 250e3, 5)
    k = np.array([100.0, 400.0, 700.0, 900.0, 1200.0])
    # the source of a mode: burst spectrum x H^2 x A^2 x excitability, from the family's own numbers
    expected = (sampled_spectrum(em.burst(), em.sample_rate_hz, f)
                * disc_response(f, exc.centre_frequency_hz, trd.quality_factor) ** 2
                * disc_aperture(k, family_fb2.path.transducer_diameter_mm / 2 * 1e-3) ** 2 * trd.a0_excitability)
    np.testing.assert_allclose(em.mode_source(f, k, "A0"), expected, rtol=1e-12)  # same products: round-off


def test_bad_window_is_refused_naming_the_field():
    with pytest.raises(InputError, match="window must be one of hann, gaussian, tukey, rect; got 'kaiser'.*"
                                         "excitation.window"):
        tone_burst(150e3, 5, FS, window="kaiser")


# -- disc footprint and strain excitability -------------------------------------------------
@pytest.mark.parametrize("z", [0.0, 1e-4, 0.5, 2.0, 3.8317059702, 6.0])
def test_footprint_quadrature_of_the_disc_is_the_aperture_factor(z):
    # Poisson's integral (Abramowitz and Stegun 1964, eq. 9.1.20) with nu = 1:
    #   int_{-1}^{1} sqrt(1 - u^2) exp(i z u) du = pi J1(z) / z,
    # so the disc's area projected on the path, normalised, transforms to 2 J1(z) / z, the
    # aperture factor, which is 1 at z = 0 (a -> 0). The 15-node Gauss-Chebyshev rule is
    # exact to degree 29; the omitted Taylor term z^30 / 30! is 8e-10 at z = 6 (bound 1e-8).
    u, w = disc_footprint()
    assert w.sum() == pytest.approx(1.0, abs=1e-15) and np.all(np.diff(u) > 0) and np.all(np.abs(u) < 1)
    np.testing.assert_allclose(u, -u[::-1], atol=1e-15)  # symmetric about the disc centre
    a = 3.5e-3
    quad = np.sum(w * np.exp(1j * z * u))
    assert quad.real == pytest.approx(float(disc_aperture(z / a, a)), abs=1e-8)
    assert abs(quad.imag) < 1e-12
    if z == 0.0:
        assert float(disc_aperture(0.0, a)) == 1.0


def _normal_mode_strain_per_power(mode, k, w, h, cl, ct, rho, nz=4001):
    """|surface strain|^2 / power flux of a Rayleigh-Lamb mode from its mode shape.

    Potentials phi = A cos(pz), psi = B sin(qz) (symmetric) or A sin(pz), B cos(qz)
    (antisymmetric), u_x = d phi/dx + d psi/dz, u_z = d phi/dz - d psi/dx (Rose 1999, ch. 8);
    (A, B) the null vector of the traction-free conditions at z = h; power flux
    P = 1/2 Re int -(s_xx v_x* + s_xz v_z*) dz (Auld 1990, vol. 2, ch. 10).
    """
    from scipy.integrate import simpson

    mu = rho * ct**2
    lam = rho * cl**2 - 2 * mu
    p = np.sqrt((w / cl) ** 2 - k**2 + 0j)
    q = np.sqrt((w / ct) ** 2 - k**2 + 0j)
    z = np.linspace(-h, h, nz)
    if mode == "S0":
        f0, f1, f2 = np.cos(p * z), -p * np.sin(p * z), -p * p * np.cos(p * z)
        g0, g1, g2 = np.sin(q * z), q * np.cos(q * z), -q * q * np.sin(q * z)
    else:
        f0, f1, f2 = np.sin(p * z), p * np.cos(p * z), -p * p * np.sin(p * z)
        g0, g1, g2 = np.cos(q * z), -q * np.sin(q * z), -q * q * np.cos(q * z)
    ux = np.stack([1j * k * f0, g1])
    uz = np.stack([f1, -1j * k * g0])
    div = 1j * k * ux + np.stack([f2, -1j * k * g1])
    szz = lam * div + 2 * mu * np.stack([f2, -1j * k * g1])
    sxz = mu * (np.stack([1j * k * f1, g2]) + 1j * k * uz)
    sxx = lam * div + 2 * mu * 1j * k * ux
    M = np.array([[szz[0, -1], szz[1, -1]], [sxz[0, -1], sxz[1, -1]]])
    c = np.linalg.svd(M)[2][-1].conj()
    comb = lambda f: c[0] * f[0] + c[1] * f[1]  # noqa: E731
    Ux, Uz, Sxx, Sxz = comb(ux), comb(uz), comb(sxx), comb(sxz)
    P = 0.5 * np.real(simpson(-(Sxx * np.conj(-1j * w * Ux) + Sxz * np.conj(-1j * w * Uz)), x=z))
    return abs(1j * k * Ux[-1]) ** 2 / abs(P)


@pytest.mark.parametrize("mode", ["S0", "A0"])
def test_strain_excitability_is_the_power_normalised_surface_strain(family_fb2, mode):
    # By reciprocity a bonded disc excites and senses a mode through its surface strain per
    # square root of power (normal-mode theory, Auld 1990 vol. 2 ch. 10): e(t) / e(t0) must
    # equal the ratio of |surface strain|^2 / power flux computed from the Rayleigh-Lamb mode
    # shapes (an independent route: mode shapes and a Poynting integral, no residue). Wave-
    # numbers from the dispersion engine. 1e-6: Simpson's rule on 4001 points and the
    # central difference of D' (observed 1e-10 for S0, 2e-7 for A0).
    mat = family_fb2.build_material()
    t0 = family_fb2.nominal_thickness_m
    ts = t0 * np.array([1.0, 0.3, 0.6, 0.85, 1.08])
    f = np.array([60e3, 150e3, 260e3])
    mi = ("S0", "A0").index(mode)
    k = fundamental_dispersion(mat, ts, f).wavenumber_rad_m[:, mi, :]
    e = strain_excitability(mode, f[None, :], k, ts[:, None], mat.cl_m_s, mat.ct_m_s)
    ref = np.array([[_normal_mode_strain_per_power(mode, k[i, j], 2 * np.pi * f[j], ts[i] / 2, mat.cl_m_s,
                                                   mat.ct_m_s, mat.density_kg_m3) for j in range(f.size)]
                    for i in range(ts.size)])
    np.testing.assert_allclose(e / e[0], ref / ref[0], rtol=1e-6)


def test_strain_excitability_thin_plate_limits(family_fb2):
    # Thin-plate limits (classical plate theory, Graff 1975 ch. 4 and 8.1): S0 is a membrane
    # wave with uniform in-plane motion, power ~ t, so |strain|^2 / power ~ t^-1; A0 is a
    # flexural wave with surface strain ~ t k^2 w, k ~ t^-1/2, power ~ t w^2 / k, so
    # |strain|^2 / power ~ t^-3/2. At 5 kHz and 1-2 mm (f d <= 10 kHz mm) the Rayleigh-Lamb
    # correction is O((k h)^2) ~ 1e-3 (tolerance 1 % on the exponent; observed 0.1 %).
    mat = family_fb2.build_material()
    ts = np.array([1e-3, 2e-3])
    f = 5e3
    for mode, expo in (("S0", -1.0), ("A0", -1.5)):
        k = fundamental_dispersion(mat, ts, f).wavenumber_rad_m[:, ("S0", "A0").index(mode), 0]
        e = strain_excitability(mode, f, k, ts, mat.cl_m_s, mat.ct_m_s)
        assert np.log(e[1] / e[0]) / np.log(2.0) == pytest.approx(expo, rel=0.01)


def test_disc_factor_is_the_aperture_at_nominal_and_grows_with_thinning_without_it(family_fb2):
    # At the nominal thickness the factor is A(k) (the family's excitabilities hold there); with
    # the aperture off it is sqrt(e(t) / e(t0)) > 1 on a thinner wall (thin-plate limits above:
    # a thinner wall couples more strongly). Identities of the model's definition: round-off.
    em = ExcitationModel.from_family(family_fb2)
    mat = family_fb2.build_material()
    t0 = family_fb2.nominal_thickness_m
    f = np.linspace(80e3, 240e3, 9)
    cur = fundamental_dispersion(mat, [t0, 0.7 * t0], f)
    for mi, mode in enumerate(("S0", "A0")):
        k0, k1 = cur.wavenumber_rad_m[0, mi], cur.wavenumber_rad_m[1, mi]
        np.testing.assert_allclose(em.disc_factor(mode, f, k0, t0, k0, t0), disc_aperture(k0, em.aperture_radius_m),
                                   rtol=1e-12)
        bare = dataclasses.replace(em, aperture_radius_m=None)
        ratio = strain_excitability(mode, f, k1, 0.7 * t0, mat.cl_m_s, mat.ct_m_s) / strain_excitability(
            mode, f, k0, t0, mat.cl_m_s, mat.ct_m_s)
        np.testing.assert_allclose(bare.disc_factor(mode, f, k1, 0.7 * t0, k0, t0), np.sqrt(ratio), rtol=1e-12)
        assert np.all(ratio > 1.0)
