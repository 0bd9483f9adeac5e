"""Fitting a bundle on a feature table (arithmetic only: no files, no campaign, no tracking).

Splits (all grouped by specimen, so a specimen never sits on two sides): calibration
(``calibration_fraction``, conformal scores only) / training. Inside the training part,
``oof_folds`` grouped folds give the out-of-fold residuals for the scale model and the
out-of-fold predictions that choose the LightGBM/GP blend.
"""
from __future__ import annotations

import logging
import time
from dataclasses import dataclass
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd
from tqdm.auto import tqdm

from waneguide.core.errors import InputError
from waneguide.features.schema import METADATA_COLUMNS
from waneguide.models.blend import blend_weights, grouped_folds
from waneguide.models.bundle import TARGETS, ModelBundle, TargetModel, TrainingDomain, jsonable
from waneguide.models.conformal import ConformalCalibrator, conformal_rank, grouped_split
from waneguide.models.gbm import (
    DEFAULT_MONOTONE_RULES,
    MonotoneGBMRegressor,
    monotonicity_audit,
    resolve_monotone_constraints,
)
from waneguide.models.gp import StandardisedGPRegressor, farthest_point_subset
from waneguide.models.mismatch import (
    PLATE_FEATURES,
    MismatchDetector,
    PhysicsChecker,
    degenerate_features,
    feature_resolution,
)

__all__ = ["TrainConfig", "default_feature_columns", "fit_bundle"]

log = logging.getLogger(__name__)

#: Identity columns of a simulated campaign's case table: never model inputs.
_CASE_ID_COLUMNS = ("case_id", "specimen_id")


@dataclass
class TrainConfig:
    """Fitting settings (defaults are the ones the benchmark times)."""

    coverage: float = 0.9
    test_fraction: float = 0.2
    calibration_fraction: float = 0.2
    false_alarm_rate: float = 0.01  # statistical detector (conformal p-value threshold)
    physics_false_alarm_rate: float = 0.005  # plate check (per path) and negative-loss check (per capture), each
    n_estimators: int = 300
    learning_rate: float = 0.05
    num_leaves: int = 31
    min_child_samples: int = 20
    monotone_rules: Sequence[tuple[str, int]] | None = None  # None: models.gbm.DEFAULT_MONOTONE_RULES
    gp_points: int = 600
    gp_features: int = 6
    oof_folds: int = 3
    # LightGBM threads. 1 by default: OpenMP threads spin-wait, and on a shared 2-core machine two of
    # them ran 10-100x slower than one (measured); parallelism, if any, goes over targets instead
    n_jobs: int = 1
    mismatch_estimators: int = 100
    monotone_tolerance: float = 1e-6


def default_feature_columns(df: pd.DataFrame, targets: Sequence[str] = ()) -> list[str]:
    """Numeric columns of ``df`` that are neither metadata nor targets."""
    skip = set(METADATA_COLUMNS) | set(_CASE_ID_COLUMNS) | set(targets) | set(TARGETS)
    return [c for c in df.columns if c not in skip and pd.api.types.is_numeric_dtype(df[c])
            and not pd.api.types.is_bool_dtype(df[c])]


def _target_bounds(family, name: str) -> tuple[float, float | None]:
    """Physical support of a target: a loss in % lies in [0, 100], in mm in [0, flange thickness]."""
    if name == "max_loss_mm":
        return 0.0, float(family.section.flange_thickness_mm)
    return 0.0, 100.0


@dataclass
class _Fold:
    """What every target's fit shares: the training part, its folds and the seed stream."""

    Xtr: pd.DataFrame
    folds: np.ndarray
    mono_feats: list[tuple[str, int]]
    seed: Any  # callable -> int, drawn in a fixed order so that a fit is reproducible
    cfg: TrainConfig


def _gp_blend(sh: _Fold, name: str, cols: list[str], ytr, oof, central, scale, sigma_floor, diag) -> dict:
    """GP on the most important features (space-filling subset) and its blend weight with LightGBM.

    Returns the GP keywords of :class:`TargetModel` (no GP when it does not earn its place or
    when every blend breaks a declared physics sign on the probe grid).
    """
    cfg, Xtr, folds, seed = sh.cfg, sh.Xtr, sh.folds, sh.seed
    gain = central.booster_.feature_importance("gain")
    order = [cols[j] for j in np.argsort(-gain) if gain[j] > 0][: cfg.gp_features]
    if not order or cfg.gp_points < 10:
        return {"gp": None, "gp_columns": [], "gp_weight": 0.0, "gp_fill": []}
    G = Xtr[order].to_numpy(dtype=float)
    fill = np.nanmedian(G, axis=0)
    fill = np.where(np.isfinite(fill), fill, 0.0)
    G = np.where(np.isfinite(G), G, fill)
    gp = StandardisedGPRegressor(max_points=cfg.gp_points, random_state=seed()).fit(G, ytr, feature_labels=order)
    hp = gp.hyperparameters()
    init = {"length_scale": gp.length_scales_, "constant": gp.constant_, "noise": gp.noise_variance_}
    oof_gp = np.empty(len(ytr))
    for k in range(int(folds.max()) + 1):
        te = folds == k
        Gz = (G[~te] - gp.x_mean_) / gp.x_scale_
        sub = farthest_point_subset(Gz, cfg.gp_points, seed())
        # fixed hyperparameters from the full fit: re-optimising per fold costs 3x and moves little
        fm = StandardisedGPRegressor(max_points=cfg.gp_points, optimize=False, kernel_init=init,
                                     random_state=seed()).fit(G[~te][sub], ytr[~te][sub])
        oof_gp[te] = fm.predict(G[te])
    w, info = blend_weights(np.column_stack([oof, oof_gp]), ytr)
    gp_w = float(w[1])
    audit: dict = {}
    if 0 < gp_w and sh.mono_feats:
        # the GP is unconstrained: keep the largest blend weight whose blend still obeys every
        # declared physics sign on a probe grid (else LightGBM alone keeps the guarantee)
        for w_try in (gp_w, gp_w / 2, gp_w / 4, 0.0):
            if w_try == 0.0:
                log.warning("target %s: every GP blend breaks a physics sign on the probe grid (%s); "
                            "using LightGBM alone", name, audit)
                gp_w = 0.0
                break
            probe = TargetModel(name, central, scale, sigma_floor, None, gp=gp, gp_columns=order,
                                gp_weight=w_try, gp_fill=list(fill))
            audit = {c: monotonicity_audit(probe.centre_sim, Xtr, c, s, rng=seed()) for c, s in sh.mono_feats}
            if max(audit.values()) <= cfg.monotone_tolerance:
                gp_w = w_try
                break
    diag["gp"][name] = dict(hp, columns=order, n_points=int(len(gp.subset_index_)))
    diag["blend"][name] = {"oof_rmse_lgbm": info["rmse"][0], "oof_rmse_gp": info["rmse"][1],
                           "oof_rmse_blend": info["blend_rmse"], "gp_weight": gp_w, "monotone_audit_blend": audit}
    if gp_w == 0.0:
        return {"gp": None, "gp_columns": [], "gp_weight": 0.0, "gp_fill": []}
    return {"gp": gp, "gp_columns": order, "gp_weight": gp_w, "gp_fill": list(fill)}


def _fit_target(sh: _Fold, family, name: str, cols: list[str], ytr, Xcal, ycal, gbm_kw: dict, diag) -> TargetModel:
    """Central LightGBM, out-of-fold scale model, optional GP blend and split-conformal calibration."""
    cfg, Xtr, folds, seed = sh.cfg, sh.Xtr, sh.folds, sh.seed
    central = MonotoneGBMRegressor(random_state=seed(), **gbm_kw).fit(Xtr, ytr)
    oof = np.empty(len(ytr))
    for k in range(int(folds.max()) + 1):
        te = folds == k
        m = MonotoneGBMRegressor(random_state=seed(), **gbm_kw).fit(Xtr[~te], ytr[~te])
        oof[te] = m.predict(Xtr[te])
    scale_kw = dict(gbm_kw, monotone_rules=(), n_estimators=max(50, cfg.n_estimators // 3))
    scale = MonotoneGBMRegressor(random_state=seed(), **scale_kw).fit(Xtr, np.abs(ytr - oof))
    sigma_floor = max(1e-3 * float(np.std(ytr)), 1e-9)
    gp_kw = _gp_blend(sh, name, cols, ytr, oof, central, scale, sigma_floor, diag)
    lo_b, hi_b = _target_bounds(family, name)
    tm = TargetModel(name, central, scale, sigma_floor, None, lower_bound=lo_b, upper_bound=hi_b, **gp_kw)
    tm.calibrator = ConformalCalibrator.from_predictions(ycal, tm.centre_sim(Xcal), tm.sigma(Xcal))
    return tm


def fit_bundle(family, features: pd.DataFrame, targets: pd.DataFrame, groups, *, config: TrainConfig | None = None,
               feature_columns: Sequence[str] | None = None, random_state: int = 0, progress: bool = False,
               family_toml: str | None = None, feature_schema: Mapping | None = None, meta: Mapping | None = None):
    """Fit every target model, the mismatch detector and the calibration; return a ModelBundle.

    Parameters
    ----------
    family : waneguide.features.family.Family
    features : DataFrame, one row per case
    targets : DataFrame with (some of) ``max_loss_pct, max_loss_mm, mean_loss_pct``
    groups : array-like, CV group of each row (simulated specimen)
    config : TrainConfig
    feature_columns : columns to use (default: :func:`default_feature_columns`)

    Returns
    -------
    (ModelBundle, dict of fitting diagnostics). The bundle is not saved (its version is the
    default ``v001`` until :meth:`ModelBundle.save_version` gives it its place in a store).
    """
    cfg = config or TrainConfig()
    conformal_rank(1, cfg.coverage)
    if len(features) != len(targets):
        raise InputError(f"features has {len(features)} rows but targets has {len(targets)}; give one target "
                         "row per feature row")
    candidates = list(feature_columns) if feature_columns is not None else default_feature_columns(features)
    if not candidates:
        raise InputError("no numeric feature columns to train on; check the feature table")
    names = [t for t in TARGETS if t in targets.columns]
    if not names:
        raise InputError(f"targets has none of the target columns {list(TARGETS)}; got {list(targets.columns)}")
    rng = np.random.default_rng(random_state)
    seed = lambda: int(rng.integers(2**31 - 1))  # noqa: E731
    X_all = features.reindex(columns=candidates).apply(pd.to_numeric, errors="coerce").astype(float)
    X_all = X_all.reset_index(drop=True)
    # a feature with no usable spread in the campaign (constant, or pinned at a search-grid bound)
    # carries nothing to learn and turns any other value in the field into a huge z: left out
    dropped = degenerate_features(X_all)
    cols = [c for c in candidates if c not in dropped]
    if not cols:
        raise InputError(f"every feature column is degenerate on the training data ({dropped}); train on a "
                         "campaign whose cases vary")
    for c, why in dropped.items():
        log.info("feature %s left out: %s", c, why)
    X = X_all[cols]
    Y = targets.reset_index(drop=True)
    groups = np.asarray(groups)
    cal = grouped_split(groups, cfg.calibration_fraction, seed())
    tr = ~cal
    Xtr, Xcal, gtr = X[tr].reset_index(drop=True), X[cal].reset_index(drop=True), groups[tr]
    folds = grouped_folds(gtr, cfg.oof_folds, seed())
    rules = DEFAULT_MONOTONE_RULES if cfg.monotone_rules is None else tuple(cfg.monotone_rules)
    cons = resolve_monotone_constraints(cols, rules, len(cols))
    sh = _Fold(Xtr=Xtr, folds=folds, mono_feats=[(c, s) for c, s in zip(cols, cons) if s], seed=seed, cfg=cfg)
    gbm_kw = dict(n_estimators=cfg.n_estimators, learning_rate=cfg.learning_rate, num_leaves=cfg.num_leaves,
                  min_child_samples=cfg.min_child_samples, n_jobs=cfg.n_jobs, monotone_rules=rules)
    diag: dict[str, Any] = {"n_train": int(tr.sum()), "n_calibration": int(cal.sum()),
                            "monotone": dict(sh.mono_feats), "gp": {}, "blend": {}, "timings_s": {}}
    tmodels = {}
    for name in tqdm(names, desc="fitting targets", disable=not progress):
        t0 = time.perf_counter()
        y_all = pd.to_numeric(Y[name], errors="coerce").to_numpy(dtype=float)
        ytr, ycal = y_all[tr], y_all[cal]
        if not (np.all(np.isfinite(ytr)) and np.all(np.isfinite(ycal))):
            raise InputError(f"target {name} has missing or non-numeric values; every case needs a value")
        tmodels[name] = _fit_target(sh, family, name, cols, ytr, Xcal, ycal, gbm_kw, diag)
        diag["timings_s"][name] = time.perf_counter() - t0
    t0 = time.perf_counter()
    det_cols = [c for c in cols if c not in PLATE_FEATURES] or cols  # the plate is the physics check's
    detector = MismatchDetector(false_alarm_rate=cfg.false_alarm_rate, n_estimators=cfg.mismatch_estimators,
                                scale_floor=feature_resolution(det_cols, family),
                                random_state=seed()).fit(Xtr[det_cols], groups=gtr)
    checker = PhysicsChecker(family, false_alarm_rate=cfg.physics_false_alarm_rate).fit(
        features.reset_index(drop=True)[tr], targets=Y[tr])
    diag["timings_s"]["mismatch"] = time.perf_counter() - t0
    domain = TrainingDomain.from_features(X_all[tr].reset_index(drop=True), rng=seed())
    bundle = ModelBundle(
        family=family, feature_columns=cols, targets=tmodels, detector=detector, checker=checker,
        training_domain=domain, coverage=cfg.coverage, calibration_source="simulated",
        metrics={"fit": jsonable(diag)},
        meta=dict(meta or {}, config=jsonable(cfg.__dict__), dropped_features=dropped),
        family_toml=family_toml, feature_schema=dict(feature_schema) if feature_schema else None,
    )
    bundle.metrics["gp"] = {t: {"bound_hits": r.get("bound_hits", [])} for t, r in diag["gp"].items()}
    return bundle, diag
