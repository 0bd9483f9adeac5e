"""Audit a model in service against hands-on thickness readings.

The arithmetic lives in small functions over DataFrames (testable by hand):

1. :func:`reading_targets` groups readings into *surveys* (one path, one day) and turns
   remaining thickness into the model's targets in percent of nominal thickness:
   ``max_loss_pct = 100 (1 - min(remaining) / nominal)`` from the thinnest reading
   (the inspector records the thinnest spot found: common practice, no source), and
   ``mean_loss_pct = 100 (1 - mean(remaining) / nominal)`` with the mean taken by the
   trapezoid rule along the path, only when the survey has at least
   ``min_mean_points`` readings spanning at least ``min_mean_span`` of the path.
2. :func:`match_surveys` pairs each survey with the scored capture of the same path
   nearest in time, within ``window_days`` (wall loss grows over months, so a week
   apart is taken as the same state: common practice, no source).
3. :func:`residual_summary` per target: residual ``r = estimate - reading``, bias with
   its Student-t confidence interval, RMSE, empirical coverage of the band (widened in
   quadrature by the reading's own uncertainty, when stated) with its Clopper-Pearson
   interval against the nominal coverage.
4. :func:`standardised_residuals` and :class:`models.drift.PageHinkley` on them, in date
   order (sequential drift of the residuals).
5. :func:`models.drift.feature_drift` of recent captures' features against the training
   domain (KS and PSI per feature, Benjamini-Hochberg).
6. :func:`decide` applies the written rules (:data:`VERDICT_RULES`).

:func:`run_audit` does all of it for a bundle and a readings CSV, reads the history,
writes the HTML report and, with ``recalibrate=True``, a recalibrated challenger.
"""
from __future__ import annotations

import re
from pathlib import Path
from typing import Any, Mapping

import numpy as np
import pandas as pd

from waneguide.core.atomic import atomic_write_text, check_output_path
from waneguide.core.caution import CAUTION
from waneguide.core.errors import InputError
from waneguide.core.settings import FUTURE_TOLERANCE_S
from waneguide.models.bundle import load_bundle
from waneguide.operations._audit_stats import (
    _times,
    calibration_curve,
    decide,
    match_surveys,
    reading_targets,
    residual_summary,
    standardised_residuals,
)
from waneguide.operations._audit_types import (
    TARGETS,
    VERDICT_RULES,
    VERDICTS,
    AuditResult,
    AuditSettings,
)
from waneguide.operations.drift import (
    PageHinkley,
    feature_drift,
)
from waneguide.operations.history import History, resolve_db_url, sqlite_file
from waneguide.operations.readings import read_readings
from waneguide.operations.registry import register_bundle
from waneguide.operations.report import render_report
from waneguide.operations.scoring import check_limit_pct
from waneguide.operations.tracking import TrackedRun, experiment_name

__all__ = [
    "AuditSettings",
    "check_audit_options",
    "AuditResult",
    "TARGETS",
    "VERDICTS",
    "VERDICT_RULES",
    "reading_targets",
    "match_surveys",
    "residual_summary",
    "standardised_residuals",
    "calibration_curve",
    "decide",
    "audit_frames",
    "run_audit",
    "format_audit",
]

# --------------------------------------------------------------------------------------
def _outside_share(reference, recent, columns, ranges: Mapping[str, tuple] | None = None) -> dict:
    """Share of recent values outside the training range of each feature.

    ``ranges`` (feature -> (min, max) over the whole training set, from the bundle's
    training domain) wins; otherwise the reference sample's own min and max are used.
    """
    out = {}
    for c in columns:
        new = np.asarray(recent[c], dtype=float)
        new = new[np.isfinite(new)]
        if ranges is not None and c in ranges:
            lo, hi = ranges[c]
        else:
            ref = np.asarray(reference[c], dtype=float)
            ref = ref[np.isfinite(ref)]
            if ref.size < 5:
                out[c] = np.nan
                continue
            lo, hi = float(ref.min()), float(ref.max())
        if new.size == 0 or not (np.isfinite(lo) and np.isfinite(hi)):
            out[c] = np.nan
            continue
        out[c] = float(np.mean((new < lo) | (new > hi)))
    return out


def audit_frames(scores, readings, *, nominal_thickness_mm: float, path_length_mm: float,
                 coverage_nominal: float, reference_features=None, recent_features=None,
                 settings: AuditSettings | None = None, model: Mapping[str, Any] | None = None,
                 training_ranges: Mapping[str, tuple] | None = None) -> AuditResult:
    """The whole audit arithmetic on plain tables (no bundle, no database).

    Parameters
    ----------
    scores : DataFrame
        Scored captures (history rows): ``path_id, captured_at, status, content_hash``, the
        estimates and bands of :data:`TARGETS`, ``in_family``.
    readings : DataFrame
        As returned by :func:`models.readings.read_readings`.
    nominal_thickness_mm, path_length_mm : float
        Flange thickness and transducer spacing of the model's family [mm].
    coverage_nominal : float
        Nominal coverage of the model's bands.
    reference_features, recent_features : DataFrame, optional
        Training-domain sample and recent captures' features, for feature drift.
    training_ranges : mapping, optional
        Feature -> (min, max) over the whole training set (the support rule of
        :data:`VERDICT_RULES`); default: the reference sample's own range.
    """

    s = settings or AuditSettings()
    surveys, rd, excluded = reading_targets(readings, nominal_thickness_mm=nominal_thickness_mm,
                                            path_length_mm=path_length_mm, settings=s)
    if surveys.empty:
        raise InputError("no reading lies on a path span of the model's family; nothing to audit.")
    m = match_surveys(surveys, scores, window_days=s.window_days)
    matched = m[m["matched"]].copy()
    notes: list[str] = []
    if matched.empty:
        first = m["match_reason"].iloc[0]
        raise InputError(
            f"no survey matched a scored capture within {s.window_days:g} days (e.g. {first}). "
            "Score the captures of those paths and dates first (waneguide score ... --db URL) "
            "or check the path_id spelling in the readings."
        )
    in_fam = matched["est_in_family"].astype("boolean").fillna(False).astype(bool) \
        if "est_in_family" in matched else pd.Series(True, index=matched.index)
    oof_share = float((~in_fam).mean()) if len(matched) else 0.0
    if (~in_fam).any():
        notes.append(f"{int((~in_fam).sum())} matched capture(s) flagged out of family are left out of the "
                     "residual statistics")
    used = matched[in_fam.to_numpy()]

    summaries, calib, drift = {}, [], {}
    ph = PageHinkley(delta=s.ph_delta, lambda_=s.ph_lambda, mu0=0.0, two_sided=True)
    for t in TARGETS:
        est = used[f"est_{t}"].to_numpy(float)
        lo = used[f"est_{t}_lower"].to_numpy(float)
        hi = used[f"est_{t}_upper"].to_numpy(float)
        truth = used[t].to_numpy(float)
        u_t = used[f"u_{t}"].to_numpy(float)
        summaries[t] = residual_summary(est, lo, hi, truth, u_t, coverage_nominal=coverage_nominal,
                                        confidence=s.confidence)
        c = calibration_curve(est, lo, hi, truth, u_t, coverage_nominal=coverage_nominal)
        c.insert(0, "target", t)
        calib.append(c)
        ok = np.isfinite(est) & np.isfinite(truth) & np.isfinite(lo) & np.isfinite(hi)
        order = np.argsort(used["date"].to_numpy()[ok], kind="stable")
        z = standardised_residuals(est[ok], lo[ok], hi[ok], truth[ok], used[f"u_{t}"].to_numpy(float)[ok],
                                   coverage_nominal=coverage_nominal)[order]
        dates = list(used["date"].to_numpy()[ok][order])
        res = ph.run(z) if z.size else None
        entry = {"dates": dates, "z": z, "result": res, "alarm_date": None}
        if res is not None and res.alarm:
            entry["alarm_date"] = str(pd.Timestamp(dates[res.alarm_index]).date())
        drift[t] = entry

    ft = None
    if reference_features is not None and recent_features is not None and len(recent_features):
        cols = [c for c in reference_features.columns if c in recent_features.columns]
        # a feature constant over the training sample carries nothing the model could have learned
        # from, so a change in it is no drift of the model's inputs: reported, not tested
        ref_num = reference_features[cols].apply(pd.to_numeric, errors="coerce")
        constant = [c for c in cols if not (ref_num[c].nunique(dropna=True) > 1)]
        tested = [c for c in cols if c not in constant]
        if constant:
            notes.append(f"feature(s) constant in the training sample, not tested for drift: {', '.join(constant)}")
        ft = feature_drift(reference_features[tested], recent_features[tested], tested, alpha=s.drift_alpha)
        share = _outside_share(reference_features, recent_features, tested, training_ranges)
        ft["outside_share"] = ft["feature"].map(share).astype(float)
    elif reference_features is None:
        notes.append("the model carries no training-domain sample; feature drift not checked")

    verdict, reasons, more_notes = decide(summaries, drift, ft, oof_share_observed=oof_share, settings=s)
    notes.extend(more_notes)

    # per-reading view: which survey and which capture each reading was compared with
    cols = ["survey_id", "matched", "match_reason", "dt_days", "est_file", "est_captured_at"]
    rd = rd.merge(m[[c for c in cols if c in m]], on="survey_id", how="left")
    unmatched = m[~m["matched"]][["survey_id", "path_id", "date", "lines", "match_reason"]].rename(
        columns={"match_reason": "reason"})
    if len(excluded):
        ex = excluded.assign(survey_id=-1, lines=excluded["line"].astype(str))[
            ["survey_id", "path_id", "date", "lines", "reason"]]
        unmatched = pd.concat([unmatched, ex], ignore_index=True)
    if len(matched) and (~in_fam).any():
        oo = matched[~in_fam.to_numpy()]
        unmatched = pd.concat([unmatched, pd.DataFrame({
            "survey_id": oo["survey_id"], "path_id": oo["path_id"], "date": oo["date"], "lines": oo["lines"],
            "reason": ["matched capture flagged out of family: " + str(r) for r in oo.get("est_mismatch_reasons", "")],
        })], ignore_index=True)
    return AuditResult(
        verdict=verdict, reasons=reasons, notes=notes, settings=s, coverage_nominal=float(coverage_nominal),
        surveys=m, readings=rd, unmatched=unmatched.reset_index(drop=True), summaries=summaries,
        calibration=pd.concat(calib, ignore_index=True), drift=drift, feature_drift=ft, model=dict(model or {}),
    )


# --------------------------------------------------------------------------------------
def model_identity(bundle) -> dict:
    """Identity of a bundle for reports and the audit record."""
    fam = bundle.family
    out = {
        "model_version": str(bundle.version),
        "model_id": str(bundle.model_id or bundle.version),
        "family_name": fam.name,
        "family_fingerprint": str(bundle.family_fingerprint),
        "family_invented": bool(getattr(fam.family, "invented", False)),
        "family_description": getattr(fam.family, "description", ""),
        "coverage_nominal": float(bundle.coverage),
        "calibration_source": str(getattr(bundle, "calibration_source", "")),
        "nominal_thickness_mm": float(fam.section.flange_thickness_mm),
        "path_length_mm": float(fam.path.transducer_spacing_mm),
        "material": fam.build_material().name,
    }
    path = getattr(bundle, "path", None)
    if path is not None:
        out["bundle_path"] = str(path)
    return out


def _reference_sample(bundle):
    """The bundle's training-domain feature sample as a DataFrame (None when it has none)."""

    dom = getattr(bundle, "training_domain", None)
    if dom is None:
        return None
    if isinstance(dom, pd.DataFrame):
        return dom
    for attr in ("reference_sample", "sample", "reference"):
        val = dom.get(attr) if isinstance(dom, Mapping) else getattr(dom, attr, None)
        if val is not None:
            return val if isinstance(val, pd.DataFrame) else pd.DataFrame(val)
    return None


def check_audit_options(*, limit_pct: float | None = None, report_path=None) -> float | None:
    """Refuse a bad limit or report path before any work (and before the history is appended to).

    Returns the limit as a float (or None). The limit follows the rule of scoring
    (:func:`models.scoring.score_captures`): 0 < L < 100 [% of nominal thickness].
    """

    limit_pct = check_limit_pct(limit_pct, "limit_pct (--limit-pct)")
    if report_path is not None:
        check_output_path(report_path, "audit report (--report)")
    return limit_pct


def run_audit(bundle, readings_csv, *, db_url: str | None = None, report_path=None,
              recalibrate: bool = False, settings: AuditSettings | None = None,
              tracking_uri: str | None = None, limit_pct: float | None = None) -> AuditResult:
    """Audit ``bundle`` against a readings CSV using the scores in the history.

    Parameters
    ----------
    bundle : ModelBundle or path
        The model in service (a folder, or an already loaded bundle).
    readings_csv : path
        Hands-on readings (:mod:`models.readings`).
    db_url : str, optional
        History database (default ``sqlite:///waneguide-history.db``).
    report_path : path, optional
        Write the HTML report there.
    recalibrate : bool
        Refit calibration and residual correction with the matched readings
        (``ModelBundle.recalibrate``), save the new version beside the old one, log it in
        MLflow and register it as the ``challenger``. Nothing is overwritten.
    """
    limit_pct = check_audit_options(limit_pct=limit_pct, report_path=report_path)
    db_file = sqlite_file(resolve_db_url(db_url))
    if db_file is not None and not db_file.is_file():
        # auditing reads the history; never create an empty database for a mistyped path
        raise InputError(f"history database {str(db_file)!r} does not exist; give the --db the captures were "
                         "scored into (`waneguide score --db ...`).")
    if isinstance(bundle, (str, Path)):
        bundle = load_bundle(bundle)
    if limit_pct is None:  # the family file may state the limit ([limits] wall_loss_limit_pct)
        limit_pct = bundle.family.limits.wall_loss_limit_pct
    s = settings or AuditSettings()
    readings = read_readings(readings_csv)
    ident = model_identity(bundle)
    hist = History(db_url)
    try:
        scores = hist.scores(model_id=ident["model_id"])
        if scores.empty:
            raise InputError(
                f"the history {hist._safe_url()} holds no captures scored by model version "
                f"{ident['model_version']} (model id {ident['model_id']}); run `waneguide score --model ... --db ...` "
                "first."
            )
        recent_feats = None
        ref = _reference_sample(bundle)
        if ref is not None:
            t = _times(scores["captured_at"])
            # the recent window counts back from the newest capture dated up to now (a capture dated
            # in the future, a clock error, must not move the window away from the real recent ones)
            valid = t <= pd.Timestamp.now(tz="UTC") + pd.Timedelta(seconds=FUTURE_TOLERANCE_S)
            last = t[valid].max()
            recent = scores[(valid & (t >= last - pd.Timedelta(days=s.recent_days))).to_numpy() &
                            (scores["status"] == "scored").to_numpy()]
            recent_feats = hist.features(model_id=ident["model_id"],
                                         content_hashes=recent["content_hash"])
            cols = [c for c in getattr(bundle, "feature_columns", ref.columns) if c in ref.columns]
            ref = ref[cols]
        dom = getattr(bundle, "training_domain", None)
        ranges = getattr(dom, "ranges", None) if dom is not None else None
        result = audit_frames(scores, readings, nominal_thickness_mm=ident["nominal_thickness_mm"],
                              path_length_mm=ident["path_length_mm"], coverage_nominal=ident["coverage_nominal"],
                              reference_features=ref, recent_features=recent_feats, settings=s, model=ident,
                              training_ranges=ranges)
        if recalibrate:
            result.challenger = _recalibrate(bundle, hist, result, tracking_uri=tracking_uri)
        # the audit record and its report land together or not at all: render first (what can
        # fail on odd input), write the report, then record; a failed record takes the report back
        if report_path is not None:
            html_text = render_report(scores=scores, audit=result, model=ident, limit_pct=limit_pct)
            result.report_path = atomic_write_text(report_path, html_text)
        try:
            result.audit_id = hist.add_audit(model_version=ident["model_version"], model_id=ident["model_id"],
                                             verdict=result.verdict, summary=result.summary(),
                                             readings_file=str(readings_csv))
        except BaseException:
            if result.report_path is not None:
                Path(result.report_path).unlink(missing_ok=True)
                result.report_path = None
            raise
    finally:
        hist.close()
    return result


def _recalibrate(bundle, hist, result: AuditResult, *, tracking_uri=None) -> dict:
    """Refit calibration with the matched readings; save and register a challenger."""

    m = result.surveys
    m = m[m["matched"]]
    if "est_in_family" in m:
        m = m[m["est_in_family"].astype("boolean").fillna(False).astype(bool).to_numpy()]
    if len(m) < result.settings.min_n:
        raise InputError(
            f"--recalibrate needs at least {result.settings.min_n} matched in-family readings; "
            f"got {len(m)}. Take more hands-on readings or widen the time window."
        )
    feats = hist.features(model_id=result.model["model_id"], content_hashes=m["est_content_hash"])
    missing = [h for h in m["est_content_hash"] if h not in feats.index]
    if missing:
        raise InputError(f"{len(missing)} matched capture(s) have no stored features in the history; "
                         "rescore them with this version of waneguide before recalibrating.")
    X = feats.loc[list(m["est_content_hash"])].reset_index(drop=True)
    cols = [c for c in getattr(bundle, "feature_columns", X.columns) if c in X.columns]
    X = X[cols]
    nominal_mm = result.model["nominal_thickness_mm"]
    y = pd.DataFrame({
        "max_loss_pct": m["max_loss_pct"].to_numpy(float),
        "mean_loss_pct": m["mean_loss_pct"].to_numpy(float),
        "max_loss_mm": m["max_loss_pct"].to_numpy(float) / 100.0 * nominal_mm,
    })
    # targets without enough readings (e.g. mean loss needs surveys along the whole path) are left as they are
    y = y[[c for c in y.columns if np.isfinite(y[c].to_numpy(float)).sum() >= result.settings.min_n]]
    new = bundle.recalibrate(X, y)
    old_path = Path(result.model.get("bundle_path") or bundle.path or "model")
    if re.match(r"^v\d{3,}$", old_path.name):
        # inside a model store: the next free vNNN (the version follows the folder)
        target = new.save_version(old_path.parent)
    else:
        target = old_path.parent / f"{old_path.name}-recal-{new.version}"
        if target.exists():
            raise InputError(f"refusing to overwrite {target}: a model with version {new.version} is already there.")
        target = new.save(target)
    info: dict[str, Any] = {"bundle_path": target, "model_version": new.version,
                            "parent_version": result.model["model_version"]}

    family_name = result.model["family_name"]
    with TrackedRun(experiment_name(family_name), run_name=f"recalibrate {info['parent_version']} -> {new.version}",
                    tracking_uri=tracking_uri, tags={"waneguide.kind": "recalibration",
                                                     "waneguide.parent_version": info["parent_version"]}) as run:
        run.log_params({"parent_version": info["parent_version"], "n_readings": len(m),
                        "window_days": result.settings.window_days, "verdict_before": result.verdict})
        run.log_metrics({f"audit_{t}_{k}": v for t, sm in result.summaries.items()
                         for k, v in sm.items() if k in ("bias", "rmse", "coverage") and np.isfinite(v)})
        info["registered_version"] = register_bundle(target, family_name, alias="challenger",
                                                     tracking_uri=tracking_uri, run_id=run.run_id)
        info["run_id"] = run.run_id
    return info


def format_audit(result: AuditResult) -> str:
    """Plain-text summary of an audit for the terminal."""

    lines = [f"verdict: {result.verdict.upper()}"]
    lines += [f"  - {r}" for r in result.reasons]
    n_m = int(result.surveys["matched"].sum())
    lines.append(f"surveys: {len(result.surveys)}, matched within {result.settings.window_days:g} days: {n_m}")
    for t, sm in result.summaries.items():
        if sm["n"] == 0:
            lines.append(f"{t}: no matched readings")
            continue
        ci = (f"[{sm['bias_lower']:+.2f}, {sm['bias_upper']:+.2f}]" if np.isfinite(sm["bias_lower"]) else "[n/a]")
        lines.append(
            f"{t}: n={sm['n']} bias={sm['bias']:+.2f} %  {sm['confidence']:.0%} CI {ci}  RMSE={sm['rmse']:.2f} %  "
            f"coverage={sm['coverage']:.0%} (nominal {sm['coverage_nominal']:.0%})")
    for t, d in result.drift.items():
        r = d["result"]
        if r is not None:
            lines.append(f"Page-Hinkley {t}: " + (f"ALARM ({r.direction}) at {d['alarm_date']}" if r.alarm else "no alarm"))
    if result.feature_drift is not None:
        nd = int(result.feature_drift["drifted"].sum())
        lines.append(f"feature drift: {nd} of {len(result.feature_drift)} features differ (BH q < "
                     f"{result.settings.drift_alpha:g})")
    lines += [f"note: {n}" for n in result.notes]
    if result.challenger:
        reg = result.challenger.get("registered_version")
        lines.append(f"challenger: version {result.challenger['model_version']} at {result.challenger['bundle_path']}"
                     + (f", registered in MLflow as version {reg} with alias 'challenger'" if reg else "")
                     + "; the model in service is unchanged (put the challenger in service with "
                       f"`waneguide promote --model STORE --version {result.challenger['model_version']} --note ...`)")
    if result.report_path:
        lines.append(f"report: {result.report_path}")
    lines.append(CAUTION)
    return "\n".join(lines)
