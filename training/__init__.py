"""waneguide.training: the training pipeline.

:func:`~waneguide.training.pipeline.train_model` turns a simulated campaign (plus optional
measured cases) into a new model bundle version: features, fit, calibration, evaluation and the
mismatch shift study. Logging the run and registering the bundle in MLflow is the operations
layer's job (:func:`waneguide.operations.train.train_and_register`); this package imports
nothing from :mod:`waneguide.operations` or :mod:`waneguide.cli`.

The public names live in :mod:`waneguide.training.pipeline` and are re-exported here.
"""
from __future__ import annotations

from waneguide.training.pipeline import (
    TrainConfig,
    TrainResult,
    campaign_features,
    evaluate_bundle,
    fit_bundle,
    format_summary,
    mismatch_study,
    read_measured,
    train_model,
)

__all__ = [
    "TrainConfig", "TrainResult", "campaign_features", "evaluate_bundle", "fit_bundle", "format_summary",
    "mismatch_study", "read_measured", "train_model",
]
