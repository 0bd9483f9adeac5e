"""The one excitation and transducer model: tone burst, burst window, disc resonance, disc aperture.

The simulator (:mod:`waneguide.simulation.forward`), the baseline thickness gauge
(:mod:`waneguide.features.thickness_gauge`, through it the feature extractor) and the tests
all take the drive and the transducers from here.

Tone burst
    ``s(t) = w(t / T) sin(2 pi f_c t)`` for ``0 <= t <= T`` and 0 elsewhere, ``T = N / f_c``
    for ``N`` cycles (``N`` may be fractional); ``t = 0`` is the trigger. It is the continuous
    function sampled at ``t_i = i / f_s`` (or, on a record, at ``t_i = i / f_s - pretrigger -
    delay``), so a fractional-sample delay is exact.

    Number of samples of the bare burst: every sample inside the closed support ``[0, T]``,
    ``n = floor(N f_s / f_c) + 1`` (a relative guard of 1e-9 keeps an exact integer
    ``N f_s / f_c = M`` from being lost to round-off: then ``n = M + 1``, the last sample on
    ``t = T``, where the hann and tukey windows, and the rect burst of whole cycles, are 0).
    Example: 5 cycles at 150 kHz sampled at 10 MHz: ``N f_s / f_c = 333.3``, 334 samples.

Windows, with ``u = t / T`` in ``[0, 1]``
    ``hann``      ``0.5 - 0.5 cos(2 pi u)`` (F. J. Harris, Proc. IEEE 66(1), 51, 1978)
    ``gaussian``  ``exp(-(u - 1/2)^2 / (2 sigma^2))`` with ``sigma = 1/6`` of the burst duration:
                  the burst spans the mean +- 3 sigma and the window is ``exp(-4.5) = 1.1 %`` at
                  its ends (truncation at +- 3 sigma: common practice, no source)
    ``tukey``     cosine-tapered, taper fraction 0.5: raised-cosine tapers over the first and
                  the last quarter, flat between (Harris 1978)
    ``rect``      1

Disc response
    One bonded piezo disc is a second-order band-pass resonator
    ``H(f) = 1 / (1 + i Q (f / f_r - f_r / f))``: ``|H| = 1`` at the resonance ``f_r``; its
    half-power points are ``f_r (sqrt(1 + 1 / (4 Q^2)) -+ 1 / (2 Q))``, ``f_r / Q`` apart (the
    standard resonator algebra). A pitch-catch pair of identical discs (transmit and receive)
    gives ``H^2``.

Disc aperture
    ``A(k) = 2 J1(k a) / (k a)``, the in-plane aperture factor of a uniform circular disc of
    radius ``a`` for a mode of wavenumber ``k`` (Raghavan and Cesnik 2005, J. Intell. Mater.
    Syst. Struct. 16, 309, doi:10.1177/1045389X05050106); once per disc, ``A^2`` for a pair.
    The model evaluates it at the nominal thickness and the reference temperature.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.special import j1

from waneguide.core.errors import InputError
from waneguide.core.validation import validate_positive_scalar, validate_sample_rate_hz

__all__ = [
    "WINDOWS",
    "GAUSSIAN_SIGMA",
    "TUKEY_TAPER",
    "burst_n_samples",
    "burst_window",
    "tone_burst",
    "sampled_spectrum",
    "disc_response",
    "disc_aperture",
    "ExcitationModel",
]

#: Tone-burst windows (the family's ``excitation.window``).
WINDOWS = ("hann", "gaussian", "tukey", "rect")
#: Standard deviation of the gaussian window as a fraction of the burst duration.
GAUSSIAN_SIGMA = 1.0 / 6.0
#: Taper fraction of the tukey window.
TUKEY_TAPER = 0.5
_COUNT_GUARD = 1e-9  # relative round-off guard of the sample count
_LOW_F_HZ = 1e-3  # the disc response is evaluated at max(f, this): no division by zero at DC


def _check_window(window: str) -> str:
    if window not in WINDOWS:
        raise InputError(f"window must be one of {', '.join(WINDOWS)}; got {window!r}. Set excitation.window in "
                         "the family file to one of them.")
    return window


def burst_n_samples(frequency_hz: float, cycles: float, sample_rate_hz: float) -> int:
    """Samples of the bare burst: ``floor(cycles fs / f) + 1``, every sample in ``[0, cycles / f]``."""
    f = validate_positive_scalar(frequency_hz, "frequency_hz", unit="Hz")
    c = validate_positive_scalar(cycles, "cycles")
    fs = validate_sample_rate_hz(sample_rate_hz)
    m = c * fs / f
    return int(math.floor(m * (1.0 + _COUNT_GUARD))) + 1


def burst_window(u, window: str = "hann") -> np.ndarray:
    """The burst window at relative times ``u = t / T`` (0 outside ``[0, 1]``)."""
    _check_window(window)
    u = np.asarray(u, dtype=float)
    inside = (u >= -_COUNT_GUARD) & (u <= 1.0 + _COUNT_GUARD)
    uu = np.clip(u, 0.0, 1.0)
    if window == "hann":
        w = 0.5 - 0.5 * np.cos(2 * np.pi * uu)
    elif window == "gaussian":
        w = np.exp(-0.5 * ((uu - 0.5) / GAUSSIAN_SIGMA) ** 2)
    elif window == "tukey":
        a = TUKEY_TAPER
        w = np.ones_like(uu)
        lo, hi = uu < a / 2, uu > 1 - a / 2
        w[lo] = 0.5 * (1 + np.cos(2 * np.pi / a * (uu[lo] - a / 2)))
        w[hi] = 0.5 * (1 + np.cos(2 * np.pi / a * (uu[hi] - 1 + a / 2)))
    else:
        w = np.ones_like(uu)
    return np.where(inside, w, 0.0)


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
    """Windowed sine burst ``w(t / T) sin(2 pi f t)``, ``0 <= t <= T = cycles / f`` (module docstring).

    Without ``n_samples`` the bare burst of :func:`burst_n_samples` samples, starting at
    sample 0. With it, a record of ``n_samples`` on the capture time axis
    ``t_i = i / fs - pretrigger_s`` holding the burst from ``delay_s`` on (evaluated
    analytically, so a non-integer sample delay is exact).

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
    _check_window(window)
    if n_samples is None:
        t = np.arange(burst_n_samples(f, c, fs)) / fs
    else:
        t = np.arange(int(n_samples)) / fs - float(pretrigger_s) - float(delay_s)
    return burst_window(t * (f / c), window) * np.sin(2 * np.pi * f * t)


def sampled_spectrum(x, sample_rate_hz: float, frequency_hz, *, start_s: float = 0.0) -> np.ndarray:
    """DTFT ``sum_i x_i exp(-i 2 pi f (start_s + i / fs))`` of samples taken from ``start_s`` on.

    At the bins of an rfft of length ``n >= len(x)`` it equals ``rfft(x, n)`` (times the
    start-time phase).
    """
    x = np.asarray(x, dtype=float)
    f = np.asarray(frequency_hz, dtype=float)
    t = start_s + np.arange(x.size) / float(sample_rate_hz)
    return np.exp(-2j * np.pi * np.multiply.outer(f, t)) @ x


def disc_response(frequency_hz, resonance_hz: float, quality_factor: float) -> np.ndarray:
    """One disc's resonance ``1 / (1 + i Q (f / f_r - f_r / f))`` (evaluated at ``f >= 1 mHz``)."""
    f = np.maximum(np.asarray(frequency_hz, dtype=float), _LOW_F_HZ)
    return 1.0 / (1.0 + 1j * quality_factor * (f / resonance_hz - resonance_hz / f))


def disc_aperture(wavenumber_rad_m, radius_m: float) -> np.ndarray:
    """One disc's aperture factor ``2 J1(k a) / (k a)`` (1 at ``k a = 0``)."""
    z = np.asarray(wavenumber_rad_m, dtype=float) * radius_m
    small = np.abs(z) <= 1e-8
    return np.where(small, 1.0, 2.0 * j1(z) / np.where(small, 1.0, z))


@dataclass(frozen=True)
class ExcitationModel:
    """The drive burst and the transducer pair of one family (module docstring).

    Build it with :meth:`from_family`. ``aperture_radius_m`` is None when the family
    switches the aperture factor off (``transducer.aperture = "none"``).
    """

    centre_frequency_hz: float
    cycles: float
    window: str
    sample_rate_hz: float
    resonance_hz: float
    quality_factor: float
    aperture_radius_m: float | None
    s0_excitability: float = 1.0
    a0_excitability: float = 1.0

    @classmethod
    def from_family(cls, family) -> "ExcitationModel":
        exc, trd = family.excitation, family.transducer
        fc = exc.centre_frequency_hz
        return cls(
            centre_frequency_hz=fc,
            cycles=float(exc.cycles),
            window=exc.window,
            sample_rate_hz=family.acquisition.sample_rate_hz,
            resonance_hz=trd.resonance_khz * 1e3 if trd.resonance_khz is not None else fc,
            quality_factor=trd.quality_factor,
            aperture_radius_m=family.path.transducer_diameter_mm * 0.5e-3 if trd.aperture == "disc" else None,
            s0_excitability=trd.s0_excitability,
            a0_excitability=trd.a0_excitability,
        )

    @property
    def burst_duration_s(self) -> float:
        """``T = cycles / f_c`` [s]."""
        return self.cycles / self.centre_frequency_hz

    @property
    def burst_centre_s(self) -> float:
        """Time of the burst centre after the trigger, ``T / 2`` [s]."""
        return 0.5 * self.burst_duration_s

    def burst(self) -> np.ndarray:
        """The bare drive burst (unit amplitude), starting at the trigger."""
        return tone_burst(self.centre_frequency_hz, self.cycles, self.sample_rate_hz, window=self.window)

    def burst_spectrum(self, frequency_hz) -> np.ndarray:
        """DTFT of the sampled drive burst, trigger at t = 0."""
        return sampled_spectrum(self.burst(), self.sample_rate_hz, frequency_hz)

    def pair_response(self, frequency_hz) -> np.ndarray:
        """``H(f)^2``: transmitting and receiving disc."""
        return disc_response(frequency_hz, self.resonance_hz, self.quality_factor) ** 2

    def pair_aperture(self, wavenumber_rad_m) -> np.ndarray:
        """``A(k)^2`` for both discs (1 when the aperture factor is off)."""
        if self.aperture_radius_m is None:
            return np.ones(np.shape(wavenumber_rad_m))
        return disc_aperture(wavenumber_rad_m, self.aperture_radius_m) ** 2

    def excitability(self, mode: str) -> float:
        """Relative amplitude of ``mode`` ("S0" or "A0")."""
        if mode not in ("S0", "A0"):
            raise InputError(f"mode must be 'S0' or 'A0'; got {mode!r}.")
        return self.s0_excitability if mode == "S0" else self.a0_excitability

    def mode_source(self, frequency_hz, wavenumber_rad_m, mode: str) -> np.ndarray:
        """Spectrum one mode leaves the pair with: ``X(f) H(f)^2 A(k)^2 E_mode`` (trigger at t = 0)."""
        return (self.burst_spectrum(frequency_hz) * self.pair_response(frequency_hz)
                * self.pair_aperture(wavenumber_rad_m) * self.excitability(mode))
