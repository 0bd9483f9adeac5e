"""CSV captures: ``# key = value`` header lines, then columns ``time_s,amplitude``.

Example::

    # path_id = P01
    # captured_at = 2026-03-01T10:15:00Z
    # temperature_c = 21.5
    # sample_rate_hz = 10000000
    # pretrigger_s = 2e-05
    # units = V
    time_s,amplitude
    -2e-05,0.00012
    ...

``sample_rate_hz`` and ``pretrigger_s`` may be left out of the header: they are then
taken from the time column. When given they must agree with it (within 1 % of a
sample period).

Each sample line holds exactly two complete numbers; a line with anything else (a trailing
``#`` comment, units, a digitiser code such as ``ERR``) is refused with the file, its
1-based line number and the offending text, never read in part.
"""
from __future__ import annotations

import io
import math
import os
import re
from array import array
from pathlib import Path
from typing import Iterator

import numpy as np

from waneguide.core.atomic import atomic_write_text
from waneguide.features.capture import Capture
from waneguide.features.io import _bounds
from waneguide.features.io._meta import capture_from_fields, fields_from_capture
from waneguide.features.io.errors import CaptureTooLargeError, CorruptFileError, EmptyDataError
from waneguide.features.io.errors import InvalidFieldError, MissingFieldError, TimeAxisError

__all__ = ["read_csv_capture", "write_csv_capture"]

COLUMNS = ("time_s", "amplitude")


def _numbered_lines(fh, where: str) -> Iterator[tuple[int, str]]:
    """(1-based line number, text) of a binary file object, as an editor numbers the lines.

    Split at LF only, a trailing CR dropped; each line decoded as UTF-8 and at most
    :data:`~waneguide.features.io._bounds.MAX_LINE_BYTES` long (read with a bounded readline,
    so a file without line breaks is never read whole).
    """
    limit = _bounds.MAX_LINE_BYTES
    offset = 0
    no = 0
    while True:
        raw = fh.readline(limit + 1)
        if not raw:
            return
        no += 1
        if len(raw) > limit:
            raise CaptureTooLargeError(
                f"{where}: line {no} is longer than {limit:,} bytes (a sample line holds two numbers, a header "
                f"line one `# key = value`); nothing after it was read. Break the file into lines."
            )
        try:
            text = raw.decode("utf-8")
        except UnicodeDecodeError as exc:
            raise CorruptFileError(
                f"{where}: line {no}: not UTF-8 text (byte {offset + exc.start} of the file cannot be decoded); a CSV "
                "capture is plain UTF-8 text. Export the capture as text, or use .mat, .h5 or .npz."
            ) from None
        offset += len(raw)
        if text.endswith("\n"):
            text = text[:-1]
        if text.endswith("\r"):
            text = text[:-1]
        yield no, text


def _parse_header(lines: Iterator[tuple[int, str]], where: str) -> tuple[dict[str, str], tuple[int, str] | None]:
    """The ``# key = value`` lines, and the first other non-blank line (None at the end of the file)."""
    meta: dict[str, str] = {}
    for no, raw in lines:
        line = raw.strip()
        if not line:
            continue
        if not line.startswith("#"):
            return meta, (no, raw)
        body = line[1:].strip()
        if not body:
            continue
        if "=" not in body:
            raise InvalidFieldError(
                f"{where}: line {no}: header lines must read `# key = value`; got {line!r}. "
                "Write it as, e.g., `# path_id = P01`, or drop the `#` line."
            )
        key, value = (s.strip() for s in body.split("=", 1))
        if not key.replace("_", "").isalnum():
            raise InvalidFieldError(
                f"{where}: line {no}: header key {key!r} must be a plain name (letters, digits, `_`); "
                f"got it in {line!r}. Rename the key, e.g. `# temperature_c = 21.5`."
            )
        if len(value) >= 2 and value[0] == value[-1] and value[0] in "\"'":
            value = value[1:-1]
        if key in meta:
            raise InvalidFieldError(
                f"{where}: line {no}: header key {key!r} is given twice (each key once); got {line!r}. "
                "Keep one of the two lines."
            )
        _bounds.check_metadata_value(f"{where}: line {no}", key, value)
        meta[key] = value
        _bounds.check_metadata_count(where, len(meta))
    return meta, None


#: A complete number as a CSV field: decimal with optional exponent, or nan / inf (read, then
#: flagged by the quality gate). Anything else (units, comments, digitiser codes) is refused.
_NUMBER = re.compile(r"[+-]?(?:(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?|nan|inf|infinity)", re.IGNORECASE)
_ACCEPTED = ("accepted: two complete numbers per line, `time_s,amplitude`, each a decimal number with an "
             "optional exponent (-2e-05, 0.00012, 12) or nan / inf; nothing else on the line (no comments, "
             "units or digitiser codes)")


def _parse_rows(lines: Iterator[tuple[int, str]], where: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(time_s, amplitude, 1-based file line of each sample) from the remaining (data) lines.

    Blank lines are skipped; every other line must be exactly two complete numbers. More than
    :data:`~waneguide.features.io._bounds.MAX_CAPTURE_SAMPLES` sample lines are refused at the
    first line past the ceiling (8 bytes per number are held, nothing else).
    """
    limit = _bounds.MAX_CAPTURE_SAMPLES
    times, amps, line_no = array("d"), array("d"), array("q")
    for no, raw in lines:
        if not raw.strip():
            continue
        fields = raw.split(",")
        where_line = f"{where}: line {no}"
        if len(fields) != 2:
            raise CorruptFileError(
                f"{where_line}: a sample line must hold 2 comma-separated fields (time_s,amplitude); got "
                f"{len(fields)} in {raw!r}; {_ACCEPTED}."
            )
        values = []
        for name, field in zip(COLUMNS, fields):
            text = field.strip()
            if not _NUMBER.fullmatch(text):
                raise CorruptFileError(
                    f"{where_line}: the {name} field {text!r} is not a complete number (line {raw!r}); "
                    f"{_ACCEPTED}. Correct or remove that line."
                )
            values.append(float(text))
        if len(times) >= limit:
            raise CaptureTooLargeError(
                f"{where_line}: more than {limit:,} sample lines, the ceiling of samples per capture; the rest "
                f"of the file was not read. Store one record of at most {limit:,} samples per file."
            )
        times.append(values[0])
        amps.append(values[1])
        line_no.append(no)
    return (np.frombuffer(times, dtype=float), np.frombuffer(amps, dtype=float),
            np.frombuffer(line_no, dtype=np.int64))


def read_csv_capture(path: str | os.PathLike) -> Capture:
    """Read one CSV capture (see module docstring); amplitudes converted to volts.

    The file is streamed line by line, within the ceilings of :mod:`features.io._bounds`
    (file bytes, line length, sample lines, metadata). Every error names the file, the
    1-based line of the file, the offending text and what is accepted.
    """
    where = str(path)
    _bounds.check_file_size(path, text=True)
    with open(path, "rb") as fh:
        lines = _numbered_lines(fh, where)
        meta, column_line = _parse_header(lines, where)
        if column_line is None:
            raise EmptyDataError(
                f"{where}: no column header and no samples after the `#` header lines; expected the line "
                "`time_s,amplitude` and then one sample per line."
            )
        start, column_text = column_line
        header = [c.strip() for c in column_text.split(",")]
        if tuple(header) != COLUMNS:
            missing = [c for c in COLUMNS if c not in header]
            raise MissingFieldError(
                f"{where}: line {start}: the column header must be exactly `time_s,amplitude`; got "
                f"{column_text.strip()!r}" + (f" (missing {', '.join(missing)})." if missing else ".")
            )
        t, a, line_no = _parse_rows(lines, where)
    if t.size == 0:
        raise EmptyDataError(f"{where}: the file has a column header (line {start}) but no samples after it.")
    if t.size < 2:
        raise EmptyDataError(f"{where}: need at least 2 samples; got {t.size} (line {line_no[0]}).")
    with np.errstate(all="ignore"):  # differences of huge finite times overflow to inf: refused below
        _check_time_axis(t, line_no, meta, where)
    return capture_from_fields(a, meta, where=where)


def _check_time_axis(t: np.ndarray, line_no: np.ndarray, meta: dict[str, str], where: str) -> None:
    """Uniform, finite time column that agrees with the header; fills in a missing rate and pre-trigger."""
    bad_t = np.flatnonzero(~np.isfinite(t))
    if bad_t.size:
        j = int(bad_t[0])
        raise TimeAxisError(
            f"{where}: line {line_no[j]}: time_s must be a finite number; got {t[j]!r} "
            f"({bad_t.size} such line(s)). Give the time of every sample in seconds."
        )
    dt = np.diff(t)
    step = float(np.median(dt))
    off = ~(np.abs(dt - step) <= 1e-3 * step)
    if not step > 0 or not math.isfinite(step) or off.any():
        j = int(np.flatnonzero(off)[0]) if off.any() else 0
        raise TimeAxisError(
            f"{where}: line {line_no[j + 1]}: time_s must increase in equal steps (uniform sampling, within "
            f"0.1 % of a step); the step from line {line_no[j]} to line {line_no[j + 1]} is {dt[j]:.6g} s against "
            f"the median step {step:.6g} s (steps range from {dt.min():.6g} to {dt.max():.6g} s)."
        )
    # a fit over the whole axis is more precise than one step
    fs_axis = (t.size - 1) / (t[-1] - t[0])
    if "sample_rate_hz" in meta:
        try:
            fs = float(meta["sample_rate_hz"])
        except ValueError:
            raise InvalidFieldError(
                f"{where}: sample_rate_hz must be a number of Hz; got {meta['sample_rate_hz']!r}. "
                "Write it as `# sample_rate_hz = 10e6`."
            ) from None
        if fs > 0 and abs(fs - fs_axis) > 1e-2 * fs / t.size:
            raise TimeAxisError(
                f"{where}: header sample_rate_hz = {fs:g} disagrees with the time column "
                f"({fs_axis:.9g} Hz). Fix one of them."
            )
    else:
        meta["sample_rate_hz"] = repr(float(fs_axis))
        fs = fs_axis
    if "pretrigger_s" in meta:
        try:
            pre = float(meta["pretrigger_s"])
        except ValueError:
            raise InvalidFieldError(
                f"{where}: pretrigger_s must be a number of seconds; got {meta['pretrigger_s']!r}. "
                "Write it as `# pretrigger_s = 2e-05`."
            ) from None
        if fs > 0 and not abs(t[0] + pre) <= 1e-2 / fs:
            raise TimeAxisError(
                f"{where}: line {line_no[0]}: header pretrigger_s = {pre:g} disagrees with the first "
                f"time_s = {t[0]:g} (the first sample must be at -pretrigger_s). Fix one of them."
            )
    else:
        meta["pretrigger_s"] = repr(float(-t[0]))


def _fmt(value) -> str:
    if isinstance(value, float):
        return repr(value)
    return str(value)


def write_csv_capture(capture: Capture, path: str | os.PathLike) -> Path:
    """Write ``capture`` as CSV (atomically), amplitudes in ``capture.units``."""
    stored, meta = fields_from_capture(capture, where=str(path))
    out = io.StringIO()
    for key, value in meta.items():
        text = _fmt(value)
        if "\n" in text:
            raise InvalidFieldError(f"{path}: metadata {key!r} must be one line for a CSV header.")
        out.write(f"# {key} = {text}\n")
    out.write(",".join(COLUMNS) + "\n")
    t = capture.time_s
    if capture.units == "counts":
        rows = (f"{ti!r},{int(ai)}\n" for ti, ai in zip(t.tolist(), stored.tolist()))
    else:
        rows = (f"{ti!r},{ai!r}\n" for ti, ai in zip(t.tolist(), stored.tolist()))
    out.writelines(rows)
    return atomic_write_text(path, out.getvalue())
