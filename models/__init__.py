"""waneguide.models: fitted models and their use.

Regressors (scikit-learn compatible)
    :class:`~models.gbm.MonotoneGBMRegressor` (LightGBM, physics sign constraints),
    :class:`~models.gbm.QuantileGBMRegressor` (rearranged quantiles),
    :class:`~models.gp.StandardisedGPRegressor` (Matern ARD + white noise, space-filling subset),
    :class:`~models.blend.GroupedCVBlend`, :class:`~models.residual.ResidualCorrector`.
Intervals
    :class:`~models.conformal.ConformalCalibrator` (split conformal / CV+, exceedance),
    :class:`~models.conformal.NormalisedConformalRegressor`, :class:`~models.conformal.CQRRegressor`,
    :func:`~models.conformal.conformal_quantile`, :func:`~models.conformal.coverage_by_group`.
Mismatch
    :class:`~models.mismatch.MismatchDetector` (MinCovDet + IsolationForest, conformal p-value),
    :class:`~models.mismatch.PhysicsChecker`.
Bundle and registry
    :func:`~models.bundle.load_bundle`, :class:`~models.bundle.ModelBundle`,
    :func:`~models.registry.register_bundle`, :func:`~models.registry.resolve_model`,
    :func:`~models.card.render_model_card`.

Names are imported on first use (``from models import load_bundle``) so that importing the
package stays cheap.
"""
from __future__ import annotations

import importlib

_WHERE = {
    "MonotoneGBMRegressor": "gbm", "QuantileGBMRegressor": "gbm", "DEFAULT_MONOTONE_RULES": "gbm",
    "StandardisedGPRegressor": "gp", "GroupedCVBlend": "blend", "ResidualCorrector": "residual",
    "ConformalCalibrator": "conformal", "NormalisedConformalRegressor": "conformal", "CQRRegressor": "conformal",
    "conformal_quantile": "conformal", "coverage_by_group": "conformal",
    "MismatchDetector": "mismatch", "PhysicsChecker": "mismatch",
    "load_bundle": "bundle", "ModelBundle": "bundle", "TARGETS": "bundle",
    "register_bundle": "registry", "resolve_model": "registry", "render_model_card": "card",
}

__all__ = sorted(_WHERE)


def __getattr__(name: str):
    if name in _WHERE:
        return getattr(importlib.import_module(f"{__name__}.{_WHERE[name]}"), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
