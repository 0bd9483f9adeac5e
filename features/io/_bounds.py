"""Ceilings of the capture readers: what a file declares is checked before anything is read.

A reader never allocates what a file merely declares (an HDF5 dataset shape, a ``.npy``
header, a zip member's uncompressed size, a MATLAB variable header, a CSV's length):
each declared size is compared with the ceilings below first, and a file above one is
refused in one line (:class:`~waneguide.features.io.errors.CaptureTooLargeError`) that
names the file, the declared size, the ceiling and the fix.

The ceilings are module attributes read at call time (tests lower them to stay fast).
"""
from __future__ import annotations

import math
import os
from typing import Any

import numpy as np

from waneguide.features.io.errors import CaptureTooLargeError, InvalidFieldError

__all__ = [
    "MAX_CAPTURE_SAMPLES",
    "MAX_METADATA_CHARS",
    "MAX_METADATA_FIELDS",
    "MAX_CSV_BYTES",
    "MAX_BINARY_BYTES",
    "MAX_LINE_BYTES",
    "check_file_size",
    "check_samples",
    "check_metadata_count",
    "check_metadata_size",
    "check_metadata_value",
]

#: Samples in one capture. Basis: far above any guided-wave record (the demo families use 8,192
#: samples; the family schema allows record_length up to 2**20), yet a float64 copy is 32 MiB.
MAX_CAPTURE_SAMPLES = 2**22
#: Characters (or elements) of one metadata value: an identifier, a timestamp or a note is far
#: shorter (a choice of this project, no source), and a longer one is refused rather than stored.
MAX_METADATA_CHARS = 1000
#: Metadata keys of one capture: 9 are documented; 256 leaves room for any rig's notes.
MAX_METADATA_FIELDS = 256
#: Bytes of one CSV line: a sample line of two 17-significant-digit numbers is at most ~50; a
#: header line holds a key and a value of at most MAX_METADATA_CHARS characters (4 bytes each at
#: most in UTF-8): 8 KiB holds both with room to spare.
MAX_LINE_BYTES = 8192
#: Bytes of a CSV capture: 64 bytes per sample line at the sample ceiling (two 17-digit numbers
#: with sign and exponent take at most 50) plus 1 MiB of header: 257 MiB.
MAX_CSV_BYTES = MAX_CAPTURE_SAMPLES * 64 + 2**20
#: Bytes of a binary capture (.mat, .h5, .npz): float64 amplitude and time axis at the sample
#: ceiling (2 x 32 MiB) with room to spare for metadata and container overhead: 128 MiB.
MAX_BINARY_BYTES = 2**27


def _fmt_bytes(n: float) -> str:
    return f"{n / 2**20:,.1f} MiB" if n >= 2**20 else f"{int(n):,} bytes"


def check_file_size(path: str | os.PathLike, *, text: bool) -> None:
    """Refuse a capture file larger than its format's byte ceiling (from os.stat, nothing read)."""
    size = os.stat(path).st_size
    limit = MAX_CSV_BYTES if text else MAX_BINARY_BYTES
    if size > limit:
        raise CaptureTooLargeError(
            f"{path}: the file is {_fmt_bytes(size)}, above the ceiling of {_fmt_bytes(limit)} for a "
            f"{'CSV' if text else 'binary'} capture (at most {MAX_CAPTURE_SAMPLES:,} samples); a capture file "
            "holds one record of one path: split the file into one capture per record."
        )


def check_samples(where: str, name: str, shape: Any, itemsize: int = 8) -> int:
    """Refuse a declared array ``shape`` above :data:`MAX_CAPTURE_SAMPLES` elements; return the count.

    ``itemsize`` above 16 bytes (no numeric sample needs more) is refused as well.
    """
    dims = tuple(int(d) for d in shape) if shape is not None else ()
    count = math.prod(dims)
    if count > MAX_CAPTURE_SAMPLES or any(d < 0 for d in dims):
        raise CaptureTooLargeError(
            f"{where}: {name!r} declares {count:,} samples (shape {dims}), above the ceiling of "
            f"{MAX_CAPTURE_SAMPLES:,} samples per capture; nothing was read. Store one record of at most "
            f"{MAX_CAPTURE_SAMPLES:,} samples per file."
        )
    if itemsize > 16:
        raise CaptureTooLargeError(
            f"{where}: {name!r} declares {itemsize}-byte elements; samples are numbers of at most 16 bytes "
            "(float64 or an integer type). Store the samples as float64."
        )
    return count


def check_metadata_size(where: str, name: str, n_elements: int) -> None:
    """Refuse a metadata array (text or numbers) declaring more than :data:`MAX_METADATA_CHARS` elements."""
    if n_elements > MAX_METADATA_CHARS:
        raise InvalidFieldError(
            f"{where}: metadata {name!r} declares {n_elements:,} elements (characters or values), above the "
            f"ceiling of {MAX_METADATA_CHARS:,}; nothing was read. A metadata value is one number or one "
            "line of text: shorten it or leave it out."
        )


def check_metadata_count(where: str, n_fields: int) -> None:
    """Refuse a capture with more than :data:`MAX_METADATA_FIELDS` metadata keys or variables."""
    if n_fields > MAX_METADATA_FIELDS:
        raise InvalidFieldError(
            f"{where}: the file holds {n_fields:,} metadata fields, above the ceiling of "
            f"{MAX_METADATA_FIELDS}; a capture documents 9 keys (docs/capture-format.md). Drop the others."
        )


def check_metadata_value(where: str, key: str, value: Any) -> None:
    """Refuse a metadata value (text, bytes or array) longer than :data:`MAX_METADATA_CHARS`."""
    if isinstance(value, (str, bytes, np.str_, np.bytes_)):
        size = len(value)
    elif isinstance(value, np.ndarray):
        size = int(value.size)
    else:
        return
    if size > MAX_METADATA_CHARS:
        raise InvalidFieldError(
            f"{where}: metadata {key!r} holds {size:,} characters or values, above the ceiling of "
            f"{MAX_METADATA_CHARS:,}; a metadata value is one number or one line of text. Shorten it or "
            "leave it out."
        )
