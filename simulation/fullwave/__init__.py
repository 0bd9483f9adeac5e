"""waneguide.simulation.fullwave: a 2-D plane-strain full-wave solver of the flange along the path.

Velocity-stress staggered-grid finite differences, second order (Virieux 1986, Geophysics
51, 889), with the material averaging of the elastodynamic finite integration technique
(Fellinger et al. 1995, Wave Motion 21, 47): void cells outside the metal make the
surfaces stress-free, so any loss profile on either surface is a set of void cells.
Absorbing ends: convolutional PML (Komatitsch and Martin 2007, Geophysics 72, SM155).
Compiled inner loop: numba, one core, float32 by default.

Entry point
    :func:`simulate_fullwave` -> :class:`FullwaveResult` (waveforms of every tone burst of
    the case on the family's record, from one broadband run).
Grid (:mod:`.grid`)
    :class:`GridSpec`, :func:`design_grid` (coarsest grid obeying the rules),
    :func:`check_grid` (guard rails: CFL, 15 cells through the wall, 5 through the
    thinnest ligament), :func:`cfl_limit_s`.
Geometry (:mod:`.model`)
    :func:`build_plate` -> :class:`Plate` (metal/void cells, EFIT coefficients, discrete energy).
Drive and records (:mod:`.source`)
    :class:`BurstSpec`, :func:`footprint` (pin-force or normal disc footprints),
    :func:`broadband_pulse`, :func:`bursts_from_broadband` (spectral multiplication).
Time loop (:mod:`.solver`)
    :class:`PlateRun`.
"""
from __future__ import annotations

from .grid import (
    CELLS_PER_WAVELENGTH,
    MIN_LIGAMENT_CELLS,
    MIN_WALL_CELLS,
    GridSpec,
    cfl_limit_s,
    check_grid,
    design_grid,
)
from .model import Plate, build_plate
from .solver import FULLWAVE_VERSION, FullwaveResult, PlateRun, simulate_fullwave
from .source import SOURCE_KINDS, BurstSpec, broadband_pulse, bursts_from_broadband, footprint

__all__ = [
    "CELLS_PER_WAVELENGTH",
    "MIN_LIGAMENT_CELLS",
    "MIN_WALL_CELLS",
    "FULLWAVE_VERSION",
    "SOURCE_KINDS",
    "BurstSpec",
    "FullwaveResult",
    "GridSpec",
    "Plate",
    "PlateRun",
    "broadband_pulse",
    "build_plate",
    "bursts_from_broadband",
    "cfl_limit_s",
    "check_grid",
    "design_grid",
    "footprint",
    "simulate_fullwave",
]
