"""Training pipeline: campaign -> features -> fit -> calibrate -> evaluate -> a new bundle version.

:func:`fit_bundle` works on any feature table plus target columns (it is what the tests and the
benchmark drive); :func:`train_model` adds the campaign, the feature extraction (cached in the
model store), the held-out evaluation, measured-data recalibration, the shifted-geometry
mismatch study, and saves the bundle as the next ``vNNN`` of the model store. It logs nothing to
MLflow and registers nothing: that is :func:`waneguide.operations.train.train_and_register`.

Test split: ``test_fraction`` of the specimens (evaluation only), grouped by specimen so a
specimen never sits on two sides; the rest goes to :func:`fit_bundle`.

This module is the orchestration and the public import path; the work is done in
``training/_fit.py`` (fitting arithmetic), ``training/_evaluate.py`` (evaluation and the
mismatch study) and ``training/_data.py`` (family, campaign features and their cache,
measured cases).
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from waneguide.core.atomic import check_output_dir
from waneguide.core.errors import InputError
from waneguide.features.conventional import conventional_estimate_frame
from waneguide.features.extractor import FeatureExtractor
from waneguide.features.schema import FEATURE_SCHEMA_VERSION, describe_features, feature_columns
from waneguide.models.bundle import TARGETS
from waneguide.models.conformal import grouped_split
from waneguide.simulation.campaign import load_campaign
from waneguide.training._data import (
    cached_campaign_features,
    campaign_features,
    extractor_settings,
    feature_cache_key,
    load_family_and_text,
    read_measured,
)
from waneguide.training._evaluate import (
    DEFAULT_SHIFT_CASES,
    DEFAULT_SHIFTS,
    evaluate_bundle,
    false_alarms_by_group,
    mismatch_study,
    shifted_family,
)
from waneguide.training._fit import TrainConfig, default_feature_columns, fit_bundle

__all__ = [
    "TrainConfig", "TrainResult", "fit_bundle", "evaluate_bundle", "default_feature_columns", "train_model",
    "read_measured", "mismatch_study", "shifted_family", "campaign_features", "cached_campaign_features",
    "extractor_settings", "feature_cache_key", "format_summary", "DEFAULT_SHIFTS", "DEFAULT_SHIFT_CASES",
    "false_alarms_by_group",
]


@dataclass
class TrainResult:
    """What :func:`train_model` returns.

    ``run_id`` and ``model_version`` stay None here; the operations layer
    (:func:`waneguide.operations.train.train_and_register`) fills them when it logs the run
    and registers the bundle.
    """

    bundle_path: Path
    metrics: dict
    bundle: Any = None
    run_id: str | None = None
    model_version: str | None = None
    messages: list[str] = field(default_factory=list)


def check_train_settings(config: TrainConfig, random_state) -> None:
    """Refuse a bad coverage or seed before any work or any file is written."""
    if not (isinstance(config.coverage, (int, float)) and 0.0 < float(config.coverage) < 1.0):
        raise InputError(f"coverage (--coverage) must lie strictly between 0 and 1; got {config.coverage!r}")
    if random_state is not None and (isinstance(random_state, bool) or not isinstance(random_state, (int, np.integer))
                                     or random_state < 0):
        raise InputError(f"random_state (--seed) must be a non-negative whole number; got {random_state!r}")


def _read_measured_checked(measured_csv, fam):
    """Measured cases, read before the (long) fit so that a bad CSV fails at once."""
    measured = read_measured(measured_csv, fam)
    for t in measured[1].columns:  # ModelBundle.recalibrate needs at least 2 values per target
        n_ok = int(np.isfinite(measured[1][t].to_numpy(dtype=float)).sum())
        if n_ok < 2:
            raise InputError(f"{measured_csv}: target {t} has {n_ok} measured case(s) with a value (zero-loss "
                             "baseline rows not counted); at least 2 are needed, or leave the column out")
    return measured


def _held_out_metrics(bundle, fam, Ft: pd.DataFrame, Ct: pd.DataFrame, cfg: TrainConfig) -> dict[str, Any]:
    """Evaluation on the held-out specimens, by loss and temperature band, and against the conventional estimate."""
    loss_band = pd.cut(Ct["max_loss_pct"], [-np.inf, 10, 25, np.inf], labels=["loss<10%", "loss10-25%", "loss>=25%"])
    temp_band = pd.cut(Ct["temperature_c"], [-np.inf, 10, 30, np.inf], labels=["T<10C", "T10-30C", "T>=30C"])
    ev = evaluate_bundle(bundle, Ft, Ct, group_labels={"loss_band": loss_band.astype(str).to_numpy(),
                                                       "temperature_band": temp_band.astype(str).to_numpy()})
    metrics: dict[str, Any] = {"evaluation": {t: ev[t] for t in TARGETS if t in ev}}
    conv = conventional_estimate_frame(fam, Ft)["mean_loss_pct"].to_numpy(dtype=float)
    conv_mae = float(np.nanmean(np.abs(conv - Ct["mean_loss_pct"].to_numpy(dtype=float))))
    metrics["conventional_mae_mean_loss_pct"] = conv_mae
    metrics["conventional_ratio"] = conv_mae / max(ev["mean_loss_pct"]["mae"], 1e-12)
    pred = bundle.predict_frame(Ft)
    mx = Ct["max_loss_pct"].to_numpy(dtype=float)
    lo, hi = fam.domain.temperature_c
    edge = 0.1 * (hi - lo)  # the outer tenth of the simulated temperature range at either end
    tb = Ct["baseline_temperature_c"].to_numpy(dtype=float)
    groups = {"pristine": mx == 0, "max loss >= 25 %": mx >= 25,
              "baseline temperature at an end of the range": (tb <= lo + edge) | (tb >= hi - edge)}
    metrics["mismatch"] = {"false_alarm_rate": cfg.false_alarm_rate,
                           "physics_false_alarm_rate": cfg.physics_false_alarm_rate,
                           "in_family_false_alarm_rate": ev["in_family_false_alarm_rate"],
                           "held_out": false_alarms_by_group(pred, groups)}
    return metrics


def train_model(family, campaign_dir, out_dir, *, measured_csv=None, random_state=0, progress=True,
                config: TrainConfig | None = None, shift_study: bool = True, shift_cases: int | None = None,
                n_jobs: int = 1) -> TrainResult:
    """Features, fit, calibrate, evaluate, write the bundle (next ``vNNN`` of ``out_dir``).

    Parameters
    ----------
    family : Family or path of the family TOML
    campaign_dir : folder written by :func:`waneguide.simulation.campaign.run_campaign` for this family
    out_dir : model store; the bundle goes to its next free ``vNNN`` folder (nothing overwritten);
        the campaign's feature table and the mismatch-study campaigns are cached in ``out_dir/.cache``
    measured_csv : optional CSV of measured cases (see :func:`read_measured`); when given, the
        bands are recalibrated on them (CV+) and a residual correction is chosen by grouped CV
    shift_study : simulate small campaigns of shifted families (thickness, shear / longitudinal speed,
        density, path, alloy) and of in-family edges (temperature ends, heavy loss) and state the
        detector's flag rate on each (:func:`mismatch_study`)
    shift_cases : cases per shifted family (default :data:`DEFAULT_SHIFT_CASES`)
    n_jobs : processes for the feature extraction

    Nothing is logged to MLflow (see :func:`waneguide.operations.train.train_and_register`).
    """
    t_start = time.perf_counter()
    cfg = config or TrainConfig()
    check_train_settings(cfg, random_state)
    out_dir = check_output_dir(out_dir, "model store (--out)")
    fam, fam_toml = load_family_and_text(family)
    camp = load_campaign(campaign_dir)
    if camp.family_fingerprint != fam.fingerprint:
        raise InputError(f"campaign {str(campaign_dir)!r} was simulated for family fingerprint "
                         f"{camp.family_fingerprint}, but {fam.name} has {fam.fingerprint}; "
                         f"re-run the campaign for this family")
    measured = _read_measured_checked(measured_csv, fam) if measured_csv is not None else None
    msgs: list[str] = []
    feats = cached_campaign_features(FeatureExtractor(fam), camp, out_dir / ".cache", progress=progress,
                                     n_jobs=n_jobs)
    cases = camp.cases.reset_index(drop=True)
    missing = [t for t in TARGETS if t not in cases.columns]
    if missing:
        raise InputError(f"campaign {str(campaign_dir)!r}: the cases lack target column(s) {missing}; "
                         "re-run the campaign with this version of waneguide")
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
    bundle, _ = fit_bundle(
        fam, feats[trn], cases.loc[trn, list(TARGETS)], groups[trn], config=cfg, feature_columns=cols,
        random_state=int(rng.integers(2**31 - 1)), progress=progress, family_toml=fam_toml, feature_schema=schema,
        meta={"campaign_fingerprint": camp.fingerprint, "n_cases": int(len(cases)), "random_state": random_state},
    )
    t_fit = time.perf_counter() - t_start
    Ft, Ct = feats[tst].reset_index(drop=True), cases[tst].reset_index(drop=True)
    metrics = _held_out_metrics(bundle, fam, Ft, Ct, cfg)
    if shift_study:
        t_study = time.perf_counter()
        study = mismatch_study(bundle, fam, bundle.predict_frame(Ft), n_cases=shift_cases or DEFAULT_SHIFT_CASES,
                               seed=random_state + 1, work_dir=out_dir / ".cache", progress=progress)
        metrics["mismatch"].update(study)
        metrics.setdefault("timings_s", {})["shift_study"] = time.perf_counter() - t_study
    if measured is not None:
        mf, mt, mg = measured
        try:
            bundle = bundle.recalibrate(mf, mt, groups=mg, random_state=random_state)
        except ValueError as exc:
            raise InputError(f"{measured_csv}: measured cases cannot recalibrate the model: {exc}") from None
        metrics["measured"] = {t: {"n": r["n"], "correction": r["correction"], "mae_without": r["cv_mae"]["none"],
                                   "mae_with": r["cv_mae"][r["correction"]]}
                               for t, r in bundle.meta["recalibration"].items()}
    metrics.setdefault("timings_s", {}).update(fit=t_fit, total_before_save=time.perf_counter() - t_start)
    bundle.metrics.update(metrics)
    path = bundle.save_version(out_dir)  # renders the model card at the final version
    return TrainResult(bundle_path=path, metrics=bundle.metrics, bundle=bundle, messages=msgs)


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
        lines.append(f"mismatch: stated false-alarm rate {mm['false_alarm_rate']:g} (statistical) + "
                     f"{mm.get('physics_false_alarm_rate', 0):g} per physics check, observed in family "
                     f"{mm['in_family_false_alarm_rate']:.3f}")
        for kind, table in (("held-out", mm.get("held_out") or {}), ("campaign", mm.get("edges") or {})):
            for name, r in table.items():
                lines.append(f"  in family ({kind}), {name:<44} flagged {r['flagged']}/{r['n']}")
        for name, r in (mm.get("shifts") or {}).items():
            lines.append(f"  {name:<28} flagged {r['flag_rate']:.2f} (physics {r.get('physics_flag_rate', 0):.2f})  "
                         f"AUROC {r['auroc']:.3f} (statistical {r.get('auroc_statistical', float('nan')):.3f})")
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
