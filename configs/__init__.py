"""Bundled configuration files, shipped as package data of ``waneguide.configs``.

``families/*.toml`` (stiffener families; the ``demo_*`` ones describe the invented Lowmoor
test rig) and ``materials/*.toml`` (example user material). Find them with
:func:`waneguide.configs.config_path`, which works from a source tree and from an installed wheel.
"""
from __future__ import annotations

from importlib.resources import files
from pathlib import Path

from waneguide.core.errors import MissingInputError

__all__ = ["config_path"]


def config_path(*parts: str) -> Path:
    """Path of a bundled configuration file, e.g. ``config_path("families", "demo_fb2.toml")``."""
    root = Path(str(files(__name__)))
    p = root.joinpath(*parts)
    if not p.exists():
        bundled = sorted(q.relative_to(root).as_posix() for q in root.rglob("*.toml"))
        raise MissingInputError(f"no bundled configuration file {'/'.join(parts)!r}; bundled: {bundled}")
    return p
