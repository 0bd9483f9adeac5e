"""Simulated thinning campaigns: space-filling sampling, chunked atomic output, resume, joblib or Dask.

A campaign of ``n_cases`` cases is planned up front from the family's
simulation domain and the seed, then simulated chunk by chunk.

Specimens and states
    Cases are grouped into specimens of ``domain.states_per_specimen``
    thinning states. A specimen is one flange with its transducers: it fixes
    the damage site (shape, sides, patch count, lengths, positions, the rough
    field), the coupling of both discs, the baseline (one pristine capture at
    its own baseline temperature, with its own noise), attenuation, echo
    strength and coherent-noise levels. Each state sets the depth of the loss
    (the same site deepened, as when a milled patch is deepened step by step;
    the order of the states is not modelled; ``pristine_fraction`` of the states
    have no loss), the capture temperature, SNR, a per-disc coupling drift
    against the baseline and the trigger jitter. ``specimen_id`` is the
    grouping unit for cross-validation: states of one specimen are not
    independent.

Sampling
    Two scrambled Sobol sequences (:class:`scipy.stats.qmc.Sobol`), one over
    the specimen dimensions and one over the state dimensions, each drawn as
    the first ``n`` points of a ``2^m`` block; categorical dimensions (shape,
    sides, patch count, pristine) are cut from their uniform coordinate.
    Random details (extra patches, rough fields, two-sided split, noise) come
    from generators seeded by ``SeedSequence(seed, spawn_key=(tag, index))``,
    so every case is reproducible on its own, whatever the chunking, the
    worker count or the scheduler.

Folder layout (all files written atomically; same seed, same bytes)::

    manifest.json              provenance, status, chunk digests
    cases.parquet              one row per case (written when complete)
    chunks/chunk_NNNNN.npz     waveforms_v (n, N) float32, baselines_v (m, N) float32
                               with baseline_row (n,), thickness_m (n, S) float32,
                               case_index, truth arrays, campaign_fingerprint

Resume: rerunning with the same arguments keeps every finished chunk (its
fingerprint is checked, and for a finished campaign its SHA-256) and computes only
the missing ones. A folder holding another campaign is refused, never overwritten.

Fidelity (``fidelity="fast"``, the default, or ``"full"``; recorded in the manifest and part of
the campaign fingerprint): ``full`` makes each case's and each baseline's noise-free record of
the direct path with the full-wave solver (:mod:`waneguide.simulation.fullwave`), one run per
task, and gives it the fast model's confounders and noise (:mod:`waneguide.simulation._fullwave_runs`,
which also states the amplitude calibration and what is not applied). Same plan, same
profiles and truth, same files, array names and case table, so training, scoring and every
check read both alike. Its default chunk is :data:`FULLWAVE_CHUNK_SIZE` cases.

Integrity: every chunk read through :class:`Campaign` is checked against the SHA-256
recorded in ``manifest.json``; a changed or damaged chunk raises
:class:`~waneguide.core.errors.InputError` naming the file, both digests and the fix
(delete the chunk and rerun ``waneguide simulate`` with the same arguments).

Modules: planning in ``_plan``, the chunk arithmetic in ``_chunk``, the files in
``_campaign_io``, reading in ``_campaign_read``; this module runs a campaign (through
:func:`waneguide.core.runner.run_tasks`: in-process, joblib or Dask).
"""
from __future__ import annotations

import hashlib
import json
import math
import os
import time
from pathlib import Path

import numpy as np
import pandas as pd

from waneguide.core.atomic import check_output_dir, file_sha256
from waneguide.core.errors import InputError
from waneguide.core.runner import check_n_jobs, check_scheduler, run_tasks
from waneguide.features.family import Family
from waneguide.simulation._campaign_io import (
    CAMPAIGN_FORMAT_VERSION,
    FIDELITIES,
    build_manifest,
    chunk_name,
    code_version,
    existing_chunk,
    read_manifest,
    write_manifest,
    write_npz,
    write_parquet,
)
from waneguide.simulation._campaign_read import Campaign, load_campaign
from waneguide.simulation._chunk import simulate_chunk as _simulate_chunk
from waneguide.simulation._chunk import truth_of
from waneguide.simulation._fullwave_runs import FULLWAVE_CHUNK_SIZE, FullwaveSetup, fullwave_chunks, fullwave_manifest
from waneguide.simulation._plan import as_family, check_n_cases, check_seed, plan_campaign
from waneguide.simulation.forward import FORWARD_MODEL_VERSION, ForwardModel
from waneguide.simulation.profiles import TRUTH_COLUMNS

__all__ = [
    "CAMPAIGN_FORMAT_VERSION",
    "DEFAULT_CHUNK_SIZE",
    "FIDELITIES",
    "FULLWAVE_CHUNK_SIZE",
    "Campaign",
    "plan_campaign",
    "run_campaign",
    "load_campaign",
    "campaign_fingerprint",
]

DEFAULT_CHUNK_SIZE = 512


def campaign_fingerprint(family: Family, n_cases: int, *, seed: int, chunk_size: int, fidelity: str = "fast",
                         fullwave: FullwaveSetup | None = None) -> str:
    """SHA-256 (16 hex digits) of everything that fixes a campaign's bytes (``fullwave``: the setup of ``full``)."""
    blob = json.dumps({
        "format_version": CAMPAIGN_FORMAT_VERSION,
        "family_fingerprint": family.fingerprint,
        "n_cases": int(n_cases),
        "seed": int(seed),
        "chunk_size": int(chunk_size),
        "forward_model_version": FORWARD_MODEL_VERSION,
        "code_version": code_version(),
        "fidelity": fidelity,
        **({"fullwave": fullwave.describe()} if fullwave is not None else {}),
    }, sort_keys=True)
    return hashlib.sha256(blob.encode()).hexdigest()[:16]


def _chunk_task(plan: pd.DataFrame, seed: int, fingerprint: str, *, fm: ForwardModel) -> dict[str, np.ndarray]:
    """One task of the runner: the arrays of one chunk (written by the calling process)."""
    arrays = _simulate_chunk(fm, plan, seed)
    arrays["campaign_fingerprint"] = np.array(fingerprint)
    return arrays


def _check_fidelity(fidelity) -> str:
    if fidelity not in FIDELITIES:
        raise InputError(f"fidelity must be one of {', '.join(FIDELITIES)} (--fidelity); got {fidelity!r}. 'fast' is "
                         "the modal-synthesis model, 'full' the full-wave solver.")
    return str(fidelity)


def _check_chunk_size(chunk_size) -> int:
    if isinstance(chunk_size, bool) or not isinstance(chunk_size, (int, np.integer)) or chunk_size < 1:
        raise InputError(f"chunk_size must be a positive whole number of cases per chunk file; got {chunk_size!r}. "
                         f"The default is {DEFAULT_CHUNK_SIZE}.")
    return int(chunk_size)


def _check_folder(out: Path, old: dict | None, fingerprint: str) -> None:
    """Refuse a folder that holds something other than (a run of) this campaign."""
    if old is None and out.exists() and any(out.iterdir()):
        raise InputError(f"output folder {str(out)!r} is not empty and holds no campaign; choose an empty --out "
                         "folder.")
    if old is not None and old.get("campaign_fingerprint") != fingerprint:
        raise InputError(
            f"{out} holds another campaign (fingerprint {old.get('campaign_fingerprint')}, family "
            f"{old.get('family_name')}, {old.get('n_cases')} cases, seed {old.get('seed')}); "
            "nothing was overwritten. Choose another --out folder."
        )


def _available_memory_bytes() -> int | None:
    """Physical memory of this machine (POSIX sysconf), or None where it cannot be read."""
    try:
        return int(os.sysconf("SC_PAGE_SIZE")) * int(os.sysconf("SC_PHYS_PAGES"))
    except (ValueError, OSError, AttributeError):  # pragma: no cover - non-POSIX
        return None


def _check_memory(family, n_cases: int, chunk_size: int, n_workers: int) -> None:
    """Refuse, before any work, a campaign whose estimated peak memory exceeds this machine's."""
    need = family.campaign_memory_bytes(n_cases, chunk_size=chunk_size, n_workers=max(1, n_workers))
    have = _available_memory_bytes()
    if have is not None and need > have:
        raise InputError(
            f"this campaign would need about {need / 2**30:.1f} GiB of memory (family {family.name}: record_length "
            f"{family.acquisition.record_length}, {n_cases} cases, chunks of {chunk_size}, {max(1, n_workers)} "
            f"worker(s)); this machine has {have / 2**30:.1f} GiB. Use fewer --cases, a smaller --chunk-size or "
            "--jobs, or a shorter record_length in the family file.")


def run_campaign(
    family: Family | str | Path,
    n_cases: int,
    out_dir: str | Path,
    *,
    seed: int = 0,
    n_jobs: int = 1,
    scheduler=None,
    chunk_size: int | None = None,
    progress: bool = True,
    fidelity: str = "fast",
) -> Campaign:
    """Simulate a campaign into ``out_dir`` (resuming one that was interrupted).

    Parameters
    ----------
    family : Family or path of a family TOML
    n_cases : int
    out_dir : path
        Empty, absent, or holding an unfinished run of the same campaign (or a finished
        one with chunks deleted: those are recomputed).
    seed : int
        Fixes every byte written.
    n_jobs : int
        Processes on this machine (joblib, loky backend); 1 runs in-process, -1 uses every core.
    scheduler : str or dask.distributed.Client, optional
        A Dask scheduler address (``tcp://host:port``), ``"local"`` or a client: chunks
        are computed on the cluster and written here by this process (no shared file
        system needed; the workers need waneguide installed). At most two chunks per
        worker thread are in flight. Overrides ``n_jobs`` (except for ``"local"``).
    chunk_size : int, optional
        Cases per chunk file (bounds memory: about ``chunk_size * N * 40`` bytes per worker);
        default :data:`DEFAULT_CHUNK_SIZE`, or :data:`FULLWAVE_CHUNK_SIZE` for ``fidelity="full"``.
    progress : bool
        Show a tqdm progress bar (stderr).
    fidelity : {"fast", "full"}
        The modal-synthesis model, or the full-wave solver (one run per case and baseline,
        each a task of the runner; module docstring).

    Returns
    -------
    Campaign
    """
    family = as_family(family)
    n = check_n_cases(n_cases)
    seed = check_seed(seed)
    fidelity = _check_fidelity(fidelity)
    if chunk_size is None:
        chunk_size = FULLWAVE_CHUNK_SIZE if fidelity == "full" else DEFAULT_CHUNK_SIZE
    chunk_size = _check_chunk_size(chunk_size)
    n_jobs = check_n_jobs(n_jobs)
    scheduler = check_scheduler(scheduler)
    out = check_output_dir(out_dir, "campaign folder (--out)")
    _check_memory(family, n, chunk_size, n_jobs if scheduler is None else 1)
    setup = FullwaveSetup.for_family(family) if fidelity == "full" else None
    fingerprint = campaign_fingerprint(family, n, seed=seed, chunk_size=chunk_size, fidelity=fidelity, fullwave=setup)
    old = read_manifest(out)
    _check_folder(out, old, fingerprint)
    n_chunks = math.ceil(n / chunk_size)
    finished = old is not None and old.get("status") == "complete"
    if finished and (out / "cases.parquet").exists() and all((out / chunk_name(k)).is_file() for k in range(n_chunks)):
        camp = load_campaign(out)
        camp.verify()  # a rerun over a finished campaign reports a changed chunk rather than keeping it
        camp.run_info = {"computed_chunks": 0, "reused_chunks": n_chunks, "seconds": 0.0}
        return camp
    started = time.perf_counter()
    (out / "chunks").mkdir(parents=True, exist_ok=True)
    for stale in (out / "chunks").glob(".chunk_*.part"):
        stale.unlink()  # our own interrupted temporary files
    fm = ForwardModel(family)
    plan = plan_campaign(family, n, seed=seed)
    fw = {"calibration": (old or {}).get("fullwave", {}).get("calibration")} if setup is not None else {}

    def manifest(status: str, chunks: list[dict]) -> dict:
        section = fullwave_manifest(setup, fw["calibration"]) if setup is not None else None
        return build_manifest(family, fm, n, seed, chunk_size, fingerprint, status, chunks, fidelity=fidelity,
                              fullwave=section)

    if old is None:
        write_manifest(out, manifest("running", []))
    # digests of a campaign finished earlier: a chunk kept from it must still match
    expected = {e["file"]: e["sha256"] for e in old.get("chunks", [])} if finished else {}

    results: dict[int, tuple[dict, str]] = {}
    tasks: dict[int, tuple] = {}
    for k in range(n_chunks):
        got = existing_chunk(out / chunk_name(k), fingerprint, expected.get(chunk_name(k)))
        if got is None:
            tasks[k] = (plan.iloc[k * chunk_size:(k + 1) * chunk_size], seed, fingerprint)
        else:
            results[k] = got
    done_cases = sum(len(r[0]["case_index"]) for r in results.values())
    stats: dict = {}
    if setup is None:
        stream = run_tasks(_chunk_task, tasks, n_jobs=n_jobs, scheduler=scheduler, shared={"fm": fm},
                           progress=progress, desc=f"simulate {family.name}", unit="case",
                           weight=lambda k: len(tasks[k][0]), initial=done_cases)
    else:
        def calibrated(cal: dict) -> None:  # recorded before any chunk is written: a resumed run reuses it
            fw["calibration"] = cal
            write_manifest(out, manifest("running", []))

        stream = fullwave_chunks(fm, {k: t[0] for k, t in tasks.items()}, seed, setup=setup,
                                 calibration=fw["calibration"], on_calibrated=calibrated, n_jobs=n_jobs,
                                 scheduler=scheduler, progress=progress, stats=stats)
    for k, arrays in stream:
        if setup is not None:
            arrays["campaign_fingerprint"] = np.array(fingerprint)
        results[k] = (truth_of(arrays), write_npz(out / chunk_name(k), arrays))
        del arrays

    truth_df = pd.DataFrame({c: np.concatenate([results[k][0][c] for k in range(n_chunks)])
                             for c in ("case_index", *TRUTH_COLUMNS)})
    truth_df["patch_count"] = truth_df["patch_count"].astype(np.int64)
    cases = plan.merge(truth_df, on="case_index", how="left", validate="one_to_one")
    front = ["case_id", "specimen_id", *TRUTH_COLUMNS, "temperature_c", "baseline_temperature_c", "snr_db"]
    cases = cases[front + [c for c in cases.columns if c not in front]]
    cases["chunk"] = (cases["case_index"] // chunk_size).astype(np.int64)
    write_parquet(cases, out / "cases.parquet")
    chunks = [{"file": chunk_name(k), "first_case": k * chunk_size,
               "n_cases": int(min(chunk_size, n - k * chunk_size)), "sha256": results[k][1]} for k in range(n_chunks)]
    man = manifest("complete", chunks)
    man["columns"] = list(cases.columns)
    man["cases_sha256"] = file_sha256(out / "cases.parquet")  # the ground truth is sealed too
    write_manifest(out, man)
    camp = load_campaign(out)
    camp.run_info = {"computed_chunks": len(tasks), "reused_chunks": n_chunks - len(tasks),
                     "seconds": time.perf_counter() - started, **stats}
    return camp
