"""Hands-on thickness readings (the audit's ground truth) from CSV.

File format: one header line, then one reading per line::

    path_id,date,position_mm,remaining_thickness_mm,method,uncertainty_mm
    P01,2024-03-14,150,1.84,UT gauge,0.02

``path_id``
    The pitch-catch path the reading was taken on (as in the captures).
``date``
    ISO 8601 date or date-time (``2024-03-14`` or ``2024-03-14T09:30``); a time zone
    may be given, otherwise UTC is assumed.
``position_mm``
    Position along the path, measured from the transmitter [mm], ``>= 0``.
``remaining_thickness_mm``
    Remaining wall thickness at that position [mm], ``> 0``.
``method``
    How it was measured (free text, e.g. ``UT gauge``, ``caliper``); must not be empty.
``uncertainty_mm`` (optional column, optional value)
    Standard uncertainty of the reading [mm], ``>= 0``; blank means unknown.

Errors name the file, the CSV line (the header is line 1), the column, the value
received and the rule.
"""
from __future__ import annotations

import math
from datetime import datetime
from pathlib import Path

import pandas as pd

from waneguide.core.atomic import atomic_path
from waneguide.core.errors import InputError
from waneguide.core.settings import FUTURE_TOLERANCE_S

__all__ = ["READING_COLUMNS", "REQUIRED_READING_COLUMNS", "read_readings", "write_readings"]

REQUIRED_READING_COLUMNS = ("path_id", "date", "position_mm", "remaining_thickness_mm", "method")
READING_COLUMNS = REQUIRED_READING_COLUMNS + ("uncertainty_mm",)


def _bad(path, line: int, column: str, value, rule: str) -> ValueError:
    return ValueError(f"{path}: line {line}, column {column}: {rule}; got {value!r}.")


def read_readings(path: str | Path):
    """Read and validate a hands-on readings CSV.

    Returns
    -------
    DataFrame
        Columns :data:`READING_COLUMNS` plus ``line`` (CSV line number) and ``reading_id``
        (0-based), with ``date`` as timezone-aware UTC timestamps, lengths as floats [mm]
        and a missing uncertainty as NaN. Extra columns are kept after these.

    Raises
    ------
    ValueError
        Missing file or column, empty file, or a bad value (naming file, line and column).
    """

    p = Path(path)
    if not p.is_file():
        raise InputError(f"readings file {str(p)!r} does not exist. Give the CSV of hands-on readings.")
    try:
        raw = pd.read_csv(p, dtype=str, keep_default_na=False, skipinitialspace=True, comment=None)
    except pd.errors.EmptyDataError:
        raise InputError(f"{p}: the readings file is empty; expected a header line "
                         f"{','.join(READING_COLUMNS)} and one reading per line.") from None
    except pd.errors.ParserError as exc:
        raise InputError(f"{p}: not a readable CSV file ({exc}).") from None
    raw.columns = [str(c).strip() for c in raw.columns]
    missing = [c for c in REQUIRED_READING_COLUMNS if c not in raw.columns]
    if missing:
        raise InputError(
            f"{p}: missing column(s) {', '.join(missing)}; the header must name "
            f"{', '.join(REQUIRED_READING_COLUMNS)} (and optionally uncertainty_mm); got {list(raw.columns)}."
        )
    if raw.empty:
        raise InputError(f"{p}: no readings below the header line.")
    raw = raw.apply(lambda s: s.str.strip())
    n = len(raw)
    lines = list(range(2, n + 2))

    path_ids, methods, dates, pos, thick, unc = [], [], [], [], [], []
    for i, line in enumerate(lines):
        row = raw.iloc[i]
        pid = row["path_id"]
        if not pid:
            raise _bad(p, line, "path_id", pid, "must name the path the reading was taken on")
        path_ids.append(pid)
        method = row["method"]
        if not method:
            raise _bad(p, line, "method", method, "must say how the reading was taken (e.g. UT gauge)")
        methods.append(method)
        try:
            # strict ISO 8601: pd.Timestamp alone reads '2nd of March' as year 1 and 03/02/2024 as March 2
            ts = pd.Timestamp(datetime.fromisoformat(str(row["date"]).strip().replace("Z", "+00:00")))
            if pd.isna(ts):
                raise ValueError
        except (ValueError, TypeError):
            raise _bad(p, line, "date", row["date"], "must be an ISO 8601 date such as 2024-03-14") from None
        ts = ts.tz_localize("UTC") if ts.tzinfo is None else ts.tz_convert("UTC")
        if ts > pd.Timestamp.now(tz="UTC") + pd.Timedelta(seconds=FUTURE_TOLERANCE_S):
            raise _bad(p, line, "date", row["date"], "lies in the future (more than a day after now); check the "
                       "date and the reading device's clock")
        dates.append(ts)
        pos.append(_number(p, line, "position_mm", row["position_mm"], allow_zero=True))
        thick.append(_number(p, line, "remaining_thickness_mm", row["remaining_thickness_mm"], allow_zero=False))
        if "uncertainty_mm" in raw.columns and row["uncertainty_mm"] != "":
            unc.append(_number(p, line, "uncertainty_mm", row["uncertainty_mm"], allow_zero=True))
        else:
            unc.append(float("nan"))

    out = pd.DataFrame({
        "path_id": path_ids,
        "date": pd.DatetimeIndex(dates),
        "position_mm": pos,
        "remaining_thickness_mm": thick,
        "method": methods,
        "uncertainty_mm": unc,
        "line": lines,
    })
    for extra in raw.columns:
        if extra not in out.columns:
            out[extra] = raw[extra].to_numpy()
    out.insert(0, "reading_id", range(n))
    return out


def _number(path, line: int, column: str, text: str, *, allow_zero: bool) -> float:
    rule = "must be a number >= 0 [mm]" if allow_zero else "must be a positive number [mm]"
    try:
        v = float(text)
    except (TypeError, ValueError):
        raise _bad(path, line, column, text, rule) from None
    if not math.isfinite(v) or v < 0 or (v == 0 and not allow_zero):
        raise _bad(path, line, column, text, rule)
    return v


def write_readings(readings, path: str | Path) -> Path:
    """Write readings (a DataFrame with :data:`READING_COLUMNS`) as CSV, atomically."""

    df = readings[list(READING_COLUMNS)].copy()
    df["date"] = [d.isoformat() if hasattr(d, "isoformat") else str(d) for d in df["date"]]
    with atomic_path(path) as tmp:
        df.to_csv(tmp, index=False, lineterminator="\n")
    return Path(path)
