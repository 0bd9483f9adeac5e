"""MLflow model registry helpers: one registered model per family, an alias for the one in service.

Registered model name: ``waneguide-<family name>``. Each version is an MLflow pyfunc model
whose only artifact is the bundle directory; it is logged with *explicit* pip requirements
(MLflow would otherwise infer them by spawning a slow subprocess) and as "models from code"
(the wrapper is a small source file, not a pickle). The version also carries the tag
``bundle_path`` (the local bundle directory it was made from), so :func:`resolve_model`
finds the bundle without copying when it is still there, and downloads it otherwise.

See :mod:`waneguide.operations.tracking` for the store defaults
(``sqlite:///mlflow.db`` in the working directory, telemetry off).
"""
from __future__ import annotations

import re
import tempfile
import warnings
from importlib import metadata
from pathlib import Path

import mlflow
from mlflow.exceptions import MlflowException
from mlflow.tracking import MlflowClient

from waneguide.core.errors import InputError
from waneguide.models.bundle import load_bundle
from waneguide.operations.tracking import experiment_name, init_tracking, local_model_cache

__all__ = ["DEFAULT_ALIAS", "registered_name", "register_bundle", "resolve_model", "set_alias"]

DEFAULT_ALIAS = "in-service"

_PYFUNC_CODE = '''"""waneguide bundle as an MLflow pyfunc model (models-from-code; no pickle)."""
import mlflow
from mlflow.pyfunc import PythonModel


class WaneguideBundleModel(PythonModel):
    def load_context(self, context):
        from waneguide.models.bundle import load_bundle

        self.bundle = load_bundle(context.artifacts["bundle"])

    def predict(self, context, model_input, params=None):
        limit = (params or {}).get("limit_pct")
        return self.bundle.predict_frame(model_input, limit_pct=limit)


mlflow.models.set_model(WaneguideBundleModel())
'''


def registered_name(family_name: str) -> str:
    return family_name if family_name.startswith("waneguide-") else f"waneguide-{family_name}"


def _pip_requirements() -> list[str]:
    reqs = []
    for dist in ("waneguide", "numpy", "pandas", "scikit-learn", "lightgbm", "skops", "pydantic", "scipy",
                 "pyarrow", "mlflow"):
        try:
            reqs.append(f"{dist}=={metadata.version(dist)}")
        except metadata.PackageNotFoundError:
            continue
    return reqs


def register_bundle(bundle_dir, family_name: str, *, alias: str | None = DEFAULT_ALIAS, tracking_uri=None,
                    run_id: str | None = None) -> str:
    """Log ``bundle_dir`` as a pyfunc model version of ``waneguide-<family_name>``; returns the version.

    When ``run_id`` is given the model is logged into that (active) run, else into a new run
    of the family's experiment. ``alias`` (default ``in-service``) is moved to the new version;
    ``None`` leaves the aliases alone.
    """
    bundle_dir = Path(bundle_dir).resolve()
    bundle = load_bundle(bundle_dir)  # refuses a tampered or foreign bundle before it is registered
    bundle_dir = bundle.path
    init_tracking(tracking_uri)

    name = registered_name(family_name)
    with tempfile.TemporaryDirectory() as tmp:
        code = Path(tmp) / "waneguide_pyfunc.py"
        code.write_text(_PYFUNC_CODE)
        active = mlflow.active_run()
        started = False
        if active is None or (run_id is not None and active.info.run_id != run_id):
            if run_id is None:
                mlflow.set_experiment(experiment_name(bundle.family.name))
            mlflow.start_run(run_id=run_id)
            started = True
        try:
            with warnings.catch_warnings():
                # MLflow suggests type hints for signature inference; the bundle validates its own input
                warnings.filterwarnings("ignore", message=".*type hints.*", category=UserWarning)
                info = mlflow.pyfunc.log_model(
                    name="model", python_model=str(code), artifacts={"bundle": str(bundle_dir)},
                    pip_requirements=_pip_requirements(), registered_model_name=name,
                )
        finally:
            if started:
                mlflow.end_run()
    client = MlflowClient()
    version = str(info.registered_model_version)
    client.set_model_version_tag(name, version, "bundle_path", str(bundle_dir))
    client.set_model_version_tag(name, version, "bundle_version", bundle.version)
    client.set_model_version_tag(name, version, "family_fingerprint", bundle.family_fingerprint)
    client.set_model_version_tag(name, version, "calibration_source", bundle.calibration_source)
    if alias:
        client.set_registered_model_alias(name, alias, version)
    return version


def set_alias(family_name: str, version: str, alias: str = DEFAULT_ALIAS, tracking_uri=None) -> None:
    """Point ``alias`` of the family's registered model at ``version``."""

    init_tracking(tracking_uri)

    MlflowClient().set_registered_model_alias(registered_name(family_name), alias, str(version))


_REF = re.compile(r"^(?:models:/)?(?P<name>[A-Za-z0-9_.\-]+?)(?:@(?P<alias>[A-Za-z0-9_.\-]+)|/(?P<version>\d+))?$")


def resolve_model(name_or_dir, tracking_uri=None) -> Path:
    """A local bundle directory for a path, or for a registered model reference.

    Accepted: an existing directory (a bundle or a model store); ``NAME`` (alias ``in-service``),
    ``NAME@ALIAS``, ``NAME/VERSION``, each optionally prefixed ``models:/``; ``NAME`` may be the
    family name (``demo-fb2``) or the registered name (``waneguide-demo-fb2``).
    """
    p = Path(str(name_or_dir))
    if p.exists():
        return p
    m = _REF.match(str(name_or_dir))
    if not m:
        raise InputError(f"{str(name_or_dir)!r} is neither an existing bundle directory nor a model reference "
                         f"(NAME, NAME@ALIAS, NAME/VERSION)")

    uri = init_tracking(tracking_uri)

    client = MlflowClient()
    name = registered_name(m.group("name"))
    try:
        if m.group("version"):
            mv = client.get_model_version(name, m.group("version"))
        else:
            mv = client.get_model_version_by_alias(name, m.group("alias") or DEFAULT_ALIAS)
    except MlflowException as exc:
        raise InputError(f"no model bundle directory {str(name_or_dir)!r} and no registered model version for it "
                         f"in {uri}: {exc.message if hasattr(exc, 'message') else exc}") from None
    local = (mv.tags or {}).get("bundle_path")
    if local and Path(local).is_dir():
        return Path(local)

    dst = local_model_cache(uri) / name / str(mv.version)
    if not (dst / "bundle").is_dir():
        dst.mkdir(parents=True, exist_ok=True)
        mlflow.artifacts.download_artifacts(artifact_uri=f"models:/{name}/{mv.version}", dst_path=str(dst))
    found = [q.parent for q in dst.rglob("bundle.json")]
    if not found:
        raise InputError(f"registered model {name} version {mv.version} has no bundle among its artifacts")
    return found[0]
