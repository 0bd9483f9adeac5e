"""waneguide.training: the training pipeline.

:func:`~waneguide.training.pipeline.train_model` turns a simulated campaign (plus optional
measured cases) into a new model bundle version: features, fit, calibration, evaluation and the
mismatch shift study. Logging the run and registering the bundle in MLflow is the operations
layer's job (:func:`waneguide.operations.train.train_and_register`).
"""
