"""Bundle files: the directory layout, writing it atomically, and reading it back with its checks.

The layout and the load-time safety rules are described in :mod:`waneguide.models.bundle`.
Here, :func:`write_bundle_dir` writes every file of a bundle (duck-typed: any object with
the attributes of :class:`~waneguide.models.bundle.ModelBundle`) into a fresh directory
built under a temporary name and renamed into place; :func:`read_bundle_dir` verifies a
directory and returns the pieces to build a ``ModelBundle`` from.
"""
from __future__ import annotations

import datetime as _dt
import hashlib
import json
import math
import os
import re
import shutil
import tempfile
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import skops.io as sio

from waneguide.core.atomic import file_sha256, make_private_dir_shareable
from waneguide.core.errors import InputError, MissingInputError
from waneguide.features.family import load_family
from waneguide.models._target import TargetModel, TrainingDomain
from waneguide.models.conformal import ConformalCalibrator
from waneguide.models.gbm import MonotoneGBMRegressor
from waneguide.models.mismatch import PhysicsChecker

__all__ = [
    "BUNDLE_FORMAT", "BUNDLE_SCHEMA_VERSION", "TRUSTED_TYPES", "VERSION_RE", "family_to_toml", "jsonable",
    "IN_SERVICE_FILE", "content_id", "in_service_version", "next_version_dir", "set_in_service", "read_bundle_dir", "write_bundle_dir",
]

BUNDLE_FORMAT = "waneguide-model-bundle"
BUNDLE_SCHEMA_VERSION = 1

#: Types allowed inside ``sklearn_parts.skops`` beyond skops' own default trust.
TRUSTED_TYPES = (
    "waneguide.models.gp.StandardisedGPRegressor",
    "waneguide.models.mismatch.MismatchDetector",
    "waneguide.models.residual.ResidualCorrector",
    "waneguide.models.residual._Const",
    "sklearn.gaussian_process._gpr.GaussianProcessRegressor",
    "sklearn.gaussian_process.kernels.ConstantKernel",
    "sklearn.gaussian_process.kernels.Matern",
    "sklearn.gaussian_process.kernels.Product",
    "sklearn.gaussian_process.kernels.Sum",
    "sklearn.gaussian_process.kernels.WhiteKernel",
    "sklearn.covariance._robust_covariance.MinCovDet",
    "sklearn.ensemble._iforest.IsolationForest",
    "sklearn.tree._classes.ExtraTreeRegressor",
    "sklearn.tree._tree.Tree",
    "numpy.random._generator.Generator",
    "numpy.random._pcg64.PCG64",
    "numpy.random.mtrand.RandomState",
)

#: Name of a version folder of a model store: ``v001``, ``v002``, ...
VERSION_RE = re.compile(r"^v(\d{3,})$")

#: Files a bundle cannot be loaded without.
_REQUIRED = ("bundle.json", "family.toml", "sklearn_parts.skops", "calibration.npz")


# ---------------------------------------------------------------------------
# plain values
# ---------------------------------------------------------------------------
def jsonable(obj):
    """``obj`` with numpy values, arrays and paths made JSON-ready; non-finite floats as strings."""
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, np.ndarray)):
        return [jsonable(v) for v in obj]
    if isinstance(obj, (np.floating, float)):
        f = float(obj)
        return f if math.isfinite(f) else ("inf" if f > 0 else "-inf" if f < 0 else "nan")
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, Path):
        return str(obj)
    return obj


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    raise ValueError(f"cannot write {type(v).__name__} to TOML")


def family_to_toml(family) -> str:
    """TOML text of a Family (two-level tables; None values omitted)."""
    data = family.model_dump(mode="json", exclude_none=True)
    lines = ["# family definition stored with the model bundle"]
    for k, v in data.items():
        if not isinstance(v, dict):
            lines.append(f"{k} = {_toml_value(v)}")
    for k, v in data.items():
        if isinstance(v, dict):
            lines.append(f"\n[{k}]")
            for kk, vv in v.items():
                lines.append(f"{kk} = {_toml_value(vv)}")
    return "\n".join(lines) + "\n"


def _estimator_params(est) -> dict:
    p = est.get_params()
    return {k: (list(map(list, v)) if k == "monotone_rules" else v) for k, v in p.items()}


# ---------------------------------------------------------------------------
# writing
# ---------------------------------------------------------------------------
def next_version_dir(store: str | os.PathLike) -> Path:
    """``store/vNNN`` with NNN one above the highest existing version (v001 for a new store)."""
    store = Path(store)
    nums = [int(m.group(1)) for p in (store.iterdir() if store.is_dir() else [])
            if (m := VERSION_RE.match(p.name)) and p.is_dir()]
    return store / f"v{(max(nums) + 1 if nums else 1):03d}"


def write_bundle_dir(bundle, path: str | os.PathLike) -> Path:
    """Write ``bundle`` to the new directory ``path`` (an existing non-empty one is refused).

    The files are written into a temporary sibling, which is renamed onto ``path`` only when
    complete: an interrupted save leaves no half bundle.
    """
    path = Path(path)
    if path.exists() and (not path.is_dir() or any(path.iterdir())):
        raise InputError(f"bundle directory {str(path)!r} already exists and is not empty; bundles are never "
                         "overwritten: choose a new directory (or save_version(store) for the next vNNN)")
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = make_private_dir_shareable(tempfile.mkdtemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent))
    try:
        _write_files(bundle, tmp)
        # rename onto the (claimed, empty) target: POSIX rename replaces an empty directory
        # atomically, so a concurrent save never sees the folder missing or half written
        os.replace(tmp, path)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return path


def _write_files(b, d: Path) -> None:
    arrays: dict[str, np.ndarray] = {}
    tmeta = {}
    for name, tm in b.targets.items():
        (d / f"lgbm_{name}_centre.txt").write_text(tm.central.to_text())
        (d / f"lgbm_{name}_scale.txt").write_text(tm.scale.to_text())
        arrays.update(tm.calibrator.to_arrays(f"{name}__"))
        tmeta[name] = {
            "sigma_floor": tm.sigma_floor, "gp_columns": tm.gp_columns, "gp_weight": tm.gp_weight,
            "gp_fill": list(map(float, tm.gp_fill)), "lower_bound": tm.lower_bound,
            "upper_bound": tm.upper_bound, "central_params": _estimator_params(tm.central),
            "scale_params": _estimator_params(tm.scale), "has_gp": tm.gp is not None,
            "has_correction": tm.correction is not None,
        }
    np.savez(d / "calibration.npz", **arrays)
    sio.dump({"gp": {n: tm.gp for n, tm in b.targets.items()},
              "correction": {n: tm.correction for n, tm in b.targets.items()},
              "detector": b.detector}, d / "sklearn_parts.skops")
    (d / "family.toml").write_text(b.family_toml or family_to_toml(b.family))
    (d / "feature_schema.json").write_text(json.dumps(
        b.feature_schema or {"feature_columns": b.feature_columns}, indent=2, default=str))
    if b.training_domain is not None:
        (d / "training_domain.json").write_text(json.dumps(b.training_domain.to_json(), indent=2))
        b.training_domain.reference.to_parquet(d / "reference_sample.parquet", index=False)
    (d / "metrics.json").write_text(json.dumps(jsonable(b.metrics), indent=2, allow_nan=False))
    if b.model_card is not None:
        (d / "model_card.md").write_text(b.model_card)
    meta = dict(b.meta)
    meta.update({
        "format": BUNDLE_FORMAT, "schema_version": BUNDLE_SCHEMA_VERSION, "version": b.version,
        "family_name": b.family.name, "family_fingerprint": b.family_fingerprint,
        "feature_columns": b.feature_columns, "coverage": b.coverage,
        "calibration_source": b.calibration_source, "targets": tmeta,
        "physics": ({"state": b.checker.state, "params": b.checker.params()} if b.checker else None),
    })
    meta.setdefault("created_at", _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"))
    (d / "bundle.json").write_text(json.dumps(jsonable(meta), indent=2, allow_nan=False))
    files = sorted(p.name for p in d.iterdir() if p.is_file())
    manifest = {"format": BUNDLE_FORMAT, "version": b.version, "algorithm": "sha256",
                "files": {f: file_sha256(d / f) for f in files}}
    (d / "manifest.json").write_text(json.dumps(manifest, indent=2))
    b.model_id = content_id(manifest["files"])


def content_id(files: dict[str, str]) -> str:
    """The bundle's identity: SHA-256 (first 16 hex digits) of its manifest's file hashes.

    Two bundles with the same version label in two stores have different ids; the history is
    keyed by it (a version label alone would mix their estimates).
    """
    blob = json.dumps(dict(sorted(files.items())), separators=(",", ":"))
    return hashlib.sha256(blob.encode()).hexdigest()[:16]


# ---------------------------------------------------------------------------
# reading
# ---------------------------------------------------------------------------
#: File in a model store naming the version in service (one line, e.g. ``v002``).
IN_SERVICE_FILE = "IN_SERVICE"


def in_service_version(store: str | os.PathLike) -> str | None:
    """The version named by ``store/IN_SERVICE``, or None when the store has no such file."""
    f = Path(store) / IN_SERVICE_FILE
    if not f.is_file():
        return None
    name = f.read_text().strip()
    if not VERSION_RE.match(name):
        raise InputError(f"{str(f)!r} must hold one version name like v002; got {name[:40]!r}. "
                         "Set it with `waneguide promote`.")
    return name


def set_in_service(store: str | os.PathLike, version: str) -> Path:
    """Point ``store/IN_SERVICE`` at ``version`` (atomic replace); the version must load."""
    store = Path(store)
    if not VERSION_RE.match(str(version)) or not (store / str(version) / "bundle.json").is_file():
        have = sorted(p.name for p in store.iterdir() if VERSION_RE.match(p.name)) if store.is_dir() else []
        raise InputError(f"model store {str(store)!r} has no version {version!r}; versions there: {have or 'none'}")
    tmp = store / f".{IN_SERVICE_FILE}.part"
    tmp.write_text(f"{version}\n")
    os.replace(tmp, store / IN_SERVICE_FILE)
    return store / IN_SERVICE_FILE


def _resolve_dir(path: Path) -> Path:
    """A version folder as given; for a store, the version in service (``IN_SERVICE``), else the newest.

    The one rule every command follows: a store folder means its in-service version. ``train``
    sets it when it adds a version; ``audit --recalibrate`` writes a challenger without moving
    it; ``promote`` and ``rollback`` move it. A store without the file (written by hand or by
    the library alone) serves its newest version.
    """
    if (path / "bundle.json").is_file():
        return path
    current = in_service_version(path) if path.is_dir() else None
    if current is not None:
        d = path / current
        if not (d / "bundle.json").is_file():
            raise InputError(f"model store {str(path)!r}: {IN_SERVICE_FILE} names {current}, which is missing; "
                             "restore it or `waneguide promote` another version")
        return d
    if path.is_dir():
        versions = sorted((int(m.group(1)), p) for p in path.iterdir()
                          if (m := VERSION_RE.match(p.name)) and (p / "bundle.json").is_file())
        if versions:
            return versions[-1][1]
    raise InputError(f"{str(path)!r} is not a waneguide model bundle: no bundle.json in it and no vNNN version "
                     f"folders. Give the folder written by `waneguide train --out`")


def _verified_meta(d: Path) -> tuple[dict, dict]:
    """bundle.json and the manifest's file list, after every format and hash check."""
    try:
        meta = json.loads((d / "bundle.json").read_text())
        manifest = json.loads((d / "manifest.json").read_text())
    except FileNotFoundError as exc:
        raise InputError(f"bundle {str(d)!r} is incomplete: {Path(exc.filename).name} is missing") from None
    except json.JSONDecodeError as exc:
        raise InputError(f"bundle {str(d)!r} is damaged: {exc}") from None
    if meta.get("format") != BUNDLE_FORMAT or manifest.get("format") != BUNDLE_FORMAT:
        raise InputError(f"{str(d)!r} is not a waneguide model bundle (format {meta.get('format')!r}, "
                         f"expected {BUNDLE_FORMAT!r}); refusing to load a foreign model")
    if meta.get("schema_version") != BUNDLE_SCHEMA_VERSION:
        raise InputError(f"bundle {str(d)!r} has schema version {meta.get('schema_version')!r}; this waneguide "
                         f"reads version {BUNDLE_SCHEMA_VERSION}. Retrain with this version")
    if "version" in manifest and manifest["version"] != meta.get("version"):
        raise InputError(f"bundle {str(d)!r}: manifest.json is for version {manifest['version']!r} but bundle.json "
                         f"says {meta.get('version')!r}; refusing to load a mixed-up bundle")
    files = manifest.get("files") or {}
    for needed in _REQUIRED:
        if needed not in files:
            raise InputError(f"bundle {str(d)!r}: the manifest does not list {needed}; refusing to load")
    for name, digest in files.items():
        f = d / name
        if Path(name).name != name:
            raise InputError(f"bundle {str(d)!r}: manifest entry {name!r} is not a plain file name")
        if not f.is_file():
            raise InputError(f"bundle {str(d)!r} is incomplete: {name} is missing")
        if file_sha256(f) != digest:
            raise InputError(f"bundle {str(d)!r} was altered: {name} does not match its SHA-256 in manifest.json; "
                             f"refusing to load. Restore the bundle from its source or retrain")
    return meta, files


class _Sealed:
    """Files of a verified bundle: only those its manifest lists can be opened, and it remembers which."""

    def __init__(self, d: Path, files: dict):
        self.d, self.files, self.current = d, files, "bundle.json"

    def __call__(self, name: str) -> Path:
        if name not in self.files:
            raise InputError(f"bundle {str(self.d)!r}: {name} is not listed in manifest.json; every file a bundle "
                             "loads must be listed and hashed. Refusing to load; restore the bundle or retrain")
        self.current = name
        return self.d / name


def _target_models(sealed: _Sealed, meta: dict, parts: dict, arrays: dict) -> dict[str, TargetModel]:
    cols = list(meta["feature_columns"])
    targets = {}
    for name, tmeta in meta["targets"].items():
        cp = dict(tmeta["central_params"])
        sp = dict(tmeta["scale_params"])
        for pp in (cp, sp):
            pp["monotone_rules"] = tuple(tuple(r) for r in pp.get("monotone_rules", ()))
        central = MonotoneGBMRegressor.from_text(sealed(f"lgbm_{name}_centre.txt").read_text(), params=cp,
                                                 feature_names=cols)
        scale = MonotoneGBMRegressor.from_text(sealed(f"lgbm_{name}_scale.txt").read_text(), params=sp,
                                               feature_names=cols)
        ub = tmeta.get("upper_bound")
        targets[name] = TargetModel(
            name=name, central=central, scale=scale, sigma_floor=float(tmeta["sigma_floor"]),
            calibrator=ConformalCalibrator.from_arrays(arrays, f"{name}__"), gp=parts["gp"].get(name),
            gp_columns=list(tmeta["gp_columns"]), gp_weight=float(tmeta["gp_weight"]),
            gp_fill=list(tmeta["gp_fill"]), correction=parts["correction"].get(name),
            lower_bound=float(tmeta["lower_bound"]), upper_bound=None if ub is None else float(ub),
        )
    return targets


def read_bundle_dir(path: str | os.PathLike) -> tuple[dict[str, Any], Path]:
    """Verify a bundle directory (or the newest ``vNNN`` of a model store) and read it.

    Returns the keyword arguments of ``ModelBundle(...)`` and the directory read; the errors
    are those listed on :func:`waneguide.models.bundle.load_bundle`.
    """
    p = Path(path)
    if not p.exists():
        raise MissingInputError(f"model bundle {str(p)!r} does not exist; give the folder written by "
                                "`waneguide train --out` (a model store or one of its vNNN folders)")
    d = _resolve_dir(p)
    meta, files = _verified_meta(d)
    sealed = _Sealed(d, files)
    try:
        return _read_sealed(sealed, meta), d
    except InputError:
        raise
    except Exception as exc:  # noqa: BLE001 - a listed file whose content is not what it claims (forged)
        first = (str(exc).strip().splitlines() or [""])[0][:200]
        raise InputError(f"bundle {str(d)!r}: {sealed.current} could not be read ({type(exc).__name__}: {first}); "
                         "refusing to load. Restore the bundle from its source or retrain") from None


def _read_sealed(sealed: _Sealed, meta: dict) -> dict[str, Any]:
    d, files = sealed.d, sealed.files
    family = load_family(sealed("family.toml"))
    if family.fingerprint != meta.get("family_fingerprint"):
        raise InputError(f"bundle {str(d)!r}: family.toml has fingerprint {family.fingerprint}, but the bundle was "
                         f"trained for {meta.get('family_fingerprint')}; refusing to load")
    untrusted = sio.get_untrusted_types(file=sealed("sklearn_parts.skops"))
    bad = sorted(set(untrusted) - set(TRUSTED_TYPES))
    if bad:
        raise InputError(f"bundle {str(d)!r}: sklearn_parts.skops contains types outside the trust list: "
                         f"{', '.join(bad)}; refusing to load")
    parts = sio.load(sealed("sklearn_parts.skops"), trusted=list(untrusted))
    with np.load(sealed("calibration.npz"), allow_pickle=False) as npz:
        arrays = {k: npz[k] for k in npz.files}
    cols = list(meta["feature_columns"])
    checker = None
    if meta.get("physics"):
        checker = PhysicsChecker.from_state(family, meta["physics"]["state"], **meta["physics"]["params"])
    domain = None
    if "training_domain.json" in files:
        ref = (pd.read_parquet(sealed("reference_sample.parquet")) if "reference_sample.parquet" in files
               else pd.DataFrame(columns=cols))
        domain = TrainingDomain.from_json(json.loads(sealed("training_domain.json").read_text()), ref)

    def optional(name, read):
        return read(sealed(name)) if name in files else None

    kwargs = dict(
        family=family, feature_columns=cols, targets=_target_models(sealed, meta, parts, arrays),
        detector=parts.get("detector"), checker=checker, training_domain=domain, coverage=float(meta["coverage"]),
        calibration_source=meta["calibration_source"], version=str(meta["version"]),
        metrics=optional("metrics.json", lambda f: json.loads(f.read_text())) or {},
        meta={k: v for k, v in meta.items() if k not in ("targets", "physics")},
        model_card=optional("model_card.md", lambda f: f.read_text()),
        family_toml=sealed("family.toml").read_text(),
        feature_schema=optional("feature_schema.json", lambda f: json.loads(f.read_text())),
        model_id=content_id(files),
    )
    return kwargs
