"""Train a bundle, then log the run to MLflow and register the bundle (what ``waneguide train`` does).

:func:`train_and_register` calls the pure training function
(:func:`waneguide.training.pipeline.train_model`, which writes only the bundle and its cache
into the model store) and then, unless ``track=False``:

* logs the settings, the metrics and the bundle files as one MLflow run of the experiment
  ``waneguide-<family>``;
* puts the new version in service in the store (``IN_SERVICE``; see
  :mod:`waneguide.operations.service`), also with ``track=False``;
* registers the bundle as a new version of the registered model ``waneguide-<family>`` with the
  alias ``in-service`` (:func:`waneguide.operations.registry.register_bundle`).

Where MLflow writes. The tracking store is ``tracking_uri`` (default
:func:`waneguide.core.settings.default_tracking_uri`: ``mlflow.db`` in the working directory).
For a SQLite store, the experiment's artifacts (the run's bundle copy and the registered
pyfunc model) go beside the database file, in ``<database name>-artifacts/<experiment>/``
(``mlflow-artifacts/`` for ``mlflow.db``), not into MLflow's own default ``./mlruns`` of the
working directory: see :func:`waneguide.operations.tracking.artifact_location`. An experiment that already exists keeps
the artifact location it was created with; a tracking server decides its own.
"""
from __future__ import annotations

from pathlib import Path

from waneguide.core.settings import default_tracking_uri
from waneguide.features.family import Family, load_family
from waneguide.models.bundle import set_in_service
from waneguide.operations.registry import register_bundle
from waneguide.operations.tracking import TrackedRun, ensure_experiment, experiment_name
from waneguide.training.pipeline import TrainConfig, TrainResult, train_model

__all__ = ["train_and_register"]

def train_and_register(family, campaign_dir, out_dir, *, measured_csv=None, tracking_uri: str | None = None,
                       random_state=0, progress: bool = True, config: TrainConfig | None = None, track: bool = True,
                       shift_study: bool = True, shift_cases: int | None = None, n_jobs: int = 1) -> TrainResult:
    """:func:`~waneguide.training.pipeline.train_model`, then the MLflow run and the registered version.

    Parameters are those of ``train_model``, plus ``tracking_uri`` (default
    :func:`~waneguide.core.settings.default_tracking_uri`) and ``track`` (False: no MLflow at
    all, nothing written outside ``out_dir``). The result carries ``run_id`` and
    ``model_version`` when tracked.
    """
    cfg = config or TrainConfig()
    fam = family if isinstance(family, Family) else load_family(family)
    exp = experiment_name(fam.name)
    # the tracking store is checked before the work, not after it (a bad URI fails in seconds)
    uri = ensure_experiment(tracking_uri or default_tracking_uri(), exp) if track else None
    result = train_model(family, campaign_dir, out_dir, measured_csv=measured_csv, random_state=random_state,
                         progress=progress, config=cfg, shift_study=shift_study, shift_cases=shift_cases,
                         n_jobs=n_jobs)
    if not track:
        set_in_service(Path(result.bundle_path).parent, Path(result.bundle_path).name)
        return result
    bundle, path = result.bundle, result.bundle_path
    with TrackedRun(exp, run_name=f"{fam.name} {path.name}", tracking_uri=uri,
                    tags={"family": fam.name, "family_fingerprint": fam.fingerprint,
                          "campaign_fingerprint": bundle.meta.get("campaign_fingerprint", ""),
                          "bundle_version": path.name, "calibration_source": bundle.calibration_source}) as run:
        run.log_params({**cfg.__dict__, "n_cases": bundle.meta.get("n_cases"), "random_state": random_state,
                        "measured_csv": str(measured_csv or "")})
        run.log_metrics({k: v for k, v in bundle.metrics.items() if k not in ("fit", "gp")})
        run.log_artifacts(path, artifact_path="bundle")
        result.model_version = register_bundle(path, fam.name, run_id=run.run_id, tracking_uri=uri)
        result.run_id = run.run_id
    # registered: the new version is in service in the store too (one rule for every command)
    set_in_service(Path(path).parent, Path(path).name)
    return result
