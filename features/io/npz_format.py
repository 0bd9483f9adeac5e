"""NumPy ``.npz`` captures: array ``amplitude`` plus one 0-d array per metadata key.

Strings are stored as 0-d unicode arrays, numbers as 0-d float arrays; the members are
read with ``allow_pickle=False`` (object arrays are refused), each after its declared
sizes are checked (:func:`read_npz_capture`).
"""
from __future__ import annotations

import lzma
import math
import os
import struct
import zipfile
import zlib
from pathlib import Path

import numpy as np
from numpy.lib import format as npformat

from waneguide.core.atomic import atomic_path
from waneguide.core.errors import WaneguideError
from waneguide.features.capture import Capture
from waneguide.features.io import _bounds
from waneguide.features.io._meta import capture_from_fields, fields_from_capture
from waneguide.features.io.errors import CaptureTooLargeError, CorruptFileError, InvalidFieldError, MissingFieldError

__all__ = ["read_npz_capture", "write_npz_capture"]


#: What zipfile and numpy.lib.format raise on a damaged archive.
_ZIP_ERRORS = (zipfile.BadZipFile, OSError, EOFError, ValueError, TypeError, KeyError, IndexError, OverflowError,
               RuntimeError, NotImplementedError, UnicodeError, struct.error, zlib.error, lzma.LZMAError)
_EOCD = b"PK\x05\x06"  # end of central directory record (PKWARE APPNOTE.TXT 4.3.16): 22 bytes + comment
#: Bytes of a .npy header (numpy's own limit for reading one, max_header_size=10000, with room).
_HEADER_BYTES = 2**16


def _corrupt(where: str, exc: BaseException) -> CorruptFileError:
    return CorruptFileError(
        f"{where}: not a readable .npz archive ({type(exc).__name__}: {str(exc)[:200]}); accepted: a zip of .npy "
        "arrays as `np.savez` writes it. Write the capture again, or export it as .csv, .mat or .h5."
    )


def _check_directory(path, where: str) -> None:
    """Refuse an archive whose central directory lists more members than a capture has (before zipfile reads it).

    The end record is found as zipfile finds it: the last 22 bytes, else the last signature
    in the final 64 KiB (the longest comment).
    """
    with open(path, "rb") as fh:
        size = fh.seek(0, os.SEEK_END)
        fh.seek(max(0, size - 22 - 65535))
        tail = fh.read()
    pos = len(tail) - 22 if tail[-22:-18] == _EOCD and tail[-2:] == b"\0\0" else tail.rfind(_EOCD)
    if pos < 0 or len(tail) - pos < 22:
        return  # no end record: zipfile refuses the file
    entries, directory_bytes = struct.unpack("<HI", tail[pos + 10:pos + 16])
    if entries > _bounds.MAX_METADATA_FIELDS + 2 or directory_bytes > (_bounds.MAX_METADATA_FIELDS + 2) * 2**12:
        raise CaptureTooLargeError(
            f"{where}: the archive lists {entries:,} members in a {directory_bytes:,}-byte directory; a capture "
            f"holds `amplitude` and at most {_bounds.MAX_METADATA_FIELDS} metadata arrays. Write the capture "
            "again with np.savez."
        )


def _read_member(zf: zipfile.ZipFile, info: zipfile.ZipInfo, name: str, where: str) -> np.ndarray:
    """One .npy member, its declared sizes checked before its data are inflated or allocated."""
    samples = name == "amplitude"
    ceiling = (_bounds.MAX_CAPTURE_SAMPLES * 16 if samples else _bounds.MAX_METADATA_CHARS * 16) + _HEADER_BYTES
    if info.file_size > ceiling:
        raise CaptureTooLargeError(
            f"{where}: member {info.filename!r} declares {info.file_size:,} bytes uncompressed, above the ceiling of "
            f"{ceiling:,} bytes for {'the samples' if samples else 'a metadata value'}; nothing was inflated. "
            f"Store one record of at most {_bounds.MAX_CAPTURE_SAMPLES:,} samples per file."
        )
    with zf.open(info) as fp:
        version = npformat.read_magic(fp)
        if version not in ((1, 0), (2, 0)):
            raise CorruptFileError(f"{where}: member {info.filename!r} is .npy format {version}; accepted 1.0 or "
                                   "2.0 (as np.savez writes). Write the capture again.")
        read_header = npformat.read_array_header_1_0 if version == (1, 0) else npformat.read_array_header_2_0
        shape, _, dtype = read_header(fp)
    if dtype.hasobject:
        raise InvalidFieldError(
            f"{where}: array {name!r} must hold plain numbers or text; got a Python object array. Store each field "
            "as a number or a string (np.savez(path, amplitude=y, path_id='P01', ...))."
        )
    if samples:
        count = _bounds.check_samples(where, name, shape, dtype.itemsize)
    else:
        count = math.prod(shape)
        _bounds.check_metadata_size(where, name, max(count, dtype.itemsize // 4))
    if count * dtype.itemsize > info.file_size:
        raise CorruptFileError(
            f"{where}: member {info.filename!r} declares {count * dtype.itemsize:,} bytes of data in a "
            f"{info.file_size:,}-byte member (truncated or damaged). Write the capture again."
        )
    with zf.open(info) as fp:
        return npformat.read_array(fp, allow_pickle=False)


def read_npz_capture(path: str | os.PathLike) -> Capture:
    """Read a ``.npz`` capture; amplitudes converted to volts.

    Every member's declared uncompressed size (the zip directory) and array header (shape,
    type) are checked against the ceilings of :mod:`features.io._bounds` before its data
    are inflated; ``time_s`` and members that are not ``.npy`` arrays are never read.
    """
    where = str(path)
    _bounds.check_file_size(path, text=False)
    if not zipfile.is_zipfile(path):
        raise CorruptFileError(
            f"{where}: not a .npz archive; accepted: a zip of .npy arrays as `np.savez` writes it. "
            "Write the capture again with np.savez, or export it as .csv, .mat or .h5."
        )
    _check_directory(path, where)
    try:
        with zipfile.ZipFile(path) as zf:
            infos = [i for i in zf.infolist() if i.filename.endswith(".npy") and i.filename != "time_s.npy"]
            _bounds.check_metadata_count(where, len(infos))
            arrays = {i.filename[:-4]: _read_member(zf, i, i.filename[:-4], where) for i in infos}
    except WaneguideError:
        raise
    except MemoryError:
        raise CaptureTooLargeError(f"{where}: the archive declares more memory than can be given; nothing was "
                                   "kept. Write the capture again with np.savez.") from None
    except _ZIP_ERRORS as exc:
        raise _corrupt(where, exc) from None
    if "amplitude" not in arrays:
        raise MissingFieldError(
            f"{where}: the archive has no 'amplitude' array (required: the samples, 1-D); found "
            f"{sorted(arrays)[:20]}. Store the samples as `amplitude`."
        )
    values = arrays.pop("amplitude")
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
