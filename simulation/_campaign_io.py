"""Campaign files: manifest.json, the deterministic chunk .npz files (with their SHA-256) and cases.parquet.

Chunk files are checked against the SHA-256 recorded in the manifest every time they are
read (:func:`read_chunk`); a mismatch names the file, both digests and the fix.
"""
from __future__ import annotations

import hashlib
import io
import json
import math
import zipfile
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from waneguide.core.atomic import atomic_path, atomic_write_text, file_sha256
from waneguide.core.errors import InputError, MissingInputError
from waneguide.simulation._chunk import truth_of
from waneguide.simulation._plan import SPECIMEN_DIMS, STATE_DIMS
from waneguide.simulation.forward import FORWARD_MODEL_VERSION
from waneguide.simulation.profiles import TRUTH_COLUMNS

__all__ = ["CAMPAIGN_FORMAT_VERSION", "FIDELITIES", "code_version", "chunk_name", "build_manifest", "write_manifest",
           "read_manifest", "write_npz", "read_chunk", "check_present", "existing_chunk", "write_parquet",
           "digest_error"]

CAMPAIGN_FORMAT_VERSION = 1
_ZIP_DATE = (1980, 1, 1, 0, 0, 0)
#: What made the noise-free waveforms, per fidelity (``--fidelity``).
FIDELITIES = {
    "fast": "free-plate S0/A0 modal synthesis; approximations listed in waneguide.simulation.forward",
    "full": "2-D plane-strain full-wave finite differences (waneguide.simulation.fullwave) with the fast model's "
            "confounders and noise (waneguide.simulation._fullwave_runs)",
}


def code_version() -> str:
    try:
        return version("waneguide")
    except PackageNotFoundError:  # pragma: no cover - not installed
        return "unknown"


def chunk_name(k: int) -> str:
    return f"chunks/chunk_{k:05d}.npz"


def build_manifest(family, fm, n_cases: int, seed: int, chunk_size: int, fingerprint: str, status: str,
                   chunks: list[dict], *, fidelity: str = "fast", fullwave: dict | None = None) -> dict[str, Any]:
    """The manifest; ``fullwave``: the full-wave section (setup and calibration) of a ``full`` campaign."""
    n_spec = math.ceil(n_cases / family.domain.states_per_specimen)
    return {
        "format": "waneguide-campaign",
        "format_version": CAMPAIGN_FORMAT_VERSION,
        "status": status,
        "campaign_fingerprint": fingerprint,
        "family_fingerprint": family.fingerprint,
        "family_name": family.name,
        "family": family.model_dump(mode="json"),
        "seed": int(seed),
        "n_cases": int(n_cases),
        "n_specimens": int(n_spec),
        "states_per_specimen": int(family.domain.states_per_specimen),
        "chunk_size": int(chunk_size),
        "n_chunks": math.ceil(n_cases / chunk_size),
        "sample_rate_hz": fm.sample_rate_hz,
        "pretrigger_s": fm.pretrigger_s,
        "record_length": fm.n_samples,
        "segment_m": fm.segment_m,
        "n_segments": int(fm.x_m.size),
        "code_version": {"waneguide": code_version(), "forward_model": FORWARD_MODEL_VERSION,
                         **({"fullwave": fullwave["fullwave_version"]} if fullwave is not None else {})},
        "sampling": {"method": "scipy.stats.qmc.Sobol, scrambled, first n of 2^m",
                     "specimen_dimensions": list(SPECIMEN_DIMS), "state_dimensions": list(STATE_DIMS)},
        "fidelity": fidelity,
        "model": FIDELITIES[fidelity],
        **({"fullwave": fullwave} if fullwave is not None else {}),
        "chunks": chunks,
    }


def write_manifest(out: Path, data: dict) -> None:
    atomic_write_text(out / "manifest.json", json.dumps(data, indent=2, sort_keys=True) + "\n")


def read_manifest(out: Path) -> dict | None:
    """The manifest of a campaign folder, or None if the folder has none."""
    p = out / "manifest.json"
    if not p.exists():
        return None
    try:
        return json.loads(p.read_text(encoding="utf-8"))
    except json.JSONDecodeError as exc:
        raise InputError(f"{p} is not valid JSON ({exc}); it is not a waneguide campaign folder. Give the folder "
                         "`waneguide simulate` wrote, or simulate into an empty --out folder.") from None


def write_npz(path: Path, arrays: dict[str, np.ndarray]) -> str:
    """Deterministic .npz (fixed zip timestamps, fixed order, no compression); returns its sha256."""
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
    return file_sha256(path)


def digest_error(path: Path, expected: str, found: str) -> InputError:
    """The error for a chunk whose bytes do not match the manifest."""
    return InputError(
        f"campaign chunk {path} does not match its SHA-256 in manifest.json (expected {expected}, found {found}): "
        "the file was changed or damaged. Delete that chunk and re-run `waneguide simulate` with the same "
        "arguments (--family, --cases, --seed, --out): it recomputes missing chunks and keeps the others."
    )


def _missing_error(path: Path) -> MissingInputError:
    return MissingInputError(
        f"campaign chunk {path} is missing. Re-run `waneguide simulate` with the same arguments (--family, "
        "--cases, --seed, --out): it recomputes missing chunks and keeps the others."
    )


def _read_bytes(path: Path) -> bytes:
    try:
        return path.read_bytes()
    except FileNotFoundError:
        raise _missing_error(path) from None


def check_present(path: Path) -> None:
    """MissingInputError (with the fix) if a chunk listed in the manifest is not there."""
    if not path.is_file():
        raise _missing_error(path)


def read_chunk(path: Path, expected_sha256: str) -> dict[str, np.ndarray]:
    """Every array of a finished chunk, after checking its bytes against ``expected_sha256``."""
    data = _read_bytes(path)
    found = hashlib.sha256(data).hexdigest()
    if found != expected_sha256:
        raise digest_error(path, expected_sha256, found)
    with np.load(io.BytesIO(data), allow_pickle=False) as z:
        return {name: z[name] for name in z.files}


def existing_chunk(path: Path, fingerprint: str, expected_sha256: str | None):
    """(truth, sha256) of a chunk already on disk, or None if it is absent or unreadable.

    With ``expected_sha256`` (a campaign finished earlier) a changed file is refused, never
    taken over; without it (an interrupted run) an unreadable file is recomputed.
    """
    if not path.exists():
        return None
    data = path.read_bytes()
    digest = hashlib.sha256(data).hexdigest()
    if expected_sha256 is not None and digest != expected_sha256:
        raise digest_error(path, expected_sha256, digest)
    try:
        with np.load(io.BytesIO(data), allow_pickle=False) as z:
            theirs = str(z["campaign_fingerprint"].reshape(-1)[0])
            if theirs != fingerprint:
                raise InputError(f"{path} belongs to another campaign (fingerprint {theirs}, this one {fingerprint}); "
                                 "nothing was overwritten. Choose an empty --out folder.")
            truth = truth_of({k: z[k] for k in ["case_index", *[f"truth_{c}" for c in TRUTH_COLUMNS]]})
    except (OSError, ValueError, zipfile.BadZipFile, KeyError, EOFError) as exc:
        if isinstance(exc, InputError):
            raise
        return None  # damaged by an interrupted write (atomic writes make this unlikely): recompute
    return truth, digest


def write_parquet(df: pd.DataFrame, path: Path) -> None:
    table = pa.Table.from_pandas(df, preserve_index=False)
    with atomic_path(path) as tmp:
        pq.write_table(table, tmp, compression="zstd")
