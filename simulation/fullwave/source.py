"""Transducer footprints, the broadband drive and tone bursts by spectral multiplication.

Footprints (on the top surface by default, or the bottom one; per unit width of the 2-D
plane-strain section)
``pin_force``
    A bonded disc of radius ``a`` drives the plate through shear concentrated at its rim
    (the pin-force limit of a perfectly bonded actuator, Crawley and de Luis 1987,
    AIAA J. 25, 1373; Giurgiutiu 2005, J. Intell. Mater. Syst. Struct. 16, 291): two
    opposite tangential line forces of 1 N/m at ``x0 - a`` and ``x0 + a``. As a receiver the
    disc senses the in-plane strain integrated over its length, ``v_x(x0 + a) - v_x(x0 - a)``
    [m/s], the reciprocal quantity. vx nodes in the top metal row (half a cell below the
    surface); a point between two nodes is shared linearly (sub-cell placement).
``normal``, ``shear``
    A uniform normal (tangential) traction over ``|x - x0| <= a`` with a total of 1 N/m; as
    a receiver the mean normal (in-plane) surface velocity over the footprint [m/s]. vz
    nodes on the surface faces (vx nodes in the surface row), shared by overlap length; a
    line force for ``a = 0``.

Source and receiver weights of one footprint are the same up to the factor ``dx``, so a
pair of footprints is reciprocal on the grid (Auld, *Acoustic Fields and Waves in Solids*,
1973, vol. 2, ch. 10: the transfer from a force at A to the velocity at B equals the
transfer from B to A).

Broadband drive
    The time derivative of a Gaussian, ``q(t) = -(t - t0) / s^2 exp(-(t - t0)^2 / (2 s^2))``,
    peak of its amplitude spectrum at ``f_p = 1 / (2 pi s)``, ``t0 = 6 s`` (the pulse is below
    1e-6 of its peak at t = 0), zero mean (no net impulse, so no rigid-body drift). With
    ``f_p`` a third of the upper band edge (-60 dB of the bursts), the drive holds at least
    5 % of its peak amplitude from 0.05 ``f_p`` to the band edge.

Tone bursts by spectral multiplication
    The grid is linear and time-invariant, so the response to a burst ``b`` is
    ``y_b = IDFT( DFT(y_q) DFT(b) / DFT(q) )`` over every bin where ``|DFT(q)|`` exceeds
    ``DECONV_FLOOR`` of its peak (the drive has energy there) and below the acquisition
    Nyquist frequency; other bins are set to 0. Both DFTs are of the sampled drives that
    the kernel injects, so inside the band the identity is exact up to round-off;
    tests/test_fullwave.py compares it with a direct burst run. The records are the
    velocities at the half steps, ``t = (n + 1/2) dt``; the half step and the
    pre-trigger are applied as a phase ramp before every m-th sample is kept
    (``dt = 1 / (m f_s)``).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import scipy.fft as sfft

from waneguide.core.errors import InputError
from waneguide.features.excitation import WINDOWS, disc_response, tone_burst

from .model import Plate

__all__ = [
    "BurstSpec",
    "SOURCE_KINDS",
    "DECONV_FLOOR",
    "footprint",
    "broadband_pulse",
    "band_edges_hz",
    "bursts_from_broadband",
    "disc_pair_response",
    "peak_frequency_for",
    "pulse_length_s",
]

SOURCE_KINDS = ("pin_force", "normal", "shear")
#: Bins where the broadband drive is below this fraction of its peak are not synthesised.
DECONV_FLOOR = 1e-4
_PULSE_T0_SIGMAS = 6.0
_PULSE_PEAK_OF_EDGE = 1.0 / 3.0


@dataclass(frozen=True)
class BurstSpec:
    """One tone burst: centre frequency [Hz], cycles and window (features.excitation)."""

    frequency_hz: float
    cycles: float
    window: str = "hann"

    def __post_init__(self):
        if not (math.isfinite(self.frequency_hz) and self.frequency_hz > 0):
            raise InputError(f"BurstSpec.frequency_hz must be positive; got {self.frequency_hz!r}.")
        if not (math.isfinite(self.cycles) and self.cycles > 0):
            raise InputError(f"BurstSpec.cycles must be positive; got {self.cycles!r}.")
        if self.window not in WINDOWS:
            raise InputError(f"BurstSpec.window must be one of {', '.join(WINDOWS)}; got {self.window!r}.")

    @classmethod
    def from_family(cls, family) -> "BurstSpec":
        exc = family.excitation
        return cls(exc.centre_frequency_hz, float(exc.cycles), exc.window)

    def samples(self, sample_rate_hz: float) -> np.ndarray:
        return tone_burst(self.frequency_hz, self.cycles, sample_rate_hz, window=self.window)


def _shares(plate: Plate, x_m: float, half_width_m: float, offset: float) -> list[tuple[int, float]]:
    """(column, share of 1 N/m) of a point (half width 0) or a uniform strip, on nodes at ``x0 + (i + offset) dx``."""
    h = plate.dx_m
    if half_width_m <= 0:
        p = (x_m - plate.x0_m) / h - offset
        i = int(math.floor(p + 1e-9))
        f = min(max(p - i, 0.0), 1.0)
        return [(i, 1.0 - f), (i + 1, f)]
    lo, hi = x_m - half_width_m, x_m + half_width_m
    out = []
    for i in range(int(math.floor((lo - plate.x0_m) / h - offset)), int(math.ceil((hi - plate.x0_m) / h - offset)) + 1):
        c = plate.x0_m + (i + offset) * h
        overlap = min(hi, c + 0.5 * h) - max(lo, c - 0.5 * h)
        if overlap > 0:
            out.append((i, overlap / (2 * half_width_m)))
    return out


def footprint(plate: Plate, kind: str, x_centre_m: float, half_width_m: float, *, receiver: bool = False,
              surface: str = "top"):
    """Nodes ``(k, 3)`` = (component, row, column) and weights of one footprint (module docstring).

    ``kind``: ``pin_force`` (opposite in-plane line forces at the two edges), ``normal`` or
    ``shear`` (uniform normal or tangential traction over the footprint; a line force for
    ``half_width_m = 0``); 1 N/m in total (per edge for ``pin_force``), along +z or +x.
    Source weights make ``weight * q`` the traction [Pa] on a node's face for ``q`` in N/m;
    receiver weights (``receiver=True``) are ``dx`` times the source weights (so a receiver
    reads the footprint-averaged velocity [m/s], or the edge difference for ``pin_force``).
    ``surface``: ``top`` (transducer side, default) or ``bottom``.
    """
    if kind not in SOURCE_KINDS:
        raise InputError(f"source kind must be one of {', '.join(SOURCE_KINDS)}; got {kind!r}.")
    if surface not in ("top", "bottom"):
        raise InputError(f"surface must be 'top' or 'bottom'; got {surface!r}.")
    h = plate.dx_m
    nx = plate.shape[1]
    rows = plate.top_row() if surface == "top" else plate.bottom_row()
    if kind == "pin_force":
        if not half_width_m > 0:
            raise InputError(f"a pin-force footprint needs a positive half width; got {half_width_m!r} m.")
        parts = [(i, -w) for i, w in _shares(plate, x_centre_m - half_width_m, 0.0, 1.0)]
        parts += _shares(plate, x_centre_m + half_width_m, 0.0, 1.0)
        comp = 0
    else:
        comp = 0 if kind == "shear" else 1
        parts = _shares(plate, x_centre_m, float(half_width_m), 1.0 if comp == 0 else 0.5)
    nodes, weights = [], []
    lo_ok = plate.npml + 1
    for i, w in parts:
        if abs(w) <= 1e-12:
            continue
        if not lo_ok <= i < nx - lo_ok - 1:
            raise InputError(f"the footprint at x = {x_centre_m * 1e3:.3f} mm (half width {half_width_m * 1e3:.3f} mm) "
                             "reaches outside the plate's inner span (absorbing or void columns).")
        if comp == 0:  # vx between columns i and i + 1: the lower (top) or higher (bottom) of their surface rows
            r = min(rows[i], rows[i + 1]) if surface == "top" else max(rows[i], rows[i + 1])
            bad = rows[i] < 0 or rows[i + 1] < 0
        else:  # vz on the surface face: above the top metal cell or below the bottom one
            r = rows[i] if surface == "top" else rows[i] - 1
            bad = rows[i] < 0
        if bad:
            raise InputError(f"no metal under the footprint at x = {x_centre_m * 1e3:.3f} mm.")
        nodes.append((comp, int(r), i))
        weights.append(w / h)
    node_arr = np.asarray(nodes, dtype=np.int64).reshape(-1, 3)
    w_arr = np.asarray(weights, dtype=float)
    return node_arr, (w_arr * h if receiver else w_arr)


def broadband_pulse(f_peak_hz: float, dt_s: float, n_steps: int) -> np.ndarray:
    """Gaussian-derivative drive (module docstring) sampled at ``n dt``, unit peak [N/m]."""
    s = 1.0 / (2 * math.pi * f_peak_hz)
    t0 = _PULSE_T0_SIGMAS * s
    t = np.arange(int(n_steps)) * dt_s - t0
    q = -t / s * np.exp(-0.5 * (t / s) ** 2)
    return q / np.abs(q).max()


def pulse_length_s(f_peak_hz: float) -> float:
    """Time after which the broadband drive is below 1e-6 of its peak (``2 t0``) [s]."""
    return 2 * _PULSE_T0_SIGMAS / (2 * math.pi * f_peak_hz)


def band_edges_hz(bursts, *, floor: float) -> float:
    """Highest frequency where any burst's amplitude spectrum exceeds ``floor`` of its own peak [Hz]."""
    f_hi = 0.0
    for b in bursts:
        fs = 40.0 * b.frequency_hz
        x = b.samples(fs)
        n = sfft.next_fast_len(max(16 * x.size, 4096), real=True)
        spec = np.abs(sfft.rfft(x, n))
        f = sfft.rfftfreq(n, 1.0 / fs)
        above = np.flatnonzero(spec > floor * spec.max())
        f_hi = max(f_hi, float(f[above[-1]]))
    return f_hi


def peak_frequency_for(bursts) -> float:
    """Spectral peak of the broadband drive: a third of the bursts' -60 dB upper edge [Hz]."""
    return _PULSE_PEAK_OF_EDGE * band_edges_hz(bursts, floor=1e-3)


def bursts_from_broadband(trace: np.ndarray, q: np.ndarray, dt_s: float, bursts, *, sample_rate_hz: float,
                          n_samples: int, pretrigger_s: float = 0.0, response=None) -> np.ndarray:
    """Receiver waveforms ``(len(bursts), n_samples)`` at the acquisition rate (module docstring).

    Parameters
    ----------
    trace : ndarray, shape (n_steps,)
        Receiver record of the broadband run (sample n at ``(n + 1/2) dt``).
    q : ndarray
        The drive the kernel injected (sample n at ``n dt``).
    bursts : sequence of BurstSpec
    response : callable or None
        ``response(f_hz) -> complex`` multiplied in (e.g. the disc pair ``H(f)^2``).
    """
    m = 1.0 / (sample_rate_hz * dt_s)
    mi = int(round(m))
    if abs(m - mi) > 1e-6 * m:
        raise InputError(f"dt_s={dt_s:.6g} s is not a whole fraction of the sample period 1/{sample_rate_hz:g} Hz.")
    trace = np.asarray(trace, dtype=float)
    n_out_steps = n_samples * mi
    pre_steps = pretrigger_s / dt_s
    n_fft = sfft.next_fast_len(int(trace.size + n_out_steps + math.ceil(pre_steps) + q.size + 16), real=True)
    f = sfft.rfftfreq(n_fft, dt_s)
    Y = sfft.rfft(trace, n_fft)
    Q = sfft.rfft(np.asarray(q, dtype=float), n_fft)
    keep = (np.abs(Q) > DECONV_FLOOR * np.abs(Q).max()) & (f < 0.5 * sample_rate_hz)
    G = np.zeros_like(Y)
    G[keep] = Y[keep] / Q[keep]
    # half-step record times and the pre-trigger: sample k of the output is y(k / fs - pretrigger)
    G *= np.exp(-2j * np.pi * f * (pre_steps + 0.5) * dt_s)
    if response is not None:
        G[keep] *= response(f[keep])
    out = np.empty((len(bursts), n_samples))
    fs_sim = 1.0 / dt_s
    for k, b in enumerate(bursts):
        B = sfft.rfft(b.samples(fs_sim), n_fft)
        y = sfft.irfft(G * B, n_fft)
        out[k] = y[: n_out_steps: mi][:n_samples]
    return out


def disc_pair_response(family):
    """``H(f)^2`` of the family's disc pair (features.excitation), as a callable of f [Hz]."""
    trd = family.transducer
    fr = trd.resonance_khz * 1e3 if trd.resonance_khz is not None else family.excitation.centre_frequency_hz
    q = trd.quality_factor
    return lambda f: disc_response(f, fr, q) ** 2
