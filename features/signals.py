"""Signal building blocks: tone bursts, the analytic signal / Hilbert envelope, gates.

All functions work on the last axis, so a whole campaign chunk (rows = captures)
goes through one call.
"""
from __future__ import annotations

import numpy as np
import scipy.fft as sfft

from waneguide.core.validation import validate_positive_scalar, validate_sample_rate_hz

__all__ = [
    "WINDOWS",
    "burst_window",
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

#: Tone-burst windows understood by :func:`tone_burst` (family ``excitation.window``).
WINDOWS = ("hann", "gaussian", "tukey", "rect")


def burst_window(n: int, window: str = "hann") -> np.ndarray:
    """Window of ``n`` samples spanning the burst, zero at both ends for hann/gaussian/tukey.

    ``gaussian`` has standard deviation n/6 (so it falls to exp(-4.5) = 1.1 % at the ends),
    ``tukey`` is a Tukey window with taper fraction 0.5 (common practice, no source).
    """
    if window not in WINDOWS:
        raise ValueError(f"window must be one of {', '.join(WINDOWS)}; got {window!r}.")
    if n < 2:
        return np.ones(max(n, 0))
    u = np.arange(n) / (n - 1)
    if window == "hann":
        return 0.5 - 0.5 * np.cos(2 * np.pi * u)
    if window == "gaussian":
        return np.exp(-0.5 * ((u - 0.5) * 6.0) ** 2)
    if window == "tukey":
        from scipy.signal.windows import tukey

        return tukey(n, 0.5)
    return np.ones(n)


def tone_burst(
    frequency_hz: float,
    cycles: float,
    sample_rate_hz: float,
    *,
    window: str = "hann",
    n_samples: int | None = None,
    delay_s: float = 0.0,
    pretrigger_s: float = 0.0,
) -> np.ndarray:
    """Windowed sine burst ``w(t) sin(2 pi f (t - delay))`` for ``delay <= t <= delay + cycles/f``.

    With ``n_samples`` the burst is placed on a capture time axis
    (``t_i = i/fs - pretrigger_s``) starting at ``delay_s``, evaluated analytically, so a
    non-integer sample delay is exact. Without it, the bare burst (starting at sample 0)
    is returned.

    Parameters
    ----------
    frequency_hz : float
        Centre frequency [Hz].
    cycles : float
        Number of cycles.
    sample_rate_hz : float
        Sampling rate [Hz].
    window : {"hann", "gaussian", "tukey", "rect"}
    n_samples : int, optional
        Length of the returned record.
    delay_s, pretrigger_s : float
        Burst start on the trigger time axis [s] and the record's pre-trigger [s].
    """
    f = validate_positive_scalar(frequency_hz, "frequency_hz", unit="Hz")
    c = validate_positive_scalar(cycles, "cycles")
    fs = validate_sample_rate_hz(sample_rate_hz)
    duration = c / f
    if n_samples is None:
        n = int(np.floor(duration * fs)) + 1
        t = np.arange(n) / fs
    else:
        t = np.arange(int(n_samples)) / fs - float(pretrigger_s) - float(delay_s)
    u = t / duration
    inside = (u >= 0) & (u <= 1)
    uu = np.clip(u, 0, 1)
    if window == "hann":
        w = 0.5 - 0.5 * np.cos(2 * np.pi * uu)
    elif window == "gaussian":
        w = np.exp(-0.5 * ((uu - 0.5) * 6.0) ** 2)
    elif window == "tukey":
        a = 0.5
        w = np.ones_like(uu)
        lo, hi = uu < a / 2, uu > 1 - a / 2
        w[lo] = 0.5 * (1 + np.cos(2 * np.pi / a * (uu[lo] - a / 2)))
        w[hi] = 0.5 * (1 + np.cos(2 * np.pi / a * (uu[hi] - 1 + a / 2)))
    elif window == "rect":
        w = np.ones_like(uu)
    else:
        raise ValueError(f"window must be one of {', '.join(WINDOWS)}; got {window!r}.")
    return np.where(inside, w * np.sin(2 * np.pi * f * t), 0.0)


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


# ---------------------------------------------------------------------------
# Mode windows: where each fundamental mode can arrive in a family's record
# ---------------------------------------------------------------------------
from dataclasses import dataclass  # noqa: E402


@dataclass(frozen=True)
class ModeWindow:
    """Time window [s after trigger] in which one mode's direct packet can arrive."""

    mode: str
    start_s: float
    stop_s: float
    fastest_m_s: float
    slowest_m_s: float

    def indices(self, sample_rate_hz: float, pretrigger_s: float, n_samples: int) -> tuple[int, int]:
        """[start, stop) sample indices, clipped to the record."""
        i0 = int(np.floor((self.start_s + pretrigger_s) * sample_rate_hz))
        i1 = int(np.ceil((self.stop_s + pretrigger_s) * sample_rate_hz))
        return max(0, min(i0, n_samples)), max(0, min(i1, n_samples))


def excitation_band_hz(family) -> tuple[float, float]:
    """Main lobe of the excitation spectrum, f0 (1 -+ 2 / cycles) (Hann burst of N cycles:
    first spectral zeros at f0 +- 2 f0 / N; Harris 1978, Proc. IEEE 66(1), 51, Hann main-lobe
    half-width 2 bins of the window length), floored at 0.2 f0."""
    f0 = family.excitation.centre_frequency_hz
    half = 2.0 / family.excitation.cycles
    return max(0.2 * f0, f0 * (1.0 - half)), f0 * (1.0 + half)


def mode_windows(family, *, velocity_margin: float = 0.03) -> dict[str, ModeWindow]:
    """S0 and A0 arrival windows from the dispersion curves, the path length and the excitation band.

    Fastest arrival: the largest group velocity in the band at nominal thickness,
    raised by ``velocity_margin`` (temperature span and curve error). Slowest: the
    smallest group velocity in the band over thicknesses from nominal down to
    nominal x (1 - max_loss/2) (the deepest path-averaged loss of the domain, taken as
    half the deepest local loss), lowered by the margin. The window then runs from
    the fastest arrival of the burst start to the slowest arrival of its end, with a
    quarter of the burst duration added on each side; S0's end is cut where A0's
    window starts if they would overlap.
    """
    key = (family.fingerprint, float(velocity_margin))
    if key not in _WINDOW_CACHE:
        _WINDOW_CACHE[key] = _mode_windows(family, velocity_margin)
    return dict(_WINDOW_CACHE[key])


_WINDOW_CACHE: dict = {}


def _mode_windows(family, velocity_margin):
    from waneguide.features.dispersion import fundamental_dispersion

    mat = family.build_material()
    d0 = family.nominal_thickness_m
    lo, hi = excitation_band_hz(family)
    f = np.linspace(lo, hi, 41)
    loss = family.domain.max_loss_pct[1] / 100.0
    d = d0 * np.linspace(1.0 - 0.5 * loss, 1.0, 6)
    curves = fundamental_dispersion(mat, d, f)
    burst = family.excitation.cycles / family.excitation.centre_frequency_hz
    L = family.path.spacing_m
    out: dict[str, ModeWindow] = {}
    for mode in ("S0", "A0"):
        vg = curves.group_velocity_m_s[:, curves.mode_index(mode), :]
        v_fast = float(np.nanmax(vg[-1])) * (1.0 + velocity_margin)
        v_slow = float(np.nanmin(vg)) * (1.0 - velocity_margin)
        out[mode] = ModeWindow(mode, L / v_fast - 0.25 * burst, L / v_slow + 1.25 * burst, v_fast, v_slow)
    s0, a0 = out["S0"], out["A0"]
    if s0.stop_s > a0.start_s:
        cut = max(a0.start_s, s0.start_s + 1.5 * burst)
        out["S0"] = ModeWindow("S0", s0.start_s, cut, s0.fastest_m_s, s0.slowest_m_s)
    return out
