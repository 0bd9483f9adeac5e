"""The one excitation and transducer model (features.excitation) against outside facts.

References: exact rational arithmetic (sample counts), scipy.signal.windows (window shapes),
F. J. Harris, Proc. IEEE 66(1), 51, 1978 (Hann main lobe), the Fourier transform of a
Gaussian, second-order resonator algebra, and the Bessel-function tables (first zero of J1,
Abramowitz and Stegun 1964, table 9.5).
"""
from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest
from scipy.optimize import brentq
from scipy.signal import windows

from waneguide.core.errors import InputError
from waneguide.features.excitation import (
    ExcitationModel,
    burst_n_samples,
    disc_aperture,
    disc_response,
    sampled_spectrum,
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
