"""Validation helpers shared by the physics code.

One helper per recurring argument, so that every public function words its
errors the same way: what is wrong, the rule, the value received, and a fix.
"""
from __future__ import annotations

import math
from typing import Any

import numpy as np

from .errors import InputError

__all__ = [
    "validate_positive_scalar",
    "validate_positive_array",
    "validate_finite_array",
    "validate_sample_rate_hz",
]


def _describe(value: Any) -> str:
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        return repr(value)
    if arr.ndim == 0:
        return repr(float(arr))
    bad = arr[~np.isfinite(arr) | (arr <= 0)]
    if bad.size:
        return f"an array containing {bad.flat[0]!r}"
    return f"an array of shape {arr.shape}"


def validate_positive_scalar(value: Any, name: str, *, unit: str = "", hint: str = "") -> float:
    """Return ``value`` as a float, refusing NaN, inf, zero and negatives.

    Raises
    ------
    InputError
        Naming ``name``, the rule, the value received and ``hint``.
    """
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise InputError(
            f"{name} must be a positive number{_unit(unit)}; got {value!r}.{_hint(hint)}"
        ) from None
    if not math.isfinite(out) or out <= 0.0:
        raise InputError(
            f"{name} must be a positive finite number{_unit(unit)}; got {out!r}.{_hint(hint)}"
        )
    return out


def validate_positive_array(value: Any, name: str, *, unit: str = "", hint: str = "") -> np.ndarray:
    """Return a 1-D float array whose entries are all positive and finite."""
    arr = np.atleast_1d(np.asarray(value, dtype=float))
    if arr.ndim != 1 or arr.size == 0:
        raise InputError(
            f"{name} must be a non-empty scalar or 1-D array{_unit(unit)}; "
            f"got shape {arr.shape}.{_hint(hint)}"
        )
    if not np.all(np.isfinite(arr)) or np.any(arr <= 0):
        raise InputError(
            f"{name} must contain only positive finite values{_unit(unit)}; "
            f"got {_describe(arr)}.{_hint(hint)}"
        )
    return arr


def validate_finite_array(value: Any, name: str, *, ndim: int | None = None) -> np.ndarray:
    """Return a float array with no NaN or inf, optionally of a given ndim."""
    arr = np.asarray(value, dtype=float)
    if ndim is not None and arr.ndim != ndim:
        raise InputError(f"{name} must be {ndim}-D; got shape {arr.shape}.")
    if not np.all(np.isfinite(arr)):
        raise InputError(f"{name} must not contain NaN or inf values.")
    return arr


def validate_sample_rate_hz(fs: Any) -> float:
    """Sample rate in Hz, positive and finite."""
    return validate_positive_scalar(
        fs,
        "sample_rate_hz",
        unit=" in Hz",
        hint=" Set it in the capture header (`# sample_rate_hz = 10e6`).",
    )


def _unit(unit: str) -> str:
    return f" ({unit.strip()})" if unit else ""


def _hint(hint: str) -> str:
    return f" {hint.strip()}" if hint else ""
