"""Training pipeline: features -> fit -> calibrate -> evaluate -> bundle -> tracked run.

:func:`fit_bundle` works on any feature table plus target columns (it is what the
tests and the benchmark drive); :func:`train_model` adds the campaign, the
feature extraction, the held-out evaluation, measured-data recalibration, the
shifted-geometry mismatch study and MLflow tracking.

Splits (all grouped by specimen, so a specimen never sits on two sides):
test (``test_fraction``, evaluation only) / calibration (``calibration_fraction``
of the rest, conformal scores only) / training. Inside the training part, 3
grouped folds give the out-of-fold residuals for the scale model and the
out-of-fold predictions that choose the LightGBM/GP blend.
"""
from __future__ import annotations

import logging
import math
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

__all__ = ["TrainConfig", "TrainResult", "fit_bundle", "evaluate_bundle", "default_feature_columns"]

log = logging.getLogger(__name__)

#: Columns of a feature table that are metadata, never model inputs.
METADATA_COLUMNS = ("file", "path_id", "captured_at", "quality_flags", "case_id", "specimen_id")


@dataclass
class TrainConfig:
    """Fitting settings (defaults are the ones the benchmark times)."""

    coverage: float = 0.9
    test_fraction: float = 0.2
    calibration_fraction: float = 0.2
    false_alarm_rate: float = 0.01
    n_estimators: int = 300
    learning_rate: float = 0.05
    num_leaves: int = 31
    min_child_samples: int = 20
    monotone_rules: Sequence[tuple[str, int]] | None = None  # None: models.gbm.DEFAULT_MONOTONE_RULES
    gp_points: int = 600
    gp_features: int = 6
    oof_folds: int = 3
    n_jobs: int = 2
    mismatch_estimators: int = 100
    monotone_tolerance: float = 1e-6


@dataclass
class TrainResult:
    """What :func:`train_model` returns."""

    bundle_path: Path
    metrics: dict
    bundle: Any = None
    run_id: str | None = None
    model_version: str | None = None
    messages: list[str] = field(default_factory=list)


def default_feature_columns(df: pd.DataFrame, targets: Sequence[str] = ()) -> list[str]:
    """Numeric columns of ``df`` that are neither metadata nor targets."""
    from models.bundle import TARGETS

    skip = set(METADATA_COLUMNS) | set(targets) | set(TARGETS)
    return [c for c in df.columns if c not in skip and pd.api.types.is_numeric_dtype(df[c])
            and not pd.api.types.is_bool_dtype(df[c])]


def _target_bounds(family, name: str) -> tuple[float, float | None]:
    if name == "max_loss_mm":
        return 0.0, float(family.section.flange_thickness_mm)
    return 0.0, 100.0


def fit_bundle(family, features: pd.DataFrame, targets: pd.DataFrame, groups, *, config: TrainConfig | None = None,
               feature_columns: Sequence[str] | None = None, random_state: int = 0, progress: bool = False,
               family_toml: str | None = None, feature_schema: Mapping | None = None, meta: Mapping | None = None):
    """Fit every target model, the mismatch detector and the calibration; return a ModelBundle.

    Parameters
    ----------
    family : features.family.Family
    features : DataFrame, one row per case
    targets : DataFrame with (some of) ``max_loss_pct, max_loss_mm, mean_loss_pct``
    groups : array-like, CV group of each row (simulated specimen)
    config : TrainConfig
    feature_columns : columns to use (default: :func:`default_feature_columns`)

    Returns
    -------
    (ModelBundle, dict of fitting diagnostics)
    """
    from tqdm.auto import tqdm

    from models.blend import blend_weights, grouped_folds
    from models.bundle import TARGETS, ModelBundle, TargetModel, TrainingDomain
    from models.conformal import ConformalCalibrator, conformal_rank, grouped_split
    from models.gbm import DEFAULT_MONOTONE_RULES, MonotoneGBMRegressor, monotonicity_audit, \
        resolve_monotone_constraints
    from models.gp import StandardisedGPRegressor, farthest_point_subset
    from models.mismatch import MismatchDetector, PhysicsChecker

    cfg = config or TrainConfig()
    conformal_rank(1, cfg.coverage)
    if len(features) != len(targets):
        raise ValueError(f"features has {len(features)} rows but targets has {len(targets)}")
    cols = list(feature_columns) if feature_columns is not None else default_feature_columns(features)
    if not cols:
        raise ValueError("no numeric feature columns to train on; check the feature table")
    names = [t for t in TARGETS if t in targets.columns]
    if not names:
        raise ValueError(f"targets has none of the target columns {list(TARGETS)}; got {list(targets.columns)}")
    rng = np.random.default_rng(random_state)
    seed = lambda: int(rng.integers(2**31 - 1))  # noqa: E731
    X = features.reindex(columns=cols).apply(pd.to_numeric, errors="coerce").astype(float).reset_index(drop=True)
    Y = targets.reset_index(drop=True)
    groups = np.asarray(groups)
    cal = grouped_split(groups, cfg.calibration_fraction, seed())
    tr = ~cal
    Xtr, Xcal, gtr = X[tr].reset_index(drop=True), X[cal].reset_index(drop=True), groups[tr]
    folds = grouped_folds(gtr, cfg.oof_folds, seed())
    rules = DEFAULT_MONOTONE_RULES if cfg.monotone_rules is None else tuple(cfg.monotone_rules)
    cons = resolve_monotone_constraints(cols, rules, len(cols))
    mono_feats = [(c, s) for c, s in zip(cols, cons) if s]
    gbm_kw = dict(n_estimators=cfg.n_estimators, learning_rate=cfg.learning_rate, num_leaves=cfg.num_leaves,
                  min_child_samples=cfg.min_child_samples, n_jobs=cfg.n_jobs, monotone_rules=rules)
    diag: dict[str, Any] = {"n_train": int(tr.sum()), "n_calibration": int(cal.sum()),
                            "monotone": {c: s for c, s in mono_feats}, "gp": {}, "blend": {}, "timings_s": {}}
    tmodels = {}
    for name in tqdm(names, desc="fitting targets", disable=not progress):
        t0 = time.perf_counter()
        y_all = pd.to_numeric(Y[name], errors="coerce").to_numpy(dtype=float)
        ytr, ycal = y_all[tr], y_all[cal]
        if not (np.all(np.isfinite(ytr)) and np.all(np.isfinite(ycal))):
            raise ValueError(f"target {name} has missing or non-numeric values; every case needs a value")
        central = MonotoneGBMRegressor(random_state=seed(), **gbm_kw).fit(Xtr, ytr)
        oof = np.empty(len(ytr))
        for k in range(int(folds.max()) + 1):
            te = folds == k
            m = MonotoneGBMRegressor(random_state=seed(), **gbm_kw).fit(Xtr[~te], ytr[~te])
            oof[te] = m.predict(Xtr[te])
        scale = MonotoneGBMRegressor(random_state=seed(), **dict(gbm_kw, monotone_rules=(), n_estimators=
                                                                  max(50, cfg.n_estimators // 3))).fit(
            Xtr, np.abs(ytr - oof))
        sigma_floor = max(1e-3 * float(np.std(ytr)), 1e-9)
        # --- GP on the most important features, space-filling subset -----------------
        gain = central.booster_.feature_importance("gain")
        order = [cols[j] for j in np.argsort(-gain) if gain[j] > 0][: cfg.gp_features]
        gp, gp_w, fill = None, 0.0, []
        if order and cfg.gp_points >= 10:
            G = Xtr[order].to_numpy(dtype=float)
            fill = np.nanmedian(G, axis=0)
            fill = np.where(np.isfinite(fill), fill, 0.0)
            G = np.where(np.isfinite(G), G, fill)
            gp = StandardisedGPRegressor(max_points=cfg.gp_points, random_state=seed()).fit(G, ytr,
                                                                                           feature_labels=order)
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
            audit = {}
            if 0 < gp_w and mono_feats:
                # the GP is unconstrained: keep the largest blend weight whose blend still obeys every
                # declared physics sign on a probe grid (else LightGBM alone keeps the guarantee)
                for w_try in (gp_w, gp_w / 2, gp_w / 4, 0.0):
                    if w_try == 0.0:
                        log.warning("target %s: every GP blend breaks a physics sign on the probe grid (%s); "
                                    "using LightGBM alone", name, audit)
                        gp_w = 0.0
                        break
                    tm_probe = TargetModel(name, central, scale, sigma_floor, None, gp=gp, gp_columns=order,
                                           gp_weight=w_try, gp_fill=list(fill))
                    audit = {c: monotonicity_audit(tm_probe.centre_sim, Xtr, c, s, rng=seed()) for c, s in mono_feats}
                    if max(audit.values()) <= cfg.monotone_tolerance:
                        gp_w = w_try
                        break
            diag["gp"][name] = dict(hp, columns=order, n_points=int(len(gp.subset_index_)))
            diag["blend"][name] = {"oof_rmse_lgbm": info["rmse"][0], "oof_rmse_gp": info["rmse"][1],
                                   "oof_rmse_blend": info["blend_rmse"], "gp_weight": gp_w,
                                   "monotone_audit_blend": audit}
            if gp_w == 0.0:
                gp = None
        lo_b, hi_b = _target_bounds(family, name)
        tm = TargetModel(name, central, scale, sigma_floor, None, gp=gp, gp_columns=order if gp is not None else [],
                         gp_weight=gp_w, gp_fill=list(fill) if gp is not None else [], lower_bound=lo_b,
                         upper_bound=hi_b)
        tm.calibrator = ConformalCalibrator.from_predictions(ycal, tm.centre_sim(Xcal), tm.sigma(Xcal))
        tmodels[name] = tm
        diag["timings_s"][name] = time.perf_counter() - t0
    t0 = time.perf_counter()
    detector = MismatchDetector(false_alarm_rate=cfg.false_alarm_rate, n_estimators=cfg.mismatch_estimators,
                                random_state=seed()).fit(Xtr)
    checker = PhysicsChecker(family).fit(features.reset_index(drop=True)[tr])
    diag["timings_s"]["mismatch"] = time.perf_counter() - t0
    domain = TrainingDomain.from_features(Xtr, rng=seed())
    bundle = ModelBundle(
        family=family, feature_columns=cols, targets=tmodels, detector=detector, checker=checker,
        training_domain=domain, coverage=cfg.coverage, calibration_source="simulated",
        metrics={"fit": _plain(diag)}, meta=dict(meta or {}, config=_plain(cfg.__dict__)),
        family_toml=family_toml, feature_schema=dict(feature_schema) if feature_schema else None,
    )
    bundle.metrics["gp"] = {t: {"bound_hits": r.get("bound_hits", [])} for t, r in diag["gp"].items()}
    return bundle, diag


def _plain(obj):
    from models.bundle import _jsonable

    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, dict):
        return {k: _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    return _jsonable(obj)


def evaluate_bundle(bundle, features: pd.DataFrame, targets: pd.DataFrame, *, group_labels: Mapping | None = None,
                    ) -> dict:
    """MAE, RMSE, coverage and mean width per target on held-out cases (+ per-group coverage).

    ``group_labels``: mapping name -> array of labels (e.g. thickness band, temperature band).
    ``relative_width`` is the mean band width over the target's observed range.
    """
    from models.conformal import coverage_by_group

    pred = bundle.predict_frame(features)
    out: dict[str, Any] = {}
    for t in bundle.targets:
        if t not in targets:
            continue
        y = pd.to_numeric(targets[t], errors="coerce").to_numpy(dtype=float)
        est = pred[t].to_numpy(dtype=float)
        lo, hi = pred[f"{t}_lower"].to_numpy(dtype=float), pred[f"{t}_upper"].to_numpy(dtype=float)
        err = est - y
        span = float(np.nanmax(y) - np.nanmin(y)) or 1.0
        cov = coverage_by_group(y, lo, hi)
        r = {"mae": float(np.mean(np.abs(err))), "rmse": float(np.sqrt(np.mean(err**2))),
             "coverage": float(cov["coverage"].iloc[0]), "mean_width": float(cov["mean_width"].iloc[0]),
             "relative_width": float(cov["mean_width"].iloc[0]) / span, "n": int(len(y))}
        if group_labels:
            r["by_group"] = {}
            for gname, labels in group_labels.items():
                g = coverage_by_group(y, lo, hi, labels).iloc[1:]
                r["by_group"][gname] = {str(row.group): {"n": int(row.n), "coverage": float(row.coverage),
                                                         "mean_width": float(row.mean_width)}
                                        for row in g.itertuples()}
        out[t] = r
    out["in_family_false_alarm_rate"] = float(1.0 - pred["in_family"].mean()) if len(pred) else math.nan
    return out
