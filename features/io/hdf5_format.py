"""HDF5 captures (``.h5`` / ``.hdf5``): dataset ``/amplitude``, metadata as root attributes.

Text attributes are UTF-8 strings, numbers are float64 scalars. An optional
``/time_s`` dataset is ignored (the time axis follows from the metadata), never read.
Sizes are checked before reading (:mod:`features.io._bounds`, :mod:`features.io._h5`).
"""
from __future__ import annotations

import os
from pathlib import Path

import h5py
import numpy as np

from waneguide.core.atomic import atomic_path
from waneguide.features.capture import Capture
from waneguide.features.io import _bounds
from waneguide.features.io._h5 import checked_dataset, h5_guard, open_h5, read_attrs, read_dataset
from waneguide.features.io._meta import capture_from_fields, fields_from_capture
from waneguide.features.io.errors import MissingFieldError

__all__ = ["read_hdf5_capture", "write_hdf5_capture"]


def read_hdf5_capture(path: str | os.PathLike) -> Capture:
    """Read an HDF5 capture; amplitudes converted to volts.

    Declarations are checked before anything is read (:mod:`features.io._h5`): the
    amplitude's shape and type, its storage and chunks, and every attribute.
    """
    where = str(path)
    _bounds.check_file_size(path, text=False)
    fh = open_h5(path, where, "HDF5 file", "an HDF5 file with an '/amplitude' dataset. Write the capture "
                 "again, or export it as .csv, .mat or .npz.")
    with fh, h5_guard(where, "HDF5 capture"):
        ds = checked_dataset(fh, "amplitude", where)
        if ds is None:
            raise MissingFieldError(
                f"{where}: the file has no '/amplitude' dataset (required: the samples, 1-D); found "
                f"{sorted(fh.keys())[:20]}. Store the samples as the dataset `amplitude`."
            )
        meta = read_attrs(fh, where)
        values = read_dataset(ds, "amplitude", where, samples=True)
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
