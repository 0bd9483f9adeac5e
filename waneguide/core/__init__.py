"""waneguide.core: what every layer may import.

:mod:`~waneguide.core.caution`
    :data:`CAUTION`, the safety wording every estimate carries.
:mod:`~waneguide.core.errors`
    :class:`WaneguideError` (base of every error the tool raises on purpose),
    :class:`InputError` (bad input: a file, field or value; also a ``ValueError``),
    :class:`MissingInputError` (a named input does not exist; also a ``FileNotFoundError``).
:mod:`~waneguide.core.atomic`
    atomic writes, file hashes, output-path checks.
:mod:`~waneguide.core.validation`
    validation helpers for recurring arguments (positive scalars and arrays, sample rates).
:mod:`~waneguide.core.settings`
    offline defaults (telemetry off) and the default locations of stores.
"""
from __future__ import annotations

from waneguide.core.caution import CAUTION
from waneguide.core.errors import InputError, MissingInputError, WaneguideError

__all__ = ["CAUTION", "WaneguideError", "InputError", "MissingInputError"]
