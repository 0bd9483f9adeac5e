"""Signal building blocks: the analytic signal / Hilbert envelope, gates, sub-sample peaks.

The tone burst is :func:`waneguide.features.excitation.tone_burst` (re-exported here).

All functions work on the last axis, so a whole campaign chunk (rows = captures)
goes through one call.
"""
from __future__ import annotations

import numpy as np
import scipy.fft as sfft

# the tone burst lives in features.excitation (the one excitation model); re-exported here,
# its historical import path
from waneguide.features.excitation import WINDOWS, tone_burst

# the mode windows live in features.windows; re-exported here, their historical import path
from waneguide.features.windows import ModeWindow, excitation_band_hz, mode_windows

__all__ = [
    "WINDOWS",
    "tone_burst",
    "analytic_signal",
    "hilbert_envelope",
    "tukey_gate",
    "parabolic_peak",
    "analytic_from_rfft",
    "decimated_analytic",
    "ModeWindow",
    "mode_windows",
    "excitation_band_hz",
]


def _analytic_multiplier(n: int) -> np.ndarray:
    # Marple 1999 (IEEE Trans. Signal Process. 47(9), 2600): X[0], X[n/2] kept, positive
    # frequencies doubled, negative ones zeroed -- the same construction as scipy.signal.hilbert.
    h = np.zeros(n)
    if n % 2 == 0:
        h[0] = h[n // 2] = 1.0
        h[1:n // 2] = 2.0
    else:
        h[0] = 1.0
        h[1:(n + 1) // 2] = 2.0
    return h


def analytic_signal(x: np.ndarray, *, n_fft: int | None = None) -> np.ndarray:
    """Discrete analytic signal along the last axis (Marple 1999).

    With ``n_fft`` larger than the record the signal is zero-padded first (less
    wrap-around at the ends) and the result cropped back to the record length.
    """
    x = np.asarray(x, dtype=float)
    n = x.shape[-1]
    m = n if n_fft is None else int(n_fft)
    if m < n:
        raise ValueError(f"n_fft must be at least the record length {n}; got {m}.")
    spec = sfft.fft(x, m, axis=-1)
    spec *= _analytic_multiplier(m)
    return sfft.ifft(spec, axis=-1)[..., :n]


def hilbert_envelope(x: np.ndarray, *, n_fft: int | None = None) -> np.ndarray:
    """Envelope |x + i H{x}| along the last axis (see :func:`analytic_signal`)."""
    return np.abs(analytic_signal(x, n_fft=n_fft))


def analytic_from_rfft(spec: np.ndarray, n_fft: int) -> np.ndarray:
    """Analytic signal of length ``n_fft`` from a one-sided spectrum ``rfft(x, n_fft)``."""
    full = np.zeros(spec.shape[:-1] + (n_fft,), dtype=complex)
    half = spec.shape[-1]
    full[..., :half] = spec
    full[..., :half] *= _analytic_multiplier(n_fft)[:half]
    return sfft.ifft(full, axis=-1)


def decimated_analytic(spec: np.ndarray, n_fft: int, stride: int) -> np.ndarray:
    """Analytic signal at every ``stride``-th sample from ``rfft(x, n_fft)``.

    The positive-frequency bins below ``fs / stride`` are doubled and folded onto
    ``n_fft / stride`` bins (sampling every stride-th point aliases bin k onto
    k mod n_fft/stride), so one short inverse FFT gives a(stride m) exactly for signals
    whose content lies below fs / stride; content above is dropped. ``n_fft`` must be a
    multiple of ``stride`` (else stride 1 is used).
    """
    if stride <= 1 or n_fft % stride:
        return analytic_from_rfft(spec, n_fft)[..., ::max(1, stride)] if stride > 1 else analytic_from_rfft(spec, n_fft)
    m = n_fft // stride
    full = np.zeros(spec.shape[:-1] + (m,), dtype=complex)
    k = min(m, spec.shape[-1])
    full[..., :k] = spec[..., :k]
    full[..., 1:k] *= 2.0
    return sfft.ifft(full, axis=-1) * (m / n_fft)


def tukey_gate(n_samples: int, start: int, stop: int, *, taper_samples: int) -> np.ndarray:
    """Gate that is 1 on ``[start, stop)`` with raised-cosine tapers of ``taper_samples`` inside it."""
    g = np.zeros(int(n_samples))
    start, stop = max(int(start), 0), min(int(stop), int(n_samples))
    if stop <= start:
        return g
    g[start:stop] = 1.0
    m = max(0, min(int(taper_samples), (stop - start) // 2))
    if m:
        ramp = 0.5 - 0.5 * np.cos(np.pi * (np.arange(m) + 0.5) / m)
        g[start:start + m] = ramp
        g[stop - m:stop] = ramp[::-1]
    return g


def parabolic_peak(y: np.ndarray, idx: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sub-sample peak by a parabola through ``y[idx-1], y[idx], y[idx+1]`` per row.

    Returns (fractional index, interpolated peak value). At the ends of a row the
    integer index is returned unchanged.

    Notes
    -----
    delta = (y[-1] - y[+1]) / (2 (y[-1] - 2 y[0] + y[+1])), peak = y[0] - (y[-1] - y[+1]) delta / 4
    (three-point parabolic interpolation; common practice, e.g. Jacobsen & Kootsookos 2007,
    IEEE Signal Process. Mag. 24(3), 123).
    """
    y = np.atleast_2d(y)
    idx = np.asarray(idx, dtype=int).reshape(-1)
    rows = np.arange(y.shape[0])
    n = y.shape[-1]
    i = np.clip(idx, 1, n - 2)
    ym, y0, yp = y[rows, i - 1], y[rows, i], y[rows, i + 1]
    den = ym - 2.0 * y0 + yp
    with np.errstate(divide="ignore", invalid="ignore"):
        delta = np.where(den < 0, 0.5 * (ym - yp) / den, 0.0)
    delta = np.clip(delta, -0.5, 0.5)
    edge = (idx < 1) | (idx > n - 2)
    delta = np.where(edge, 0.0, delta)
    peak = np.where(edge, y[rows, np.clip(idx, 0, n - 1)], y0 - 0.25 * (ym - yp) * delta)
    return np.where(edge, idx, i) + delta, peak
