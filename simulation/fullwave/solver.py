"""Running the full-wave grid: one broadband run per case, every tone burst from it.

:class:`PlateRun` holds the fields of one :class:`~.model.Plate` and advances them with the
compiled kernel (:mod:`._kernel`), recording receiver channels. :func:`simulate_fullwave`
is the family-level entry: it builds the flange at the capture temperature, drives the
transmitter footprint with the broadband pulse, records the receiver footprint and turns the
record into the family's tone bursts at the acquisition rate (:mod:`.source`).

What the full-wave capture means, next to the fast model's (simulation.forward)
- same record: the family's sample rate, record length and pre-trigger, burst starting at
  the trigger;
- the disc pair's resonance ``H(f)^2`` (features.excitation) is multiplied in when
  ``disc_resonance`` is on (default), as the fast model does;
- the aperture, the mode excitabilities, reflection and mode conversion at thickness
  changes, the mid-plane offset of one-sided loss come from the grid itself, not from
  the family's transducer numbers;
- amplitudes are the receiver quantity of the footprint [m/s] per 1 N/m drive amplitude
  (not volts): no noise, coupling, jitter, crosstalk or attenuation is added;
- 2-D plane strain along the path: no lateral edge echoes, no cylindrical spreading; the
  flange ends are absorbing (default) or stress-free (``ends="free"``).

Temperature: the material at ``temperature_c`` (``Material.at_temperature``) and every length
(wall, losses, positions, disc) scaled by its expansion factor, as in the fast model.
"""
from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np

from waneguide.core.errors import InputError
from waneguide.features.capture import Capture
from waneguide.features.family import Family

from . import _kernel
from .grid import GridSpec, check_grid, design_grid
from .model import Plate, build_plate
from .source import (
    SOURCE_KINDS,
    BurstSpec,
    band_edges_hz,
    broadband_pulse,
    bursts_from_broadband,
    disc_pair_response,
    footprint,
    peak_frequency_for,
    pulse_length_s,
)

__all__ = ["PlateRun", "FullwaveResult", "simulate_fullwave", "FULLWAVE_VERSION"]

#: Bumped whenever what the solver writes changes.
FULLWAVE_VERSION = "1"
_MARGIN_M = 0.01  # plate beyond each transducer edge before the absorbing columns (absorbing ends)


class PlateRun:
    """Fields of one plate and the compiled time loop.

    Parameters
    ----------
    plate : Plate
    dtype : numpy float dtype, default float32
    pml_f0_hz : float
        Dominant frequency for the CPML frequency shift ``alpha_max = pi f0``.

    Attributes
    ----------
    fields : tuple (vx, vz, sxx, szz, sxz)
        State after the last step: velocities at ``t_{n+1/2}``, stresses at ``t_{n+1}``.
    step_index : int
        Steps taken so far.
    """

    def __init__(self, plate: Plate, *, dtype=np.float32, pml_f0_hz: float):
        self.plate = plate
        self.dtype = np.dtype(dtype)
        if self.dtype not in (np.float32, np.float64):
            raise InputError(f"dtype must be float32 or float64; got {self.dtype}.")
        nz, nx = plate.shape
        self.fields = tuple(np.zeros((nz, nx), self.dtype) for _ in range(5))
        self.coeffs = tuple(np.ascontiguousarray(c, dtype=self.dtype) for c in plate.coeffs)
        self.psi = tuple(np.zeros((nz, max(2 * plate.npml, 1)), self.dtype) for _ in range(8))
        self.pml = plate.cpml(pml_f0_hz, self.dtype)
        self.step_index = 0

    def run(self, n_steps: int, source=None, q=None, receivers: Sequence = ()) -> np.ndarray:
        """Advance ``n_steps``; return the receiver records ``(len(receivers), n_steps)`` (float64).

        ``source`` = (nodes, weights) of :func:`~.source.footprint`, ``q`` the drive per step
        (indexed by the global step number, so a run may be split into calls); each receiver
        is (nodes, weights).
        """
        if source is None:
            src_nodes, src_w, qq = np.zeros((0, 3), np.int64), np.zeros(0, self.dtype), np.zeros(1, self.dtype)
        else:
            src_nodes = np.ascontiguousarray(source[0], dtype=np.int64)
            src_w = np.ascontiguousarray(source[1], dtype=self.dtype)
            qq = np.ascontiguousarray(q, dtype=self.dtype)
            if qq.size == 0:
                qq = np.zeros(1, self.dtype)
        if receivers:
            rec_nodes = np.concatenate([np.asarray(r[0], np.int64).reshape(-1, 3) for r in receivers])
            rec_w = np.concatenate([np.asarray(r[1], float) for r in receivers])
            rec_ch = np.concatenate([np.full(len(r[1]), k, np.int64) for k, r in enumerate(receivers)])
        else:
            rec_nodes, rec_w, rec_ch = np.zeros((0, 3), np.int64), np.zeros(0), np.zeros(0, np.int64)
        out = np.zeros((max(len(receivers), 1), int(n_steps)))
        _kernel.advance(self.fields, self.coeffs, self.psi, self.pml, self.plate.npml, src_nodes, src_w, qq,
                        rec_nodes, rec_w, rec_ch, out, self.step_index, int(n_steps))
        self.step_index += int(n_steps)
        return out[: len(receivers)]


@dataclass(frozen=True, eq=False)
class FullwaveResult:
    """Receiver waveforms of one full-wave case and how they were made.

    Attributes
    ----------
    waveforms : ndarray, shape (n_bursts, n_samples)
        Receiver quantity of the footprint [m/s per N/m of drive] per burst, on the
        family's record (sample k at ``k / fs - pretrigger``).
    bursts : tuple of BurstSpec
    sample_rate_hz, pretrigger_s : float
    source_kind : str
    grid : GridSpec
    shape : (nz, nx)
    n_steps : int
    runtime_s : float
        Wall time of the time loop.
    broadband : ndarray
        Receiver record of the broadband run at the simulation step (t = (n + 1/2) dt).
    drive : ndarray
        Broadband drive per step [N/m].
    meta : dict
        Temperature, material, span, band, versions (see :meth:`metadata`).
    """

    waveforms: np.ndarray
    bursts: tuple
    sample_rate_hz: float
    pretrigger_s: float
    source_kind: str
    grid: GridSpec
    shape: tuple
    n_steps: int
    runtime_s: float
    broadband: np.ndarray = field(repr=False)
    drive: np.ndarray = field(repr=False)
    meta: dict = field(default_factory=dict)

    @property
    def n_samples(self) -> int:
        return int(self.waveforms.shape[1])

    @property
    def time_s(self) -> np.ndarray:
        return np.arange(self.n_samples) / self.sample_rate_hz - self.pretrigger_s

    @property
    def n_cells(self) -> int:
        return (self.shape[0] - 2) * (self.shape[1] - 2)

    @property
    def cell_updates_per_s(self) -> float:
        return self.n_cells * self.n_steps / max(self.runtime_s, 1e-12)

    def metadata(self) -> dict[str, Any]:
        out = {"fullwave_version": FULLWAVE_VERSION, "source_kind": self.source_kind, "dx_m": self.grid.dx_m,
               "dt_s": self.grid.dt_s, "npml": self.grid.npml, "grid_basis": self.grid.basis, "nz": self.shape[0],
               "nx": self.shape[1], "cells": self.n_cells, "n_steps": self.n_steps, "runtime_s": self.runtime_s,
               "cell_updates_per_s": self.cell_updates_per_s,
               "bursts": [(b.frequency_hz, b.cycles, b.window) for b in self.bursts]}
        out.update(self.meta)
        return out

    def to_capture(self, index: int = 0, *, volts_per_unit: float = 1.0, path_id: str = "P",
                   captured_at: str | None = None) -> Capture:
        """Burst ``index`` as a :class:`Capture` (amplitude times ``volts_per_unit``)."""
        b = self.bursts[index]
        return Capture(
            amplitude_v=self.waveforms[index] * float(volts_per_unit), sample_rate_hz=self.sample_rate_hz,
            pretrigger_s=self.pretrigger_s, path_id=str(path_id), captured_at=captured_at,
            temperature_c=self.meta.get("temperature_c"), excitation_khz=b.frequency_hz / 1e3, cycles=b.cycles,
            units="V", extra={"simulated": True, "fidelity": "full", "fullwave_version": FULLWAVE_VERSION,
                              "family": self.meta.get("family"), "family_fingerprint": self.meta.get("family_fingerprint")},
        )


def _min_remaining_m(t: float, x_m, top, bottom) -> float:
    if top is None and bottom is None:
        return t
    n = np.asarray(x_m if x_m is not None else [], dtype=float).size
    tp = np.zeros(n) if top is None else np.asarray(top, dtype=float)
    bt = np.zeros(n) if bottom is None else np.asarray(bottom, dtype=float)
    if tp.shape != bt.shape:
        raise InputError(f"top_loss_m and bottom_loss_m must share the shape of x_m; got {tp.shape} and {bt.shape}.")
    if tp.size == 0:
        return t
    rest = t - tp - bt
    if not np.all(np.isfinite(rest)) or rest.min() <= 0:
        raise InputError(f"the loss must leave metal everywhere: top + bottom loss reaches {(tp + bt).max() * 1e3:.3f} mm "
                         f"of a {t * 1e3:.3f} mm wall.")
    return float(rest.min())


def simulate_fullwave(
    family: Family,
    top_loss_m=None,
    bottom_loss_m=None,
    x_m=None,
    *,
    temperature_c: float | None = None,
    grid: GridSpec | None = None,
    bursts: Sequence[BurstSpec] | None = None,
    source: str = "pin_force",
    receiver: str | None = None,
    disc_resonance: bool = True,
    ends: str = "absorbing",
    margin_m: float = _MARGIN_M,
    dtype=np.float32,
) -> FullwaveResult:
    """One full-wave pitch-catch case of ``family``: every burst from one broadband run.

    Parameters
    ----------
    family : Family
    top_loss_m, bottom_loss_m : array, optional
        Loss depth [m] from the top (transducer) and bottom surface at ``x_m``; 0 outside
        the range of ``x_m``; None: no loss on that side.
    x_m : array, optional
        Positions [m] from the transmitter centre (needed with a loss).
    temperature_c : float, optional
        Structure temperature [degC]; default the family's reference temperature.
    grid : GridSpec, optional
        Default :func:`~.grid.design_grid` for the band and the thinnest ligament; a given
        grid is checked (:func:`~.grid.check_grid`).
    bursts : sequence of BurstSpec, optional
        Default the family's excitation.
    source : {"pin_force", "normal", "shear"}
        Footprint of the transmitting disc (:mod:`.source`).
    receiver : {"pin_force", "normal", "shear"}, optional
        Footprint of the receiving disc; default the same kind (the reciprocal quantity).
    disc_resonance : bool, default True
        Multiply the disc pair's ``H(f)^2`` in.
    ends : {"absorbing", "free"}
        Absorbing ends ``margin_m`` beyond the discs, or the family's stress-free flange ends.
    dtype : float32 (default) or float64

    Returns
    -------
    FullwaveResult
    """
    if not isinstance(family, Family):
        raise TypeError(f"family must be a Family; got {type(family).__name__}.")
    receiver = source if receiver is None else receiver
    for label, kind in (("source", source), ("receiver", receiver)):
        if kind not in SOURCE_KINDS:
            raise InputError(f"{label} must be one of {', '.join(SOURCE_KINDS)}; got {kind!r}.")
    if (top_loss_m is not None or bottom_loss_m is not None) and x_m is None:
        raise InputError("x_m (positions from the transmitter [m]) is required with top_loss_m or bottom_loss_m.")
    ref = family.build_material()
    temp = family.environment.reference_temperature_c if temperature_c is None else float(temperature_c)
    mat = ref.at_temperature(temp)
    e = ref.expansion_factor(temp)
    scale = (lambda a: None if a is None else np.asarray(a, dtype=float) * e)  # noqa: E731
    x, top, bottom = scale(x_m), scale(top_loss_m), scale(bottom_loss_m)
    t = family.nominal_thickness_m * e
    L = family.path_length_m * e
    a = family.path.transducer_diameter_mm * 0.5e-3 * e
    t_min = _min_remaining_m(t, x, top, bottom)
    bursts = tuple(bursts) if bursts is not None else (BurstSpec.from_family(family),)
    if not bursts:
        raise InputError("bursts must name at least one tone burst.")
    acq = family.acquisition
    fs = acq.sample_rate_hz
    f_max = band_edges_hz(bursts, floor=1e-2)
    if grid is None:
        grid = design_grid(mat, t, f_max, min_thickness_m=t_min, sample_rate_hz=fs,
                           f_low_hz=min(b.frequency_hz for b in bursts))
    else:
        check_grid(grid, mat, t, min_thickness_m=t_min, f_max_hz=f_max, sample_rate_hz=fs)
    if ends == "free":
        d_near, d_far = (d * e for d in family.path.end_distances_m())
        span = (-d_near, L + d_far)
    else:
        span = (-(a + margin_m), L + a + margin_m)
    plate = build_plate(mat, grid, t, x_start_m=span[0], x_end_m=span[1], x_m=x, top_loss_m=top,
                        bottom_loss_m=bottom, ends=ends)
    f_peak = peak_frequency_for(bursts)
    dt = grid.dt_s
    t_end = acq.record_length / fs - acq.pretrigger_s + pulse_length_s(f_peak)
    n_steps = int(math.ceil(t_end / dt)) + 2
    q = broadband_pulse(f_peak, dt, int(math.ceil(pulse_length_s(f_peak) / dt)) + 1)
    src = footprint(plate, source, 0.0, a)
    rec = footprint(plate, receiver, L, a, receiver=True)
    run = PlateRun(plate, dtype=dtype, pml_f0_hz=f_peak)
    t0 = time.perf_counter()
    trace = run.run(n_steps, src, q, [rec])[0]
    runtime = time.perf_counter() - t0
    response = disc_pair_response(family) if disc_resonance else None
    waves = bursts_from_broadband(trace, q, dt, bursts, sample_rate_hz=fs, n_samples=int(acq.record_length),
                                  pretrigger_s=acq.pretrigger_s, response=response)
    meta = {"family": family.name, "family_fingerprint": family.fingerprint, "temperature_c": temp,
            "material": mat.name, "cl_m_s": mat.cl_m_s, "ct_m_s": mat.ct_m_s, "density_kg_m3": mat.density_kg_m3,
            "nominal_thickness_m": t, "path_length_m": L, "span_m": span, "ends": ends, "f_max_hz": f_max,
            "drive_peak_hz": f_peak, "receiver_kind": receiver, "disc_resonance": bool(disc_resonance),
            "dtype": np.dtype(dtype).name, "min_remaining_m": t_min, "metal_cells": plate.n_metal_cells}
    return FullwaveResult(waveforms=waves, bursts=bursts, sample_rate_hz=fs, pretrigger_s=acq.pretrigger_s,
                          source_kind=source, grid=grid, shape=plate.shape, n_steps=n_steps, runtime_s=runtime,
                          broadband=trace, drive=q, meta=meta)
