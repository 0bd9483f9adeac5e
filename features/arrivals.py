"""Arrival-time estimators, vectorised over rows (one capture per row).

Four estimators, each with its own error behaviour:

* **envelope peak** -- maximum of the Hilbert envelope, parabolic sub-sample refinement;
* **threshold crossing** -- last upward crossing of ``fraction x packet maximum`` before
  the peak, linear interpolation between samples (robust to the tail of a dispersed packet);
* **cross-correlation** against a reference (the baseline), peak refined either by a
  parabola through three correlation samples or by the slope of the cross-spectrum
  phase across the excitation band (generalised cross-correlation, Knapp & Carter 1976,
  IEEE Trans. ASSP 24(4), 320, doi:10.1109/TASSP.1976.1162830);
* **phase delay at the centre frequency** -- the cross-spectrum phase at f0 divided by
  2 pi f0, resolved to the 2 pi branch nearest a coarse delay.

Times are in samples here (fractional indices); the extractor converts to seconds.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.fft as sfft

from waneguide.core.errors import InputError
from waneguide.features.signals import hilbert_envelope, parabolic_peak

__all__ = [
    "DelayEstimate",
    "envelope_peak_index",
    "threshold_crossing_index",
    "xcorr_delay",
    "xcorr_delay_from_spectra",
    "phase_slope_delay",
    "phase_delay",
    "phase_delay_from_dft",
    "single_bin_dft",
    "envelope_arrivals",
]


def _rows(x) -> np.ndarray:
    return np.atleast_2d(np.asarray(x, dtype=float))


def envelope_peak_index(envelope: np.ndarray, *, half_width: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """(fractional index, value) of each row's envelope maximum.

    Without ``half_width``: parabola through the maximum and its two neighbours.
    With it: least-squares parabola over ``2 half_width + 1`` samples around the
    maximum, re-centred once on the vertex -- a broad envelope peak is flat over
    many samples, so three points let noise move the vertex by whole samples,
    while the wide fit averages it out.
    """
    env = _rows(envelope)
    ipk = np.argmax(env, axis=-1)
    if not half_width:
        return parabolic_peak(env, ipk)
    n, m = env.shape
    K = int(half_width)
    u = np.arange(-K, K + 1, dtype=float)
    design = np.stack([np.ones_like(u), u, u * u], axis=1)
    pinv = np.linalg.pinv(design)  # (3, 2K+1)
    rows = np.arange(n)[:, None]
    centre = ipk.astype(float)
    for _ in range(2):
        c = np.clip(np.rint(centre).astype(int), K, m - 1 - K)
        seg = env[rows, c[:, None] + u.astype(int)[None, :]]
        a0, a1, a2 = pinv @ seg.T
        with np.errstate(divide="ignore", invalid="ignore"):
            off = np.where(a2 < 0, -a1 / (2 * a2), 0.0)
        off = np.clip(off, -K, K)
        centre = c + off
        value = a0 + a1 * off + a2 * off**2
    return centre, value


def threshold_crossing_index(envelope: np.ndarray, fraction: float = 0.5, *, peak_index=None,
                             peak_value=None, fit_half_width: int = 0) -> np.ndarray:
    """Fractional index where each row's envelope last rises through ``fraction * max`` before its peak.

    ``peak_value`` (default: the sample maximum) sets the threshold. With
    ``fit_half_width = K > 0`` a least-squares line over the 2K + 1 samples around the
    crossing replaces the two-sample interpolation: the rising edge of a smooth packet
    is close to straight there (for a Hann envelope sin^2 the 50 % point is its
    inflection), and the fit averages the noise. NaN when the envelope never falls
    below the threshold before the peak.
    """
    if not 0.0 < fraction < 1.0:
        raise InputError(f"fraction must lie in (0, 1) (a share of the packet maximum); got {fraction!r}.")
    env = _rows(envelope)
    n, m = env.shape
    rows = np.arange(n)
    ipk = np.argmax(env, axis=-1) if peak_index is None else np.asarray(peak_index, dtype=int).reshape(-1)
    top = env[rows, ipk] if peak_value is None else np.asarray(peak_value, dtype=float).reshape(-1)
    thr = fraction * top
    j = np.arange(m)[None, :]
    below = (env < thr[:, None]) & (j < ipk[:, None])
    last = np.where(below, j, -1).max(axis=-1)
    ok = last >= 0
    lo = np.clip(last, 0, m - 2)
    if fit_half_width:
        K = int(fit_half_width)
        u = np.arange(-K, K + 2, dtype=float)  # samples lo-K .. lo+K+1, centred between lo and lo+1
        c = np.clip(lo, K, m - 2 - K)
        seg = env[rows[:, None], c[:, None] + u.astype(int)[None, :]]
        um = u.mean()
        slope = ((u - um) * (seg - seg.mean(-1, keepdims=True))).sum(-1) / ((u - um) ** 2).sum()
        icpt = seg.mean(-1) - slope * um
        with np.errstate(divide="ignore", invalid="ignore"):
            pos = c + (thr - icpt) / slope
        good = ok & (slope > 0) & (pos >= c - K) & (pos <= c + K + 1)
        return np.where(good, pos, np.where(ok, lo + 0.5, np.nan))
    e0 = env[rows, lo]
    e1 = env[rows, lo + 1]
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = (thr - e0) / (e1 - e0)
    return np.where(ok, lo + np.clip(frac, 0.0, 1.0), np.nan)


@dataclass(frozen=True)
class DelayEstimate:
    """Delay of ``x`` relative to the reference, in samples (positive: ``x`` later).

    Attributes
    ----------
    parabolic : ndarray
        Correlation peak refined by a parabola.
    phase_slope : ndarray
        Cross-spectrum phase slope over the band (line through the origin), started from ``parabolic``.
    peak_correlation : ndarray
        Normalised correlation coefficient at the peak (1 for identical shapes).
    """

    parabolic: np.ndarray
    phase_slope: np.ndarray
    peak_correlation: np.ndarray


def xcorr_delay_from_spectra(
    X: np.ndarray,
    R: np.ndarray,
    n_fft: int,
    *,
    max_lag: int,
    band_bins: np.ndarray,
    norm: np.ndarray | None = None,
) -> DelayEstimate:
    """Cross-correlation delay from one-sided spectra ``X = rfft(x, n_fft)``, ``R = rfft(ref, n_fft)``.

    ``n_fft`` must be at least the sum of the two lengths minus one so the
    correlation is linear, not circular. ``band_bins`` are the rfft bins used by the
    phase-slope refinement; ``norm`` (``||x|| ||ref||`` per row) scales the peak to a
    correlation coefficient.
    """
    C = X * np.conj(R)
    c = sfft.irfft(C, n_fft, axis=-1)
    L = int(max_lag)
    window = np.concatenate([c[:, n_fft - L:], c[:, :L + 1]], axis=-1)  # lags -L..L
    ipk = np.argmax(window, axis=-1)
    frac, peak = parabolic_peak(window, ipk)
    tau_p = frac - L
    tau_s = phase_slope_delay(C, n_fft, band_bins, start=tau_p)
    if norm is None:
        corr = np.full(tau_p.shape, np.nan)
    else:
        with np.errstate(divide="ignore", invalid="ignore"):
            corr = peak / norm
    return DelayEstimate(tau_p, tau_s, corr)


def phase_slope_delay(C: np.ndarray, n_fft: int, band_bins: np.ndarray, *, start: np.ndarray) -> np.ndarray:
    """Delay [samples] from the weighted slope of ``angle(C)`` over ``band_bins``.

    A pure delay tau gives angle(C(w)) = -w tau. The phase is de-rotated by the
    ``start`` delay so that what is left stays well inside one turn over the band,
    unwrapped, and a line through the origin is fitted with weights ``|C|``
    (weighted least squares): delay = start - sum(w om phi) / sum(w om^2).
    """
    k = np.asarray(band_bins)
    omega = 2.0 * np.pi * k / n_fft  # rad/sample
    Cb = C[:, k] * np.exp(1j * omega[None, :] * start[:, None])
    phi = np.unwrap(np.angle(Cb), axis=-1)
    w = np.abs(Cb)
    with np.errstate(divide="ignore", invalid="ignore"):
        slope = (w * omega * phi).sum(-1) / (w * omega**2).sum(-1)
    return start - slope


def xcorr_delay(
    x: np.ndarray,
    ref: np.ndarray,
    *,
    max_lag: int | None = None,
    band: tuple[float, float] | None = None,
) -> DelayEstimate:
    """Delay of each row of ``x`` against ``ref`` (same shape, or one reference row) [samples].

    Parameters
    ----------
    max_lag : int, optional
        Largest |lag| searched (default: the record length - 1).
    band : (lo, hi), optional
        Normalised frequency band (cycles/sample) for the phase-slope fit; default:
        bins where the cross-spectrum exceeds 10 % of its maximum.
    """
    x, ref = _rows(x), _rows(ref)
    ref = np.broadcast_to(ref, x.shape)
    n = x.shape[-1]
    n_fft = sfft.next_fast_len(2 * n - 1, real=True)
    X = sfft.rfft(x, n_fft, axis=-1)
    R = sfft.rfft(ref, n_fft, axis=-1)
    if band is None:
        mag = np.abs(X * np.conj(R)).mean(axis=0)
        bins = np.flatnonzero(mag >= 0.1 * mag.max())
    else:
        f = np.arange(X.shape[-1]) / n_fft
        bins = np.flatnonzero((f >= band[0]) & (f <= band[1]))
    norm = np.sqrt((x * x).sum(-1) * (ref * ref).sum(-1))
    return xcorr_delay_from_spectra(X, R, n_fft, max_lag=n - 1 if max_lag is None else max_lag,
                                    band_bins=bins, norm=norm)


def single_bin_dft(x: np.ndarray, frequency_norm: float, *, offset: float = 0.0) -> np.ndarray:
    """DFT of each row at one normalised frequency (cycles/sample), any value, not only a bin.

    ``offset`` is the index of the first sample on a common axis, so results of
    segments that start at different samples stay comparable.
    """
    x = _rows(x)
    n = np.arange(x.shape[-1]) + offset
    return x @ np.exp(-2j * np.pi * frequency_norm * n)


def phase_delay_from_dft(P: np.ndarray, Q: np.ndarray, frequency_norm: float, *, near: np.ndarray) -> np.ndarray:
    """Phase delay [samples] from single-bin DFTs ``P`` (signal) and ``Q`` (reference).

    tau = -angle(P conj(Q)) / (2 pi f) + m / f with the integer m that puts tau nearest ``near``.
    """
    period = 1.0 / frequency_norm
    tau0 = -np.angle(P * np.conj(Q)) * period / (2.0 * np.pi)
    m = np.round((np.asarray(near, dtype=float) - tau0) / period)
    return tau0 + m * period


def phase_delay(x: np.ndarray, ref: np.ndarray, frequency_norm: float, *, near=None) -> np.ndarray:
    """Phase delay of ``x`` against ``ref`` at ``frequency_norm`` (cycles/sample) [samples].

    ``near`` (default: the parabolic cross-correlation delay) picks the 2 pi branch.
    """
    x, ref = _rows(x), _rows(ref)
    if near is None:
        near = xcorr_delay(x, ref).parabolic
    return phase_delay_from_dft(single_bin_dft(x, frequency_norm), single_bin_dft(ref, frequency_norm),
                                frequency_norm, near=near)


def envelope_arrivals(x: np.ndarray, *, fraction: float = 0.5, n_fft: int | None = None,
                      half_width: int | None = None, fit_half_width: int = 0):
    """(envelope-peak index, threshold-crossing index) of each row, via :func:`hilbert_envelope`."""
    env = hilbert_envelope(_rows(x), n_fft=n_fft)
    ipk, peak = envelope_peak_index(env, half_width=half_width)
    return ipk, threshold_crossing_index(env, fraction, peak_value=peak if half_width else None,
                                         fit_half_width=fit_half_width)
