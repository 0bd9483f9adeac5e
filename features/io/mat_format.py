"""MATLAB ``.mat`` captures: one variable per metadata key plus ``amplitude``.

Version 5 files (MATLAB's default ``save``) are read and written with
:func:`scipy.io.loadmat` / :func:`scipy.io.savemat`. Version 7.3 files are HDF5
files with a 512-byte MATLAB user block; scipy refuses them, so they are read with
h5py: MATLAB stores arrays column-major (a 1-by-N row vector becomes an HDF5
dataset of shape (N, 1)) and text as uint16 character codes tagged with the
attribute ``MATLAB_class = "char"`` (MathWorks, "MAT-File Versions", v7.3 is
HDF5-based; layout details recalled from memory of files MATLAB writes).
"""
from __future__ import annotations

import os
import time
from pathlib import Path

import h5py
import numpy as np
import scipy.io
from scipy.io.matlab import MatReadError

from waneguide.core.atomic import atomic_path
from waneguide.core.errors import InputError
from waneguide.features.capture import Capture
from waneguide.features.io._meta import capture_from_fields, fields_from_capture
from waneguide.features.io.errors import CorruptFileError, InvalidFieldError, MissingFieldError

__all__ = ["read_mat_capture", "write_mat_capture"]


def _read_v5(path, where):
    try:
        data = scipy.io.loadmat(path, squeeze_me=True, chars_as_strings=True)
    except NotImplementedError:
        return None  # v7.3: HDF5
    except (MatReadError, ValueError, TypeError, OSError, IndexError, EOFError) as exc:
        raise CorruptFileError(
            f"{where}: not a readable MATLAB .mat file ({exc}); accepted: MATLAB v5 or v7.3 files written "
            "by `save`. Save the capture again, or export it as .csv, .h5 or .npz."
        ) from None
    return {k: v for k, v in data.items() if not k.startswith("__")}


def _decode_h5(node):
    if not isinstance(node, h5py.Dataset):
        return None
    value = node[()]
    cls = node.attrs.get("MATLAB_class", b"")
    if isinstance(cls, bytes):
        cls = cls.decode()
    if cls == "char":
        codes = np.asarray(value).T.ravel()
        return "".join(chr(int(c)) for c in codes)
    arr = np.asarray(value)
    if arr.ndim == 2:
        arr = arr.T  # column-major on disk
    return np.squeeze(arr)


def _read_v73(path, where):
    try:
        fh = h5py.File(path, "r")
    except OSError as exc:
        raise CorruptFileError(
            f"{where}: not a readable MATLAB v7.3 (HDF5) file ({exc}); accepted: MATLAB v5 or v7.3 files "
            "written by `save`. Save the capture again, or export it as .csv, .h5 or .npz."
        ) from None
    with fh:
        return {k: _decode_h5(fh[k]) for k in fh.keys() if not k.startswith("#")}


def read_mat_capture(path: str | os.PathLike) -> Capture:
    """Read a v5 or v7.3 ``.mat`` capture; amplitudes converted to volts."""
    where = str(path)
    data = _read_v5(path, where)
    if data is None:
        data = _read_v73(path, where)
    if "amplitude" not in data or data["amplitude"] is None:
        raise MissingFieldError(
            f"{where}: the file has no 'amplitude' variable (required: the samples as a vector); found "
            f"{sorted(data)}. Save the samples as `amplitude`."
        )
    values = data.pop("amplitude")
    data.pop("time_s", None)
    meta = {}
    for k, v in data.items():
        if isinstance(v, np.ndarray) and v.dtype == object:
            raise InvalidFieldError(
                f"{where}: variable {k!r} must be a number or text; got a cell array or struct. "
                "Store it as a scalar or a char array."
            )
        meta[k] = v.item() if isinstance(v, np.ndarray) and v.ndim == 0 else v
    return capture_from_fields(values, meta, where=where)


def _mat73_userblock() -> bytes:
    text = (
        "MATLAB 7.3 MAT-file, Platform: waneguide, Created on: "
        + time.strftime("%a %b %d %H:%M:%S %Y", time.gmtime(0))
        + " HDF5 schema 1.00 ."
    ).encode("ascii")
    head = text[:116].ljust(116, b" ")
    return head + b"\x00" * 8 + b"\x00\x02" + b"IM" + b"\x00" * (512 - 128)


def _write_v73(tmp: Path, stored: np.ndarray, meta: dict, counts: bool) -> None:
    with h5py.File(tmp, "w", userblock_size=512) as fh:
        def put(name, value):
            if isinstance(value, str):
                codes = np.array([ord(c) for c in value], dtype=np.uint16).reshape(-1, 1)
                ds = fh.create_dataset(name, data=codes)
                ds.attrs["MATLAB_class"] = np.bytes_(b"char")
                ds.attrs["MATLAB_int_decode"] = np.int32(2)
            else:
                arr = np.atleast_1d(np.asarray(value, dtype=float)).reshape(-1, 1)
                ds = fh.create_dataset(name, data=arr)
                ds.attrs["MATLAB_class"] = np.bytes_(b"double")

        put("amplitude", stored)
        for k, v in meta.items():
            put(k, v if not isinstance(v, bool) else float(v))
    with open(tmp, "r+b") as raw:
        raw.write(_mat73_userblock())


def write_mat_capture(capture: Capture, path: str | os.PathLike, *, version: str = "5") -> Path:
    """Write ``capture`` as a ``.mat`` file (``version`` ``"5"`` or ``"7.3"``), atomically."""
    if version not in ("5", "7.3"):
        raise InputError(f"{path}: MAT version must be '5' or '7.3'; got {version!r}. Pass version=\"5\" or \"7.3\".")
    stored, meta = fields_from_capture(capture, where=str(path))
    with atomic_path(path, suffix=".mat") as tmp:
        if version == "5":
            variables = {"amplitude": stored.reshape(1, -1)}
            variables.update({k: (v if not isinstance(v, bool) else int(v)) for k, v in meta.items()})
            with open(tmp, "wb") as fh:
                scipy.io.savemat(fh, variables, do_compression=True, oned_as="row")
        else:
            _write_v73(tmp, stored, meta, capture.units == "counts")
    return Path(path)
