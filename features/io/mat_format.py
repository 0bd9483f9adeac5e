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

import math
import os
import struct
import time
import zlib
from pathlib import Path

import h5py
import numpy as np
import scipy.io
from scipy.io.matlab import MatReadError, matfile_version

from waneguide.core.atomic import atomic_path
from waneguide.core.errors import InputError, WaneguideError
from waneguide.features.capture import Capture
from waneguide.features.io import _bounds
from waneguide.features.io._h5 import checked_dataset, h5_guard, open_h5, read_attrs, read_dataset
from waneguide.features.io._meta import capture_from_fields, fields_from_capture
from waneguide.features.io.errors import CaptureTooLargeError, CorruptFileError, InvalidFieldError, MissingFieldError

__all__ = ["read_mat_capture", "write_mat_capture"]


#: What scipy.io raises on a damaged file.
_MAT_ERRORS = (MatReadError, ValueError, TypeError, OSError, IndexError, EOFError, KeyError, OverflowError,
               AttributeError, RuntimeError, NotImplementedError, UnicodeError, zlib.error, struct.error)
#: MATLAB classes a capture variable may have (numbers, logicals, text).
_PLAIN_CLASSES = {"double", "single", "int8", "uint8", "int16", "uint16", "int32", "uint32", "int64", "uint64",
                  "char", "logical"}
_MI_COMPRESSED = 15  # data type of a compressed element (MathWorks, "MAT-File Format", Table 1-1)


def _corrupt(where: str, exc: BaseException) -> CorruptFileError:
    return CorruptFileError(
        f"{where}: not a readable MATLAB .mat file ({type(exc).__name__}: {str(exc)[:200]}); accepted: MATLAB v5 "
        "or v7.3 files written by `save`. Save the capture again, or export it as .csv, .h5 or .npz."
    )


def _check_inflated_size(path, where: str) -> None:
    """Inflate every compressed element of a v5 file in bounded pieces, refusing past the binary ceiling.

    scipy sizes its buffers by the tags inside a compressed element, so a small file whose
    stream inflates without end (a compression bomb) is refused here, before scipy reads it.
    """
    limit = _bounds.MAX_BINARY_BYTES
    total = 0
    with open(path, "rb") as fh:
        head = fh.read(128)
        endian = "<" if head[126:128] == b"IM" else ">"
        while len(tag := fh.read(8)) == 8:
            mdtype, nbytes = struct.unpack(endian + "II", tag)
            if mdtype != _MI_COMPRESSED:
                fh.seek(nbytes, os.SEEK_CUR)
                continue
            d = zlib.decompressobj()
            left = nbytes
            while left > 0 and not d.eof:
                piece = fh.read(min(left, 2**20))
                if not piece:
                    break
                left -= len(piece)
                while piece and not d.eof:
                    total += len(d.decompress(piece, 2**20))
                    piece = d.unconsumed_tail
                    if total > limit:
                        raise CaptureTooLargeError(
                            f"{where}: the compressed variables inflate past {limit // 2**20} MiB, the ceiling of a "
                            "binary capture (a compression bomb or a damaged file); nothing was read. Save the "
                            "capture again (one record per file)."
                        )
            fh.seek(left, os.SEEK_CUR)


def _check_v5_headers(path, where: str) -> list[str]:
    """Variable names to read, after checking every variable header (scipy.io.whosmat) against the ceilings."""
    variables = scipy.io.whosmat(path)
    _bounds.check_metadata_count(where, len(variables))
    names = []
    for name, shape, cls in variables:
        if name == "time_s":
            continue  # ignored, never read
        if cls not in _PLAIN_CLASSES:
            raise InvalidFieldError(
                f"{where}: variable {name!r} must be a number or text; got a MATLAB {cls} (a cell array, struct, "
                "sparse matrix or object). Store it as a full numeric array or a char array."
            )
        if name == "amplitude":
            _bounds.check_samples(where, name, shape)
        else:
            _bounds.check_metadata_size(where, name, math.prod(shape))
        names.append(name)
    return names


def _read_v5(path, where):
    try:
        _check_inflated_size(path, where)  # first: scipy.io.whosmat itself inflates what a tag claims
        names = _check_v5_headers(path, where)
        data = scipy.io.loadmat(path, squeeze_me=True, chars_as_strings=True, variable_names=names)
    except WaneguideError:
        raise
    except MemoryError:
        raise CaptureTooLargeError(
            f"{where}: a variable declares more memory than can be given (its data tag disagrees with its "
            "header); nothing was kept. Save the capture again."
        ) from None
    except _MAT_ERRORS as exc:
        raise _corrupt(where, exc) from None
    return {k: v for k, v in data.items() if not k.startswith("__")}


def _decode_h5(node, name, where):
    if node is None:
        return None  # a group (a MATLAB struct): not a capture variable
    value = read_dataset(node, name, where, samples=name == "amplitude")
    cls = read_attrs(node, where).get("MATLAB_class", b"")
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
    fh = open_h5(path, where, "MATLAB v7.3 (HDF5) file", "MATLAB v5 or v7.3 files written by `save`. Save the "
                 "capture again, or export it as .csv, .h5 or .npz.")
    with fh, h5_guard(where, "MATLAB v7.3 (HDF5) file"):
        names = [k for k in fh.keys() if not k.startswith("#") and k != "time_s"]
        _bounds.check_metadata_count(where, len(names))
        return {k: _decode_h5(checked_dataset(fh, k, where), k, where) for k in names}


def read_mat_capture(path: str | os.PathLike) -> Capture:
    """Read a v5 or v7.3 ``.mat`` capture; amplitudes converted to volts.

    Declarations are checked before anything is read: v5 variable headers
    (:func:`scipy.io.whosmat`) and the inflated size of compressed variables; v7.3
    datasets as for ``.h5`` (:mod:`features.io._h5`).
    """
    where = str(path)
    _bounds.check_file_size(path, text=False)
    try:
        major, _ = matfile_version(path)
    except _MAT_ERRORS as exc:
        raise _corrupt(where, exc) from None
    data = _read_v73(path, where) if major == 2 else _read_v5(path, where)
    if "amplitude" not in data or data["amplitude"] is None:
        raise MissingFieldError(
            f"{where}: the file has no 'amplitude' variable (required: the samples as a vector); found "
            f"{sorted(data)[:20]}. Save the samples as `amplitude`."
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
