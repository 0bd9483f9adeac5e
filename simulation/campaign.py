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
fingerprint is checked) and computes only the missing ones. A folder holding
another campaign is refused, never overwritten.
"""
from __future__ import annotations

import hashlib
import json
import math
import time
import zipfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterator

import numpy as np
import pandas as pd

from waneguide.core.atomic import atomic_path, atomic_write_text
from waneguide.features.capture import Capture
from waneguide.features.family import Family, family_from_mapping, load_family

from waneguide.simulation.forward import FORWARD_MODEL_VERSION, ForwardModel
from waneguide.simulation.profiles import TRUTH_COLUMNS, sample_site, site_shape, truth_arrays

__all__ = [
    "CAMPAIGN_FORMAT_VERSION",
    "Campaign",
    "plan_campaign",
    "run_campaign",
    "load_campaign",
    "campaign_fingerprint",
]

CAMPAIGN_FORMAT_VERSION = 1
DEFAULT_CHUNK_SIZE = 512
_TAG_SPECIMEN_QMC, _TAG_STATE_QMC, _TAG_PLAN, _TAG_SITE, _TAG_CASE_NOISE, _TAG_BASE_NOISE = range(1, 7)
_SPECIMEN_DIMS = ("shape", "sides", "n_patches", "patch_length", "position", "baseline_temperature",
                  "coupling_tx", "coupling_rx", "attenuation", "echo_reflection", "crosstalk", "ringing",
                  "baseline_snr")
_STATE_DIMS = ("pristine", "max_loss", "temperature", "snr", "coupling_drift_tx", "coupling_drift_rx")
_ZIP_DATE = (1980, 1, 1, 0, 0, 0)


def _code_version() -> str:
    try:
        from importlib.metadata import version

        return version("waneguide")
    except Exception:  # pragma: no cover - not installed
        return "unknown"


def _as_family(family: Family | str | Path) -> Family:
    return family if isinstance(family, Family) else load_family(family)


def _check_n(n_cases: Any) -> int:
    if isinstance(n_cases, bool) or not isinstance(n_cases, (int, np.integer)) or n_cases < 1:
        raise ValueError(f"n_cases must be a positive whole number; got {n_cases!r}.")
    return int(n_cases)


def _check_seed(seed: Any) -> int:
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ValueError(f"seed must be a non-negative whole number; got {seed!r}.")
    return int(seed)


def campaign_fingerprint(family: Family, n_cases: int, *, seed: int, chunk_size: int) -> str:
    """SHA-256 (16 hex digits) of everything that fixes a campaign's bytes."""
    blob = json.dumps({
        "format_version": CAMPAIGN_FORMAT_VERSION,
        "family_fingerprint": family.fingerprint,
        "n_cases": int(n_cases),
        "seed": int(seed),
        "chunk_size": int(chunk_size),
        "forward_model_version": FORWARD_MODEL_VERSION,
        "code_version": _code_version(),
    }, sort_keys=True)
    return hashlib.sha256(blob.encode()).hexdigest()[:16]


# ---------------------------------------------------------------------------
# Planning
# ---------------------------------------------------------------------------
def _sobol(d: int, n: int, seq: np.random.SeedSequence) -> np.ndarray:
    from scipy.stats import qmc

    m = max(0, math.ceil(math.log2(max(n, 1))))
    return qmc.Sobol(d, scramble=True, rng=np.random.default_rng(seq)).random_base2(m)[:n]


def _pick(u: np.ndarray, options) -> np.ndarray:
    options = list(options)
    idx = np.minimum((u * len(options)).astype(int), len(options) - 1)
    return np.asarray(options, dtype=object)[idx]


def _span(u: np.ndarray, pair) -> np.ndarray:
    lo, hi = pair
    return lo + (hi - lo) * u


def plan_campaign(family: Family | str | Path, n_cases: int, *, seed: int = 0) -> pd.DataFrame:
    """The sampling plan: one row per case with every sampled parameter (no truth yet)."""
    family = _as_family(family)
    n = _check_n(n_cases)
    seed = _check_seed(seed)
    dom = family.domain
    spp = dom.states_per_specimen
    n_spec = math.ceil(n / spp)
    us = _sobol(len(_SPECIMEN_DIMS), n_spec, np.random.SeedSequence(seed, spawn_key=(_TAG_SPECIMEN_QMC,)))
    uc = _sobol(len(_STATE_DIMS), n, np.random.SeedSequence(seed, spawn_key=(_TAG_STATE_QMC,)))
    S = dict(zip(_SPECIMEN_DIMS, us.T))
    C = dict(zip(_STATE_DIMS, uc.T))
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(_TAG_PLAN,)))
    jitter_sd = dom.jitter_ns * 1e-9
    spec = pd.DataFrame({
        "specimen_index": np.arange(n_spec, dtype=np.int64),
        "shape": _pick(S["shape"], dom.shapes).astype(str),
        "sides": _pick(S["sides"], dom.sides).astype(str),
        "n_patches": (1 + np.minimum((S["n_patches"] * dom.max_patches).astype(int), dom.max_patches - 1)).astype(np.int64),
        "patch_length_mm": _span(S["patch_length"], dom.patch_length_mm),
        "position_fraction": _span(S["position"], dom.position_fraction),
        "baseline_temperature_c": _span(S["baseline_temperature"], dom.temperature_c),
        "coupling_tx_db": _span(S["coupling_tx"], dom.coupling_db),
        "coupling_rx_db": _span(S["coupling_rx"], dom.coupling_db),
        "attenuation_db_per_m": _span(S["attenuation"], dom.attenuation_db_per_m),
        "echo_reflection": _span(S["echo_reflection"], dom.echo_reflection),
        "crosstalk_db": _span(S["crosstalk"], dom.crosstalk_db),
        "ringing_db": _span(S["ringing"], dom.ringing_db),
        "baseline_snr_db": _span(S["baseline_snr"], dom.snr_db),
        "baseline_jitter_s": rng.normal(0.0, jitter_sd, n_spec) if jitter_sd > 0 else np.zeros(n_spec),
    })
    spec["specimen_id"] = [f"S{j:06d}" for j in range(n_spec)]
    pristine = C["pristine"] < dom.pristine_fraction
    cases = pd.DataFrame({
        "case_index": np.arange(n, dtype=np.int64),
        "specimen_index": np.arange(n, dtype=np.int64) // spp,
        "state_index": np.arange(n, dtype=np.int64) % spp,
        "pristine": pristine,
        "max_loss_target_pct": np.where(pristine, 0.0, _span(C["max_loss"], dom.max_loss_pct)),
        "temperature_c": _span(C["temperature"], dom.temperature_c),
        "snr_db": _span(C["snr"], dom.snr_db),
        "coupling_drift_tx_db": _span(C["coupling_drift_tx"], dom.coupling_drift_db),
        "coupling_drift_rx_db": _span(C["coupling_drift_rx"], dom.coupling_drift_db),
        "jitter_s": rng.normal(0.0, jitter_sd, n) if jitter_sd > 0 else np.zeros(n),
    })
    cases["case_id"] = [f"C{i:07d}" for i in range(n)]
    out = cases.merge(spec, on="specimen_index", how="left", validate="many_to_one")
    front = ["case_id", "specimen_id", "case_index", "specimen_index", "state_index"]
    return out[front + [c for c in out.columns if c not in front]]


# ---------------------------------------------------------------------------
# One chunk
# ---------------------------------------------------------------------------
def _site(family: Family, fm: ForwardModel, row, seed: int):
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(_TAG_SITE, int(row.specimen_index))))
    return sample_site(rng, path_length_m=fm.path_length_m, shape=str(row.shape), sides=str(row.sides),
                       n_patches=int(row.n_patches), length_m=float(row.patch_length_mm) * 1e-3,
                       position_fraction=float(row.position_fraction), position_range=family.domain.position_fraction)


def _simulate_chunk(fm: ForwardModel, plan: pd.DataFrame, seed: int) -> dict[str, np.ndarray]:
    """Waveforms, baselines, profiles and truth of the cases in ``plan`` (a slice of the plan)."""
    family = fm.family
    t_nom = fm.nominal_thickness_m
    spec_rows = plan.drop_duplicates("specimen_index")
    sites = {int(r.specimen_index): _site(family, fm, r, seed) for r in spec_rows.itertuples()}
    # one unit-depth loss shape per specimen; each state scales it to its own depth
    shapes = {j: site_shape(fm.x_m, patches) for j, patches in sites.items()}
    counts = {j: len({p.site for p in patches}) for j, patches in sites.items()}
    spec_idx = plan["specimen_index"].to_numpy(np.int64)
    depth_m = plan["max_loss_target_pct"].to_numpy(float) / 100.0 * t_nom
    loss = np.stack([shapes[int(j)] for j in spec_idx]) * depth_m[:, None]
    thick = t_nom - loss
    truth = truth_arrays(loss, np.full(fm.x_m.size, fm.segment_m), t_nom,
                         np.array([counts[int(j)] for j in spec_idx]))
    del loss
    col = lambda df, c: df[c].to_numpy(dtype=float)  # noqa: E731
    gain = 10.0 ** ((col(plan, "coupling_tx_db") + col(plan, "coupling_rx_db") + col(plan, "coupling_drift_tx_db")
                     + col(plan, "coupling_drift_rx_db")) / 20.0)
    clean = fm.synthesize(thick, col(plan, "temperature_c"), gain=gain, jitter_s=col(plan, "jitter_s"),
                          attenuation_db_per_m=col(plan, "attenuation_db_per_m"),
                          echo_reflection=col(plan, "echo_reflection"), crosstalk_db=col(plan, "crosstalk_db"),
                          ringing_db=col(plan, "ringing_db"), dtype=np.float32)
    rngs = [np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(_TAG_CASE_NOISE, int(i))))
            for i in plan["case_index"]]
    waves = fm.finish(clean, col(plan, "snr_db"), rngs, out=clean)
    base_gain = 10.0 ** ((col(spec_rows, "coupling_tx_db") + col(spec_rows, "coupling_rx_db")) / 20.0)
    m = len(spec_rows)
    base_clean = fm.synthesize(np.full((m, fm.x_m.size), t_nom), col(spec_rows, "baseline_temperature_c"),
                               gain=base_gain, jitter_s=col(spec_rows, "baseline_jitter_s"),
                               attenuation_db_per_m=col(spec_rows, "attenuation_db_per_m"),
                               echo_reflection=col(spec_rows, "echo_reflection"),
                               crosstalk_db=col(spec_rows, "crosstalk_db"), ringing_db=col(spec_rows, "ringing_db"),
                               dtype=np.float32)
    brngs = [np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(_TAG_BASE_NOISE, int(j))))
             for j in spec_rows["specimen_index"]]
    bases = fm.finish(base_clean, col(spec_rows, "baseline_snr_db"), brngs, out=base_clean)
    spec_pos = {int(j): k for k, j in enumerate(spec_rows["specimen_index"])}
    out = {
        "case_index": plan["case_index"].to_numpy(np.int64),
        "specimen_index": spec_rows["specimen_index"].to_numpy(np.int64),
        "baseline_row": np.array([spec_pos[int(j)] for j in plan["specimen_index"]], dtype=np.int32),
        "waveforms_v": waves,
        "baselines_v": bases,
        "thickness_m": thick.astype(np.float32),
    }
    for k, v in truth.items():
        out[f"truth_{k}"] = v
    return out


def _write_npz(path: Path, arrays: dict[str, np.ndarray]) -> str:
    """Deterministic .npz (fixed zip timestamps, fixed order, no compression); returns sha256."""
    with atomic_path(path) as tmp:
        with zipfile.ZipFile(tmp, "w", compression=zipfile.ZIP_STORED, allowZip64=True) as zf:
            for name in sorted(arrays):
                info = zipfile.ZipInfo(f"{name}.npy", date_time=_ZIP_DATE)
                info.compress_type = zipfile.ZIP_STORED
                info.external_attr = 0o644 << 16
                with zf.open(info, "w", force_zip64=True) as fh:
                    arr = np.asarray(arrays[name])
                    if not arr.flags.c_contiguous:
                        arr = np.ascontiguousarray(arr)
                    np.lib.format.write_array(fh, arr, allow_pickle=False)
    return _sha256(path)


def _sha256(path: Path) -> str:
    from waneguide.core.atomic import file_sha256

    return file_sha256(path)


def _chunk_name(k: int) -> str:
    return f"chunks/chunk_{k:05d}.npz"


def _truth_of(arrays) -> dict[str, np.ndarray]:
    return {"case_index": np.asarray(arrays["case_index"]),
            **{k: np.asarray(arrays[f"truth_{k}"]) for k in TRUTH_COLUMNS}}


def _run_and_write(fm: ForwardModel, plan: pd.DataFrame, seed: int, path: str, fingerprint: str):
    """Worker task (joblib / serial): simulate one chunk and write it; returns its truth and digest."""
    arrays = _simulate_chunk(fm, plan, seed)
    arrays["campaign_fingerprint"] = np.array(fingerprint)
    digest = _write_npz(Path(path), arrays)
    return path, _truth_of(arrays), digest


def _simulate_for_dask(fm: ForwardModel, plan: pd.DataFrame, seed: int, fingerprint: str):
    arrays = _simulate_chunk(fm, plan, seed)
    arrays["campaign_fingerprint"] = np.array(fingerprint)
    return arrays


# ---------------------------------------------------------------------------
# The runner
# ---------------------------------------------------------------------------
def _manifest(family, fm, plan_n, seed, chunk_size, fingerprint, status, chunks) -> dict[str, Any]:
    n_spec = math.ceil(plan_n / family.domain.states_per_specimen)
    return {
        "format": "waneguide-campaign",
        "format_version": CAMPAIGN_FORMAT_VERSION,
        "status": status,
        "campaign_fingerprint": fingerprint,
        "family_fingerprint": family.fingerprint,
        "family_name": family.name,
        "family": family.model_dump(mode="json"),
        "seed": int(seed),
        "n_cases": int(plan_n),
        "n_specimens": int(n_spec),
        "states_per_specimen": int(family.domain.states_per_specimen),
        "chunk_size": int(chunk_size),
        "n_chunks": math.ceil(plan_n / chunk_size),
        "sample_rate_hz": fm.sample_rate_hz,
        "pretrigger_s": fm.pretrigger_s,
        "record_length": fm.n_samples,
        "segment_m": fm.segment_m,
        "n_segments": int(fm.x_m.size),
        "code_version": {"waneguide": _code_version(), "forward_model": FORWARD_MODEL_VERSION},
        "sampling": {"method": "scipy.stats.qmc.Sobol, scrambled, first n of 2^m",
                     "specimen_dimensions": list(_SPECIMEN_DIMS), "state_dimensions": list(_STATE_DIMS)},
        "model": "free-plate S0/A0 modal synthesis; approximations listed in training.forward",
        "chunks": chunks,
    }


def _write_manifest(out: Path, data: dict) -> None:
    atomic_write_text(out / "manifest.json", json.dumps(data, indent=2, sort_keys=True) + "\n")


def _read_manifest(out: Path) -> dict | None:
    p = out / "manifest.json"
    if not p.exists():
        return None
    try:
        return json.loads(p.read_text(encoding="utf-8"))
    except json.JSONDecodeError as exc:
        raise ValueError(f"{p} is not valid JSON ({exc}); it is not a waneguide campaign folder.") from None


def _existing_chunk(path: Path, fingerprint: str):
    """Truth and digest of a finished chunk, or None if it is absent or unreadable."""
    if not path.exists():
        return None
    try:
        with np.load(path, allow_pickle=False) as z:
            theirs = str(z["campaign_fingerprint"].reshape(-1)[0])
            if theirs != fingerprint:
                raise ValueError(f"{path} belongs to another campaign (fingerprint {theirs}); "
                                 "choose an empty --out folder.")
            truth = _truth_of({k: z[k] for k in ["case_index", *[f"truth_{c}" for c in TRUTH_COLUMNS]]})
    except (OSError, zipfile.BadZipFile, KeyError, EOFError):
        return None  # damaged: recompute (atomic writes make this unlikely)
    return truth, _sha256(path)


def run_campaign(
    family: Family | str | Path,
    n_cases: int,
    out_dir: str | Path,
    *,
    seed: int = 0,
    workers: int = 1,
    scheduler=None,
    chunk_size: int = DEFAULT_CHUNK_SIZE,
    progress: bool = True,
) -> "Campaign":
    """Simulate a campaign into ``out_dir`` (resuming one that was interrupted).

    Parameters
    ----------
    family : Family or path of a family TOML
    n_cases : int
    out_dir : path
        Empty, absent, or holding an unfinished run of the same campaign.
    seed : int
        Fixes every byte written.
    workers : int
        Processes on this machine (joblib, loky backend); 1 runs in-process.
    scheduler : str or dask.distributed.Client, optional
        A Dask scheduler address (``tcp://host:port``) or a client: chunks are
        computed on the cluster and written here by this process (no shared
        file system needed; the workers need waneguide installed). At most two
        chunks per worker thread are in flight. Overrides ``workers``.
    chunk_size : int
        Cases per chunk file (bounds memory: about ``chunk_size * N * 40`` bytes
        per worker).
    progress : bool
        Show a tqdm progress bar (stderr).

    Returns
    -------
    Campaign
    """
    from tqdm.auto import tqdm

    family = _as_family(family)
    n = _check_n(n_cases)
    seed = _check_seed(seed)
    if isinstance(chunk_size, bool) or not isinstance(chunk_size, (int, np.integer)) or chunk_size < 1:
        raise ValueError(f"chunk_size must be a positive whole number; got {chunk_size!r}.")
    if isinstance(workers, bool) or not isinstance(workers, (int, np.integer)) or workers < 1:
        raise ValueError(f"workers must be a positive whole number; got {workers!r}.")
    chunk_size = int(chunk_size)
    if scheduler is not None and isinstance(scheduler, str) and not scheduler.startswith(("tcp://", "tls://")):
        raise ValueError(f"scheduler must be a Dask address like tcp://127.0.0.1:8786 or a Client; got {scheduler!r}.")
    if scheduler is not None and not isinstance(scheduler, str):
        from dask.distributed import Client

        if not isinstance(scheduler, Client):
            raise ValueError(f"scheduler must be a Dask address or a dask.distributed.Client; got {type(scheduler).__name__}.")
    from waneguide.core.atomic import check_output_dir

    out = check_output_dir(out_dir, "campaign folder (--out)")
    fingerprint = campaign_fingerprint(family, n, seed=seed, chunk_size=chunk_size)
    old = _read_manifest(out)
    if old is None and out.exists() and any(out.iterdir()):
        raise ValueError(f"output folder {str(out)!r} is not empty and holds no campaign; choose an empty --out folder.")
    if old is not None and old.get("campaign_fingerprint") != fingerprint:
        raise ValueError(
            f"{out} holds another campaign (fingerprint {old.get('campaign_fingerprint')}, family "
            f"{old.get('family_name')}, {old.get('n_cases')} cases, seed {old.get('seed')}); "
            "nothing was overwritten. Choose another --out folder."
        )
    if old is not None and old.get("status") == "complete" and (out / "cases.parquet").exists():
        camp = load_campaign(out)
        camp.run_info = {"computed_chunks": 0, "reused_chunks": int(old.get("n_chunks", 0)), "seconds": 0.0}
        return camp
    started = time.perf_counter()
    (out / "chunks").mkdir(parents=True, exist_ok=True)
    for stale in (out / "chunks").glob(".chunk_*.part"):
        stale.unlink()  # our own interrupted temporary files
    fm = ForwardModel(family)
    plan = plan_campaign(family, n, seed=seed)
    if old is None:
        _write_manifest(out, _manifest(family, fm, n, seed, chunk_size, fingerprint, "running", []))

    n_chunks = math.ceil(n / chunk_size)
    results: dict[int, tuple[dict, str]] = {}
    todo: list[int] = []
    for k in range(n_chunks):
        got = _existing_chunk(out / _chunk_name(k), fingerprint)
        if got is None:
            todo.append(k)
        else:
            results[k] = got
    slices = {k: plan.iloc[k * chunk_size:(k + 1) * chunk_size] for k in todo}
    done_cases = sum(len(r[0]["case_index"]) for r in results.values())
    bar = tqdm(total=n, initial=done_cases, unit="case", desc=f"simulate {family.name}", disable=not progress,
               leave=False)
    try:
        if scheduler is not None:
            _run_dask(scheduler, fm, slices, seed, out, fingerprint, results, bar)
        elif workers == 1 or len(todo) <= 1:
            for k in todo:
                _, truth, digest = _run_and_write(fm, slices[k], seed, str(out / _chunk_name(k)), fingerprint)
                results[k] = (truth, digest)
                bar.update(len(slices[k]))
        else:
            from joblib import Parallel, delayed

            tasks = (delayed(_run_and_write)(fm, slices[k], seed, str(out / _chunk_name(k)), fingerprint) for k in todo)
            index = {str(out / _chunk_name(k)): k for k in todo}
            for path, truth, digest in Parallel(n_jobs=int(workers), return_as="generator_unordered")(tasks):
                results[index[path]] = (truth, digest)
                bar.update(len(truth["case_index"]))
    finally:
        bar.close()

    truth_df = pd.DataFrame({c: np.concatenate([results[k][0][c] for k in range(n_chunks)])
                             for c in ("case_index", *TRUTH_COLUMNS)})
    truth_df["patch_count"] = truth_df["patch_count"].astype(np.int64)
    cases = plan.merge(truth_df, on="case_index", how="left", validate="one_to_one")
    front = ["case_id", "specimen_id", *TRUTH_COLUMNS, "temperature_c", "baseline_temperature_c", "snr_db"]
    cases = cases[front + [c for c in cases.columns if c not in front]]
    cases["chunk"] = (cases["case_index"] // chunk_size).astype(np.int64)
    _write_parquet(cases, out / "cases.parquet")
    chunks = [{"file": _chunk_name(k), "first_case": k * chunk_size,
               "n_cases": int(min(chunk_size, n - k * chunk_size)), "sha256": results[k][1]} for k in range(n_chunks)]
    man = _manifest(family, fm, n, seed, chunk_size, fingerprint, "complete", chunks)
    man["columns"] = list(cases.columns)
    _write_manifest(out, man)
    camp = load_campaign(out)
    camp.run_info = {"computed_chunks": len(todo), "reused_chunks": n_chunks - len(todo),
                     "seconds": time.perf_counter() - started}
    return camp


def _write_parquet(df: pd.DataFrame, path: Path) -> None:
    import pyarrow as pa
    import pyarrow.parquet as pq

    table = pa.Table.from_pandas(df, preserve_index=False)
    with atomic_path(path) as tmp:
        pq.write_table(table, tmp, compression="zstd")


def _run_dask(scheduler, fm, slices, seed, out, fingerprint, results, bar) -> None:
    from dask.distributed import Client, as_completed

    own = not isinstance(scheduler, Client)
    if own:
        try:
            client = Client(scheduler, timeout="20s", set_as_default=False)
        except (OSError, TimeoutError) as exc:
            raise ValueError(f"could not reach the Dask scheduler at {scheduler} ({exc}); start it, or drop "
                             "--scheduler to run on this machine. Finished chunks are kept.") from None
    else:
        client = scheduler
    try:
        n_threads = max(1, sum(client.nthreads().values()))
        fm_future = client.scatter(fm, broadcast=True)
        pending = list(slices)
        window = 2 * n_threads
        futures = {}

        def submit(k):
            f = client.submit(_simulate_for_dask, fm_future, slices[k], seed, fingerprint,
                              key=f"waneguide-chunk-{fingerprint}-{k}", pure=False)
            futures[f.key] = k
            return f

        ac = as_completed([submit(pending.pop(0)) for _ in range(min(window, len(pending)))])
        for fut in ac:
            k = futures.pop(fut.key)
            arrays = fut.result()
            fut.release()
            digest = _write_npz(out / _chunk_name(k), arrays)
            results[k] = (_truth_of(arrays), digest)
            bar.update(len(arrays["case_index"]))
            del arrays
            if pending:
                ac.add(submit(pending.pop(0)))
    finally:
        if own:
            client.close()


# ---------------------------------------------------------------------------
# Reading
# ---------------------------------------------------------------------------
@dataclass
class Campaign:
    """A finished campaign folder (see module docstring); use :func:`load_campaign`.

    Attributes
    ----------
    path : Path
    manifest : dict
    family : Family
    family_fingerprint, fingerprint : str
    cases : DataFrame
        One row per case: ``case_id``, ``specimen_id``, truth columns, confounders, plan.
    sample_rate_hz, pretrigger_s : float
    n_samples : int
    """

    path: Path
    manifest: dict
    family: Family
    cases: pd.DataFrame

    def __post_init__(self) -> None:
        self._cache: tuple[int, dict] | None = None
        self.run_info: dict | None = None  # set by run_campaign: computed/reused chunks, seconds

    def summary(self) -> str:
        """A few lines describing the campaign (what `waneguide simulate` prints)."""
        c = self.cases
        size = sum(p.stat().st_size for p in self.path.rglob("*") if p.is_file())
        lines = [
            f"campaign {self.fingerprint} of family {self.family.name} (fingerprint {self.family_fingerprint}), "
            f"seed {self.seed}",
            f"  {len(c)} cases on {c['specimen_id'].nunique()} specimens, {len(self.manifest['chunks'])} chunk(s), "
            f"{self.n_samples} samples at {self.sample_rate_hz / 1e6:g} MHz, {size / 1e6:.1f} MB on disk",
            f"  max loss {c['max_loss_pct'].min():.1f} to {c['max_loss_pct'].max():.1f} % "
            f"(mean {c['max_loss_pct'].mean():.1f} %), {int((c['max_loss_pct'] == 0).sum())} pristine state(s)",
            f"  temperature {c['temperature_c'].min():.1f} to {c['temperature_c'].max():.1f} degC, "
            f"SNR {c['snr_db'].min():.1f} to {c['snr_db'].max():.1f} dB",
            "  simulated with the free-plate S0/A0 model (approximations listed in training.forward)",
        ]
        if self.run_info is not None:
            ri = self.run_info
            lines.insert(1, f"  {ri['computed_chunks']} chunk(s) computed, {ri['reused_chunks']} kept from an "
                            f"earlier run, {ri['seconds']:.1f} s")
        return "\n".join(lines)

    @property
    def fingerprint(self) -> str:
        return self.manifest["campaign_fingerprint"]

    @property
    def family_fingerprint(self) -> str:
        return self.manifest["family_fingerprint"]

    @property
    def sample_rate_hz(self) -> float:
        return float(self.manifest["sample_rate_hz"])

    @property
    def pretrigger_s(self) -> float:
        return float(self.manifest["pretrigger_s"])

    @property
    def n_samples(self) -> int:
        return int(self.manifest["record_length"])

    @property
    def seed(self) -> int:
        return int(self.manifest["seed"])

    def __len__(self) -> int:
        return len(self.cases)

    def _chunk(self, k: int) -> dict[str, np.ndarray]:
        if self._cache is not None and self._cache[0] == k:
            return self._cache[1]
        entry = self.manifest["chunks"][k]
        with np.load(self.path / entry["file"], allow_pickle=False) as z:
            arrays = {name: z[name] for name in z.files}
        self._cache = (k, arrays)
        return arrays

    def iter_chunks(self, *, with_profiles: bool = False) -> Iterator[tuple]:
        """Yield ``(cases_slice, waveforms_v, baselines_v)`` per chunk (float32, shape (n, N) each).

        ``baselines_v[i]`` is the pristine baseline of case ``i``'s specimen.
        With ``with_profiles=True`` a fourth item, ``thickness_m`` (n, n_segments), follows.
        """
        for k, entry in enumerate(self.manifest["chunks"]):
            with np.load(self.path / entry["file"], allow_pickle=False) as z:
                waves = z["waveforms_v"]
                bases = z["baselines_v"][z["baseline_row"]]
                prof = z["thickness_m"] if with_profiles else None
            sl = self.cases.iloc[entry["first_case"]: entry["first_case"] + entry["n_cases"]]
            yield (sl, waves, bases, prof) if with_profiles else (sl, waves, bases)

    def _locate(self, i: int) -> tuple[dict, int, pd.Series]:
        if not 0 <= int(i) < len(self.cases):
            raise ValueError(f"case index {i} is outside this campaign (0 to {len(self.cases) - 1}).")
        cs = int(self.manifest["chunk_size"])
        arrays = self._chunk(int(i) // cs)
        return arrays, int(i) % cs, self.cases.iloc[int(i)]

    def _capture(self, wave, row, role: str, temperature_c: float) -> Capture:
        exc = self.family.excitation
        return Capture(
            amplitude_v=np.asarray(wave, dtype=np.float64),
            sample_rate_hz=self.sample_rate_hz,
            pretrigger_s=self.pretrigger_s,
            path_id=str(row["specimen_id"]),
            captured_at=None,
            temperature_c=float(temperature_c),
            excitation_khz=exc.centre_frequency_khz,
            cycles=float(exc.cycles),
            units="V",
            extra={"simulated": True, "role": role, "case_id": str(row["case_id"]),
                   "specimen_id": str(row["specimen_id"]), "campaign_fingerprint": self.fingerprint,
                   "family": self.family.name, "family_fingerprint": self.family_fingerprint},
        )

    def capture(self, i: int) -> Capture:
        """The simulated capture of case ``i`` (row position in :attr:`cases`)."""
        arrays, j, row = self._locate(i)
        return self._capture(arrays["waveforms_v"][j], row, "capture", row["temperature_c"])

    def baseline(self, i: int) -> Capture:
        """The pristine baseline of case ``i``'s specimen."""
        arrays, j, row = self._locate(i)
        return self._capture(arrays["baselines_v"][arrays["baseline_row"][j]], row, "baseline",
                             row["baseline_temperature_c"])

    def profile(self, i: int):
        """The thickness profile of case ``i`` as a :class:`~training.profiles.ThinningProfile`."""
        from waneguide.simulation.profiles import ThinningProfile

        arrays, j, row = self._locate(i)
        fam = self.family
        seg = float(self.manifest["segment_m"])
        x = (np.arange(int(self.manifest["n_segments"])) + 0.5) * seg
        return ThinningProfile(x, arrays["thickness_m"][j].astype(float), fam.nominal_thickness_m,
                               fam.path.spacing_m, patch_count=int(row["patch_count"]),
                               shape="pristine" if row["max_loss_pct"] == 0 else str(row["shape"]),
                               sides=str(row["sides"]))

    def verify(self) -> None:
        """Check every chunk against its SHA-256 in the manifest; ValueError on a mismatch."""
        for entry in self.manifest["chunks"]:
            got = _sha256(self.path / entry["file"])
            if got != entry["sha256"]:
                raise ValueError(f"{self.path / entry['file']} does not match its digest in manifest.json; "
                                 "the file was changed or damaged. Re-simulate into a new folder.")


def load_campaign(out_dir: str | Path) -> Campaign:
    """Open a finished campaign folder."""
    out = Path(out_dir)
    man = _read_manifest(out)
    if man is None or man.get("format") != "waneguide-campaign":
        raise ValueError(f"{out} is not a waneguide campaign folder (no manifest.json).")
    if man.get("format_version") != CAMPAIGN_FORMAT_VERSION:
        raise ValueError(f"{out}: campaign format {man.get('format_version')} is not supported "
                         f"(this tool reads {CAMPAIGN_FORMAT_VERSION}).")
    if man.get("status") != "complete" or not (out / "cases.parquet").exists():
        done = len(list((out / "chunks").glob("chunk_*.npz"))) if (out / "chunks").exists() else 0
        raise ValueError(f"campaign {out} is incomplete ({done} of {man.get('n_chunks')} chunks); rerun "
                         "`waneguide simulate` with the same arguments to resume it.")
    family = family_from_mapping(man["family"], where=f"{out / 'manifest.json'}: family")
    if family.fingerprint != man["family_fingerprint"]:
        raise ValueError(f"{out}: the family stored in manifest.json does not match its fingerprint "
                         f"{man['family_fingerprint']}; the manifest was edited.")
    cases = pd.read_parquet(out / "cases.parquet")
    return Campaign(path=out, manifest=man, family=family, cases=cases)
