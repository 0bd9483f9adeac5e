"""The metadata set shared by every capture format, and the unit coders.

Keys (see docs/capture-format.md): ``path_id`` (required), ``captured_at`` (ISO 8601),
``temperature_c``, ``sample_rate_hz`` (required), ``pretrigger_s`` (default 0),
``excitation_khz``, ``cycles``, ``units`` (``V``, ``mV`` or ``counts``; default ``V``) and
``counts_scale_v`` (volts per count, required with ``units = counts``). Any other key
is kept verbatim in ``Capture.extra``.

The coders :func:`to_volts` and :func:`from_volts` are the only place where stored
amplitudes become volts and back; readers and writers call nothing else.
"""
from __future__ import annotations

import math
from datetime import datetime
from typing import Any, Mapping

import numpy as np

from waneguide.features.capture import CAPTURE_METADATA_KEYS, Capture
from waneguide.features.io._bounds import check_metadata_count, check_metadata_value
from waneguide.features.io.errors import EmptyDataError, InvalidFieldError, MissingFieldError, UnknownUnitsError

__all__ = ["UNITS", "to_volts", "from_volts", "capture_from_fields", "fields_from_capture"]

#: Accepted amplitude units and their factor to volts (counts use ``counts_scale_v``).
UNITS = {"V": 1.0, "mV": 1e-3, "counts": None}

_FLOAT_KEYS = ("temperature_c", "sample_rate_hz", "pretrigger_s", "excitation_khz", "cycles", "counts_scale_v")
_REQUIRED = ("path_id", "sample_rate_hz")
#: An accepted value of each numeric key, quoted in error messages.
_EXAMPLES = {"temperature_c": "21.5", "sample_rate_hz": "10e6", "pretrigger_s": "2e-05", "excitation_khz": "150",
             "cycles": "5", "counts_scale_v": "3.0e-5"}


def _units_factor(units: str, counts_scale_v: float | None, where: str) -> float:
    if units not in UNITS:
        raise UnknownUnitsError(
            f"{where}: units must be one of V, mV, counts; got {units!r}. "
            "Set it in the header (`# units = V`)."
        )
    if units == "counts":
        if counts_scale_v is None:
            raise UnknownUnitsError(
                f"{where}: units = counts needs counts_scale_v (volts per count); it is missing. "
                "Add `# counts_scale_v = 3.0e-5` (your digitiser's full scale over its count range)."
            )
        return float(counts_scale_v)
    return float(UNITS[units])


def to_volts(values: Any, units: str, counts_scale_v: float | None = None, *, where: str = "capture") -> np.ndarray:
    """Stored amplitudes in ``units`` -> volts (float64)."""
    return np.asarray(values, dtype=float) * _units_factor(units, counts_scale_v, where)


def from_volts(amplitude_v: Any, units: str, counts_scale_v: float | None = None, *, where: str = "capture") -> np.ndarray:
    """Volts -> stored amplitudes in ``units``; counts are rounded to whole numbers."""
    factor = _units_factor(units, counts_scale_v, where)
    out = np.asarray(amplitude_v, dtype=float) / factor
    if units == "counts":
        out = np.rint(out)
    return out


def _decode(value: bytes, key: str, where: str) -> str:
    try:
        return value.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise InvalidFieldError(
            f"{where}: metadata {key!r} is not UTF-8 text (byte {exc.start} cannot be decoded); store it as "
            "plain text or a number."
        ) from None


def _as_float(value: Any, key: str, where: str) -> float | None:
    if value is None:
        return None
    if isinstance(value, (bytes, np.bytes_)):
        value = _decode(value, key, where)
    if isinstance(value, str):
        text = value.strip()
        if text == "" or text.lower() in ("none", "nan", "null"):
            return None
        try:
            value = float(text)
        except ValueError:
            raise InvalidFieldError(_not_a_number(where, key, value)) from None
    try:
        arr = np.asarray(value, dtype=float).ravel()
    except (TypeError, ValueError):
        raise InvalidFieldError(_not_a_number(where, key, value)) from None
    if arr.size != 1:
        raise InvalidFieldError(
            f"{where}: {key} must be a single number; got {arr.size} values. Store one value "
            f"(e.g. {key} = {_EXAMPLES[key]})."
        )
    out = float(arr[0])
    if math.isnan(out):
        return None
    if not math.isfinite(out):
        raise InvalidFieldError(
            f"{where}: {key} must be a finite number; got {out!r}. Store the real value "
            f"(e.g. {key} = {_EXAMPLES[key]}) or leave the key out."
        )
    return out


def _not_a_number(where: str, key: str, value: Any) -> str:
    return (f"{where}: {key} must be a number; got {value!r}. Accepted: a plain number such as "
            f"{key} = {_EXAMPLES[key]} (no units or text).")


def _as_text(value: Any, key: str, where: str) -> str | None:
    if value is None:
        return None
    if isinstance(value, (bytes, np.bytes_)):
        return _decode(value, key, where)
    if isinstance(value, np.ndarray):
        if value.dtype.kind in "US":
            return str(value.item()) if value.size == 1 else "".join(str(v) for v in value.ravel())
        if value.size == 1:
            value = value.item()
    return str(value)


def capture_from_fields(values: Any, meta: Mapping[str, Any], *, where: str) -> Capture:
    """Build a :class:`Capture` from stored amplitudes and a raw metadata mapping.

    Checks every documented key and converts the amplitudes to volts.
    """
    arr = np.asarray(values)
    if arr.dtype.kind not in "iufb":
        raise EmptyDataError(
            f"{where}: amplitude must be numeric (integers or floats); got dtype {arr.dtype}. "
            "Store the samples as numbers."
        )
    arr = np.squeeze(arr)
    if arr.ndim != 1 or arr.size == 0:
        raise EmptyDataError(
            f"{where}: amplitude must be a non-empty 1-D array of samples; got shape {np.shape(values)}. "
            "Store one capture per file, as a vector."
        )
    meta = dict(meta)
    check_metadata_count(where, len(meta))
    for key, value in meta.items():
        check_metadata_value(where, str(key), value)
    path_id = (_as_text(meta.get("path_id"), "path_id", where) or "").strip()
    for key in _REQUIRED:
        value = path_id if key == "path_id" else meta.get(key)
        if value is None or (isinstance(value, str) and not value.strip()):
            hint = {"path_id": "`# path_id = P01`", "sample_rate_hz": "`# sample_rate_hz = 10e6`"}[key]
            raise MissingFieldError(f"{where}: required metadata {key!r} is missing. Add it ({hint}).")
    nums = {k: _as_float(meta.get(k), k, where) for k in _FLOAT_KEYS}
    fs = nums["sample_rate_hz"]
    if fs is None or fs <= 0:
        raise InvalidFieldError(
            f"{where}: sample_rate_hz must be a positive number of Hz; got {meta.get('sample_rate_hz')!r}. "
            "Give the digitiser's rate, e.g. sample_rate_hz = 10e6."
        )
    pre = nums["pretrigger_s"] if nums["pretrigger_s"] is not None else 0.0
    if pre < 0:
        raise InvalidFieldError(
            f"{where}: pretrigger_s must be >= 0 s (time recorded before the trigger); got {pre!r}. "
            "Give it as a positive number of seconds, e.g. pretrigger_s = 2e-05."
        )
    for key in ("excitation_khz", "cycles", "counts_scale_v"):
        if nums[key] is not None and nums[key] <= 0:
            raise InvalidFieldError(
                f"{where}: {key} must be positive; got {nums[key]!r}. Give the real value "
                f"(e.g. {key} = {_EXAMPLES[key]}) or leave the key out."
            )
    units = _as_text(meta.get("units"), "units", where) or "V"
    units = units.strip()
    amplitude_v = to_volts(arr, units, nums["counts_scale_v"], where=where)
    captured_at = _as_text(meta.get("captured_at"), "captured_at", where)
    if captured_at is not None:
        captured_at = captured_at.strip() or None
    if captured_at is not None:
        try:
            datetime.fromisoformat(captured_at.replace("Z", "+00:00"))
        except ValueError:
            raise InvalidFieldError(
                f"{where}: captured_at must be an ISO 8601 timestamp such as 2026-03-01T10:15:00Z; got {captured_at!r}."
            ) from None
    extra = {k: v for k, v in meta.items() if k not in CAPTURE_METADATA_KEYS}
    return Capture(
        amplitude_v=amplitude_v,
        sample_rate_hz=fs,
        pretrigger_s=pre,
        path_id=path_id,
        captured_at=captured_at,
        temperature_c=nums["temperature_c"],
        excitation_khz=nums["excitation_khz"],
        cycles=nums["cycles"],
        units=units,
        counts_scale_v=nums["counts_scale_v"],
        source=where,
        extra=extra,
    )


def fields_from_capture(capture: Capture, *, where: str = "capture") -> tuple[np.ndarray, dict[str, Any]]:
    """(stored amplitudes in ``capture.units``, metadata dict without None values)."""
    stored = from_volts(capture.amplitude_v, capture.units, capture.counts_scale_v, where=where)
    meta = {k: v for k, v in capture.metadata().items() if v is not None}
    for k, v in capture.extra.items():
        if isinstance(v, (str, int, float, bool, np.integer, np.floating)):
            meta.setdefault(k, v)
    return stored, meta
