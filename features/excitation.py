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
    ``A(k) = 2 J1(k a) / (k a)``, the aperture factor of a uniform circular disc of radius ``a``
    for a mode of wavenumber ``k``: the disc's area projected on the path, ``(2 / pi)
    sqrt(1 - u^2)`` for ``u = x / a`` in ``[-1, 1]``, has the Fourier transform ``2 J1(k a) /
    (k a)`` (Poisson's integral, Abramowitz and Stegun 1964, eq. 9.1.20). With the
    radial pin-force model of a bonded disc (Raghavan and Cesnik 2005, Smart Mater. Struct. 14,
    1448) a disc couples to a mode as ``J1(k a) = (k a / 2) A(k)``: the aperture factor times a
    coupling to the surface strain, below. Once per disc, ``A^2`` for a pair.

Disc footprint
    Each disc integrates over the wall under it: the footprint's thickness is the
    area-weighted mean ``t_fp = sum_j w_j t(x_c + a u_j)`` on the Gauss-Chebyshev nodes of
    the second kind (weights ``w_j`` proportional to ``sin^2(j pi / (n + 1))``, exact for
    polynomials of degree ``2 n - 1`` against ``sqrt(1 - u^2)``; :func:`disc_footprint`),
    the profile being uniform across the width. One disc's factor for mode m is

        F_m(f, t_fp) = A(k_m(f, t_fp) a) sqrt(e_m(f, t_fp) / e_m(f, t_nom))

    with the wavenumber at the footprint's mean thickness and the relative strain
    excitability ``e_m`` (:func:`strain_excitability`) at that thickness; at the nominal
    thickness ``F_m = A(k_m)`` (the family's ``s0/a0_excitability`` stay the nominal-thickness
    values). The model evaluates ``F_m`` at the reference temperature.

Strain excitability
    A bonded disc drives the plate by in-plane shear at its rim and senses the mean in-plane
    surface strain under it; by reciprocity both are the mode's surface strain per square
    root of its power flux. From the residue of the plate's response to a surface shear
    load (V. Giurgiutiu 2005, J. Intell. Mater. Syst. Struct. 16, 291, eqs. for the PWAS
    strain field; doi:10.1177/1045389X05050106), with half-thickness h,
    ``p^2 = w^2 / c_L^2 - k^2``, ``q^2 = w^2 / c_T^2 - k^2``,

        N_S = k q (k^2 + q^2) cos(p h) cos(q h)
        D_S = (k^2 - q^2)^2 cos(p h) sin(q h) + 4 k^2 p q sin(p h) cos(q h)
        N_A = k q (k^2 + q^2) sin(p h) sin(q h)
        D_A = (k^2 - q^2)^2 sin(p h) cos(q h) + 4 k^2 p q cos(p h) sin(q h)

    the surface strain per unit load of a mode is ``N / D'(k)`` and
    ``e_m = k N_m / D_m'(k)`` is proportional to ``|surface strain|^2 / power flux`` of
    mode m (thin-plate limits: ``e_S0 ~ t^-1``, ``e_A0 ~ t^-3/2``; a thinner wall couples
    more strongly to both modes).
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
    "disc_footprint",
    "strain_excitability",
    "FOOTPRINT_NODES",
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
#: Nodes of the disc-footprint quadrature (Gauss-Chebyshev, second kind); odd, so one sits at the centre.
FOOTPRINT_NODES = 15
_DK_REL = 1e-6  # relative wavenumber step of the central difference D'(k)


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


def disc_footprint(n_nodes: int = FOOTPRINT_NODES) -> tuple[np.ndarray, np.ndarray]:
    """Nodes ``u`` (in units of the radius, increasing, inside (-1, 1)) and weights (sum 1) of a disc's area on the path.

    Gauss-Chebyshev quadrature of the second kind: ``sum_j w_j g(u_j)`` is the mean of
    ``g`` over the disc when ``g`` varies along the path only.
    """
    n = int(n_nodes)
    if n < 1:
        raise InputError(f"n_nodes must be a positive whole number; got {n_nodes!r}.")
    theta = np.arange(n, 0, -1) * np.pi / (n + 1)
    w = np.sin(theta) ** 2
    return np.cos(theta), w / w.sum()


def _rl_terms(mode: str, k, w, h, cl, ct):
    """N and D of the module docstring at wavenumber k, both scaled by exp(-(|Im p| + |Im q|) h)."""
    p = np.sqrt((w / cl) ** 2 - k * k + 0j)
    q = np.sqrt((w / ct) ** 2 - k * k + 0j)
    cp, sp, cq, sq = np.cos(p * h), np.sin(p * h), np.cos(q * h), np.sin(q * h)
    m2 = (k * k - q * q) ** 2
    if mode == "S0":
        return k * q * (k * k + q * q) * cp * cq, m2 * cp * sq + 4 * k * k * p * q * sp * cq
    return k * q * (k * k + q * q) * sp * sq, m2 * sp * cq + 4 * k * k * p * q * cp * sq


def strain_excitability(mode: str, frequency_hz, wavenumber_rad_m, thickness_m, cl_m_s: float,
                        ct_m_s: float) -> np.ndarray:
    """Relative strain excitability ``e = k N / D'(k)`` of S0 or A0 (module docstring) [arbitrary units].

    ``wavenumber_rad_m`` must be the mode's Rayleigh-Lamb root at ``(frequency_hz,
    thickness_m)`` (arrays broadcast together); only ratios at one frequency are meaningful.
    ``D'`` by a central difference of relative step 1e-6 (truncation and round-off below 1e-9).
    """
    if mode not in ("S0", "A0"):
        raise InputError(f"mode must be 'S0' or 'A0'; got {mode!r}.")
    k = np.asarray(wavenumber_rad_m, dtype=float)
    w = 2 * np.pi * np.asarray(frequency_hz, dtype=float)
    h = 0.5 * np.asarray(thickness_m, dtype=float)
    p = np.sqrt((w / cl_m_s) ** 2 - k * k + 0j)
    q = np.sqrt((w / ct_m_s) ** 2 - k * k + 0j)
    scale = np.exp(-(np.abs(p.imag) + np.abs(q.imag)) * h)  # keeps cosh/sinh finite; cancels in N / D'
    dk = _DK_REL * k
    num, _ = _rl_terms(mode, k, w, h, cl_m_s, ct_m_s)
    d_hi = _rl_terms(mode, k + dk, w, h, cl_m_s, ct_m_s)[1]
    d_lo = _rl_terms(mode, k - dk, w, h, cl_m_s, ct_m_s)[1]
    return np.real(k * num * scale / ((d_hi - d_lo) * scale / (2 * dk)))


@dataclass(frozen=True)
class ExcitationModel:
    """The drive burst and the transducer pair of one family (module docstring).

    Build it with :meth:`from_family`. ``aperture_radius_m`` is None when the family
    switches the aperture factor off (``transducer.aperture = "none"``); the footprint
    (``footprint_radius_m``, half the disc diameter) and the strain excitability at the
    local thickness apply either way.
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
    footprint_radius_m: float = 0.0
    cl_m_s: float | None = None
    ct_m_s: float | None = None

    @classmethod
    def from_family(cls, family) -> "ExcitationModel":
        exc, trd = family.excitation, family.transducer
        fc = exc.centre_frequency_hz
        mat = family.build_material()
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
            footprint_radius_m=family.path.transducer_diameter_mm * 0.5e-3,
            cl_m_s=mat.cl_m_s,
            ct_m_s=mat.ct_m_s,
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

    def aperture(self, wavenumber_rad_m) -> np.ndarray:
        """``A(k)`` of one disc (1 when the aperture factor is off)."""
        if self.aperture_radius_m is None:
            return np.ones(np.shape(wavenumber_rad_m))
        return disc_aperture(wavenumber_rad_m, self.aperture_radius_m)

    def pair_aperture(self, wavenumber_rad_m) -> np.ndarray:
        """``A(k)^2`` for both discs (1 when the aperture factor is off)."""
        return self.aperture(wavenumber_rad_m) ** 2

    def disc_factor(self, mode: str, frequency_hz, wavenumber_rad_m, thickness_m, nominal_wavenumber_rad_m,
                    nominal_thickness_m: float) -> np.ndarray:
        """One disc's factor ``A(k a) sqrt(e(k, t) / e(k_nom, t_nom))`` on a footprint of mean thickness ``thickness_m``.

        ``wavenumber_rad_m`` is the mode's root at ``thickness_m``, ``nominal_wavenumber_rad_m``
        at ``nominal_thickness_m`` (same frequencies; arrays broadcast). Equals ``A(k)``
        at the nominal thickness.
        """
        if self.cl_m_s is None or self.ct_m_s is None:
            raise ValueError("disc_factor needs the bulk velocities: build the model with ExcitationModel.from_family.")
        e = strain_excitability(mode, frequency_hz, wavenumber_rad_m, thickness_m, self.cl_m_s, self.ct_m_s)
        e0 = strain_excitability(mode, frequency_hz, nominal_wavenumber_rad_m, nominal_thickness_m, self.cl_m_s,
                                 self.ct_m_s)
        ratio = e / e0
        if not np.all(ratio > 0):
            raise InputError(f"the {mode} strain excitability changes sign between the nominal and a thinned wall "
                             "in the excitation band (a mode cut-off or root mix-up); check the family's material, "
                             "thickness and excitation band.")
        return self.aperture(wavenumber_rad_m) * np.sqrt(ratio)

    def excitability(self, mode: str) -> float:
        """Relative amplitude of ``mode`` ("S0" or "A0")."""
        if mode not in ("S0", "A0"):
            raise InputError(f"mode must be 'S0' or 'A0'; got {mode!r}.")
        return self.s0_excitability if mode == "S0" else self.a0_excitability

    def mode_source(self, frequency_hz, wavenumber_rad_m, mode: str) -> np.ndarray:
        """Spectrum one mode leaves the pair with: ``X(f) H(f)^2 A(k)^2 E_mode`` (trigger at t = 0)."""
        return (self.burst_spectrum(frequency_hz) * self.pair_response(frequency_hz)
                * self.pair_aperture(wavenumber_rad_m) * self.excitability(mode))
