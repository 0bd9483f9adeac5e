"""waneguide.operations: the model in service.

:mod:`~waneguide.operations.scoring` (score captures), :mod:`~waneguide.operations.history`
(append-only history database), :mod:`~waneguide.operations.readings` (hands-on thickness
readings), :mod:`~waneguide.operations.audit` (bias, coverage, drift, verdict, recalibration),
:mod:`~waneguide.operations.drift` (Page-Hinkley, CUSUM, PSI), :mod:`~waneguide.operations.report`
(self-contained HTML report), :mod:`~waneguide.operations.registry` and
:mod:`~waneguide.operations.tracking` (MLflow registry and run tracking),
:mod:`~waneguide.operations.train` (train, then log and register).
"""
