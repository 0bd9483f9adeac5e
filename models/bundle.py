"""The model bundle: everything needed to score one stiffener family, in one directory.

Layout (``BUNDLE_FORMAT``, schema :data:`BUNDLE_SCHEMA_VERSION`)::

    bundle.json            format marker, schema/bundle version, family fingerprint, targets,
                           coverage, calibration source, feature columns, per-target settings
    manifest.json          bundle version and the SHA-256 of every other file (verified on load)
    family.toml            the family definition the model was trained for
    feature_schema.json    feature columns (+ units/descriptions when the schema provides them)
    training_domain.json   per-feature ranges and quantiles of the training data
    reference_sample.parquet   a sample of training feature rows (drift checks)
    metrics.json           evaluation figures
    model_card.md          Markdown model card with cautions (rendered when the bundle is saved,
                           so it names the version it was saved as)
    lgbm_<target>_centre.txt, lgbm_<target>_scale.txt   LightGBM native text models
    sklearn_parts.skops    GP, residual correction and mismatch detector (skops, trusted types only)
    calibration.npz        conformal residuals and folds (plain arrays, no pickle)

Safety on load: the format marker and schema version must match, every file in the
manifest must hash to its recorded value, the family file must reproduce the
recorded fingerprint, and the skops file may contain only the types in
:data:`TRUSTED_TYPES`. Anything else is refused with an InputError (a ValueError) that says why.
A hash manifest detects corruption and edits, not a deliberate forger who also
rewrites the manifest; skops with a fixed trust list is what keeps loading from
running foreign code.

Nothing is overwritten: :meth:`ModelBundle.save` writes into a fresh directory
(built under a temporary name and renamed into place) and refuses an existing
non-empty one; :meth:`ModelBundle.save_version` puts it into the next free
``vNNN`` directory of a model store.

Modules: the per-target arithmetic (:class:`TargetModel`, :class:`TrainingDomain`) lives in
``models/_target.py``, the file layout, writing and verified reading in ``models/_bundle_io.py``;
this module puts them together and is the public import path of all of them.
"""
from __future__ import annotations

import copy
import datetime as _dt
import os
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from waneguide.core.errors import InputError
from waneguide.models._bundle_io import (
    BUNDLE_FORMAT,
    BUNDLE_SCHEMA_VERSION,
    TRUSTED_TYPES,
    IN_SERVICE_FILE,
    VERSION_RE,
    family_to_toml,
    in_service_version,
    jsonable,
    next_version_dir,
    read_bundle_dir,
    set_in_service,
    write_bundle_dir,
)
from waneguide.models._target import TARGETS, TargetModel, TrainingDomain, frame_X
from waneguide.models.card import render_model_card
from waneguide.models.conformal import ConformalCalibrator
from waneguide.models.mismatch import combine_mismatch
from waneguide.models.residual import ResidualCorrector

__all__ = [
    "IN_SERVICE_FILE",
    "in_service_version",
    "set_in_service",
    "BUNDLE_FORMAT",
    "BUNDLE_SCHEMA_VERSION",
    "TARGETS",
    "TRUSTED_TYPES",
    "ModelBundle",
    "TargetModel",
    "TrainingDomain",
    "load_bundle",
    "family_to_toml",
    "jsonable",
    "next_version_dir",
]


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
    model_id : str or None
        Content identity of the saved bundle (hash of its manifest's file hashes; set by
        :meth:`save` and :func:`load_bundle`); the history keys estimates by it.
    """

    def __init__(self, *, family, feature_columns, targets, detector=None, checker=None, training_domain=None,
                 coverage=0.9, calibration_source="simulated", version="v001", metrics=None, meta=None,
                 model_card=None, family_toml=None, feature_schema=None, model_id=None):
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
        self.model_id = model_id
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
        if not isinstance(feature_df, pd.DataFrame):
            raise InputError(f"predict_frame needs a pandas DataFrame of features; got {type(feature_df).__name__}")
        cov = self.coverage if coverage is None else float(coverage)
        X = frame_X(feature_df, self.feature_columns)
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

    def exceedance(self, feature_df: pd.DataFrame, limit_pct: float) -> np.ndarray:
        """Probability that the maximum loss exceeds ``limit_pct`` [% of nominal], per row.

        The same number :meth:`predict_frame` gives for that limit; used when a stored estimate
        is shown again for another limit than the one it was scored with.
        """
        if "max_loss_pct" not in self.targets:
            return np.full(len(feature_df), np.nan)
        X = frame_X(feature_df, self.feature_columns)
        return np.asarray(self.targets["max_loss_pct"].predict(X, self.coverage, float(limit_pct))["exceed"], float)

    # -- recalibration -----------------------------------------------------------
    def recalibrate(self, feature_df: pd.DataFrame, targets_df: pd.DataFrame, *, groups=None,
                    random_state: int = 0) -> "ModelBundle":
        """A new bundle version calibrated on measured cases (this one is left untouched, nothing is saved).

        For every target column present in ``targets_df``: a residual correction on top of the
        simulated model is chosen by grouped CV (none / bias / GP; groups = ``groups`` or the
        ``path_id`` column, else one group per row), and the band becomes CV+ over its fold
        models (Barber et al. 2021). With fewer than about 1/(1-coverage) cases the band is
        infinite, by the finite-sample rule.
        """
        if len(feature_df) != len(targets_df):
            raise InputError(f"recalibrate: {len(feature_df)} feature rows but {len(targets_df)} target rows")
        present = [t for t in TARGETS if t in targets_df.columns and t in self.targets]
        if not present:
            raise InputError(f"recalibrate: targets_df has none of the target columns {list(TARGETS)}; "
                             f"got {list(targets_df.columns)}")
        if groups is None:
            groups = (feature_df["path_id"].astype(str).to_numpy() if "path_id" in feature_df
                      else np.arange(len(feature_df)))
        groups = np.asarray(groups)
        X = frame_X(feature_df, self.feature_columns)
        new = copy.copy(self)
        new.targets = dict(self.targets)
        report = {}
        for t in present:
            y = pd.to_numeric(targets_df[t], errors="coerce").to_numpy(dtype=float)
            ok = np.isfinite(y)
            if ok.sum() < 2:
                raise InputError(f"recalibrate: target {t} has {int(ok.sum())} usable values; need at least 2")
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
        m = VERSION_RE.match(self.version)
        new.version = f"v{int(m.group(1)) + 1:03d}" if m else self.version + "-recal"
        new.meta = dict(self.meta, parent_version=self.version, recalibration=report,
                        created_at=_dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"))
        new.metrics = dict(self.metrics, recalibration=report)
        new.path = None
        new.model_card = None  # rendered when the new version is saved
        return new

    # -- persistence ---------------------------------------------------------------
    def save_version(self, store: str | os.PathLike) -> Path:
        """Save into the next free ``vNNN`` folder of ``store``; the version string follows it.

        The folder is claimed with an atomic ``mkdir`` before anything is written, so two
        trainings into one store at the same time get two versions (the later one takes the
        next number) and neither loses its model.
        """
        Path(store).mkdir(parents=True, exist_ok=True)
        for _ in range(1000):
            target = next_version_dir(store)
            try:
                target.mkdir()
            except FileExistsError:  # taken by a concurrent save since we looked: try the next one
                continue
            break
        else:  # pragma: no cover - a thousand concurrent claims
            raise InputError(f"could not claim a new version folder in {str(store)!r}; retry")
        previous = self.version
        self.version = target.name
        try:
            return self.save(target)
        except BaseException:
            self.version = previous
            if target.is_dir() and not any(target.iterdir()):
                target.rmdir()  # give the claimed number back
            raise

    def save(self, path: str | os.PathLike) -> Path:
        """Write the bundle to a new directory ``path`` (refuses an existing non-empty one).

        The model card is rendered here, once, from the bundle as it is saved (its version
        included), so the card, ``bundle.json`` and ``manifest.json`` always agree.
        """
        previous = self.model_card
        self.model_card = render_model_card(self)
        try:
            self.path = write_bundle_dir(self, path)
        except BaseException:
            self.model_card = previous
            raise
        return self.path


def load_bundle(path: str | os.PathLike) -> ModelBundle:
    """Load and verify a bundle directory (or the newest ``vNNN`` of a model store).

    Raises
    ------
    MissingInputError
        ``path`` does not exist.
    InputError
        Not a bundle, foreign format or schema, a file missing or altered (hash mismatch),
        family fingerprint mismatch, or an untrusted type in the scikit-learn parts.
    """
    kwargs, d = read_bundle_dir(path)
    b = ModelBundle(**kwargs)
    b.path = d
    return b
