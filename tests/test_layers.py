"""The layer contract: waneguide's packages import only downwards, and imports sit at module top.

The contract is the one stated in ``waneguide/__init__.py`` and DEVELOPERS.md (a layered
architecture, as import-linter's "layers" contract states it; import-linter itself cannot follow
setuptools' ``package-dir`` mapping in an editable install, so this test parses the source with
:mod:`ast` instead, the equivalent check). Every ``import`` statement counts, including those in
function bodies, so a lazy import cannot hide a wrong arrow.
"""
from __future__ import annotations

import ast
import tomllib
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

#: Top to bottom; a module may import its own layer and any layer below it.
LAYERS = (
    "waneguide.cli",
    "waneguide.operations",
    "waneguide.training",
    "waneguide.models",
    "waneguide.simulation",
    "waneguide.features",
    "waneguide.configs",
    "waneguide.core",
)


def _package_dirs() -> dict[str, Path]:
    conf = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
    mapping = conf["package-dir"]
    out = {}
    for pkg in conf["packages"]:
        # the longest mapped prefix gives the folder (setuptools' package-dir rule)
        base = max((k for k in mapping if pkg == k or pkg.startswith(k + ".")), key=len)
        out[pkg] = ROOT / mapping[base] / Path(*pkg[len(base):].lstrip(".").split(".")) if pkg != base \
            else ROOT / mapping[base]
    return out


def _modules():
    for pkg, folder in _package_dirs().items():
        for path in sorted(folder.glob("*.py")):
            name = pkg if path.stem == "__init__" else f"{pkg}.{path.stem}"
            yield name, path


def _imports(name: str, path: Path):
    """(line, imported module, inside a function) for every import statement of a module."""
    tree = ast.parse(path.read_text(), filename=str(path))
    is_pkg = path.stem == "__init__"
    parents = {}
    for node in ast.walk(tree):
        for child in ast.iter_child_nodes(node):
            parents[child] = node

    def in_function(node):
        while node in parents:
            node = parents[node]
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                return True
        return False

    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for a in node.names:
                yield node.lineno, a.name, in_function(node)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = name.split(".") if is_pkg else name.split(".")[:-1]
                base = base[: len(base) - node.level + 1]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            yield node.lineno, mod, in_function(node)


def _layer(module: str) -> int | None:
    for i, layer in enumerate(LAYERS):
        if module == layer or module.startswith(layer + "."):
            return i
    return None


def test_every_installed_package_belongs_to_a_layer():
    unknown = [pkg for pkg in _package_dirs() if pkg != "waneguide" and _layer(pkg) is None]
    assert not unknown, f"packages outside the layer list {LAYERS}: {unknown}"


def test_no_import_against_the_layer_direction():
    wrong = []
    for name, path in _modules():
        own = _layer(name)
        if own is None:
            continue
        for line, mod, _ in _imports(name, path):
            target = _layer(mod)
            if target is not None and target < own:
                wrong.append(f"{path.relative_to(ROOT)}:{line} ({name}) imports {mod}")
    assert not wrong, "imports against the layer direction:\n" + "\n".join(wrong)


def test_the_contract_catches_a_wrong_arrow(tmp_path):
    # the checker itself must fail on a planted upward import (a test that cannot fail is a defect)
    bad = tmp_path / "bad.py"
    bad.write_text("def f():\n    from waneguide.operations.scoring import score_captures\n")
    found = list(_imports("waneguide.features.bad", bad))
    assert found == [(2, "waneguide.operations.scoring", True)]
    assert _layer(found[0][1]) < _layer("waneguide.features.bad")


def _lazy_allowed(name: str, path: Path) -> bool:
    # The one documented lazy-import place: the CLI's command modules, whose bodies import the
    # library so that `waneguide --help` stays fast (DEVELOPERS.md, "Imports").
    return name.startswith("waneguide.cli.cmd_")


def test_imports_sit_at_module_top():
    late = []
    for name, path in _modules():
        if _lazy_allowed(name, path):
            continue
        for line, mod, inside in _imports(name, path):
            if inside:
                late.append(f"{path.relative_to(ROOT)}:{line} imports {mod} inside a function")
    assert not late, "imports inside functions outside the CLI command modules:\n" + "\n".join(late)


@pytest.mark.parametrize("pkg", ["waneguide.features", "waneguide.models", "waneguide.training"])
def test_top_level_folders_install_inside_the_namespace(pkg):
    # the layout rule: concept folders at the repo top, installed inside `waneguide`
    dirs = _package_dirs()
    assert dirs[pkg] == ROOT / pkg.split(".")[1]
    assert all(p == "waneguide" or p.startswith("waneguide.") for p in dirs)
