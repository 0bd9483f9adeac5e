"""Shared fixtures. Every test is offline and seeded."""
from __future__ import annotations

import os
from pathlib import Path

import pytest

os.environ.setdefault("MLFLOW_DISABLE_TELEMETRY", "true")
os.environ.setdefault("DO_NOT_TRACK", "true")
os.environ.setdefault("MPLBACKEND", "Agg")

REPO_ROOT = Path(__file__).resolve().parent.parent
FAMILY_FB2 = REPO_ROOT / "configs" / "families" / "demo_fb2.toml"
FAMILY_ST3 = REPO_ROOT / "configs" / "families" / "demo_st3.toml"


@pytest.fixture(scope="session")
def repo_root() -> Path:
    return REPO_ROOT


@pytest.fixture(scope="session")
def family_fb2():
    from waneguide.features.family import load_family

    return load_family(FAMILY_FB2)


@pytest.fixture(scope="session")
def family_st3():
    from waneguide.features.family import load_family

    return load_family(FAMILY_ST3)
