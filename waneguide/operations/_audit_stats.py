"""Audit arithmetic on plain tables: targets from readings, matching, residuals, verdict.

See :mod:`waneguide.operations.audit` for the steps; every function here is pure.
"""
from __future__ import annotations

import math
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd
from scipy import stats

from waneguide.core.errors import InputError
from waneguide.operations._audit_types import (
    AuditSettings,
)
from waneguide.operations.drift import (
    PSI_MAJOR,
)


# --------------------------------------------------------------------------------------
# 1. readings -> targets
def reading_targets(readings, *, nominal_thickness_mm: float, path_length_mm: float,
                    settings: AuditSettings | None = None):
    """Group readings into surveys (path, calendar day, UTC) and compute their targets.

    Returns
    -------
    surveys : DataFrame
        ``survey_id, path_id, date, n_readings, span_mm, min_remaining_mm, max_loss_pct,
        mean_loss_pct, u_max_loss_pct, u_mean_loss_pct, methods, lines``
        (``u_*`` standard uncertainty in percent; NaN when unknown).
    readings : DataFrame
        Input readings inside the path with a ``survey_id`` column.
    excluded : DataFrame
        Readings outside the path span (``0..path_length_mm``), with ``reason``.
    """

    s = settings or AuditSettings()
    nominal = float(nominal_thickness_mm)
    length = float(path_length_mm)
    r = readings.copy()
    outside = (r["position_mm"] < 0) | (r["position_mm"] > length)
    excluded = r[outside].copy()
    excluded["reason"] = [f"position {p:g} mm is outside the path (0 to {length:g} mm from the transmitter)"
                          for p in excluded["position_mm"]]
    r = r[~outside].copy()
    thicker = r["remaining_thickness_mm"] > nominal * 1.15
    if thicker.any():
        row = r[thicker].iloc[0]
        raise InputError(
            f"readings line {int(row['line'])}: remaining_thickness_mm {row['remaining_thickness_mm']:g} is more than "
            f"15% above the nominal flange thickness {nominal:g} mm of the model's family; "
            "is the reading from another family or in another unit?"
        )
    r["day"] = r["date"].dt.floor("D")
    rows = []
    r["survey_id"] = -1
    for sid, ((pid, day), grp) in enumerate(r.groupby(["path_id", "day"], sort=True)):
        r.loc[grp.index, "survey_id"] = sid
        g = grp.sort_values("position_mm")
        x = g["position_mm"].to_numpy(float)
        t = g["remaining_thickness_mm"].to_numpy(float)
        u = g["uncertainty_mm"].to_numpy(float)
        imin = int(np.argmin(t))
        span = float(x.max() - x.min()) if len(x) else 0.0
        max_loss = 100.0 * (1.0 - t[imin] / nominal)
        mean_loss = np.nan
        u_mean = np.nan
        if len(x) >= s.min_mean_points and span >= s.min_mean_span * length:
            # trapezoid mean of remaining thickness over the surveyed span
            mean_t = float(np.trapezoid(t, x) / span)
            mean_loss = 100.0 * (1.0 - mean_t / nominal)
            if np.all(np.isfinite(u)):
                # independent readings: u(mean) = sqrt(sum (w_i u_i)^2) with trapezoid weights w_i
                w = np.zeros_like(x)
                dx = np.diff(x)
                w[:-1] += dx / 2
                w[1:] += dx / 2
                u_mean = 100.0 * float(np.sqrt(np.sum((w / span * u) ** 2))) / nominal
        rows.append({
            "survey_id": sid,
            "path_id": pid,
            "date": grp["date"].min(),
            "n_readings": int(len(g)),
            "span_mm": span,
            "min_remaining_mm": float(t[imin]),
            "max_loss_pct": max_loss,
            "mean_loss_pct": mean_loss,
            "u_max_loss_pct": 100.0 * float(u[imin]) / nominal if np.isfinite(u[imin]) else np.nan,
            "u_mean_loss_pct": u_mean,
            "methods": ", ".join(sorted(set(g["method"]))),
            "lines": ", ".join(str(int(v)) for v in g["line"]),
        })
    cols = ["survey_id", "path_id", "date", "n_readings", "span_mm", "min_remaining_mm", "max_loss_pct",
            "mean_loss_pct", "u_max_loss_pct", "u_mean_loss_pct", "methods", "lines"]
    surveys = pd.DataFrame(rows, columns=cols)
    return surveys, r.drop(columns=["day"]), excluded


# --------------------------------------------------------------------------------------
# 2. matching
def _times(values):
    return pd.to_datetime(pd.Series(values, dtype=object), utc=True, errors="coerce", format="ISO8601")


def match_surveys(surveys, scores, *, window_days: float = 7.0):
    """Pair each survey with the nearest scored capture of its path within ``window_days``.

    Only rows with ``status == "scored"`` and a finite ``max_loss_pct`` take part.
    Ties in time go to the earlier capture.

    Returns
    -------
    DataFrame
        ``surveys`` plus ``matched`` (bool), ``match_reason``, ``dt_days`` (capture minus
        reading, days) and, for matched rows, the capture's columns prefixed ``est_``
        (``est_max_loss_pct``, ``est_max_loss_pct_lower``, ..., ``est_in_family``,
        ``est_content_hash``, ``est_captured_at``, ``est_file``).
    """

    sc = scores.copy()
    if "status" in sc:
        sc = sc[sc["status"].fillna("scored") == "scored"]
    sc = sc[np.isfinite(pd.to_numeric(sc["max_loss_pct"], errors="coerce").to_numpy(float))]
    sc = sc.assign(_t=_times(sc["captured_at"]).to_numpy())
    sc = sc[sc["_t"].notna()]
    by_path = {pid: g.sort_values(["_t"], kind="stable") for pid, g in sc.groupby("path_id")}
    take = [c for c in ("content_hash", "file", "captured_at", "temperature_c", "max_loss_pct",
                        "max_loss_pct_lower", "max_loss_pct_upper", "mean_loss_pct", "mean_loss_pct_lower",
                        "mean_loss_pct_upper", "in_family", "mismatch_p_value", "mismatch_reasons") if c in sc]
    out_rows = []
    for _, srv in surveys.iterrows():
        rec: dict[str, Any] = {"matched": False, "dt_days": np.nan, "match_reason": ""}
        g = by_path.get(srv["path_id"])
        if g is None or g.empty:
            rec["match_reason"] = f"no scored capture of path {srv['path_id']} in the history"
        else:
            dt = (g["_t"] - srv["date"]).dt.total_seconds().to_numpy() / 86400.0
            i = int(np.argmin(np.abs(dt)))
            if abs(dt[i]) > window_days:
                rec["match_reason"] = (f"nearest scored capture of path {srv['path_id']} is {abs(dt[i]):.1f} days "
                                       f"away (window {window_days:g} days)")
                rec["dt_days"] = float(dt[i])
            else:
                rec.update(matched=True, dt_days=float(dt[i]), match_reason="matched")
                row = g.iloc[i]
                for c in take:
                    rec[f"est_{c}"] = row[c]
        out_rows.append(rec)
    extra = pd.DataFrame(out_rows, index=surveys.index)
    for c in take:
        if f"est_{c}" not in extra:
            extra[f"est_{c}"] = np.nan
    return pd.concat([surveys, extra], axis=1)


# --------------------------------------------------------------------------------------
# 3. residual arithmetic
def _z(level: float) -> float:
    return float(stats.norm.ppf(0.5 + level / 2.0))


def _side_halfwidth(est, lo, hi, truth):
    """Half-width of the band on the side the truth falls (truth above estimate -> upper side)."""
    est, lo, hi, truth = (np.asarray(a, dtype=float) for a in (est, lo, hi, truth))
    return np.where(truth >= est, hi - est, est - lo)


def _reach(est, lower, upper, truth, u, level: float, coverage_nominal: float) -> np.ndarray:
    """How far from the estimate a reading may fall and still count as inside the band at ``level``.

    The side half-width ``h`` (scaled by ``z_{(1+a)/2} / z_{(1+c)/2}`` for another level ``a``)
    combined in quadrature with the reading's own spread ``z_{(1+a)/2} u``: the band a reading
    with standard uncertainty ``u`` should fall in (Gaussian approximation; with ``u = 0`` it
    is the band itself).
    """
    za, zc = _z(level), _z(coverage_nominal)
    h = _side_halfwidth(est, lower, upper, truth) * (za / zc)
    u = np.where(np.isfinite(u), u, 0.0)
    return np.sqrt(h ** 2 + (za * u) ** 2)


def residual_summary(est, lower, upper, truth, u_truth=None, *, coverage_nominal: float,
                     confidence: float = 0.95) -> dict:
    """Residual statistics of one target over matched pairs (NaN pairs dropped; infinite bands kept).

    ``r = est - truth``; bias ``mean(r)`` with the Student-t interval
    ``mean +- t_{(1+confidence)/2, n-1} s / sqrt(n)``; RMSE ``sqrt(mean r^2)``; MAE;
    empirical coverage ``k/n`` with ``k`` the readings inside the band and its
    Clopper-Pearson interval (Clopper and Pearson 1934) at ``confidence``. With reading
    uncertainties ``u_truth`` the band a reading is held to is widened in quadrature by
    ``z u`` (see :func:`_reach`); without them it is ``[lower, upper]``.
    """

    est, lower, upper, truth = (np.asarray(a, dtype=float) for a in (est, lower, upper, truth))
    u = np.full(est.shape, np.nan) if u_truth is None else np.asarray(u_truth, dtype=float)
    # an infinite band (conformal order statistic beyond the calibration set) is kept: it is a
    # real, if useless, band and covers every reading; only missing values drop a pair
    ok = np.isfinite(est) & np.isfinite(truth) & ~np.isnan(lower) & ~np.isnan(upper)
    est, lower, upper, truth, u = est[ok], lower[ok], upper[ok], truth[ok], u[ok]
    n = int(est.size)
    out = {"n": n, "bias": np.nan, "bias_lower": np.nan, "bias_upper": np.nan, "sd": np.nan,
           "rmse": np.nan, "mae": np.nan, "covered": 0, "coverage": np.nan,
           "coverage_lower": np.nan, "coverage_upper": np.nan, "coverage_nominal": float(coverage_nominal),
           "mean_band_width": np.nan, "confidence": float(confidence)}
    if n == 0:
        return out
    r = est - truth
    out["bias"] = float(r.mean())
    out["rmse"] = float(np.sqrt(np.mean(r ** 2)))
    out["mae"] = float(np.mean(np.abs(r)))
    out["mean_band_width"] = float(np.mean(upper - lower))
    if n >= 2:
        sd = float(r.std(ddof=1))
        half = float(stats.t.ppf(0.5 + confidence / 2.0, n - 1)) * sd / math.sqrt(n)
        out.update(sd=sd, bias_lower=out["bias"] - half, bias_upper=out["bias"] + half)
    reach = _reach(est, lower, upper, truth, u, coverage_nominal, coverage_nominal)
    k = int(np.sum(np.abs(r) <= reach + 1e-12))
    ci = stats.binomtest(k, n).proportion_ci(confidence_level=confidence, method="exact")
    out.update(covered=k, coverage=k / n, coverage_lower=float(ci.low), coverage_upper=float(ci.high))
    return out


def standardised_residuals(est, lower, upper, truth, u_truth, *, coverage_nominal: float,
                           floor: float = 0.05) -> np.ndarray:
    """``z = (est - truth) / sqrt(s^2 + u^2)``, with ``s`` the band's side half-width over
    ``z_{(1+c)/2}`` (the band read as a Gaussian interval at nominal coverage ``c``) and
    ``u`` the reading's standard uncertainty (0 when unknown). ``floor`` [same units]
    keeps zero-width bands from dividing by zero.
    """
    est, lower, upper, truth, u = (np.asarray(a, dtype=float) for a in (est, lower, upper, truth, u_truth))
    s = _side_halfwidth(est, lower, upper, truth) / _z(coverage_nominal)
    u = np.where(np.isfinite(u), u, 0.0)
    scale = np.maximum(np.sqrt(s ** 2 + u ** 2), floor)
    return (est - truth) / scale


def calibration_curve(est, lower, upper, truth, u_truth=None, *, coverage_nominal: float,
                      levels: Sequence[float] = (0.5, 0.6, 0.7, 0.8, 0.9, 0.95, 0.99)):
    """Empirical coverage at several nominal levels from one band.

    The band at level ``a`` is the nominal band with each side scaled by
    ``z_{(1+a)/2} / z_{(1+c)/2}`` (a Gaussian-shape approximation), widened by the reading
    uncertainty as in :func:`residual_summary`; at ``a = c`` with ``u = 0`` it is the band
    itself, so that point is exact.

    Returns
    -------
    DataFrame with ``level, empirical, n``.
    """

    est, lower, upper, truth = (np.asarray(a, dtype=float) for a in (est, lower, upper, truth))
    u = np.full(est.shape, np.nan) if u_truth is None else np.asarray(u_truth, dtype=float)
    ok = np.isfinite(est) & np.isfinite(truth) & np.isfinite(lower) & np.isfinite(upper)
    est, lower, upper, truth, u = est[ok], lower[ok], upper[ok], truth[ok], u[ok]
    lv = sorted(set(float(a) for a in levels) | {float(coverage_nominal)})
    rows = []
    for a in lv:
        if est.size == 0:
            rows.append({"level": a, "empirical": np.nan, "n": 0})
            continue
        reach = _reach(est, lower, upper, truth, u, a, coverage_nominal)
        rows.append({"level": a, "empirical": float(np.mean(np.abs(est - truth) <= reach + 1e-12)),
                     "n": int(est.size)})
    return pd.DataFrame(rows)


# --------------------------------------------------------------------------------------
# 6. verdict
def decide(summaries: Mapping[str, dict], drift: Mapping[str, dict], feature_table, *,
           oof_share_observed: float, settings: AuditSettings) -> tuple[str, list[str], list[str]]:
    """Apply :data:`VERDICT_RULES`; returns ``(verdict, reasons, notes)``."""
    s = settings
    retrain, recal, notes = [], [], []
    if feature_table is not None and len(feature_table):
        ft = feature_table
        out_dom = ft[ft["drifted"] & (ft["psi"] >= PSI_MAJOR) & (ft.get("outside_share", 0.0) > s.support_share)]
        for _, row in out_dom.iterrows():
            retrain.append(
                f"feature {row['feature']} left the training domain: KS q = {row['q_value']:.2g} < {s.drift_alpha:g}, "
                f"PSI = {row['psi']:.2f}, {row['outside_share']:.0%} of recent values outside the training range")
        if ft["drifted"].any() and out_dom.empty:
            notes.append(f"{int(ft['drifted'].sum())} feature(s) differ in distribution from the training sample "
                         "but stay within its range (the field population is not the simulated one); "
                         "not a reason to retrain on its own")
    if oof_share_observed > s.oof_share:
        retrain.append(f"{oof_share_observed:.0%} of the matched captures were flagged out of family "
                       f"(rule: more than {s.oof_share:.0%})")
    for target, sm in summaries.items():
        if sm["n"] < s.min_n:
            notes.append(f"{target}: {sm['n']} matched reading(s), fewer than {s.min_n}; residual rules not applied")
            continue
        if np.isfinite(sm["bias_lower"]) and (sm["bias_lower"] > 0 or sm["bias_upper"] < 0):
            recal.append(f"{target}: bias {sm['bias']:+.2f} % of nominal, {sm['confidence']:.0%} CI "
                         f"[{sm['bias_lower']:+.2f}, {sm['bias_upper']:+.2f}] excludes zero")
        if np.isfinite(sm["coverage_upper"]) and sm["coverage_upper"] < sm["coverage_nominal"]:
            recal.append(f"{target}: band coverage {sm['coverage']:.0%} ({sm['covered']}/{sm['n']}), "
                         f"{sm['confidence']:.0%} CI [{sm['coverage_lower']:.0%}, {sm['coverage_upper']:.0%}] "
                         f"below nominal {sm['coverage_nominal']:.0%}")
        d = drift.get(target)
        if d is not None and d["result"] is not None and d["result"].alarm:
            recal.append(f"{target}: Page-Hinkley alarm ({d['result'].direction}) on the standardised residuals "
                         f"at the reading of {d.get('alarm_date', '?')} (delta {s.ph_delta:g}, lambda {s.ph_lambda:g})")
    if retrain:
        return "retrain", retrain + recal, notes
    if recal:
        return "recalibrate", recal, notes
    return "in control", ["no rule fired"], notes

