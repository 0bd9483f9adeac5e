"""The built wheel: one top-level package, its configs as package data, and a demo that runs.

Packaging rule of this project (issue 9, README "Install"): ``pip install`` of the wheel adds
only ``waneguide`` (and its ``.dist-info``) to site-packages, and ``waneguide demo --quick`` runs
from the installed copy, writing nothing outside ``--out``.
"""
from __future__ import annotations

import os
import shutil
import subprocess
import sys
import sysconfig
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

pytestmark = pytest.mark.slow


def _run(cmd, **kw):
    proc = subprocess.run([str(c) for c in cmd], capture_output=True, text=True, timeout=1500, **kw)
    assert proc.returncode == 0, f"{cmd} failed ({proc.returncode}):\n{proc.stdout[-3000:]}\n{proc.stderr[-3000:]}"
    return proc


@pytest.fixture(scope="module")
def wheel(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("wheel")
    # build from a copy: an in-tree build leaves build/ and *.egg-info in the checkout
    src = tmp_path_factory.mktemp("src") / "waneguide"
    shutil.copytree(ROOT, src, ignore=shutil.ignore_patterns(
        ".git", ".venv", "build", "dist", "*.egg-info", "__pycache__", ".pytest_cache", ".ruff_cache", "demo-output"))
    # the project venv has setuptools and wheel (the [test] extra pulls `build`); no isolation means
    # no download during the test
    _run([sys.executable, "-m", "build", "--wheel", "--no-isolation", "--outdir", out, src])
    (whl,) = out.glob("waneguide-*.whl")
    return whl


def test_wheel_has_one_top_level_package_and_its_configs(wheel):
    names = zipfile.ZipFile(wheel).namelist()
    tops = {n.split("/")[0] for n in names}
    assert {t for t in tops if not t.endswith(".dist-info")} == {"waneguide"}
    for needed in ("waneguide/configs/families/demo_fb2.toml", "waneguide/configs/families/demo_st3.toml",
                   "waneguide/configs/materials/example_user_alloy.toml", "waneguide/features/__init__.py",
                   "waneguide/models/__init__.py", "waneguide/training/__init__.py", "waneguide/cli/main.py"):
        assert needed in names, needed


def test_installed_wheel_runs_the_quick_demo_outside_the_checkout(wheel, tmp_path):
    venv = tmp_path / "venv"
    _run([sys.executable, "-m", "venv", "--without-pip", venv])
    py = venv / "bin" / "python"
    site = Path(_run([py, "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"]).stdout.strip())
    before = set(os.listdir(site))
    # dependencies come from this test's own environment (no download): a .pth line adds its
    # site-packages *after* the fresh venv's own, and .pth files found there are not executed, so
    # the checkout's editable-install hook stays out
    (site / "zz_test_deps.pth").write_text(sysconfig.get_paths()["purelib"] + "\n")
    _run([sys.executable, "-m", "pip", "--python", py, "install", "--no-deps", "--no-index", "--quiet", wheel])
    added = set(os.listdir(site)) - before - {"zz_test_deps.pth"}
    assert {a for a in added if not a.endswith(".dist-info")} == {"waneguide"}, added
    where = _run([py, "-c", "import waneguide.features, waneguide.configs as c; "
                  "print(waneguide.features.__file__); print(c.config_path('families', 'demo_fb2.toml'))"],
                 cwd=tmp_path).stdout.split()
    assert all(Path(w).is_relative_to(site) for w in where), where
    cwd = tmp_path / "stand-here"
    cwd.mkdir()
    env = {k: v for k, v in os.environ.items() if not k.startswith(("PYTHON", "VIRTUAL_ENV"))}
    proc = _run([venv / "bin" / "waneguide", "demo", "--quick", "--no-progress", "--out", tmp_path / "demo"],
                cwd=cwd, env=env)
    assert "decision support only" in proc.stdout.lower()
    assert (tmp_path / "demo").is_dir() and any((tmp_path / "demo").rglob("*.html"))
    assert list(cwd.iterdir()) == [], "the demo wrote outside --out"
