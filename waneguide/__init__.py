"""waneguide: wall-loss estimation from ultrasonic guided-wave captures on aluminium stiffeners.

One installed namespace, in layers that import only downwards (checked by
``tests/test_layers.py`` and the import-linter contract in ``pyproject.toml``):

``waneguide.core``
    caution text, error classes, atomic writes, argument validation, settings.
``waneguide.features``
    plate-wave physics (materials, Rayleigh-Lamb dispersion, excitation), capture files,
    quality gate, feature extraction, the conventional estimate.
``waneguide.simulation``
    thinning profiles, the fast forward model, simulated campaigns and their runner.
``waneguide.models``
    estimators (LightGBM, GP), conformal intervals, mismatch detector, model bundle.
``waneguide.training``
    the training pipeline: campaign features, fit, calibration, evaluation, a new bundle.
``waneguide.operations``
    scoring, history database, hands-on readings, audit, drift, report, registry and tracking.
``waneguide.cli``
    the ``waneguide`` command and the invented demo.

Decision support only: see :data:`waneguide.core.caution.CAUTION`.
"""
from __future__ import annotations

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("waneguide")
except PackageNotFoundError:  # pragma: no cover - running from a source tree without install
    __version__ = "0+unknown"

__all__ = ["__version__"]
