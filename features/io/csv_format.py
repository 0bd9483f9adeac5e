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
import os
import re
from pathlib import Path

import numpy as np

from waneguide.core.atomic import atomic_write_text
from waneguide.features.capture import Capture
from waneguide.features.io._meta import capture_from_fields, fields_from_capture
from waneguide.features.io.errors import CorruptFileError, EmptyDataError, InvalidFieldError, MissingFieldError, TimeAxisError

__all__ = ["read_csv_capture", "write_csv_capture"]

COLUMNS = ("time_s", "amplitude")


def _parse_header(lines: list[str], where: str) -> tuple[dict[str, str], int]:
    meta: dict[str, str] = {}
    i = 0
    for i, raw in enumerate(lines):
        line = raw.strip()
        if not line:
            continue
        if not line.startswith("#"):
            return meta, i
        body = line[1:].strip()
        if not body:
            continue
        if "=" not in body:
            raise InvalidFieldError(
                f"{where}: line {i + 1}: header lines must read `# key = value`; got {line!r}. "
                "Write it as, e.g., `# path_id = P01`, or drop the `#` line."
            )
        key, value = (s.strip() for s in body.split("=", 1))
        if not key.replace("_", "").isalnum():
            raise InvalidFieldError(
                f"{where}: line {i + 1}: header key {key!r} must be a plain name (letters, digits, `_`); "
                f"got it in {line!r}. Rename the key, e.g. `# temperature_c = 21.5`."
            )
        if len(value) >= 2 and value[0] == value[-1] and value[0] in "\"'":
            value = value[1:-1]
        if key in meta:
            raise InvalidFieldError(
                f"{where}: line {i + 1}: header key {key!r} is given twice (each key once); got {line!r}. "
                "Keep one of the two lines."
            )
        meta[key] = value
    return meta, len(lines)


#: A complete number as a CSV field: decimal with optional exponent, or nan / inf (read, then
#: flagged by the quality gate). Anything else (units, comments, digitiser codes) is refused.
_NUMBER = re.compile(r"[+-]?(?:(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?|nan|inf|infinity)", re.IGNORECASE)
_ACCEPTED = ("accepted: two complete numbers per line, `time_s,amplitude`, each a decimal number with an "
             "optional exponent (-2e-05, 0.00012, 12) or nan / inf; nothing else on the line (no comments, "
             "units or digitiser codes)")


def _parse_rows(lines: list[str], first: int, where: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(time_s, amplitude, 1-based file line of each sample) from the data lines ``lines[first:]``.

    Blank lines are skipped; every other line must be exactly two complete numbers.
    """
    times: list[float] = []
    amps: list[float] = []
    line_no: list[int] = []
    for i in range(first, len(lines)):
        raw = lines[i]
        if not raw.strip():
            continue
        fields = raw.split(",")
        where_line = f"{where}: line {i + 1}"
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
        times.append(values[0])
        amps.append(values[1])
        line_no.append(i + 1)
    return np.array(times, dtype=float), np.array(amps, dtype=float), np.array(line_no, dtype=int)


def _split_lines(text: str) -> list[str]:
    """Lines as an editor numbers them: split at LF only, a trailing CR dropped."""
    lines = text.split("\n")
    if lines and lines[-1] == "":
        lines.pop()
    return [ln[:-1] if ln.endswith("\r") else ln for ln in lines]


def read_csv_capture(path: str | os.PathLike) -> Capture:
    """Read one CSV capture (see module docstring); amplitudes converted to volts.

    Every error names the file, the 1-based line of the file, the offending text and what is accepted.
    """
    where = str(path)
    try:
        text = Path(path).read_text(encoding="utf-8")
    except UnicodeDecodeError as exc:
        raise CorruptFileError(
            f"{where}: not a UTF-8 text file (byte {exc.start} cannot be decoded); a CSV capture is plain "
            "UTF-8 text. Export the capture as text, or use .mat, .h5 or .npz."
        ) from None
    lines = _split_lines(text)
    meta, start = _parse_header(lines, where)
    if start >= len(lines):
        raise EmptyDataError(
            f"{where}: no column header and no samples after the `#` header lines; expected the line "
            "`time_s,amplitude` and then one sample per line."
        )
    header = [c.strip() for c in lines[start].split(",")]
    if tuple(header) != COLUMNS:
        missing = [c for c in COLUMNS if c not in header]
        raise MissingFieldError(
            f"{where}: line {start + 1}: the column header must be exactly `time_s,amplitude`; got "
            f"{lines[start].strip()!r}" + (f" (missing {', '.join(missing)})." if missing else ".")
        )
    t, a, line_no = _parse_rows(lines, start + 1, where)
    if t.size == 0:
        raise EmptyDataError(f"{where}: the file has a column header (line {start + 1}) but no samples after it.")
    if t.size < 2:
        raise EmptyDataError(f"{where}: need at least 2 samples; got {t.size} (line {line_no[0]}).")
    bad_t = np.flatnonzero(~np.isfinite(t))
    if bad_t.size:
        j = int(bad_t[0])
        raise TimeAxisError(
            f"{where}: line {line_no[j]}: time_s must be a finite number; got {t[j]!r} "
            f"({bad_t.size} such line(s)). Give the time of every sample in seconds."
        )
    dt = np.diff(t)
    step = float(np.median(dt))
    off = np.abs(dt - step) > 1e-3 * step
    if step <= 0 or off.any():
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
        if fs > 0 and abs(t[0] + pre) > 1e-2 / fs:
            raise TimeAxisError(
                f"{where}: line {line_no[0]}: header pretrigger_s = {pre:g} disagrees with the first "
                f"time_s = {t[0]:g} (the first sample must be at -pretrigger_s). Fix one of them."
            )
    else:
        meta["pretrigger_s"] = repr(float(-t[0]))
    return capture_from_fields(a, meta, where=where)


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
