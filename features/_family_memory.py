"""Memory a simulated campaign of a family needs, estimated from the family alone (before any work).

The estimate follows the arrays the modal synthesis holds (simulation/_tables.py,
simulation/forward.py, simulation/_chunk.py), so a caller can refuse a campaign that cannot
fit before it starts. Three parts:

* the forward model's tables while they are built: the dispersion root scan over every band
  bin and every node of the thickness grid, :data:`TABLE_BYTES_PER_BIN_NODE` each;
* one chunk: per record (a case, and the baselines of its specimens on top) the band arrays
  (:data:`BAND_BYTES_PER_BIN` per band bin), the inverse FFT (8 bytes per FFT point: the
  complex64 half spectrum and the float32 record), the thickness profiles (40 bytes per
  segment) and a fixed part;
* the campaign's case tables: :data:`CASE_TABLE_BYTES` per case.

The band and the FFT length are found as the synthesis finds them (band: where the burst
spectrum times the transducer pair response is within 60 dB of its peak; FFT: long enough for
the slowest end echo over the thinned plate, between 1 and 8 record lengths).
"""
from __future__ import annotations

import math

import numpy as np

from waneguide.features.dispersion import fundamental_dispersion
from waneguide.features.excitation import ExcitationModel

__all__ = ["synthesis_size", "model_memory_bytes", "chunk_memory_bytes", "campaign_memory_bytes",
           "TABLE_BYTES_PER_BIN_NODE", "BAND_BYTES_PER_BIN", "CASE_TABLE_BYTES"]

#: Peak bytes of building the forward model's tables, per band bin and thickness-grid node.
#: Regression value of this code: tracemalloc peak of ForwardModel(family) was 1.04 MB per band
#: bin at the default 128 nodes (8,150 bytes per bin-node) for 116 to 1,934 bins; 4 % added.
TABLE_BYTES_PER_BIN_NODE = 8_500
#: Bytes per band bin of one record in the synthesis: complex128 spectra (accumulator, path term,
#: contribution, sum: 64), float64 phase and attenuation rows (phase, nominal phase, attenuation and
#: up to five path logs: 64), the jitter factor in the render (16) and margin (8). Counted from
#: simulation/forward.py; the chunk estimate is checked against a tracemalloc peak in tests/test_family.py.
BAND_BYTES_PER_BIN = 152
#: Bytes per FFT point of one record: complex64 half spectrum (4 per point) and float32 record (4).
FFT_BYTES_PER_POINT = 8
#: Bytes per path segment of one record: five float64 copies of the thickness profile.
SEGMENT_BYTES = 40
#: Fixed bytes of one record (grid weights over the 128-node thickness grid, row bookkeeping).
RECORD_FIXED_BYTES = 4_096
#: Bytes per case of the campaign's tables (plan, truth, the merged case table and its Arrow copy
#: for Parquet). Regression value of this code: the plan alone peaks at 360 bytes per case (demo-fb2,
#: tracemalloc); the merged table and its copies take about as much again each; rounded up to 2 KiB.
CASE_TABLE_BYTES = 2_048
#: Relative floor of the synthesised band (-60 dB of the peak of |burst spectrum x pair response|).
BAND_FLOOR = 1e-3
#: Longest FFT of the synthesis, in record lengths.
MAX_FFT_RECORDS = 8


def synthesis_size(family) -> tuple[int, int]:
    """(FFT length, band bins) the modal synthesis of ``family`` uses, estimated from the family alone."""
    acq = family.acquisition
    fs, n = acq.sample_rate_hz, int(acq.record_length)
    em = ExcitationModel.from_family(family)
    burst = em.burst()
    m = max(n, burst.size)
    f = np.fft.rfftfreq(m, 1.0 / fs)
    env = np.abs(np.fft.rfft(burst, m)) * np.abs(em.pair_response(f))
    inband = np.flatnonzero((env > BAND_FLOOR * env.max()) & (f > 0))
    f_lo, f_hi = float(f[inband[0]]), float(f[inband[-1]])
    t_nom = family.nominal_thickness_m
    t_thin = t_nom * (1.0 - family.domain.max_loss_pct[1] / 100.0)
    curves = fundamental_dispersion(family.build_material(), [t_thin, t_nom], np.linspace(f_lo, f_hi, 16))
    cg_min = float(np.nanmin(curves.group_velocity_m_s))
    near, far = family.path.end_distances_m()
    e1, e2 = family.edge_distances_m()
    length = family.path_length_m
    r_max = max(length + 2 * near, length + 2 * far, math.hypot(length, 2 * max(e1, e2)))
    ring_s = 10 * em.quality_factor / (math.pi * em.resonance_hz)
    t_needed = acq.pretrigger_s + 1.05 * r_max / cg_min + 3 * burst.size / fs + ring_s
    n_fft = min(max(n, math.ceil(t_needed * fs)), MAX_FFT_RECORDS * n)
    bins = int(math.floor((f_hi - f_lo) * n_fft / fs)) + 1
    return n_fft, bins


def model_memory_bytes(family, *, n_thickness: int = 128) -> int:
    """Peak bytes of building the forward model of ``family`` (transient: the kept tables are small)."""
    _, bins = synthesis_size(family)
    return TABLE_BYTES_PER_BIN_NODE * bins * int(n_thickness)


def _positive_int(value, name: str) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise ValueError(f"{name} must be a positive whole number; got {value!r}")
    return int(value)


def chunk_memory_bytes(family, chunk_size: int, *, n_receivers: int = 1) -> int:
    """Peak bytes of simulating one chunk of ``chunk_size`` cases, each recorded by ``n_receivers`` receivers.

    Baselines count on top: one per specimen, ``chunk_size / domain.states_per_specimen`` of them.
    """
    chunk_size = _positive_int(chunk_size, "chunk_size")
    n_receivers = _positive_int(n_receivers, "n_receivers")
    n_fft, bins = synthesis_size(family)
    n_segments = max(1, round(family.path.transducer_spacing_mm / family.domain.segment_mm))
    per_record = (BAND_BYTES_PER_BIN * bins + FFT_BYTES_PER_POINT * n_fft + SEGMENT_BYTES * n_segments
                  + RECORD_FIXED_BYTES)
    records = chunk_size * n_receivers * (1.0 + 1.0 / family.domain.states_per_specimen)
    return int(math.ceil(per_record * records))


def campaign_memory_bytes(family, n_cases: int, *, chunk_size: int, n_workers: int = 1, n_receivers: int = 1,
                          n_thickness: int = 128) -> int:
    """Peak bytes of a campaign of ``n_cases`` in chunks of ``chunk_size``, ``n_workers`` chunks at a time.

    The case tables of the whole campaign, plus the larger of the model build (before any chunk)
    and ``n_workers`` chunks in flight.
    """
    n_cases = _positive_int(n_cases, "n_cases")
    chunk_size = _positive_int(chunk_size, "chunk_size")
    n_workers = _positive_int(n_workers, "n_workers")
    chunk = chunk_memory_bytes(family, min(chunk_size, n_cases), n_receivers=n_receivers)
    return CASE_TABLE_BYTES * n_cases + max(model_memory_bytes(family, n_thickness=n_thickness), n_workers * chunk)
