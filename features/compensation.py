"""Dispersion compensation of one Lamb mode (Wilcox 2003) and the sharpest-thickness search.

A mode that left the transmitter with spectrum F(w) arrives after a distance d as

    U(w) = F(w) exp(-i k(w) d)                                         (1)

(one mode, e^{i(wt - kx)} convention). Wilcox maps the received spectrum from
frequency to wavenumber, H(k) = U(w(k)) v_g(k), and transforms back over k:

    h(x) = int H(k) exp(i k x) dk = int U(w) exp(i k(w) x) dw          (2)

(the second form by the change of variable dk = dw / v_g). At x = d the phase of
(1) is undone for every frequency at once, so |h(x)| is the excitation envelope
again, centred at x = d + v_g t_c (t_c: time of the burst centre after the trigger),
with its duration scaled by v_g (Wilcox 2003, eqs. 5-9).

:func:`wilcox_compensate` follows the paper literally (FFT of the record, spectrum
interpolated onto a uniform wavenumber grid, inverse FFT over k). The extractor uses
:class:`CompensationOperator`, which evaluates the right-hand form of (2) directly on
the FFT bins of the excitation band: no interpolation, and one matrix product
compensates a whole chunk of captures. The sharpest thickness is the candidate
whose curve refocuses the packet best at the known path length (see
:class:`CompensationOperator`).

References
----------
P. D. Wilcox, "A rapid signal processing technique to remove the effect of
dispersion from guided wave signals", IEEE Trans. UFFC 50(4), 419-427, 2003,
doi:10.1109/TUFFC.2003.1197965.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.fft as sfft

from waneguide.core.errors import InputError
from waneguide.core.validation import validate_positive_scalar, validate_sample_rate_hz
from waneguide.features.arrivals import threshold_crossing_index
from waneguide.features.signals import parabolic_peak

__all__ = [
    "dispersive_propagate",
    "wilcox_compensate",
    "CompensationOperator",
    "PacketMeasure",
    "measure_packets",
    "candidate_thicknesses",
]


def _k_of_f(frequency_hz, wavenumber_rad_m, f_query):
    f = np.asarray(frequency_hz, dtype=float)
    k = np.asarray(wavenumber_rad_m, dtype=float)
    ok = np.isfinite(k)
    out = np.interp(f_query, f[ok], k[ok], left=np.nan, right=np.nan)
    return out


def dispersive_propagate(
    signal: np.ndarray,
    sample_rate_hz: float,
    frequency_hz: np.ndarray,
    wavenumber_rad_m: np.ndarray,
    distance_m: float,
    *,
    n_out: int | None = None,
) -> np.ndarray:
    """Propagate ``signal`` (rows) over ``distance_m`` along one mode, eq. (1).

    The wavenumber curve k(f) is interpolated linearly onto the FFT bins; bins
    outside the curve's frequency range are set to zero, so the signal must be
    band-limited inside it. The record is zero-padded to avoid wrap-around and
    cropped to ``n_out`` samples (default: the input length).
    """
    fs = validate_sample_rate_hz(sample_rate_hz)
    x = np.atleast_2d(np.asarray(signal, dtype=float))
    n = x.shape[-1]
    n_out = n if n_out is None else int(n_out)
    n_fft = sfft.next_fast_len(2 * max(n, n_out), real=True)
    X = sfft.rfft(x, n_fft, axis=-1)
    f = np.arange(X.shape[-1]) * fs / n_fft
    k = _k_of_f(frequency_hz, wavenumber_rad_m, f)
    phase = np.where(np.isfinite(k), np.exp(-1j * np.nan_to_num(k) * distance_m), 0.0)
    out = sfft.irfft(X * phase, n_fft, axis=-1)[:, :n_out]
    return out if np.ndim(signal) > 1 else out[0]


def wilcox_compensate(
    signal: np.ndarray,
    sample_rate_hz: float,
    frequency_hz: np.ndarray,
    wavenumber_rad_m: np.ndarray,
    *,
    pretrigger_s: float = 0.0,
    band_hz: tuple[float, float] | None = None,
    max_distance_m: float | None = None,
    oversample: int = 4,
) -> tuple[np.ndarray, np.ndarray]:
    """Dispersion compensation by frequency-to-wavenumber mapping (Wilcox 2003), literally.

    Parameters
    ----------
    signal : ndarray, shape (n,)
        Received record on the trigger time axis (``t_i = i/fs - pretrigger_s``).
    frequency_hz, wavenumber_rad_m : ndarray
        The mode's dispersion curve k(f), increasing in f.
    band_hz : (lo, hi), optional
        Frequencies mapped (default: the whole curve).
    max_distance_m : float, optional
        Largest distance represented (sets the wavenumber step); default twice the
        distance the slowest group velocity covers in the record.
    oversample : int
        Zero-padding factor of the time record before interpolation (Wilcox 2003, sec. III).

    Returns
    -------
    distance_m, h : ndarray
        Distance axis [m] and the complex compensated signal; ``abs(h)`` is the envelope.
    """
    fs = validate_sample_rate_hz(sample_rate_hz)
    x = np.asarray(signal, dtype=float).ravel()
    n = x.size
    f_c = np.asarray(frequency_hz, dtype=float)
    k_c = np.asarray(wavenumber_rad_m, dtype=float)
    ok = np.isfinite(k_c)
    f_c, k_c = f_c[ok], k_c[ok]
    lo, hi = (f_c[0], f_c[-1]) if band_hz is None else band_hz
    sel = (f_c >= lo) & (f_c <= hi)
    f_c, k_c = f_c[sel], k_c[sel]
    if f_c.size < 4 or np.any(np.diff(k_c) <= 0):
        raise InputError(f"the dispersion curve must have at least 4 points with k increasing in the band; got "
                         f"{f_c.size} point(s) in {lo:g} to {hi:g} Hz. Give a curve that covers band_hz.")
    vg = np.gradient(2 * np.pi * f_c, k_c)
    n_fft = sfft.next_fast_len(int(oversample) * n, real=True)
    t = np.arange(n) / fs - pretrigger_s
    e = x * x
    t_c = float((t * e).sum() / e.sum()) if e.sum() > 0 else 0.0
    U = sfft.rfft(x, n_fft)
    f = np.arange(U.size) * fs / n_fft
    # spectrum on the trigger time axis, de-rotated by the energy centre t_c so that
    # linear interpolation sees a slowly varying function; the rotation is put back exactly.
    U = U * np.exp(2j * np.pi * f * (pretrigger_s + t_c))
    if max_distance_m is None:
        max_distance_m = 2.0 * float(vg.min()) * (n / fs) + 2.0 * float(vg.max()) * abs(t_c)
    dk = 2 * np.pi / float(max_distance_m)
    k_grid = np.arange(0.0, k_c[-1], dk)
    k_grid = k_grid[k_grid >= k_c[0]]
    f_of_k = np.interp(k_grid, k_c, f_c)
    vg_k = np.interp(k_grid, k_c, vg)
    Uk = np.interp(f_of_k, f, U.real) + 1j * np.interp(f_of_k, f, U.imag)
    Uk *= np.exp(-2j * np.pi * f_of_k * t_c)
    H = Uk * vg_k
    # x spacing = max_distance / n_k; at least 4 points per wavenumber bin up to k_max
    n_k = sfft.next_fast_len(4 * int(np.ceil(k_c[-1] / dk)) + 1)
    # h(x_m) = sum_i H(k_i) exp(i k_i x_m) dk with k_i = k0 + i dk
    spec = np.zeros(n_k, dtype=complex)
    i0 = int(round(k_grid[0] / dk))
    idx = i0 + np.arange(k_grid.size)
    idx = idx[idx < n_k]
    spec[idx] = H[: idx.size]
    h = sfft.ifft(spec) * n_k * dk
    x_axis = np.arange(n_k) * 2 * np.pi / (n_k * dk)
    keep = x_axis <= max_distance_m
    return x_axis[keep], h[keep]


@dataclass(frozen=True)
class CompensationOperator:
    """Eq. (2) on the rfft bins of a gated segment: nominal profile and candidate focus.

    The received spectrum is first referred to the trigger time axis and to the
    burst centre t_c (factor ``exp(-i w t0) exp(i w t_c)``, t0 the trigger time of the
    segment's first sample), so that a perfectly compensated packet peaks at
    x = propagation distance.

    * ``profile`` -- h(x) for the nominal thickness on the distance grid ``distance_m``;
    * ``focus`` -- for every candidate thickness j, ``|h_j(L)| / sum |U|``: the compensated
      amplitude at the known path length L over its upper bound (all phases aligned).
      It equals 1 when the candidate's k(w) is the true one over the band and falls
      as residual dispersion or a wrong arrival spreads the phases. The path length
      must be fixed: without it a thin-plate A0 packet compresses equally well for
      every thickness at a distance scaled by sqrt(d_j / d) (Kirchhoff k ~ d^-1/2 sqrt(w)).

    Attributes
    ----------
    profile_matrix : ndarray, shape (B, M), complex
    focus_matrix : ndarray, shape (B, J), complex
    thickness_m : ndarray, shape (J,)
        Candidate thicknesses (uniform grid).
    distance_m : ndarray, shape (M,)
    nominal_index : int
    """

    profile_matrix: np.ndarray
    focus_matrix: np.ndarray
    thickness_m: np.ndarray
    distance_m: np.ndarray
    nominal_index: int

    @classmethod
    def build(
        cls,
        *,
        band_frequency_hz: np.ndarray,
        wavenumber_rad_m: np.ndarray,
        thickness_m: np.ndarray,
        distance_m: np.ndarray,
        path_length_m: float,
        segment_start_s: float,
        burst_centre_s: float,
        nominal_index: int,
    ) -> "CompensationOperator":
        """``wavenumber_rad_m`` has shape (J, B): k of each candidate at each band bin [rad/m]."""
        f = np.asarray(band_frequency_hz, dtype=float)
        k = np.atleast_2d(np.asarray(wavenumber_rad_m, dtype=float))
        if np.any(~np.isfinite(k)):
            raise ValueError("wavenumbers must be finite on the whole band for every candidate thickness.")
        w = 2 * np.pi * f
        dw = (w[1] - w[0]) if w.size > 1 else 1.0
        ref = np.exp(1j * w * (burst_centre_s - segment_start_s))  # (B,)
        xm = np.asarray(distance_m, dtype=float)
        j = int(nominal_index)
        profile = ref[:, None] * np.exp(1j * k[j][:, None] * xm[None, :]) * dw
        focus = ref[:, None] * np.exp(1j * k.T * float(path_length_m))
        return cls(np.ascontiguousarray(profile), np.ascontiguousarray(focus),
                   np.asarray(thickness_m, dtype=float), xm, j)

    def profile(self, band_spectrum: np.ndarray) -> np.ndarray:
        """Nominal-thickness compensated signal h(x), shape (n, M), from rfft values on the band (n, B)."""
        return np.asarray(band_spectrum) @ self.profile_matrix

    def focus(self, band_spectrum: np.ndarray) -> np.ndarray:
        """Focus in [0, 1] of every candidate, shape (n, J)."""
        u = np.asarray(band_spectrum)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.abs(u @ self.focus_matrix) / np.abs(u).sum(-1, keepdims=True)


@dataclass(frozen=True)
class PacketMeasure:
    """Compressed packet of each row: position [m], FWHM width [m], peak |h|, sharpness."""

    position_m: np.ndarray
    width_m: np.ndarray
    peak: np.ndarray
    sharpness: np.ndarray


def measure_packets(envelope: np.ndarray, distance_m: np.ndarray) -> PacketMeasure:
    """Position (parabolic peak), full width at half maximum and sharpness of envelopes (n, M).

    Sharpness is peak^2 / sum(envelope^2). With eq. (2) the energy int |h|^2 dx equals
    int |U|^2 v_g dw (Parseval over k), so on grids x_j = v_j t that share one time grid
    the sum is the same for every candidate thickness and the ratio rises as the packet
    compresses.
    """
    env = np.atleast_2d(envelope)
    dx = float(distance_m[1] - distance_m[0])
    ipk, peak = parabolic_peak(env, np.argmax(env, axis=-1))
    left = threshold_crossing_index(env, 0.5)
    right = env.shape[-1] - 1 - threshold_crossing_index(env[:, ::-1], 0.5)
    with np.errstate(divide="ignore", invalid="ignore"):
        sharp = peak**2 / (env * env).sum(-1)
    return PacketMeasure(distance_m[0] + ipk * dx, (right - left) * dx, peak, sharp)


def candidate_thicknesses(nominal_m: float, lo: float = 0.5, hi: float = 1.15, step: float = 0.025) -> tuple[np.ndarray, int]:
    """Uniform grid of candidate thicknesses (fractions ``lo..hi`` of nominal) containing nominal exactly."""
    nominal = validate_positive_scalar(nominal_m, "nominal thickness", unit="m")
    n_lo = int(round((1.0 - lo) / step))
    n_hi = int(round((hi - 1.0) / step))
    frac = 1.0 + step * np.arange(-n_lo, n_hi + 1)
    return nominal * frac, n_lo
