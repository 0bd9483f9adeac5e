"""Error classes shared by every layer.

Every error that waneguide raises on purpose derives from :class:`WaneguideError`; the CLI
turns exactly these (plus operating-system errors such as a full disk) into one line on stderr
with exit code 2. Anything else is a defect and shows its traceback.

:class:`InputError` is also a :class:`ValueError` and :class:`MissingInputError` also a
:class:`FileNotFoundError`, so library callers may catch the built-in classes.
Messages say what was wrong, the rule, what was received, and the fix, naming the file or field.
"""
from __future__ import annotations

__all__ = ["WaneguideError", "InputError", "MissingInputError", "StorageError"]


class WaneguideError(Exception):
    """Base class of the errors waneguide raises on purpose."""


class InputError(WaneguideError, ValueError):
    """Bad input: a file, field, option or value that breaks a documented rule."""


class MissingInputError(WaneguideError, FileNotFoundError):
    """A file or folder named as input does not exist."""


class StorageError(WaneguideError, OSError):
    """A store could not take a write (disk or database full, read-only); nothing stored was lost."""
