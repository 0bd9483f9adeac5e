"""HDF5 captures (``.h5`` / ``.hdf5``): dataset ``/amplitude``, metadata as root attributes.

Text attributes are UTF-8 strings, numbers are float64 scalars. An optional
``/time_s`` dataset is ignored (the time axis follows from the metadata).
"""
from __future__ import annotations

import os
from pathlib import Path

import h5py
import numpy as np

from waneguide.core.atomic import atomic_path
from waneguide.features.capture import Capture
from waneguide.features.io._meta import capture_from_fields, fields_from_capture
from waneguide.features.io.errors import CorruptFileError, MissingFieldError

__all__ = ["read_hdf5_capture", "write_hdf5_capture"]


def read_hdf5_capture(path: str | os.PathLike) -> Capture:
    """Read an HDF5 capture; amplitudes converted to volts."""
    where = str(path)
    try:
        fh = h5py.File(path, "r")
    except OSError as exc:
        raise CorruptFileError(
            f"{where}: not a readable HDF5 file ({exc}); accepted: an HDF5 file with an '/amplitude' "
            "dataset. Write the capture again, or export it as .csv, .mat or .npz."
        ) from None
    with fh:
        if "amplitude" not in fh or not isinstance(fh["amplitude"], h5py.Dataset):
            raise MissingFieldError(
                f"{where}: the file has no '/amplitude' dataset (required: the samples, 1-D); found "
                f"{sorted(fh.keys())}. Store the samples as the dataset `amplitude`."
            )
        values = fh["amplitude"][()]
        meta = {k: (v.decode() if isinstance(v, bytes) else v) for k, v in fh.attrs.items()}
    return capture_from_fields(values, meta, where=where)


def write_hdf5_capture(capture: Capture, path: str | os.PathLike) -> Path:
    """Write ``capture`` as an HDF5 file (atomically), amplitudes in ``capture.units``."""
    stored, meta = fields_from_capture(capture, where=str(path))
    with atomic_path(path, suffix=".h5") as tmp:
        with h5py.File(tmp, "w") as fh:
            fh.create_dataset("amplitude", data=stored.astype(np.int64) if capture.units == "counts" else stored)
            for k, v in meta.items():
                fh.attrs[k] = v if not isinstance(v, bool) else int(v)
    return Path(path)
