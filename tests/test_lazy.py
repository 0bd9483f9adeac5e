"""The one lazy-import mechanism (:mod:`waneguide.core.lazy`): PEP 562 module ``__getattr__``."""
from __future__ import annotations

import subprocess
import sys

import pytest

from waneguide.core.lazy import lazy_exports


def test_name_loads_from_its_submodule_once():
    # PEP 562: a module-level __getattr__ is called only for names not found in the module
    store: dict = {}
    get, listing = lazy_exports("email", {"Parser": "parser"}, store)
    import email.parser

    assert get("Parser") is email.parser.Parser
    assert store["Parser"] is email.parser.Parser
    assert listing() == ["Parser"]
    with pytest.raises(AttributeError, match="has no attribute 'nope'"):
        get("nope")


@pytest.mark.parametrize("package, heavy", [("waneguide.features", "lightgbm"), ("waneguide.models", "lightgbm"),
                                            ("waneguide.simulation", "lightgbm")])
def test_importing_a_package_does_not_pull_in_the_model_libraries(package, heavy):
    # the reason the mechanism exists (measured import time; DEVELOPERS.md, "Imports")
    code = f"import sys, {package}; print({heavy!r} in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, check=True)
    assert out.stdout.strip() == "False"
