"""Atomic file writing: write to a temporary sibling, fsync, then rename over the target.

Readers never see a half-written file, and an interrupted write leaves the old
file (or no file) in place. Every writer in waneguide goes through here.
"""
from __future__ import annotations

import contextlib
import hashlib
import os
import tempfile
from pathlib import Path
from typing import Iterator

from .errors import InputError

__all__ = [
    "atomic_path", "atomic_write_bytes", "atomic_write_text", "check_output_dir", "check_output_path", "file_sha256",
    "current_umask", "make_private_dir_shareable",
]


def _check_parents(target: Path, what: str) -> None:
    """The nearest existing ancestor of ``target`` must be a folder."""
    for parent in target.parents:
        if parent.exists():
            if not parent.is_dir():
                raise InputError(f"{what} {str(target)!r} lies under {str(parent)!r}, which is a file, not a folder; "
                                 "give a path inside a folder.")
            break


def check_output_path(target: str | os.PathLike, what: str = "output file") -> Path:
    """Refuse an output path that cannot become a file: an existing folder, or one under a file.

    Call it before long work so that a bad ``--out`` fails at once; :func:`atomic_path`
    calls it too.

    Raises
    ------
    ValueError
        Naming ``what``, the path and the fix.
    """
    target = Path(target)
    if target.is_dir():
        raise InputError(f"{what} {str(target)!r} is an existing folder; give a file name (e.g. {str(target / 'out')!r}).")
    _check_parents(target, what)
    return target


def check_output_dir(target: str | os.PathLike, what: str = "output folder") -> Path:
    """Refuse an output folder path that is an existing file or lies under a file."""
    target = Path(target)
    if target.exists() and not target.is_dir():
        raise InputError(f"{what} {str(target)!r} is an existing file, not a folder; give a folder path.")
    _check_parents(target, what)
    return target


@contextlib.contextmanager
def atomic_path(target: str | os.PathLike, *, suffix: str | None = None) -> Iterator[Path]:
    """Yield a temporary path next to ``target``; on success rename it onto ``target``.

    The caller writes the temporary file by any means (pandas, h5py, matplotlib).
    On an exception the temporary file is removed and ``target`` is untouched.
    """
    target = check_output_path(target)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(
        prefix=f".{target.name}.", suffix=suffix if suffix is not None else (target.suffix + ".part"),
        dir=target.parent,
    )
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        with open(tmp_path, "rb+") as fh:
            os.fsync(fh.fileno())
        # mkstemp creates 0600; give the file the mode an ordinary open() would (0666 minus the umask)
        os.chmod(tmp_path, 0o666 & ~current_umask())
        os.replace(tmp_path, target)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            tmp_path.unlink()
        raise


def current_umask() -> int:
    """The process umask: from ``/proc/self/status`` on Linux, else by setting and restoring it."""
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError):
        pass
    mask = os.umask(0o022)  # POSIX has no read-only call; restored at once
    os.umask(mask)
    return mask


def make_private_dir_shareable(path: str | os.PathLike) -> Path:
    """Give a folder made by ``tempfile.mkdtemp`` (0700) the mode ``mkdir`` would (0777 minus the umask)."""
    os.chmod(path, 0o777 & ~current_umask())
    return Path(path)


def atomic_write_bytes(target: str | os.PathLike, data: bytes) -> Path:
    """Write ``data`` to ``target`` atomically; returns the target path."""
    with atomic_path(target) as tmp:
        tmp.write_bytes(data)
    return Path(target)


def atomic_write_text(target: str | os.PathLike, text: str, encoding: str = "utf-8") -> Path:
    """Write ``text`` to ``target`` atomically; returns the target path."""
    return atomic_write_bytes(target, text.encode(encoding))


def file_sha256(path: str | os.PathLike) -> str:
    """Hex SHA-256 of a file's bytes, read in 4 MiB blocks (integrity manifests)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 22), b""):
            h.update(block)
    return h.hexdigest()
