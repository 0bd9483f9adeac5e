"""Arrival estimators against exact delays, scipy's Hilbert transform and the Cramer-Rao bound."""
from __future__ import annotations

import numpy as np
import pytest
import scipy.signal

from waneguide.features.arrivals import (
    envelope_arrivals,
    phase_delay,
    xcorr_delay,
)
from waneguide.features.signals import hilbert_envelope, tone_burst

FS = 10e6
F0 = 150e3
N = 4096


def _burst(delay_samples=0.0, cycles=5):
    # evaluated analytically on the sample grid, so a fractional delay is exact
    return tone_burst(F0, cycles, FS, n_samples=N, delay_s=(100.0 + delay_samples) / FS)


def test_envelope_matches_scipy_hilbert():
    # reference: scipy.signal.hilbert (Marple 1999 construction); identity up to FFT round-off: for
    # unit-scale data of 4096 samples that is ~1e-15, atol 1e-12 is common practice, no source
    rng = np.random.default_rng(3)
    x = np.stack([_burst(0.0) + 0.01 * rng.normal(size=N), rng.normal(size=N)])
    np.testing.assert_allclose(hilbert_envelope(x), np.abs(scipy.signal.hilbert(x, axis=-1)), rtol=0, atol=1e-12)
    x_odd = rng.normal(size=1001)
    np.testing.assert_allclose(hilbert_envelope(x_odd), np.abs(scipy.signal.hilbert(x_odd)), atol=1e-12)


def test_envelope_of_tone_burst_is_its_window():
    # narrow-band limit (Bedrosian's theorem, approximately: the Hann window's spectrum
    # is not strictly below f0): the envelope of w(t) sin(2 pi f0 t) is w(t) to 1 % of the peak
    # (common practice, no source; this code gives 3e-4 for 10 cycles, a regression value)
    b = _burst(0.0, cycles=10)
    env = hilbert_envelope(b, n_fft=2 * N)
    n_b = int(round(10 / F0 * FS))
    w = 0.5 - 0.5 * np.cos(2 * np.pi * (np.arange(N) - 100) / (10 / F0 * FS))
    w[(np.arange(N) < 100) | (np.arange(N) > 100 + n_b)] = 0
    assert np.max(np.abs(env - w)) < 0.01


@pytest.mark.parametrize("delay", [0.3, 7.77, 23.51])
def test_every_estimator_recovers_fractional_delay(delay):
    # issue 4 check: a tone burst delayed by a known non-integer number of samples is
    # recovered within 0.05 sample by every estimator at high SNR (66 dB peak-to-noise here). The
    # 0.05 sample is the acceptance figure of issue 4 (a project requirement; common practice, no
    # source). At this SNR the envelope peak and the threshold crossing, the noisiest, scatter by
    # about 0.025 and 0.02 sample over noise draws (regression values of this code), so the limit is
    # about two of their spreads: these seeded draws pass, not every seed would.
    rng = np.random.default_rng(int(delay * 100))
    ref = _burst(0.0)
    x = _burst(delay) + 5e-4 * rng.normal(size=N)
    ref_n = ref + 5e-4 * rng.normal(size=N)
    d = xcorr_delay(x, ref_n, max_lag=200)
    hw = int(5 / F0 * FS / 8)  # least-squares peak fit over an eighth of the burst each side
    # and a least-squares line over 2 x 24 + 1 samples at the 50 % crossing
    pk_x, thr_x = envelope_arrivals(x, n_fft=2 * N, half_width=hw, fit_half_width=24)
    pk_r, thr_r = envelope_arrivals(ref_n, n_fft=2 * N, half_width=hw, fit_half_width=24)
    estimates = {
        "xcorr_parabolic": d.parabolic[0],
        "xcorr_phase_slope": d.phase_slope[0],
        "phase_at_f0": phase_delay(x, ref_n, F0 / FS)[0],
        "envelope_peak": (pk_x - pk_r)[0],
        "threshold_crossing": (thr_x - thr_r)[0],
    }
    for name, value in estimates.items():
        assert abs(value - delay) < 0.05, (name, value)


def test_absolute_arrivals_of_hann_burst():
    # Hann window: envelope peak at half the burst length, 50 % crossing at a quarter
    # (sin^2 shape; common practice, no source); tolerance 0.5 sample for the small
    # departure of the Hilbert envelope from the window
    pk, thr = envelope_arrivals(_burst(0.0), n_fft=2 * N)
    n_b = 5 / F0 * FS
    assert abs(pk[0] - (100 + n_b / 2)) < 0.5
    assert abs(thr[0] - (100 + n_b / 4)) < 0.5


def _crb_samples2(s_fine_derivative, sigma):
    # Kay, Fundamentals of Statistical Signal Processing vol. I (1993), Example 3.13
    # (range estimation): var(tau) >= sigma^2 / sum_n (ds/dn)^2 for a known signal in
    # white Gaussian noise, delay in samples
    return sigma**2 / np.sum(s_fine_derivative**2)


@pytest.mark.parametrize("snr_db", [20.0, 30.0, 40.0])
def test_xcorr_spread_within_twice_cramer_rao(snr_db):
    # issue 4 check (acceptance figure of issue 4, a project requirement): cross-correlation delay
    # spread within 2x of the CRB at 20-40 dB
    # (SNR = peak amplitude^2 / noise variance). Reference noise-free (Kay's known-signal
    # setting). 400 trials: the sample standard deviation has ~3.5 % relative error,
    # so the lower limit 0.8 x sqrt(CRB) (an unbiased estimator cannot beat the bound) is safe.
    rng = np.random.default_rng(int(snr_db))
    delay = 11.37
    sigma = 10 ** (-snr_db / 20)
    ref = _burst(0.0)
    clean = _burst(delay)
    trials = clean[None, :] + sigma * rng.normal(size=(400, N))
    est = xcorr_delay(trials, ref, max_lag=60)
    h = 1e-3
    ds = (_burst(delay + h) - _burst(delay - h)) / (2 * h)
    bound = np.sqrt(_crb_samples2(ds, sigma))
    for name, values in (("parabolic", est.parabolic), ("phase_slope", est.phase_slope)):
        ratio = np.std(values - delay) / bound
        assert 0.8 < ratio < 2.0, (name, snr_db, ratio)
        # no bias beyond the spread: the mean of 400 trials has a standard error of std/20, under bound/10
        # given the ratio above, so 3 x bound is over 30 standard errors: a loose limit (common practice,
        # no source)
        assert abs(np.mean(values) - delay) < 3 * bound
