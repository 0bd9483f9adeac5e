"""MLflow run tracking with an embedded default store (no server needed).

* Default tracking URI: ``sqlite:///<working directory>/mlflow.db``; ``--tracking-uri`` for a
  team server.
* Telemetry is off (``MLFLOW_DISABLE_TELEMETRY=true``; ``DO_NOT_TRACK=true``): no outbound calls.
* :func:`init_tracking` creates / migrates the store once per process, under a lock, before
  any parallel work: concurrent first use of a new SQLite store races on its schema migration.
* For a SQLite store an experiment's artifacts go beside the database
  (``<database name>-artifacts/<experiment>/``), never into MLflow's default ``./mlruns``:
  :func:`ensure_experiment` creates experiments that way, and :class:`TrackedRun` uses it.
"""
from __future__ import annotations

import math
import os
import re
import threading
from pathlib import Path
from typing import Any, Mapping

import mlflow
import sqlalchemy as sa
from mlflow.exceptions import MlflowException
from mlflow.tracking import MlflowClient

from waneguide.core.errors import InputError
from waneguide.core.settings import DEFAULT_MODEL_CACHE_DIR, default_tracking_uri, mask_credentials, offline_defaults

__all__ = ["default_tracking_uri", "init_tracking", "TrackedRun", "flatten_metrics", "experiment_name",
           "artifact_location", "ensure_experiment", "local_model_cache"]

_READY: set[str] = set()
_LOCK = threading.Lock()


def experiment_name(family_name: str) -> str:
    return f"waneguide-{family_name}"


#: Database schemes MLflow would retry for about 100 s (15 attempts, exponential back-off) when the
#: server is unreachable; one quick connection of our own answers first.
_SERVER_DATABASES = ("postgresql", "mysql", "mssql")


def _probe_server_database(uri: str) -> None:
    """Fail in seconds, with the password masked, when a database tracking store cannot be reached."""
    if uri.split(":", 1)[0].split("+", 1)[0] not in _SERVER_DATABASES:
        return
    try:
        engine = sa.create_engine(uri, connect_args={"connect_timeout": 10})
        with engine.connect():
            pass
        engine.dispose()
    except Exception as exc:  # noqa: BLE001 - any failure to connect is the user's store setting
        raise InputError(mask_credentials(f"cannot reach the MLflow tracking store {uri}: {exc}").splitlines()[0]
                         + " Check --tracking-uri (and that the database server is running).") from None


def init_tracking(tracking_uri: str | None = None) -> str:
    """Point MLflow at ``tracking_uri`` (default: :func:`default_tracking_uri`) and create the store once."""
    offline_defaults()
    uri = tracking_uri or default_tracking_uri()

    with _LOCK:
        mlflow.set_tracking_uri(uri)
        mlflow.set_registry_uri(uri)
        if uri not in _READY:
            _probe_server_database(uri)
            try:
                MlflowClient(uri).search_experiments(max_results=1)  # creates + migrates the schema
            except Exception as exc:  # noqa: BLE001 - turn any store failure into a clear user error
                raise InputError(mask_credentials(f"cannot open the MLflow tracking store {uri!r}: {exc}. ")
                                 + "Check --tracking-uri (default: sqlite file mlflow.db in the working directory)") from None
            _READY.add(uri)
    return uri


_SQLITE = "sqlite:///"


def artifact_location(tracking_uri: str, experiment: str) -> str | None:
    """File URI of the artifact folder of ``experiment`` beside a SQLite tracking database.

    ``sqlite:////data/mlflow.db`` -> ``file:///data/mlflow-artifacts/<experiment>``; a relative
    database path is taken from the working directory, as SQLite does. None for any other kind
    of store (a tracking server or a file store chooses its own).
    """
    if not tracking_uri.startswith(_SQLITE):
        return None
    db = tracking_uri[len(_SQLITE):].split("?", 1)[0]
    if not db or db == ":memory:":
        return None
    db_path = Path(db).resolve()
    return (db_path.parent / f"{db_path.stem}-artifacts" / experiment).as_uri()


def ensure_experiment(tracking_uri: str | None, experiment: str) -> str:
    """Create ``experiment`` with its artifacts beside a SQLite store (see :func:`artifact_location`).

    Returns the tracking URI used. An existing experiment is left as it is.
    """
    uri = init_tracking(tracking_uri)
    client = MlflowClient(uri)
    if client.get_experiment_by_name(experiment) is None:
        try:
            client.create_experiment(experiment, artifact_location=artifact_location(uri, experiment))
        except MlflowException:
            if client.get_experiment_by_name(experiment) is None:  # not a concurrent creation: a real failure
                raise
    return uri


def local_model_cache(tracking_uri: str) -> Path:
    """Folder where registered bundles are downloaded when their own folder is gone.

    Beside a SQLite store: ``<database name>-artifacts/downloaded-models/``; for any other store
    :data:`waneguide.core.settings.DEFAULT_MODEL_CACHE_DIR` in the working directory.
    """
    loc = artifact_location(tracking_uri, "downloaded-models")
    if loc is not None:
        return Path(loc[len("file://"):])
    return Path.cwd() / DEFAULT_MODEL_CACHE_DIR


def flatten_metrics(d: Mapping, prefix: str = "") -> dict[str, float]:
    """Finite numeric leaves of a nested dict as ``a.b.c`` keys (MLflow metric names)."""
    out: dict[str, float] = {}
    for k, v in d.items():
        key = re.sub(r"[^A-Za-z0-9_\-./]", "_", f"{prefix}{k}")  # MLflow's allowed metric-name characters
        if isinstance(v, Mapping):
            out.update(flatten_metrics(v, key + "."))
        elif isinstance(v, bool):
            out[key] = float(v)
        elif isinstance(v, (int, float)) and math.isfinite(float(v)):
            out[key] = float(v)
    return out


class TrackedRun:
    """Context manager over one MLflow run; every method is a no-op when ``enabled`` is False.

    Examples
    --------
    >>> with TrackedRun("waneguide-demo-fb2", enabled=False) as run:
    ...     run.log_params({"seed": 0})
    """

    def __init__(self, experiment: str, *, run_name: str | None = None, tracking_uri: str | None = None,
                 tags: Mapping[str, str] | None = None, enabled: bool = True):
        self.experiment = experiment
        self.run_name = run_name
        self.tracking_uri = tracking_uri
        self.tags = dict(tags or {})
        self.enabled = enabled
        self.run_id: str | None = None
        self.uri: str | None = None
        self._mlflow = None

    def __enter__(self) -> "TrackedRun":
        if not self.enabled:
            return self
        self.uri = ensure_experiment(self.tracking_uri, self.experiment)

        self._mlflow = mlflow
        mlflow.set_experiment(self.experiment)
        run = mlflow.start_run(run_name=self.run_name, tags=self.tags)
        self.run_id = run.info.run_id
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if self._mlflow is not None:
            self._mlflow.end_run(status="FAILED" if exc_type else "FINISHED")

    def log_params(self, params: Mapping[str, Any]) -> None:
        if self._mlflow is not None:
            self._mlflow.log_params({k: (str(v)[:500]) for k, v in params.items()})

    def log_metrics(self, metrics: Mapping[str, Any]) -> None:
        if self._mlflow is not None:
            flat = flatten_metrics(metrics)
            if flat:
                self._mlflow.log_metrics(flat)

    def set_tags(self, tags: Mapping[str, Any]) -> None:
        if self._mlflow is not None:
            self._mlflow.set_tags({k: str(v) for k, v in tags.items()})

    def log_artifacts(self, local_dir: str | os.PathLike, artifact_path: str | None = None) -> None:
        if self._mlflow is not None:
            self._mlflow.log_artifacts(str(local_dir), artifact_path=artifact_path)
