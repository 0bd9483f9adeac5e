"""Capture files: one reader and one writer per format behind one small interface.

:func:`read_capture` / :func:`write_capture` pick the format from the suffix:

==============  ==========================================================
``.csv``        ``# key = value`` header lines, columns ``time_s,amplitude``
``.mat``        MATLAB v5 (scipy.io) or v7.3 (HDF5, read with h5py)
``.h5/.hdf5``   dataset ``/amplitude``, metadata as root attributes
``.npz``        array ``amplitude``, one 0-d array per metadata key
==============  ==========================================================

The metadata set and the unit conversion are shared (:mod:`features.io._meta`);
the full description is docs/capture-format.md. Every reader checks what a file declares
(sizes, shapes, lengths) against the ceilings of :mod:`features.io._bounds` before it reads
(:data:`MAX_CAPTURE_SAMPLES` samples per capture). Errors are the named classes of
:mod:`features.io.errors`, all subclasses of :class:`waneguide.core.errors.InputError`;
a file or folder that does not exist raises :class:`waneguide.core.errors.MissingInputError`.
"""
from __future__ import annotations

import os
from pathlib import Path
from typing import Iterable

from waneguide.core.errors import InputError, MissingInputError
from waneguide.features.capture import Capture
from waneguide.features.io._bounds import MAX_CAPTURE_SAMPLES
from waneguide.features.io._meta import UNITS, from_volts, to_volts
from waneguide.features.io.csv_format import read_csv_capture, write_csv_capture
from waneguide.features.io.errors import (
    CaptureFileError,
    CaptureTooLargeError,
    CorruptFileError,
    EmptyDataError,
    InvalidFieldError,
    MissingFieldError,
    TimeAxisError,
    UnknownUnitsError,
    UnsupportedFormatError,
)
from waneguide.features.io.hdf5_format import read_hdf5_capture, write_hdf5_capture
from waneguide.features.io.mat_format import read_mat_capture, write_mat_capture
from waneguide.features.io.npz_format import read_npz_capture, write_npz_capture

__all__ = [
    "CAPTURE_SUFFIXES",
    "MAX_CAPTURE_SAMPLES",
    "UNITS",
    "CaptureFileError",
    "CaptureTooLargeError",
    "CorruptFileError",
    "EmptyDataError",
    "InvalidFieldError",
    "MissingFieldError",
    "TimeAxisError",
    "UnknownUnitsError",
    "UnsupportedFormatError",
    "capture_files",
    "from_volts",
    "read_capture",
    "read_captures",
    "to_volts",
    "write_capture",
]

_READERS = {
    ".csv": read_csv_capture,
    ".mat": read_mat_capture,
    ".h5": read_hdf5_capture,
    ".hdf5": read_hdf5_capture,
    ".npz": read_npz_capture,
}
_WRITERS = {
    ".csv": write_csv_capture,
    ".mat": write_mat_capture,
    ".h5": write_hdf5_capture,
    ".hdf5": write_hdf5_capture,
    ".npz": write_npz_capture,
}
#: File suffixes recognised as captures.
CAPTURE_SUFFIXES = tuple(_READERS)


def _suffix(path: Path) -> str:
    suf = path.suffix.lower()
    if suf not in _READERS:
        raise UnsupportedFormatError(
            f"{path}: unsupported capture format {path.suffix or '(no suffix)'!r}; "
            f"accepted: {', '.join(CAPTURE_SUFFIXES)} (docs/capture-format.md). Convert the file to one of them."
        )
    return suf


def read_capture(path: str | os.PathLike) -> Capture:
    """Read one capture file; the format follows from the suffix."""
    p = Path(path)
    suf = _suffix(p)
    if not p.is_file():
        raise MissingInputError(f"capture file {str(p)!r} does not exist (or is not a file); check the path.")
    return _READERS[suf](p)


def write_capture(capture: Capture, path: str | os.PathLike, **options) -> Path:
    """Write ``capture`` to ``path`` (format from the suffix), atomically.

    ``options`` go to the format's writer (``version="7.3"`` for ``.mat``).
    """
    p = Path(path)
    return _WRITERS[_suffix(p)](capture, p, **options)


def capture_files(dir_or_files: str | os.PathLike | Iterable[str | os.PathLike]) -> list[Path]:
    """Capture files named by a directory (its capture files, sorted), a file, or a list of both."""
    items = [dir_or_files] if isinstance(dir_or_files, (str, os.PathLike)) else list(dir_or_files)
    files: list[Path] = []
    for item in items:
        p = Path(item)
        if p.is_dir():
            found = sorted(f for f in p.iterdir() if f.is_file() and f.suffix.lower() in _READERS)
            if not found:
                raise InputError(
                    f"directory {str(p)!r} holds no capture files: a capture file ends in "
                    f"{', '.join(CAPTURE_SUFFIXES)} (not recursive). Give the folder that holds the captures."
                )
            files.extend(found)
        else:
            if not p.exists():
                raise MissingInputError(f"capture file or folder {str(p)!r} does not exist; check the path.")
            _suffix(p)
            if not p.is_file():
                raise MissingInputError(f"capture file {str(p)!r} is not a regular file; give a capture file or a folder.")
            files.append(p)
    if not files:
        raise InputError("no capture files given: name at least one capture file or folder.")
    return files


def read_captures(dir_or_files: str | os.PathLike | Iterable[str | os.PathLike]) -> list[Capture]:
    """Read every capture of a directory, a file, or a list of files and directories."""
    return [read_capture(p) for p in capture_files(dir_or_files)]
