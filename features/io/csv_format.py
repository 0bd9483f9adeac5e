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
"""
from __future__ import annotations

import io
import os
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
                f"{where}: line {i + 1}: header lines must read `# key = value`; got {line!r}."
            )
        key, value = (s.strip() for s in body.split("=", 1))
        if not key.replace("_", "").isalnum():
            raise InvalidFieldError(f"{where}: line {i + 1}: header key {key!r} must be a plain name.")
        if len(value) >= 2 and value[0] == value[-1] and value[0] in "\"'":
            value = value[1:-1]
        if key in meta:
            raise InvalidFieldError(f"{where}: line {i + 1}: header key {key!r} is given twice.")
        meta[key] = value
    return meta, len(lines)


def read_csv_capture(path: str | os.PathLike) -> Capture:
    """Read one CSV capture (see module docstring); amplitudes converted to volts."""
    where = str(path)
    try:
        text = Path(path).read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise CorruptFileError(f"{where}: not a UTF-8 text file; a CSV capture is plain text.") from None
    lines = text.splitlines()
    meta, start = _parse_header(lines, where)
    if start >= len(lines):
        raise EmptyDataError(f"{where}: no column header and no samples after the `#` header lines.")
    header = [c.strip() for c in lines[start].split(",")]
    if tuple(header) != COLUMNS:
        missing = [c for c in COLUMNS if c not in header]
        raise MissingFieldError(
            f"{where}: line {start + 1}: the column header must be exactly `time_s,amplitude`; got "
            f"{lines[start].strip()!r}" + (f" (missing {', '.join(missing)})." if missing else ".")
        )
    body = "\n".join(lines[start + 1:])
    if not body.strip():
        raise EmptyDataError(f"{where}: the file has a column header but no samples.")
    try:
        data = np.loadtxt(io.StringIO(body), delimiter=",", dtype=float, ndmin=2)
    except ValueError as exc:
        raise CorruptFileError(f"{where}: samples must be two numbers per line (time_s,amplitude): {exc}.") from None
    if data.shape[1] != 2:
        raise CorruptFileError(f"{where}: expected 2 columns per sample line; got {data.shape[1]}.")
    t, a = data[:, 0], data[:, 1]
    if t.size < 2:
        raise EmptyDataError(f"{where}: need at least 2 samples; got {t.size}.")
    if not np.all(np.isfinite(t)):
        raise TimeAxisError(f"{where}: time_s contains NaN or inf values.")
    dt = np.diff(t)
    step = float(np.median(dt))
    if step <= 0 or np.max(np.abs(dt - step)) > 1e-3 * step:
        raise TimeAxisError(
            f"{where}: time_s must increase in equal steps (uniform sampling); steps range from "
            f"{dt.min():.6g} to {dt.max():.6g} s."
        )
    # a fit over the whole axis is more precise than one step
    fs_axis = (t.size - 1) / (t[-1] - t[0])
    if "sample_rate_hz" in meta:
        try:
            fs = float(meta["sample_rate_hz"])
        except ValueError:
            raise InvalidFieldError(f"{where}: sample_rate_hz must be a number; got {meta['sample_rate_hz']!r}.") from None
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
            raise InvalidFieldError(f"{where}: pretrigger_s must be a number; got {meta['pretrigger_s']!r}.") from None
        if fs > 0 and abs(t[0] + pre) > 1e-2 / fs:
            raise TimeAxisError(
                f"{where}: header pretrigger_s = {pre:g} disagrees with the first time_s = {t[0]:g} "
                "(the first sample must be at -pretrigger_s)."
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
