"""Full-wave campaigns (``fidelity = "full"``): the campaign grid, one run per case and baseline, the amplitude scale.

A full-wave campaign has the plan, the profiles, the truth, the confounders, the noise and
the files of a fast one (:mod:`waneguide.simulation.campaign`); only the noise-free record
of the direct path comes from :func:`waneguide.simulation.fullwave.simulate_fullwave`
instead of the modal synthesis. Then :func:`waneguide.simulation._chunk.simulate_chunk`
applies the fast model's own confounder code to it.

One run per case and per specimen baseline
    Each is a task of :func:`waneguide.core.runner.run_tasks` (in this process, joblib worker
    processes, or Dask workers; never threads on one grid). A chunk is assembled and written
    as soon as its runs are in, so an interrupted campaign keeps every finished chunk.
Surfaces
    The top (transducer) surface carries the loss of the top patches, the bottom surface
    that of the bottom ones (:func:`~waneguide.simulation._chunk.surface_losses`): a
    one-sided site thins the top only, a two-sided site both, as the plan says. The
    profile is the stored one (thickness at the segment centres, linear in between); beyond
    the path ends the wall keeps the end segment's loss, as the fast model reads it.
Campaign grid (:class:`FullwaveSetup`)
    One grid for every case: ``n_wall`` cells through the wall (the coarsest grid that
    obeys every rule of :mod:`waneguide.simulation.fullwave.grid` at the domain's deepest
    loss), ``dt = 1 / (m fs)`` stable at the stiffest temperature of the domain, the same
    absorbing layer. At temperature T the cells grow with the wall (``dx = t e(T) / n_wall``),
    so baseline and case differ by the loss and the temperature only, never by the grid.
Amplitude scale (:func:`calibrate`)
    The full-wave receiver quantity [m/s per N/m] is put on the fast model's volt scale by
    one factor per family: a pristine full-wave run at the reference temperature, restricted
    to the fast model's band, is scaled so that its peak equals the fast model's reference
    peak (the pristine direct arrival, a quarter of full scale; the reference of the SNR).
    The factor and what it leaves (S0 and A0 window peaks and envelope arrivals, full-wave
    over fast) are recorded in the manifest.
Not applied
    The end and edge echoes (``echo_reflection``): the 2-D section has absorbing ends and no
    lateral edges (:data:`waneguide.simulation._chunk.NOT_APPLIED_TO_RECORDS`).
"""
from __future__ import annotations

import math
import time
from dataclasses import asdict, dataclass
from typing import Iterator

import numpy as np
import pandas as pd

from waneguide.core.runner import run_tasks
from waneguide.features.family import Family
from waneguide.features.signals import hilbert_envelope
from waneguide.features.windows import mode_windows
from waneguide.simulation._chunk import NOT_APPLIED_TO_RECORDS, simulate_chunk, surface_losses
from waneguide.simulation._confound import band_spectrum, render
from waneguide.simulation.forward import ForwardModel
from waneguide.simulation.fullwave import FULLWAVE_VERSION, BurstSpec, GridSpec, design_grid, simulate_fullwave
from waneguide.simulation.fullwave.grid import COURANT, cfl_limit_s
from waneguide.simulation.fullwave.source import band_edges_hz

__all__ = ["FULLWAVE_CHUNK_SIZE", "FullwaveSetup", "fullwave_record", "calibrate", "fullwave_chunks",
           "fullwave_manifest"]

#: Default cases per chunk file of a full-wave campaign (a chunk is seconds per case, not milliseconds:
#: small chunks keep what an interruption loses small).
FULLWAVE_CHUNK_SIZE = 32
_FAR_M = 1.0  # the end losses are carried this far beyond the path ends (through the absorbing layers)


@dataclass(frozen=True)
class FullwaveSetup:
    """What fixes a campaign's full-wave runs (recorded in the manifest and the fingerprint).

    Attributes
    ----------
    n_wall : int
        Cells through the nominal wall (at every temperature).
    steps_per_sample : int
        ``dt = 1 / (steps_per_sample fs)``.
    npml : int
        Absorbing columns per end.
    source, receiver : str
        Footprints (:data:`waneguide.simulation.fullwave.SOURCE_KINDS`).
    ends : str
    basis : str
        What set the grid.
    """

    n_wall: int
    steps_per_sample: int
    npml: int
    source: str = "pin_force"
    receiver: str = "pin_force"
    ends: str = "absorbing"
    basis: str = ""

    @classmethod
    def for_family(cls, family: Family, *, source: str = "pin_force", receiver: str | None = None) -> "FullwaveSetup":
        """The campaign grid of ``family`` (module docstring)."""
        mat = family.build_material()
        t = family.nominal_thickness_m
        fs = family.acquisition.sample_rate_hz
        burst = BurstSpec.from_family(family)
        t_min = t * (1.0 - family.domain.max_loss_pct[1] / 100.0)
        g = design_grid(mat, t, band_edges_hz((burst,), floor=1e-2), min_thickness_m=t_min, sample_rate_hz=fs,
                        f_low_hz=burst.frequency_hz)
        n_wall = int(round(t / g.dx_m))
        # stable at the stiffest (coldest) and the most finely cut temperature of the domain
        dt = min(COURANT * cfl_limit_s(t * mat.expansion_factor(T) / n_wall, mat.at_temperature(T).cl_m_s)
                 for T in (*family.domain.temperature_c, family.environment.reference_temperature_c))
        m = int(math.ceil(1.0 / (fs * dt) - 1e-9))
        return cls(n_wall=n_wall, steps_per_sample=m, npml=int(g.npml), source=source,
                   receiver=source if receiver is None else receiver,
                   basis=f"{g.basis} at the domain's deepest loss ({family.domain.max_loss_pct[1]:g} %); "
                         f"dt = 1/({m} fs), Courant <= {COURANT:g} over domain.temperature_c")

    def grid_at(self, family: Family, temperature_c: float) -> GridSpec:
        """The grid at ``temperature_c``: the wall in ``n_wall`` cells of the expanded wall."""
        e = family.build_material().expansion_factor(float(temperature_c))
        return GridSpec(dx_m=family.nominal_thickness_m * e / self.n_wall,
                        dt_s=1.0 / (self.steps_per_sample * family.acquisition.sample_rate_hz), npml=self.npml,
                        basis=self.basis)

    def describe(self) -> dict:
        return {"fullwave_version": FULLWAVE_VERSION, **asdict(self)}


def fullwave_record(top_m, bottom_m, temperature_c: float, *, family: Family, setup: FullwaveSetup,
                    x_m: np.ndarray) -> tuple[np.ndarray, float]:
    """One run: the family burst's receiver record (N,) [m/s per N/m] and the run's wall time [s].

    ``top_m``, ``bottom_m``: loss [m] on the segment centres ``x_m`` (reference temperature), or
    None; the end values are kept beyond the path ends.
    """
    t0 = time.perf_counter()
    x = np.concatenate(([x_m[0] - _FAR_M], x_m, [x_m[-1] + _FAR_M]))
    ext = (lambda v: None if v is None or not np.any(v) else np.concatenate(([v[0]], v, [v[-1]])))  # noqa: E731
    top, bottom = ext(top_m), ext(bottom_m)
    res = simulate_fullwave(family, top, bottom, x if (top is not None or bottom is not None) else None,
                            temperature_c=float(temperature_c), grid=setup.grid_at(family, temperature_c),
                            source=setup.source, receiver=setup.receiver, ends=setup.ends)
    return res.waveforms[0], time.perf_counter() - t0


def _band_limited(fm: ForwardModel, records: np.ndarray) -> np.ndarray:
    n = np.atleast_2d(records).shape[0]
    return render(fm._tables, band_spectrum(fm._tables, records), fm.n_samples, gain=np.ones(n),
                  jitter_s=np.zeros(n), crosstalk_db=None, ringing_db=None)


def calibrate(fm: ForwardModel, pristine: np.ndarray) -> dict:
    """The amplitude scale [V per (m/s per N/m)] from a pristine full-wave record at the reference temperature.

    Returns the scale and, per mode, the envelope peak of the scaled full-wave record over
    the fast model's and the envelope-peak arrival, full-wave minus fast [s] (both pristine,
    no echoes, no confounders). The modes are told apart in time: S0 from the start of its
    window (:func:`waneguide.features.windows.mode_windows`) to the midpoint between the fast
    model's S0 and A0 envelope peaks (each mode synthesised alone), A0 from there to the end
    of its window.
    """
    family = fm.family
    full = _band_limited(fm, pristine)[0]
    scale = fm.reference_peak_v / float(np.abs(full).max())
    t_ref = family.environment.reference_temperature_c
    flat = np.full((1, fm.x_m.size), fm.nominal_thickness_m)
    fast = fm.synthesize(flat, t_ref, echoes=False)[0]
    split = int(np.mean([np.argmax(hilbert_envelope(fm.synthesize(flat, t_ref, echoes=False, modes=(m,))[0]))
                         for m in ("S0", "A0")]))
    env_full, env_fast = hilbert_envelope(full * scale), hilbert_envelope(fast)
    out = {"method": "one factor per family: the peak of a pristine full-wave run at the reference temperature "
                     "(fast model's band) made equal to the fast model's reference peak",
           "amplitude_scale_v_per_unit": scale, "reference_peak_v": fm.reference_peak_v,
           "reference_temperature_c": t_ref}
    win = mode_windows(family)
    s0_start = win["S0"].indices(fm.sample_rate_hz, fm.pretrigger_s, fm.n_samples)[0]
    a0_stop = win["A0"].indices(fm.sample_rate_hz, fm.pretrigger_s, fm.n_samples)[1]
    for mode, (i0, i1) in (("s0", (s0_start, split)), ("a0", (split, a0_stop))):
        a, b = env_full[i0:i1], env_fast[i0:i1]
        out[f"{mode}_peak_full_over_fast"] = float(a.max() / b.max())
        out[f"{mode}_arrival_full_minus_fast_s"] = float((np.argmax(a) - np.argmax(b)) / fm.sample_rate_hz)
    return out


def _runs_of(fm: ForwardModel, plan: pd.DataFrame, seed: int) -> tuple[dict, dict]:
    """Run arguments of the cases and the specimen baselines of one chunk's plan rows."""
    top, bottom = surface_losses(fm, plan, seed)
    cases = {("case", int(i)): (top[r] if top[r].any() else None, bottom[r] if bottom[r].any() else None, float(T))
             for r, (i, T) in enumerate(zip(plan["case_index"], plan["temperature_c"]))}
    spec = plan.drop_duplicates("specimen_index")
    bases = {("base", int(j)): (None, None, float(T))
             for j, T in zip(spec["specimen_index"], spec["baseline_temperature_c"])}
    return cases, bases


def fullwave_chunks(fm: ForwardModel, missing: dict[int, pd.DataFrame], seed: int, *, setup: FullwaveSetup,
                    calibration: dict | None, on_calibrated, n_jobs: int, scheduler, progress: bool,
                    stats: dict) -> Iterator[tuple[int, dict]]:
    """Yield ``(k, arrays)`` of every missing chunk ``k -> plan rows`` as its runs come in.

    ``calibration``: that of an earlier run of the campaign, or None (a calibration run is
    then the first task and ``on_calibrated(calibration)`` is called when it is in). ``stats``
    receives the number of runs and their summed wall time.
    """
    family = fm.family
    tasks: dict = {}
    if calibration is None:
        tasks[("calibration", 0)] = (None, None, family.environment.reference_temperature_c)
    needs: dict[int, list] = {}
    for k, rows in missing.items():
        cases, bases = _runs_of(fm, rows, seed)
        needs[k] = [*bases, *cases]
        tasks.update(bases)
        tasks.update(cases)
    users = {key: sum(key in keys for keys in needs.values()) for key in tasks}
    done: dict = {}
    stats.update(runs=0, run_seconds=0.0)

    def ready():
        for k in [k for k, keys in needs.items() if all(key in done for key in keys)]:
            keys = needs.pop(k)
            scale = calibration["amplitude_scale_v_per_unit"]
            recs = tuple(scale * np.stack([done[key] for key in keys if key[0] == kind]) for kind in ("case", "base"))
            arrays = simulate_chunk(fm, missing[k], seed, records=recs)
            for key in keys:
                users[key] -= 1
                if users[key] == 0:
                    del done[key]
            yield k, arrays

    stream = run_tasks(fullwave_record, tasks, n_jobs=n_jobs, scheduler=scheduler,
                       shared={"family": family, "setup": setup, "x_m": fm.x_m}, progress=progress,
                       desc=f"simulate {family.name} (full-wave)", unit="run")
    for key, (wave, seconds) in stream:
        stats["runs"] += 1
        stats["run_seconds"] += seconds
        if key[0] == "calibration":
            calibration = calibrate(fm, wave)
            on_calibrated(calibration)
        else:
            done[key] = wave
        if calibration is not None:
            yield from ready()


def fullwave_manifest(setup: FullwaveSetup, calibration: dict | None) -> dict:
    """The ``fullwave`` section of a full-wave campaign's manifest."""
    return {**setup.describe(), "calibration": calibration, "not_applied": dict(NOT_APPLIED_TO_RECORDS),
            "surfaces": "top patches on the top (transducer) surface, bottom patches on the bottom surface; the "
                        "stored profile (segment centres, linear between), end losses kept beyond the path ends"}
