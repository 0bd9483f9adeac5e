"""The project's one lazy-import mechanism: package attributes loaded on first use (PEP 562).

A package ``__init__`` lists which of its public names live in which submodule; importing the
package then costs only what it imports eagerly, and ``package.name`` imports the submodule the
first time it is asked for. Measured (``python -X importtime``; DEVELOPERS.md, "Imports"): the
feature-extraction and model modules pull in pandas, LightGBM and scikit-learn (about 1-2 s),
which the light commands and the physics functions do not need.

Everywhere else imports sit at module top; the CLI's command modules import the library inside
their ``run`` functions so that ``waneguide --help`` stays fast (the same reason).

Examples
--------
>>> __getattr__, __dir__ = lazy_exports("json", {"loads": "decoder"})  # doctest: +SKIP
"""
from __future__ import annotations

import importlib
from typing import Callable, Mapping

__all__ = ["lazy_exports"]


def lazy_exports(package: str, where: Mapping[str, str], eager: Mapping[str, object] | None = None
                 ) -> tuple[Callable[[str], object], Callable[[], list[str]]]:
    """Module ``__getattr__`` and ``__dir__`` for ``package`` that load ``where[name]`` on first use.

    Parameters
    ----------
    package : str
        The package's ``__name__``.
    where : mapping
        Public name -> submodule (relative to the package, without a leading dot).
    eager : mapping, optional
        The package's ``globals()``; a loaded name is stored there so the lookup happens once.
    """
    table = dict(where)

    def __getattr__(name: str):
        if name not in table:
            raise AttributeError(f"module {package!r} has no attribute {name!r}")
        value = getattr(importlib.import_module(f"{package}.{table[name]}"), name)
        if eager is not None:
            eager[name] = value
        return value

    def __dir__() -> list[str]:
        return sorted(set(table) | set(eager or ()))

    return __getattr__, __dir__
