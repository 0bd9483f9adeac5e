"""The confounders of a simulated capture, shared by the fast model and the full-wave campaign path.

The fast model (:mod:`waneguide.simulation.forward`) synthesises the received spectrum on the
band bins of its tables (:mod:`waneguide.simulation._tables`) and then, for every case,
applies the same steps this module holds:

1. attenuation ``exp(-a(f) r)``, ``a`` proportional to frequency with ``attenuation_db_per_m``
   at the burst centre (:func:`attenuation_np_per_m`; the fast model applies it per path);
2. the coupling gain of both discs, the coherent noise (electrical crosstalk and disc
   ringing at their levels re the pristine reference peak) and the trigger jitter (a
   phase ramp that moves everything, crosstalk included), then the inverse FFT cut to the
   record (:func:`render`).

A full-wave record (:mod:`waneguide.simulation.fullwave`, lossless, no coupling, no noise) is
taken onto the same band bins (:func:`band_spectrum`) and given the same attenuation of its
direct path and the same :func:`render` (:func:`confound_records`), so a full-wave campaign
applies every confounder in exactly the fast model's way. Noise, clipping and the rounding
to counts follow in :meth:`ForwardModel.finish`, which both paths call.
"""
from __future__ import annotations

import numpy as np
import scipy.fft as sfft

__all__ = ["attenuation_np_per_m", "render", "band_spectrum", "confound_records"]

_DB_PER_NP = 20.0 * np.log10(np.e)


def attenuation_np_per_m(attenuation_db_per_m: np.ndarray, freq_hz: np.ndarray, centre_hz: float) -> np.ndarray:
    """Attenuation [Np/m] (n, F): ``attenuation_db_per_m`` (n,) at ``centre_hz``, proportional to frequency."""
    return (np.asarray(attenuation_db_per_m, dtype=float) / _DB_PER_NP)[:, None] * (freq_hz / centre_hz)[None, :]


def render(tb, Y: np.ndarray, n_samples: int, *, gain: np.ndarray, jitter_s: np.ndarray, crosstalk_db, ringing_db,
           dtype=np.float64) -> np.ndarray:
    """Waveforms (n, n_samples) of band spectra ``Y`` (n, F) with gain, coherent noise and jitter (module docstring).

    ``Y`` is modified in place. ``gain`` and ``jitter_s`` are (n,) arrays; ``crosstalk_db`` and
    ``ringing_db`` None or (n,)-broadcastable levels [dB re the reference peak] (None or -inf: off).
    """
    n = Y.shape[0]
    Y *= gain[:, None]
    for level, shape in ((crosstalk_db, tb.crosstalk), (ringing_db, tb.ringing)):
        if level is None:
            continue
        lv = np.broadcast_to(np.asarray(level, dtype=float), (n,))
        lin = np.where(np.isfinite(lv), 10.0 ** (lv / 20.0), 0.0) * tb.ref_peak_v
        if np.any(lin):
            Y += lin[:, None] * shape[None, :]
    if np.any(jitter_s):
        Y *= np.exp(-1j * (2 * np.pi * tb.freq_hz)[None, :] * jitter_s[:, None])
    cdtype = np.complex64 if np.dtype(dtype) == np.float32 else np.complex128
    full = np.zeros((n, tb.n_fft // 2 + 1), cdtype)
    full[:, tb.bins] = Y
    return sfft.irfft(full, tb.n_fft, axis=1)[:, :n_samples]


def band_spectrum(tb, waveforms: np.ndarray) -> np.ndarray:
    """Spectra (n, F) of records (n, N) on the band bins of the tables (zero-padded to ``tb.n_fft``)."""
    x = np.atleast_2d(np.asarray(waveforms, dtype=float))
    return sfft.rfft(x, tb.n_fft, axis=1)[:, tb.bins]


def confound_records(fm, clean: np.ndarray, temperature_c, *, gain, jitter_s, attenuation_db_per_m, crosstalk_db,
                     ringing_db, dtype=np.float64) -> np.ndarray:
    """Noise-free records (n, N) of the direct path (e.g. full-wave) given the fast model's confounders.

    ``fm`` a :class:`~waneguide.simulation.forward.ForwardModel` of the family. The records are
    restricted to its band, attenuated over the path at ``temperature_c`` (length grown by the
    expansion factor, as the fast model does), then :func:`render` applies gain, coherent
    noise and jitter. Per-row arguments broadcast to (n,). No echoes are added.
    """
    tb = fm._tables
    Y = band_spectrum(tb, clean)
    n = Y.shape[0]
    b = lambda v: np.broadcast_to(np.asarray(v, dtype=float), (n,))  # noqa: E731
    e, _ = fm.temperature_factors(b(temperature_c))
    a_np = attenuation_np_per_m(b(attenuation_db_per_m), tb.freq_hz, fm.family.excitation.centre_frequency_hz)
    Y *= np.exp(-a_np * (fm.path_length_m * e)[:, None])
    return render(tb, Y, fm.n_samples, gain=b(gain), jitter_s=b(jitter_s), crosstalk_db=crosstalk_db,
                  ringing_db=ringing_db, dtype=dtype)
