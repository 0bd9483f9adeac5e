"""The model bundle: everything needed to score one stiffener family, in one directory.

Layout (``BUNDLE_FORMAT``, schema :data:`BUNDLE_SCHEMA_VERSION`)::

    bundle.json            format marker, schema/bundle version, family fingerprint, targets,
                           coverage, calibration source, feature columns, per-target settings
    manifest.json          SHA-256 of every other file (verified on load)
    family.toml            the family definition the model was trained for
    feature_schema.json    feature columns (+ units/descriptions when the schema provides them)
    training_domain.json   per-feature ranges and quantiles of the training data
    reference_sample.parquet   a sample of training feature rows (drift checks)
    metrics.json           evaluation figures
    model_card.md          Markdown model card with cautions
    lgbm_<target>_centre.txt, lgbm_<target>_scale.txt   LightGBM native text models
    sklearn_parts.skops    GP, residual correction and mismatch detector (skops, trusted types only)
    calibration.npz        conformal residuals and folds (plain arrays, no pickle)

Safety on load: the format marker and schema version must match, every file in the
manifest must hash to its recorded value, the family file must reproduce the
recorded fingerprint, and the skops file may contain only the types in
:data:`TRUSTED_TYPES`. Anything else is refused with a ValueError that says why.
A hash manifest detects corruption and edits, not a deliberate forger who also
rewrites the manifest; skops with a fixed trust list is what keeps loading from
running foreign code.

Nothing is overwritten: :meth:`ModelBundle.save` writes into a fresh directory
(built under a temporary name and renamed into place) and refuses an existing
non-empty one; :meth:`ModelBundle.save_version` puts it into the next free
``vNNN`` directory of a model store.
"""
from __future__ import annotations

import copy
import datetime as _dt
import json
import math
import os
import re
import shutil
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

__all__ = [
    "BUNDLE_FORMAT",
    "BUNDLE_SCHEMA_VERSION",
    "TARGETS",
    "TRUSTED_TYPES",
    "ModelBundle",
    "TargetModel",
    "TrainingDomain",
    "load_bundle",
    "family_to_toml",
    "next_version_dir",
]

BUNDLE_FORMAT = "waneguide-model-bundle"
BUNDLE_SCHEMA_VERSION = 1
#: Targets every bundle predicts, with their physical support (lower, upper) in their unit.
TARGETS = ("max_loss_pct", "max_loss_mm", "mean_loss_pct")

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

_VERSION_RE = re.compile(r"^v(\d{3,})$")


# ---------------------------------------------------------------------------
# small pieces
# ---------------------------------------------------------------------------
def _sha256(path: Path) -> str:
    from waneguide.core.atomic import file_sha256

    return file_sha256(path)


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


def next_version_dir(store: str | os.PathLike) -> Path:
    """``store/vNNN`` with NNN one above the highest existing version (v001 for a new store)."""
    store = Path(store)
    nums = [int(m.group(1)) for p in (store.iterdir() if store.is_dir() else [])
            if (m := _VERSION_RE.match(p.name)) and p.is_dir()]
    return store / f"v{(max(nums) + 1 if nums else 1):03d}"


def _as_array(X) -> np.ndarray:
    return X.to_numpy(dtype=float) if isinstance(X, pd.DataFrame) else np.asarray(X, dtype=float)


def _frame_X(df: pd.DataFrame, columns: Sequence[str]) -> pd.DataFrame:
    X = df.reindex(columns=list(columns))
    bad = [c for c in X.columns if not pd.api.types.is_numeric_dtype(X[c])]
    if bad:
        X[bad] = X[bad].apply(pd.to_numeric, errors="coerce")
    return X.astype(float)


@dataclass
class TrainingDomain:
    """Where the model was trained: per-feature quantiles and a reference sample.

    Attributes
    ----------
    quantiles : DataFrame indexed by feature, columns min, q01, q50, q99, max
    reference : DataFrame, up to 1,000 training feature rows (for drift tests)
    """

    quantiles: pd.DataFrame
    reference: pd.DataFrame

    @classmethod
    def from_features(cls, X: pd.DataFrame, *, n_reference: int = 1000, rng=None) -> "TrainingDomain":
        rng = np.random.default_rng(rng)
        q = X.quantile([0.0, 0.01, 0.5, 0.99, 1.0]).T
        q.columns = ["min", "q01", "q50", "q99", "max"]
        idx = rng.choice(len(X), size=min(n_reference, len(X)), replace=False)
        return cls(q, X.iloc[np.sort(idx)].reset_index(drop=True))

    @property
    def ranges(self) -> dict[str, tuple[float, float]]:
        """feature -> (min, max) seen in training."""
        return {k: (float(r["min"]), float(r["max"])) for k, r in self.quantiles.iterrows()}

    def out_of_range(self, feature_df: pd.DataFrame) -> pd.DataFrame:
        """Boolean frame: True where a value lies outside the training [min, max]."""
        X = _frame_X(feature_df, self.quantiles.index)
        return (X < self.quantiles["min"]) | (X > self.quantiles["max"])

    def to_json(self) -> dict:
        return {k: {c: (None if not np.isfinite(v) else float(v)) for c, v in r.items()}
                for k, r in self.quantiles.iterrows()}

    @classmethod
    def from_json(cls, data: Mapping, reference: pd.DataFrame) -> "TrainingDomain":
        q = pd.DataFrame.from_dict(data, orient="index").astype(float)
        return cls(q[["min", "q01", "q50", "q99", "max"]], reference)


@dataclass
class TargetModel:
    """Everything that predicts one target: centre, scale, optional GP blend and correction, calibration.

    Prediction: mu_sim(x) = w * LightGBM(x) + (1 - w) * GP(x_gp); sigma(x) = max(scale(x), floor);
    with a measured-data correction g the estimate is mu_sim + g(x) and the band is CV+ over the
    correction's fold models (see :class:`models.conformal.ConformalCalibrator`).
    """

    name: str
    central: Any
    scale: Any
    sigma_floor: float
    calibrator: Any
    gp: Any = None
    gp_columns: list[str] = field(default_factory=list)
    gp_weight: float = 0.0  # weight of the GP in the blend (0: LightGBM only)
    gp_fill: list[float] = field(default_factory=list)  # training medians for NaN GP inputs
    correction: Any = None
    lower_bound: float = 0.0
    upper_bound: float | None = None

    def centre_sim(self, X) -> np.ndarray:
        Xn = _as_array(X)
        mu = self.central.predict_array(Xn)
        if self.gp is not None and self.gp_weight > 0:
            mu = (1.0 - self.gp_weight) * mu + self.gp_weight * self.gp.predict_array(self._gp_X(X))
        return mu

    def _gp_X(self, X) -> np.ndarray:
        if not isinstance(X, pd.DataFrame):
            raise ValueError("TargetModel needs a DataFrame with named feature columns")
        G = X[self.gp_columns].to_numpy(dtype=float)
        fill = np.asarray(self.gp_fill, dtype=float)
        return np.where(np.isfinite(G), G, fill[None, :]) if G.size else G

    def sigma(self, X) -> np.ndarray:
        return np.maximum(self.scale.predict_array(_as_array(X)), self.sigma_floor)

    def _corr_X(self, X) -> np.ndarray:
        return self._gp_X(X) if self.gp_columns else _as_array(X)

    def predict(self, X: pd.DataFrame, coverage: float, limit=None) -> dict[str, np.ndarray]:
        mu_sim = self.centre_sim(X)
        s = self.sigma(X)
        if self.correction is not None:
            Xc = self._corr_X(X)
            est = mu_sim + self.correction.predict(Xc)
            centres = mu_sim[:, None] + self.correction.predict_folds(Xc)
        else:
            est, centres = mu_sim, mu_sim
        lo, hi = self.calibrator.interval(centres, s, coverage)
        hi_b = math.inf if self.upper_bound is None else self.upper_bound
        out = {
            "estimate": np.clip(est, self.lower_bound, hi_b),
            # known support: clip finite bounds to it; an infinite band stays infinite (honest)
            "lower": np.where(np.isfinite(lo), np.clip(lo, self.lower_bound, hi_b), lo),
            "upper": np.where(np.isfinite(hi), np.clip(hi, self.lower_bound, hi_b), hi),
        }
        if limit is not None:
            out["exceed"] = self.calibrator.exceedance(centres, s, limit)
        return out


# ---------------------------------------------------------------------------
# the bundle
# ---------------------------------------------------------------------------
class ModelBundle:
    """A fitted, calibrated model for one family (see module docstring).

    Attributes
    ----------
    family : features.family.Family
    family_fingerprint : str
    version : str (``v001``, ...)
    feature_columns : list of str
    coverage : float, nominal band coverage
    calibration_source : "measured" or "simulated"
    targets : dict name -> TargetModel
    detector : models.mismatch.MismatchDetector or None
    checker : models.mismatch.PhysicsChecker or None
    training_domain : TrainingDomain
    metrics : dict
    meta : dict (everything else recorded in bundle.json)
    path : Path or None (where it was loaded from / saved to)
    """

    def __init__(self, *, family, feature_columns, targets, detector=None, checker=None, training_domain=None,
                 coverage=0.9, calibration_source="simulated", version="v001", metrics=None, meta=None,
                 model_card=None, family_toml=None, feature_schema=None):
        self.family = family
        self.family_fingerprint = family.fingerprint
        self.feature_columns = list(feature_columns)
        self.targets = dict(targets)
        self.detector = detector
        self.checker = checker
        self.training_domain = training_domain
        self.coverage = float(coverage)
        self.calibration_source = calibration_source
        self.version = version
        self.metrics = dict(metrics or {})
        self.meta = dict(meta or {})
        self.model_card = model_card
        self.family_toml = family_toml
        self.feature_schema = feature_schema
        self.path: Path | None = None

    def __repr__(self) -> str:
        return (f"ModelBundle(family={self.family.name!r}, version={self.version!r}, "
                f"targets={list(self.targets)}, coverage={self.coverage:g}, calibration={self.calibration_source!r})")

    # -- scoring -----------------------------------------------------------------
    def predict_frame(self, feature_df: pd.DataFrame, *, limit_pct: float | None = None,
                      coverage: float | None = None) -> pd.DataFrame:
        """Estimates, bands, exceedance probability and the out-of-family verdict per row.

        ``limit_pct``: the user's limit on ``max_loss_pct``; ``exceed_probability`` is the
        (conservative) probability that the maximum loss exceeds it (NaN when not given).
        Rows flagged out of family still get their numbers (``in_family`` False, reasons given).
        """
        from waneguide.models.mismatch import combine_mismatch

        if not isinstance(feature_df, pd.DataFrame):
            raise ValueError(f"predict_frame needs a pandas DataFrame of features; got {type(feature_df).__name__}")
        cov = self.coverage if coverage is None else float(coverage)
        X = _frame_X(feature_df, self.feature_columns)
        cols: dict[str, Any] = {}
        exceed = np.full(len(X), np.nan)
        for name in TARGETS:
            if name not in self.targets:
                for suf in ("", "_lower", "_upper"):
                    cols[name + suf] = np.full(len(X), np.nan)
                continue
            lim = limit_pct if (name == "max_loss_pct" and limit_pct is not None) else None
            r = self.targets[name].predict(X, cov, lim)
            cols[name], cols[name + "_lower"], cols[name + "_upper"] = r["estimate"], r["lower"], r["upper"]
            if lim is not None:
                exceed = r["exceed"]
        cols["exceed_probability"] = exceed
        mm = combine_mismatch(self.detector, self.checker, feature_df, self.feature_columns, X=X)
        cols["in_family"] = mm["in_family"].to_numpy(dtype=bool)
        cols["mismatch_p_value"] = mm["mismatch_p_value"].to_numpy(dtype=float)
        cols["mismatch_reasons"] = mm["mismatch_reasons"].to_numpy(dtype=object)
        return pd.DataFrame(cols, index=feature_df.index)

    # -- recalibration -----------------------------------------------------------
    def recalibrate(self, feature_df: pd.DataFrame, targets_df: pd.DataFrame, *, groups=None,
                    random_state: int = 0) -> "ModelBundle":
        """A new bundle version calibrated on measured cases (this one is left untouched).

        For every target column present in ``targets_df``: a residual correction on top of the
        simulated model is chosen by grouped CV (none / bias / GP; groups = ``groups`` or the
        ``path_id`` column, else one group per row), and the band becomes CV+ over its fold
        models (Barber et al. 2021). With fewer than about 1/(1-coverage) cases the band is
        infinite, by the finite-sample rule.
        """
        from waneguide.models.conformal import ConformalCalibrator
        from waneguide.models.residual import ResidualCorrector

        if len(feature_df) != len(targets_df):
            raise ValueError(f"recalibrate: {len(feature_df)} feature rows but {len(targets_df)} target rows")
        present = [t for t in TARGETS if t in targets_df.columns and t in self.targets]
        if not present:
            raise ValueError(f"recalibrate: targets_df has none of the target columns {list(TARGETS)}; "
                             f"got {list(targets_df.columns)}")
        if groups is None:
            groups = (feature_df["path_id"].astype(str).to_numpy() if "path_id" in feature_df
                      else np.arange(len(feature_df)))
        groups = np.asarray(groups)
        X = _frame_X(feature_df, self.feature_columns)
        new = copy.copy(self)
        new.targets = dict(self.targets)
        report = {}
        for t in present:
            y = pd.to_numeric(targets_df[t], errors="coerce").to_numpy(dtype=float)
            ok = np.isfinite(y)
            if ok.sum() < 2:
                raise ValueError(f"recalibrate: target {t} has {int(ok.sum())} usable values; need at least 2")
            tm = copy.copy(self.targets[t])
            Xo = X[ok]
            mu = tm.centre_sim(Xo)
            s = tm.sigma(Xo)
            corr = ResidualCorrector(random_state=random_state).fit(tm._corr_X(Xo), y[ok] - mu, groups[ok])
            if corr.choice_ == "none":
                # the simulated model is independent of these cases: plain split conformal on all of them
                tm.correction = None
                tm.calibrator = ConformalCalibrator.from_predictions(y[ok], mu, s)
            else:
                fold_pred = corr.predict_folds(tm._corr_X(Xo))[np.arange(ok.sum()), corr.folds_]
                tm.correction = corr
                tm.calibrator = ConformalCalibrator.from_predictions(y[ok], mu + fold_pred, s, folds=corr.folds_)
            new.targets[t] = tm
            report[t] = {"n": int(ok.sum()), "correction": corr.choice_, "cv_mae": corr.cv_mae_}
        new.calibration_source = "measured"
        m = _VERSION_RE.match(self.version)
        new.version = f"v{int(m.group(1)) + 1:03d}" if m else self.version + "-recal"
        new.meta = dict(self.meta, parent_version=self.version, recalibration=report,
                        created_at=_dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"))
        new.metrics = dict(self.metrics, recalibration=report)
        new.path = None
        from waneguide.models.card import render_model_card

        new.model_card = render_model_card(new)
        return new

    # -- persistence ---------------------------------------------------------------
    def save_version(self, store: str | os.PathLike) -> Path:
        """Save into the next free ``vNNN`` folder of ``store``; the version string follows it."""
        target = next_version_dir(store)
        self.version = target.name
        return self.save(target)

    def save(self, path: str | os.PathLike) -> Path:
        """Write the bundle to a new directory ``path`` (refuses an existing non-empty one)."""
        import skops.io as sio

        path = Path(path)
        if path.exists() and (not path.is_dir() or any(path.iterdir())):
            raise ValueError(f"bundle directory {str(path)!r} already exists and is not empty; "
                             f"bundles are never overwritten: choose a new directory (or save_version(store))")
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent))
        try:
            self._write(tmp, sio)
            if path.exists():
                path.rmdir()  # empty by the check above
            os.replace(tmp, path)
        except BaseException:
            shutil.rmtree(tmp, ignore_errors=True)
            raise
        self.path = path
        return path

    def _write(self, d: Path, sio) -> None:
        from waneguide.models.card import render_model_card

        arrays: dict[str, np.ndarray] = {}
        tmeta = {}
        for name, tm in self.targets.items():
            (d / f"lgbm_{name}_centre.txt").write_text(tm.central.to_text())
            (d / f"lgbm_{name}_scale.txt").write_text(tm.scale.to_text())
            arrays.update(tm.calibrator.to_arrays(f"{name}__"))
            tmeta[name] = {
                "sigma_floor": tm.sigma_floor, "gp_columns": tm.gp_columns, "gp_weight": tm.gp_weight,
                "gp_fill": list(map(float, tm.gp_fill)), "lower_bound": tm.lower_bound,
                "upper_bound": tm.upper_bound, "central_params": _plain_params(tm.central),
                "scale_params": _plain_params(tm.scale), "has_gp": tm.gp is not None,
                "has_correction": tm.correction is not None,
            }
        np.savez(d / "calibration.npz", **arrays)
        sio.dump({"gp": {n: tm.gp for n, tm in self.targets.items()},
                  "correction": {n: tm.correction for n, tm in self.targets.items()},
                  "detector": self.detector}, d / "sklearn_parts.skops")
        (d / "family.toml").write_text(self.family_toml or family_to_toml(self.family))
        (d / "feature_schema.json").write_text(json.dumps(
            self.feature_schema or {"feature_columns": self.feature_columns}, indent=2, default=str))
        if self.training_domain is not None:
            (d / "training_domain.json").write_text(json.dumps(self.training_domain.to_json(), indent=2))
            self.training_domain.reference.to_parquet(d / "reference_sample.parquet", index=False)
        (d / "metrics.json").write_text(json.dumps(_jsonable(self.metrics), indent=2, allow_nan=False))
        (d / "model_card.md").write_text(self.model_card or render_model_card(self))
        meta = dict(self.meta)
        meta.update({
            "format": BUNDLE_FORMAT, "schema_version": BUNDLE_SCHEMA_VERSION, "version": self.version,
            "family_name": self.family.name, "family_fingerprint": self.family_fingerprint,
            "feature_columns": self.feature_columns, "coverage": self.coverage,
            "calibration_source": self.calibration_source, "targets": tmeta,
            "physics": ({"state": self.checker.state, "params": self.checker.params()} if self.checker else None),
        })
        meta.setdefault("created_at", _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"))
        (d / "bundle.json").write_text(json.dumps(_jsonable(meta), indent=2, allow_nan=False))
        files = sorted(p.name for p in d.iterdir() if p.is_file())
        manifest = {"format": BUNDLE_FORMAT, "algorithm": "sha256",
                    "files": {f: _sha256(d / f) for f in files}}
        (d / "manifest.json").write_text(json.dumps(manifest, indent=2))


def _plain_params(est) -> dict:
    p = est.get_params()
    return {k: (list(map(list, v)) if k == "monotone_rules" else v) for k, v in p.items()}


def _jsonable(obj):
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
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


# ---------------------------------------------------------------------------
# loading
# ---------------------------------------------------------------------------
def _resolve_dir(path: Path) -> Path:
    if (path / "bundle.json").is_file():
        return path
    if path.is_dir():
        versions = sorted((int(m.group(1)), p) for p in path.iterdir()
                          if (m := _VERSION_RE.match(p.name)) and (p / "bundle.json").is_file())
        if versions:
            return versions[-1][1]
    raise ValueError(f"{str(path)!r} is not a waneguide model bundle: no bundle.json in it and no vNNN version "
                     f"folders. Give the folder written by `waneguide train --out`")


def load_bundle(path: str | os.PathLike) -> ModelBundle:
    """Load and verify a bundle directory (or the newest ``vNNN`` of a model store).

    Raises
    ------
    ValueError
        Not a bundle, foreign format or schema, a file missing or altered (hash mismatch),
        family fingerprint mismatch, or an untrusted type in the scikit-learn parts.
    """
    import skops.io as sio

    from waneguide.features.family import load_family

    from waneguide.models.conformal import ConformalCalibrator
    from waneguide.models.gbm import MonotoneGBMRegressor
    from waneguide.models.mismatch import PhysicsChecker

    p = Path(path)
    if not p.exists():
        raise ValueError(f"model bundle {str(p)!r} does not exist")
    d = _resolve_dir(p)
    try:
        meta = json.loads((d / "bundle.json").read_text())
        manifest = json.loads((d / "manifest.json").read_text())
    except FileNotFoundError as exc:
        raise ValueError(f"bundle {str(d)!r} is incomplete: {Path(exc.filename).name} is missing") from None
    except json.JSONDecodeError as exc:
        raise ValueError(f"bundle {str(d)!r} is damaged: {exc}") from None
    if meta.get("format") != BUNDLE_FORMAT or manifest.get("format") != BUNDLE_FORMAT:
        raise ValueError(f"{str(d)!r} is not a waneguide model bundle (format {meta.get('format')!r}, "
                         f"expected {BUNDLE_FORMAT!r}); refusing to load a foreign model")
    if meta.get("schema_version") != BUNDLE_SCHEMA_VERSION:
        raise ValueError(f"bundle {str(d)!r} has schema version {meta.get('schema_version')!r}; this waneguide "
                         f"reads version {BUNDLE_SCHEMA_VERSION}. Retrain with this version")
    files = manifest.get("files") or {}
    for needed in ("bundle.json", "family.toml", "sklearn_parts.skops", "calibration.npz"):
        if needed not in files:
            raise ValueError(f"bundle {str(d)!r}: the manifest does not list {needed}; refusing to load")
    for name, digest in files.items():
        f = d / name
        if Path(name).name != name:
            raise ValueError(f"bundle {str(d)!r}: manifest entry {name!r} is not a plain file name")
        if not f.is_file():
            raise ValueError(f"bundle {str(d)!r} is incomplete: {name} is missing")
        if _sha256(f) != digest:
            raise ValueError(f"bundle {str(d)!r} was altered: {name} does not match its SHA-256 in manifest.json; "
                             f"refusing to load. Restore the bundle from its source or retrain")
    family = load_family(d / "family.toml")
    if family.fingerprint != meta.get("family_fingerprint"):
        raise ValueError(f"bundle {str(d)!r}: family.toml has fingerprint {family.fingerprint}, but the bundle was "
                         f"trained for {meta.get('family_fingerprint')}; refusing to load")
    untrusted = sio.get_untrusted_types(file=d / "sklearn_parts.skops")
    bad = sorted(set(untrusted) - set(TRUSTED_TYPES))
    if bad:
        raise ValueError(f"bundle {str(d)!r}: sklearn_parts.skops contains types outside the trust list: "
                         f"{', '.join(bad)}; refusing to load")
    parts = sio.load(d / "sklearn_parts.skops", trusted=list(untrusted))
    with np.load(d / "calibration.npz", allow_pickle=False) as npz:
        arrays = {k: npz[k] for k in npz.files}
    cols = list(meta["feature_columns"])
    targets = {}
    for name, tmeta in meta["targets"].items():
        cp = dict(tmeta["central_params"])
        sp = dict(tmeta["scale_params"])
        for pp in (cp, sp):
            pp["monotone_rules"] = tuple(tuple(r) for r in pp.get("monotone_rules", ()))
        central = MonotoneGBMRegressor.from_text((d / f"lgbm_{name}_centre.txt").read_text(), params=cp,
                                                 feature_names=cols)
        scale = MonotoneGBMRegressor.from_text((d / f"lgbm_{name}_scale.txt").read_text(), params=sp,
                                               feature_names=cols)
        ub = tmeta.get("upper_bound")
        targets[name] = TargetModel(
            name=name, central=central, scale=scale, sigma_floor=float(tmeta["sigma_floor"]),
            calibrator=ConformalCalibrator.from_arrays(arrays, f"{name}__"), gp=parts["gp"].get(name),
            gp_columns=list(tmeta["gp_columns"]), gp_weight=float(tmeta["gp_weight"]),
            gp_fill=list(tmeta["gp_fill"]), correction=parts["correction"].get(name),
            lower_bound=float(tmeta["lower_bound"]), upper_bound=None if ub is None else float(ub),
        )
    checker = None
    if meta.get("physics"):
        checker = PhysicsChecker.from_state(family, meta["physics"]["state"], **meta["physics"]["params"])
    domain = None
    if (d / "training_domain.json").is_file() and "training_domain.json" in files:
        ref = (pd.read_parquet(d / "reference_sample.parquet") if "reference_sample.parquet" in files
               else pd.DataFrame(columns=cols))
        domain = TrainingDomain.from_json(json.loads((d / "training_domain.json").read_text()), ref)
    rest = {k: v for k, v in meta.items() if k not in ("targets", "physics")}
    b = ModelBundle(
        family=family, feature_columns=cols, targets=targets, detector=parts.get("detector"), checker=checker,
        training_domain=domain, coverage=float(meta["coverage"]), calibration_source=meta["calibration_source"],
        version=str(meta["version"]), metrics=json.loads((d / "metrics.json").read_text()) if "metrics.json" in files
        else {}, meta=rest, model_card=(d / "model_card.md").read_text() if "model_card.md" in files else None,
        family_toml=(d / "family.toml").read_text(),
        feature_schema=json.loads((d / "feature_schema.json").read_text()) if "feature_schema.json" in files else None,
    )
    b.path = d
    return b
