"""waneguide.models: fitted models and their use.

Regressors (scikit-learn compatible)
    :class:`~waneguide.models.gbm.MonotoneGBMRegressor` (LightGBM, physics sign constraints),
    :class:`~waneguide.models.gp.StandardisedGPRegressor` (Matern ARD + white noise, space-filling subset),
    :class:`~waneguide.models.residual.ResidualCorrector` (measured-data correction chosen by grouped CV);
    :func:`~waneguide.models.blend.blend_weights` and :func:`~waneguide.models.blend.grouped_folds`
    (stacking weights and grouped folds of the training pipeline).
Intervals
    :class:`~waneguide.models.conformal.ConformalCalibrator` (split conformal / CV+, exceedance),
    :func:`~waneguide.models.conformal.conformal_quantile`, :func:`~waneguide.models.conformal.coverage_by_group`.
Mismatch
    :class:`~waneguide.models.mismatch.MismatchDetector` (MinCovDet + IsolationForest, conformal p-value),
    :class:`~waneguide.models.mismatch.PhysicsChecker`.
Bundle
    :func:`~waneguide.models.bundle.load_bundle`, :class:`~waneguide.models.bundle.ModelBundle`,
    :func:`~waneguide.models.card.render_model_card`. (Registering a bundle in MLflow is the
    operations layer's job: :mod:`waneguide.operations.registry`.)

Lazy names: this ``__init__`` imports none of its modules. The names above are resolved on
first use by a module ``__getattr__`` (PEP 562) made by the project's one lazy-import mechanism,
:func:`waneguide.core.lazy.lazy_exports`, so ``from waneguide.models import load_bundle`` imports
only what that name needs and importing the package alone does not pull in LightGBM,
scikit-learn and skops. Every module inside the package imports at module top.
"""
from __future__ import annotations

from waneguide.core.lazy import lazy_exports

_WHERE = {
    "MonotoneGBMRegressor": "gbm", "DEFAULT_MONOTONE_RULES": "gbm",
    "StandardisedGPRegressor": "gp", "ResidualCorrector": "residual",
    "blend_weights": "blend", "grouped_folds": "blend",
    "ConformalCalibrator": "conformal", "conformal_quantile": "conformal", "coverage_by_group": "conformal",
    "MismatchDetector": "mismatch", "PhysicsChecker": "mismatch",
    "load_bundle": "bundle", "ModelBundle": "bundle", "TARGETS": "bundle", "render_model_card": "card",
}

__all__ = sorted(_WHERE)

__getattr__, __dir__ = lazy_exports(__name__, _WHERE, globals())
