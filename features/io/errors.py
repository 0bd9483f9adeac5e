"""Named errors of the capture readers.

Every error is a :class:`waneguide.core.errors.InputError` (so also a ``ValueError``, and
the CLI turns it into one line on stderr) and names the file, the field or line at fault,
the rule, what was received and what is accepted. Tests and callers can catch the
specific class. A capture file that does not exist raises
:class:`waneguide.core.errors.MissingInputError` instead.
"""
from __future__ import annotations

from waneguide.core.errors import InputError

__all__ = [
    "CaptureFileError",
    "UnsupportedFormatError",
    "CorruptFileError",
    "MissingFieldError",
    "InvalidFieldError",
    "UnknownUnitsError",
    "TimeAxisError",
    "EmptyDataError",
    "CaptureTooLargeError",
]


class CaptureFileError(InputError):
    """Base class: a capture file that cannot be read as documented in docs/capture-format.md."""

    code = "capture_file_error"


class UnsupportedFormatError(CaptureFileError):
    """The file suffix is not one of .csv, .mat, .h5, .hdf5, .npz."""

    code = "unsupported_format"


class CorruptFileError(CaptureFileError):
    """The container itself cannot be parsed (not a MAT/HDF5/NPZ file, broken CSV)."""

    code = "corrupt_file"


class MissingFieldError(CaptureFileError):
    """A required metadata key or data array is absent."""

    code = "missing_field"


class InvalidFieldError(CaptureFileError):
    """A metadata value has the wrong type or lies outside its accepted range."""

    code = "invalid_field"


class UnknownUnitsError(CaptureFileError):
    """``units`` is not V, mV or counts, or counts come without ``counts_scale_v``."""

    code = "unknown_units"


class TimeAxisError(CaptureFileError):
    """The time column is not uniformly sampled or disagrees with the header."""

    code = "time_axis"


class EmptyDataError(CaptureFileError):
    """The file holds no samples, or the amplitude is not a 1-D numeric array."""

    code = "empty_data"


class CaptureTooLargeError(CaptureFileError):
    """The file, or an array it declares, is above a reader's ceiling (features.io._bounds)."""

    code = "too_large"
