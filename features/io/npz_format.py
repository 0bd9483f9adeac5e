"""NumPy ``.npz`` captures: array ``amplitude`` plus one 0-d array per metadata key.

Strings are stored as 0-d unicode arrays, numbers as 0-d float arrays; the file is
read with ``allow_pickle=False`` (object arrays are refused).
"""
from __future__ import annotations

import os
import zipfile
from pathlib import Path

import numpy as np

from waneguide.core.atomic import atomic_path
from waneguide.features.capture import Capture
from waneguide.features.io._meta import capture_from_fields, fields_from_capture
from waneguide.features.io.errors import CorruptFileError, InvalidFieldError, MissingFieldError

__all__ = ["read_npz_capture", "write_npz_capture"]


def read_npz_capture(path: str | os.PathLike) -> Capture:
    """Read a ``.npz`` capture; amplitudes converted to volts."""
    where = str(path)
    if not zipfile.is_zipfile(path):
        raise CorruptFileError(
            f"{where}: not a .npz archive; accepted: a zip of .npy arrays as `np.savez` writes it. "
            "Write the capture again with np.savez, or export it as .csv, .mat or .h5."
        )
    try:
        with np.load(path, allow_pickle=False) as data:
            arrays = {k: data[k] for k in data.files}
    except (zipfile.BadZipFile, OSError, EOFError) as exc:
        raise CorruptFileError(
            f"{where}: not a readable .npz archive ({exc}); accepted: a zip of .npy arrays as `np.savez` "
            "writes it. Write the capture again."
        ) from None
    except ValueError as exc:  # object arrays with allow_pickle=False
        raise InvalidFieldError(
            f"{where}: arrays must be plain numbers or text; got a Python object array ({exc}). "
            "Store each field as a number or a string (np.savez(path, amplitude=y, path_id='P01', ...))."
        ) from None
    if "amplitude" not in arrays:
        raise MissingFieldError(
            f"{where}: the archive has no 'amplitude' array (required: the samples, 1-D); found "
            f"{sorted(arrays)}. Store the samples as `amplitude`."
        )
    values = arrays.pop("amplitude")
    arrays.pop("time_s", None)
    meta = {}
    for k, v in arrays.items():
        meta[k] = v.item() if v.ndim == 0 else v
    return capture_from_fields(values, meta, where=where)


def write_npz_capture(capture: Capture, path: str | os.PathLike) -> Path:
    """Write ``capture`` as a ``.npz`` archive (atomically), amplitudes in ``capture.units``."""
    stored, meta = fields_from_capture(capture, where=str(path))
    arrays = {"amplitude": stored.astype(np.int64) if capture.units == "counts" else stored}
    for k, v in meta.items():
        arrays[k] = np.asarray(v if not isinstance(v, bool) else int(v))
    with atomic_path(path, suffix=".npz") as tmp:
        with open(tmp, "wb") as fh:
            np.savez(fh, **arrays)
    return Path(path)
