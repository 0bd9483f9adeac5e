"""Precomputed tables of the forward model (once per family and grid size, per process).

The synthesised band, the FFT length, the log-spaced thickness grid with its wavenumber table,
each mode's source spectrum (drive burst x disc pair x excitability, from
:class:`waneguide.features.excitation.ExcitationModel`), the per-disc footprint factor
(aperture x relative strain excitability at each grid thickness) and the coherent-noise shapes.
See :mod:`waneguide.simulation.forward` for the model.
"""
from __future__ import annotations

import math
import threading
from dataclasses import dataclass

import numpy as np
import scipy.fft as sfft

from waneguide.core.errors import InputError
from waneguide.features.dispersion import fundamental_dispersion
from waneguide.features.excitation import ExcitationModel
from waneguide.features.family import Family

__all__ = ["MODES", "Tables", "cached_tables", "mode_index", "pair_factors"]

MODES = ("S0", "A0")
_BAND_FLOOR = 1e-3  # relative source amplitude that bounds the synthesised band (-60 dB)
_REF_PEAK_FRACTION = 0.25  # pristine direct-arrival peak as a fraction of ADC full scale
_RINGING_Q_FACTOR = 10.0  # ringing decay time 10 Q / (pi f_r)
_MIN_GRID = 16
_GRID_SPAN = (0.07, 1.10)  # thickness grid bounds re nominal (at least)


@dataclass(frozen=True)
class Tables:
    n_fft: int
    bins: np.ndarray            # (F,) rfft bin indices inside the band
    freq_hz: np.ndarray         # (F,)
    ln_t0: float
    dln: float
    thickness_grid_m: np.ndarray  # (G,)
    K: np.ndarray               # (M, G, F) wavenumber at reference temperature [rad/m]
    source: np.ndarray          # (M, F) complex source spectrum per mode, nominal footprints (A(k_nom)^2 included)
    source_bare: np.ndarray     # (M, F) the same without the two disc factors
    disc: np.ndarray            # (M, G, F) one disc's factor on a footprint of grid thickness (reference temperature)
    disc_nominal: np.ndarray    # (M, F) one disc's factor at nominal thickness, A(k_nom) (exact)
    crosstalk: np.ndarray       # (F,) complex, unit time-domain peak
    ringing: np.ndarray         # (F,) complex, unit time-domain peak
    ref_peak_v: float


_CACHE: dict[tuple[str, int], Tables] = {}
_LOCK = threading.Lock()


def mode_index(mode: str) -> int:
    try:
        return MODES.index(mode)
    except ValueError:
        raise InputError(f"mode {mode!r} is not simulated; accepted: {', '.join(MODES)}.") from None


def cached_tables(family: Family, n_thickness: int) -> Tables:
    key = (family.fingerprint, n_thickness)
    with _LOCK:
        tb = _CACHE.get(key)
    if tb is None:
        tb = _build_tables(family, n_thickness)
        with _LOCK:
            _CACHE[key] = tb
    return tb


def pair_factors(tb: Tables, footprint_m: np.ndarray, weights: np.ndarray,
                 nominal_thickness_m: float) -> tuple[np.ndarray, list[np.ndarray]]:
    """Pair factors ``F_tx F_rx`` of the rows whose footprints are not all nominal.

    ``footprint_m`` (n, 2, nodes): thickness at the transmitter's and the receiver's footprint
    nodes; ``weights`` (nodes,) the area weights. Returns the row indices and, per mode, the
    (rows, F) product of the two discs' factors at their footprints' mean thickness (linear in
    ln t on the grid; a disc whose nodes are all nominal takes the exact nominal factor).
    """
    off = np.any(footprint_m != nominal_thickness_m, axis=2)  # (n, 2)
    rows = np.flatnonzero(off.any(axis=1))
    if rows.size == 0:
        return rows, [np.empty((0, tb.freq_hz.size))] * len(MODES)
    off = off[rows][:, :, None]
    G = tb.thickness_grid_m.size
    u = np.clip((np.log(footprint_m[rows] @ weights) - tb.ln_t0) / tb.dln, 0.0, G - 1.0)  # (r, 2)
    i0 = np.minimum(np.floor(u).astype(np.int64), G - 2)
    w = (u - i0)[:, :, None]
    pair = []
    for m in range(len(MODES)):
        F = np.where(off, tb.disc[m][i0] * (1 - w) + tb.disc[m][i0 + 1] * w, tb.disc_nominal[m][None, None, :])
        pair.append(F[:, 0] * F[:, 1])
    return rows, pair


def _fft_length(family: Family, em: ExcitationModel, f_lo: float, f_hi: float, n_burst: int) -> int:
    """Long enough that the slowest synthesised arrival does not wrap round.

    For a path thinned all along to the domain's deepest loss (band-edge components below
    -60 dB may), at most 8 record lengths.
    """
    acq = family.acquisition
    fs, N = acq.sample_rate_hz, int(acq.record_length)
    t_nom = family.nominal_thickness_m
    t_thin = t_nom * (1.0 - family.domain.max_loss_pct[1] / 100.0)
    probe = fundamental_dispersion(family.build_material(), [t_thin, t_nom], np.linspace(f_lo, f_hi, 64))
    cg_min = np.nanmin(probe.group_velocity_m_s)
    d_near, d_far = family.path.end_distances_m()
    e1, e2 = family.edge_distances_m()
    L = family.path_length_m
    r_max = max(L + 2 * d_near, L + 2 * d_far, math.hypot(L, 2 * max(e1, e2)))
    ring_s = 10 * em.quality_factor / (np.pi * em.resonance_hz)
    t_needed = acq.pretrigger_s + r_max * 1.05 / cg_min + 3 * n_burst / fs + ring_s
    n_fft = max(N, sfft.next_fast_len(int(math.ceil(t_needed * fs)), real=True))
    return min(n_fft, 8 * N)


def _thickness_grid(t_nom: float, n: int) -> np.ndarray:
    """Log-spaced grid covering 7-110 % of nominal with the nominal thickness on a node.

    With nominal on a node, a footprint or segment at nominal thickness is read without
    interpolation error, so a loss that vanishes under a disc changes its factor continuously.
    """
    lo, hi = math.log(1.0 / _GRID_SPAN[0]), math.log(_GRID_SPAN[1])
    n_lo = min(range(1, n - 1), key=lambda j: max(lo / j, hi / (n - 1 - j)))
    dln = max(lo / n_lo, hi / (n - 1 - n_lo))
    grid = t_nom * np.exp(dln * (np.arange(n) - n_lo))
    grid[n_lo] = t_nom
    return grid


def _build_tables(family: Family, n_thickness: int) -> Tables:
    if n_thickness < _MIN_GRID:
        raise InputError(f"n_thickness must be at least {_MIN_GRID}; got {n_thickness}.")
    acq = family.acquisition
    fs, N = acq.sample_rate_hz, int(acq.record_length)
    em = ExcitationModel.from_family(family)
    burst = em.burst()
    mat = family.build_material()
    t_nom = family.nominal_thickness_m
    # band: bins where |X H^2| exceeds the floor, found on a first FFT of the record length
    f_rec = sfft.rfftfreq(N, 1 / fs)
    env = np.abs(sfft.rfft(burst, N)) * np.abs(em.pair_response(f_rec))
    inband = np.flatnonzero(env > _BAND_FLOOR * env.max())
    inband = inband[f_rec[inband] > 0]
    f_lo, f_hi = f_rec[inband[0]], f_rec[inband[-1]]
    n_fft = _fft_length(family, em, f_lo, f_hi, burst.size)
    f_all = sfft.rfftfreq(n_fft, 1 / fs)
    bins = np.flatnonzero((f_all >= f_lo) & (f_all <= f_hi))
    f = f_all[bins]
    delay = np.exp(-2j * np.pi * f * acq.pretrigger_s)  # the trigger sits pretrigger_s into the record
    X = em.burst_spectrum(f) * delay
    # thickness grid, log-spaced
    grid = _thickness_grid(t_nom, n_thickness)
    curves = fundamental_dispersion(mat, grid, f)
    K = np.ascontiguousarray(curves.wavenumber_rad_m.transpose(1, 0, 2))  # (M, G, F)
    if not np.all(np.isfinite(K)):
        raise InputError(f"family {family.name}: the S0/A0 dispersion table has gaps (a root was not found) over "
                         f"{f_lo / 1e3:.0f}-{f_hi / 1e3:.0f} kHz; check the material and the excitation band.")
    k_nom = fundamental_dispersion(mat, t_nom, f).wavenumber_rad_m[0]
    bare = np.stack([em.burst_spectrum(f) * em.pair_response(f) * em.excitability(mode) * delay for mode in MODES])
    disc_nom = np.stack([em.aperture(k_nom[m]) for m in range(len(MODES))])
    disc = np.stack([em.disc_factor(mode, f[None, :], K[m], grid[:, None], k_nom[m][None, :], t_nom)
                     for m, mode in enumerate(MODES)])
    src = bare * disc_nom**2

    def peak_of(spec_band: np.ndarray) -> float:
        full = np.zeros(n_fft // 2 + 1, complex)
        full[bins] = spec_band
        return float(np.abs(sfft.irfft(full, n_fft)[:N]).max())

    # pristine direct arrival at reference temperature, unit scale
    L = family.path_length_m
    ref_peak_unit = peak_of((src * np.exp(-1j * k_nom * L)).sum(axis=0))
    ref_peak = _REF_PEAK_FRACTION * family.full_scale_v
    src *= ref_peak / ref_peak_unit
    bare *= ref_peak / ref_peak_unit
    t = np.arange(n_fft) / fs
    tau = _RINGING_Q_FACTOR * em.quality_factor / (np.pi * em.resonance_hz)
    ring = sfft.rfft(np.exp(-t / tau) * np.sin(2 * np.pi * em.resonance_hz * t), n_fft)[bins] * delay
    return Tables(
        n_fft=int(n_fft), bins=bins, freq_hz=f, ln_t0=float(np.log(grid[0])),
        dln=float(np.log(grid[1] / grid[0])), thickness_grid_m=grid, K=K, source=src, source_bare=bare,
        disc=np.ascontiguousarray(disc), disc_nominal=disc_nom,
        crosstalk=X / peak_of(X), ringing=ring / peak_of(ring), ref_peak_v=ref_peak,
    )
