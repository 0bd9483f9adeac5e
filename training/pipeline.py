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

__all__ = [
    "TrainConfig", "TrainResult", "fit_bundle", "evaluate_bundle", "default_feature_columns", "train_model",
    "read_measured", "mismatch_study", "shifted_family", "campaign_features", "format_summary",
]

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
    # LightGBM threads. 1 by default: OpenMP threads spin-wait, and on a shared 2-core machine two of
    # them ran 10-100x slower than one (measured); parallelism, if any, goes over targets instead
    n_jobs: int = 1
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
    from waneguide.models.bundle import TARGETS

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

    from waneguide.models.blend import blend_weights, grouped_folds
    from waneguide.models.bundle import TARGETS, ModelBundle, TargetModel, TrainingDomain
    from waneguide.models.conformal import ConformalCalibrator, conformal_rank, grouped_split
    from waneguide.models.gbm import DEFAULT_MONOTONE_RULES, MonotoneGBMRegressor, monotonicity_audit, \
        resolve_monotone_constraints
    from waneguide.models.gp import StandardisedGPRegressor, farthest_point_subset
    from waneguide.models.mismatch import MismatchDetector, PhysicsChecker

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
                                random_state=seed()).fit(Xtr, groups=gtr)
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
    from waneguide.models.bundle import _jsonable

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
    from waneguide.models.conformal import coverage_by_group

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


# ---------------------------------------------------------------------------
# campaign -> bundle
# ---------------------------------------------------------------------------
#: Shifted geometries of the mismatch study: (name, what changes, how much).
DEFAULT_SHIFTS = (
    ("flange thickness +15 %", "thickness", 1.15),
    ("path length +10 %", "spacing", 1.10),
    ("alloy swapped", "alloy", None),
)


def _load_family(family):
    from waneguide.features.family import Family, load_family

    if isinstance(family, Family):
        return family, None
    p = Path(family)
    return load_family(p), p.read_text()


def shifted_family(family, what: str, factor: float | None):
    """A copy of ``family`` with its flange thickness, path length or alloy changed (mismatch study)."""
    from waneguide.features.family import family_from_mapping

    data = family.model_dump(mode="json", exclude_none=True)
    data["family"]["name"] = f"{family.name}-shifted"
    if what == "thickness":
        data["section"]["flange_thickness_mm"] = round(data["section"]["flange_thickness_mm"] * factor, 6)
    elif what == "spacing":
        data["path"]["transducer_spacing_mm"] = round(data["path"]["transducer_spacing_mm"] * factor, 6)
    elif what == "alloy":
        current = data["material"].get("builtin")
        data["material"] = {"builtin": "al-7075-t6" if current != "al-7075-t6" else "al-2024-t3"}
    else:
        raise ValueError(f"unknown shift {what!r}; use thickness, spacing or alloy")
    return family_from_mapping(data, where=f"shifted family ({what})")


def campaign_features(family, campaign, *, progress: bool = True, n_jobs: int = 1) -> pd.DataFrame:
    """Feature table of every case of ``campaign`` (extractor array path, chunk by chunk)."""
    from tqdm.auto import tqdm

    from waneguide.features.extractor import FeatureExtractor

    ex = FeatureExtractor(family)
    parts = []
    n_chunks = len(campaign.manifest.get("chunks", [])) or None
    for cases, waves, bases in tqdm(campaign.iter_chunks(), total=n_chunks, desc="features", disable=not progress):
        parts.append(ex.extract_batch(
            waves, bases, temperature_c=cases["temperature_c"].to_numpy(dtype=float),
            baseline_temperature_c=cases["baseline_temperature_c"].to_numpy(dtype=float), n_jobs=n_jobs,
            sample_rate_hz=campaign.sample_rate_hz, pretrigger_s=campaign.pretrigger_s,
            path_id=cases["specimen_id"].astype(str).to_numpy(), on_reject="nan"))
    return pd.concat(parts, ignore_index=True)


def _cached_features(family, campaign, cache_dir: Path, *, progress: bool, n_jobs: int) -> pd.DataFrame:
    from waneguide.core.atomic import atomic_path
    from waneguide.features.schema import FEATURE_SCHEMA_VERSION

    f = cache_dir / f"features_{campaign.fingerprint}_{family.fingerprint}_v{FEATURE_SCHEMA_VERSION}.parquet"
    if f.is_file():
        df = pd.read_parquet(f)
        if len(df) == len(campaign.cases):
            return df
    df = campaign_features(family, campaign, progress=progress, n_jobs=n_jobs)
    with atomic_path(f, suffix=".parquet.part") as tmp:
        df.to_parquet(tmp, index=False)
    return df


def read_measured(csv_path, family) -> tuple[pd.DataFrame, pd.DataFrame, np.ndarray]:
    """Features, targets and groups (path) of measured cases listed in a CSV.

    Columns: ``file`` (capture, relative to the CSV), target columns (any of ``max_loss_pct,
    max_loss_mm, mean_loss_pct``), optional ``path_id`` (else the capture's own) and optional
    ``baseline`` (baseline capture per row). Without ``baseline``, the rows of a path whose
    targets are all zero serve as that path's baselines (and are not used as cases).
    """
    from waneguide.features.extractor import FeatureExtractor
    from waneguide.features.io import read_capture
    from waneguide.models.bundle import TARGETS

    csv_path = Path(csv_path)
    if not csv_path.is_file():
        raise ValueError(f"measured CSV {str(csv_path)!r} does not exist or is not a file")
    try:
        tab = pd.read_csv(csv_path)
    except (pd.errors.EmptyDataError, pd.errors.ParserError, UnicodeDecodeError) as exc:
        raise ValueError(f"{csv_path}: not a readable measured-cases CSV ({str(exc).strip().splitlines()[0]}); "
                         "expected a header line with 'file' and target columns") from None
    if "file" not in tab.columns:
        raise ValueError(f"{csv_path}: needs a 'file' column (capture path relative to the CSV); "
                         f"got columns {list(tab.columns)}")
    tcols = [t for t in TARGETS if t in tab.columns]
    if not tcols:
        raise ValueError(f"{csv_path}: needs at least one target column of {list(TARGETS)}; got {list(tab.columns)}")
    for t in tcols:  # blank = not measured; anything else must be a loss in range
        raw = tab[t]
        num = pd.to_numeric(raw, errors="coerce")
        upper = 100.0 if t.endswith("_pct") else np.inf
        bad = (raw.notna() & num.isna()) | ~(num.isna() | ((num >= 0) & (num < upper)))
        if bad.any():
            i = int(np.flatnonzero(bad.to_numpy())[0])
            rule = "a wall loss from 0 to below 100 [% of nominal]" if upper == 100.0 else "a wall loss >= 0 [mm]"
            raise ValueError(f"{csv_path}: row {i + 2}, column {t}: must be {rule} (or blank when not measured); "
                             f"got {str(raw.iloc[i])!r}")
        tab[t] = num
    root = csv_path.parent
    caps = [read_capture(root / str(f)) for f in tab["file"]]
    paths = (tab["path_id"].astype(str).tolist() if "path_id" in tab.columns
             else [c.path_id or f"row{i}" for i, c in enumerate(caps)])
    ex = FeatureExtractor(family)
    rows, keep = [], []
    if "baseline" in tab.columns:
        for i, c in enumerate(caps):
            rows.append(ex.extract(c, read_capture(root / str(tab["baseline"].iloc[i]))))
            keep.append(i)
    else:
        zero = (tab[tcols].fillna(-1) == 0).all(axis=1).to_numpy()
        base = {}
        for i in np.flatnonzero(zero):
            base.setdefault(paths[i], []).append(caps[i])
        for i, c in enumerate(caps):
            if zero[i]:
                continue
            if paths[i] not in base:
                raise ValueError(f"{csv_path}: row {i + 2} (path {paths[i]!r}) has no baseline: add a 'baseline' "
                                 f"column or a row of that path with zero loss")
            rows.append(ex.extract(c, base[paths[i]]))
            keep.append(i)
    if not rows:
        raise ValueError(f"{csv_path}: no measured cases left after taking out the baselines")
    feats = pd.DataFrame(rows)
    feats["path_id"] = [paths[i] for i in keep]
    return feats, tab.iloc[keep][tcols].reset_index(drop=True), np.asarray([paths[i] for i in keep])


def _auroc(p_in, p_out) -> float:
    from sklearn.metrics import roc_auc_score

    y = np.r_[np.zeros(len(p_in)), np.ones(len(p_out))]
    return float(roc_auc_score(y, -np.r_[p_in, p_out]))


def mismatch_study(bundle, family, p_in_family, *, shifts=DEFAULT_SHIFTS, n_cases: int = 120, seed: int = 0,
                   work_dir: Path, progress: bool = False) -> dict:
    """AUROC and flag rate of the detector on small campaigns simulated with shifted geometry."""
    from waneguide.simulation.campaign import load_campaign, run_campaign

    out = {}
    for name, what, factor in shifts:
        fam_s = shifted_family(family, what, factor)
        d = work_dir / f"shift_{what}_{factor}"
        if not (d / "manifest.json").is_file() or len(load_campaign(d).cases) != n_cases:
            run_campaign(fam_s, n_cases, d, seed=seed, progress=progress)
        camp = load_campaign(d)
        # the field processes a shifted structure with the configured family: extract with `family`
        feats = campaign_features(family, camp, progress=False)
        pred = bundle.predict_frame(feats)
        p = pred["mismatch_p_value"].to_numpy(dtype=float)
        flagged = ~pred["in_family"].to_numpy(dtype=bool)
        out[name] = {"auroc": _auroc(p_in_family, p), "flag_rate": float(flagged.mean()), "n": int(len(p)),
                     "change": what, "factor": factor}
    return out


def train_model(family, campaign_dir, out_dir, *, measured_csv=None, tracking_uri=None, random_state=0,
                progress=True, config: TrainConfig | None = None, track: bool = True, shift_study: bool = True,
                shift_cases: int = 120, n_jobs: int = 1) -> TrainResult:
    """Features, fit, calibrate, evaluate, write the bundle (next ``vNNN`` of ``out_dir``), log the run.

    Parameters
    ----------
    family : Family or path of the family TOML
    campaign_dir : folder written by :func:`training.campaign.run_campaign` for this family
    out_dir : model store; the bundle goes to its next free ``vNNN`` folder (nothing overwritten)
    measured_csv : optional CSV of measured cases (see :func:`read_measured`); when given, the
        bands are recalibrated on them (CV+) and a residual correction is chosen by grouped CV
    tracking_uri : MLflow URI (default ``sqlite:///mlflow.db`` in the working directory)
    track : False skips MLflow entirely
    shift_study : simulate small shifted-geometry campaigns to measure the mismatch AUROC
    """
    from waneguide.features.conventional import conventional_estimate_frame
    from waneguide.features.schema import FEATURE_SCHEMA_VERSION, describe_features, feature_columns
    from waneguide.models.bundle import TARGETS
    from waneguide.models.card import render_model_card
    from waneguide.models.conformal import grouped_split
    from waneguide.simulation.campaign import load_campaign

    from waneguide.operations.tracking import TrackedRun, experiment_name

    from waneguide.core.atomic import check_output_dir

    t_start = time.perf_counter()
    cfg = config or TrainConfig()
    # settings first, so that a bad one fails before any work or any file is written
    if not (isinstance(cfg.coverage, (int, float)) and 0.0 < float(cfg.coverage) < 1.0):
        raise ValueError(f"coverage (--coverage) must lie strictly between 0 and 1; got {cfg.coverage!r}")
    if random_state is not None and (isinstance(random_state, bool) or not isinstance(random_state, (int, np.integer))
                                     or random_state < 0):
        raise ValueError(f"random_state (--seed) must be a non-negative whole number; got {random_state!r}")
    out_dir = check_output_dir(out_dir, "model store (--out)")
    fam, fam_toml = _load_family(family)
    camp = load_campaign(campaign_dir)
    if camp.family_fingerprint != fam.fingerprint:
        raise ValueError(f"campaign {str(campaign_dir)!r} was simulated for family fingerprint "
                         f"{camp.family_fingerprint}, but {fam.name} has {fam.fingerprint}; "
                         f"re-run the campaign for this family")
    # measured cases are read before the (long) fit so that a bad CSV fails at once
    measured = read_measured(measured_csv, fam) if measured_csv is not None else None
    if measured is not None:  # ModelBundle.recalibrate needs at least 2 values per target
        for t in measured[1].columns:
            n_ok = int(np.isfinite(measured[1][t].to_numpy(dtype=float)).sum())
            if n_ok < 2:
                raise ValueError(f"{measured_csv}: target {t} has {n_ok} measured case(s) with a value (zero-loss "
                                 "baseline rows not counted); at least 2 are needed, or leave the column out")
    msgs: list[str] = []
    feats = _cached_features(fam, camp, out_dir / ".cache", progress=progress, n_jobs=n_jobs)
    cases = camp.cases.reset_index(drop=True)
    missing = [t for t in TARGETS if t not in cases.columns]
    if missing:
        raise ValueError(f"campaign cases lack target column(s) {missing}")
    cols = [c for c in feature_columns() if c in feats.columns]
    groups = cases["specimen_id"].astype(str).to_numpy()
    rng = np.random.default_rng(random_state)
    test = grouped_split(groups, cfg.test_fraction, int(rng.integers(2**31 - 1)))
    ok = feats[cols].notna().any(axis=1).to_numpy()  # rows the quality gate rejected entirely are dropped
    if (~ok).any():
        msgs.append(f"{int((~ok).sum())} simulated case(s) rejected by the quality gate were left out")
    trn, tst = ~test & ok, test & ok
    schema = {"feature_schema_version": FEATURE_SCHEMA_VERSION, "feature_columns": cols,
              "describe": describe_features().to_dict(orient="records")}
    bundle, diag = fit_bundle(
        fam, feats[trn], cases.loc[trn, list(TARGETS)], groups[trn], config=cfg, feature_columns=cols,
        random_state=int(rng.integers(2**31 - 1)), progress=progress, family_toml=fam_toml, feature_schema=schema,
        meta={"campaign_fingerprint": camp.fingerprint, "n_cases": int(len(cases)), "random_state": random_state},
    )
    t_fit = time.perf_counter() - t_start
    Ft, Ct = feats[tst].reset_index(drop=True), cases[tst].reset_index(drop=True)
    loss_band = pd.cut(Ct["max_loss_pct"], [-np.inf, 10, 25, np.inf], labels=["loss<10%", "loss10-25%", "loss>=25%"])
    temp_band = pd.cut(Ct["temperature_c"], [-np.inf, 10, 30, np.inf], labels=["T<10C", "T10-30C", "T>=30C"])
    ev = evaluate_bundle(bundle, Ft, Ct, group_labels={"loss_band": loss_band.astype(str).to_numpy(),
                                                       "temperature_band": temp_band.astype(str).to_numpy()})
    metrics: dict[str, Any] = {"evaluation": {t: ev[t] for t in TARGETS if t in ev}}
    conv = conventional_estimate_frame(fam, Ft)["mean_loss_pct"].to_numpy(dtype=float)
    conv_mae = float(np.nanmean(np.abs(conv - Ct["mean_loss_pct"].to_numpy(dtype=float))))
    metrics["conventional_mae_mean_loss_pct"] = conv_mae
    metrics["conventional_ratio"] = conv_mae / max(ev["mean_loss_pct"]["mae"], 1e-12)
    p_in = bundle.predict_frame(Ft)["mismatch_p_value"].to_numpy(dtype=float)
    metrics["mismatch"] = {"false_alarm_rate": cfg.false_alarm_rate,
                           "in_family_false_alarm_rate": ev["in_family_false_alarm_rate"]}
    if shift_study:
        metrics["mismatch"]["shifts"] = mismatch_study(bundle, fam, p_in, n_cases=shift_cases,
                                                       seed=random_state + 1, work_dir=out_dir / ".cache",
                                                       progress=progress)
    if measured is not None:
        mf, mt, mg = measured
        try:
            bundle = bundle.recalibrate(mf, mt, groups=mg, random_state=random_state)
        except ValueError as exc:
            raise ValueError(f"{measured_csv}: measured cases cannot recalibrate the model: {exc}") from None
        metrics["measured"] = {t: {"n": r["n"], "correction": r["correction"], "mae_without": r["cv_mae"]["none"],
                                   "mae_with": r["cv_mae"][r["correction"]]}
                               for t, r in bundle.meta["recalibration"].items()}
    metrics["timings_s"] = {"fit": t_fit, "total_before_save": time.perf_counter() - t_start}
    bundle.metrics.update(metrics)
    bundle.model_card = render_model_card(bundle)
    path = bundle.save_version(out_dir)
    bundle.model_card = render_model_card(bundle)  # version number now final
    result = TrainResult(bundle_path=path, metrics=bundle.metrics, bundle=bundle, messages=msgs)
    if track:
        with TrackedRun(experiment_name(fam.name), run_name=f"{fam.name} {path.name}", tracking_uri=tracking_uri,
                        tags={"family": fam.name, "family_fingerprint": fam.fingerprint,
                              "campaign_fingerprint": camp.fingerprint, "bundle_version": path.name,
                              "calibration_source": bundle.calibration_source}) as run:
            run.log_params({**{k: v for k, v in cfg.__dict__.items()}, "n_cases": len(cases),
                            "random_state": random_state, "measured_csv": str(measured_csv or "")})
            run.log_metrics({k: v for k, v in bundle.metrics.items() if k not in ("fit", "gp")})
            run.log_artifacts(path, artifact_path="bundle")
            from waneguide.operations.registry import register_bundle

            result.model_version = register_bundle(path, fam.name, run_id=run.run_id, tracking_uri=tracking_uri)
            result.run_id = run.run_id
    return result


def format_summary(result: TrainResult) -> str:
    """Plain-text evaluation summary (what ``waneguide train`` prints)."""
    m = result.metrics
    lines = [f"bundle: {result.bundle_path}", "",
             "held-out simulated cases (unseen specimens):",
             f"  {'target':<15}{'MAE':>9}{'RMSE':>9}{'coverage':>10}{'width':>9}{'width/range':>12}"]
    for t, r in m.get("evaluation", {}).items():
        lines.append(f"  {t:<15}{r['mae']:>9.3f}{r['rmse']:>9.3f}{r['coverage']:>10.3f}{r['mean_width']:>9.3f}"
                     f"{r['relative_width']:>12.3f}")
    if "conventional_ratio" in m:
        lines.append(f"  conventional single-mode MAE / model MAE (mean_loss_pct): {m['conventional_ratio']:.2f}")
    mm = m.get("mismatch", {})
    if mm:
        lines.append(f"mismatch: stated false-alarm rate {mm['false_alarm_rate']:g}, "
                     f"observed in family {mm['in_family_false_alarm_rate']:.3f}")
        for name, r in (mm.get("shifts") or {}).items():
            lines.append(f"  {name:<24} AUROC {r['auroc']:.3f}  flagged {r['flag_rate']:.2f}")
    for t, r in (m.get("measured") or {}).items():
        lines.append(f"measured {t}: MAE {r['mae_without']:.3f} (simulated model) -> {r['mae_with']:.3f} "
                     f"({r['correction']}), n = {r['n']}")
    cal = result.bundle.calibration_source if result.bundle is not None else "?"
    lines.append(f"bands calibrated on {cal} cases")
    if result.model_version:
        lines.append(f"registered as waneguide-{result.bundle.family.name} version {result.model_version} "
                     f"(alias in-service), run {result.run_id}")
    lines += result.messages
    return "\n".join(lines)
