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

import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np

from waneguide.operations.drift import PSI_MAJOR, PageHinkley, cusum_arl_siegmund, feature_drift, two_sided_arl

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

#: Targets the audit compares (percent of nominal flange thickness).
TARGETS = ("max_loss_pct", "mean_loss_pct")
VERDICTS = ("in control", "recalibrate", "retrain")

VERDICT_RULES = (
    "retrain when the inputs have left the training domain: at least one feature drifted "
    "(Benjamini-Hochberg adjusted KS p-value below alpha) with a major shift (PSI >= 0.25) and more "
    "than {support_share:.0%} of its recent values outside the range seen in training (features constant "
    "in training are not tested); "
    "or more than {oof_share:.0%} of the matched captures were flagged out of family.",
    "recalibrate (when not retrain) for any target with at least {min_n} matched readings: the bias "
    "confidence interval excludes zero; or the empirical band coverage is significantly below nominal "
    "(the upper end of its Clopper-Pearson interval is below the nominal coverage); or the "
    "Page-Hinkley test on the standardised residuals alarmed.",
    "in control otherwise. With fewer than {min_n} matched readings per target the residual rules "
    "cannot fire, and the report says so.",
)


@dataclass(frozen=True)
class AuditSettings:
    """Stated settings of one audit (all printed in the report).

    Attributes
    ----------
    window_days : float
        A survey is matched to the nearest scored capture of its path no more than this
        many days away.
    confidence : float
        Level of the bias and coverage confidence intervals.
    ph_delta, ph_lambda : float
        Page-Hinkley drift allowance and threshold on the standardised residuals
        [standard deviations]; 0.5 and 5 give an in-control average run length near 465
        readings (two-sided) and about 10 readings of delay for a one-sigma bias step.
    drift_alpha : float
        False discovery rate for the per-feature drift tests.
    recent_days : float
        Captures scored within this many days before the last one count as "recent" for
        feature drift.
    min_n : int
        Matched readings a target needs before its residual rules may fire.
    support_share, oof_share : float
        Shares used by the retrain rules (see :data:`VERDICT_RULES`).
    min_mean_points, min_mean_span : int, float
        A survey gives a mean-loss target only with this many readings spanning this
        fraction of the path.
    """

    window_days: float = 7.0
    confidence: float = 0.95
    ph_delta: float = 0.5
    ph_lambda: float = 5.0
    drift_alpha: float = 0.05
    recent_days: float = 90.0
    min_n: int = 3
    support_share: float = 0.05
    oof_share: float = 0.25
    min_mean_points: int = 3
    min_mean_span: float = 0.8

    def __post_init__(self):
        checks = {
            "window_days": self.window_days > 0,
            "confidence": 0 < self.confidence < 1,
            "ph_delta": self.ph_delta >= 0,
            "ph_lambda": self.ph_lambda > 0,
            "drift_alpha": 0 < self.drift_alpha < 1,
            "recent_days": self.recent_days > 0,
            "min_n": self.min_n >= 2,
            "support_share": 0 <= self.support_share < 1,
            "oof_share": 0 <= self.oof_share < 1,
            "min_mean_points": self.min_mean_points >= 2,
            "min_mean_span": 0 < self.min_mean_span <= 1,
        }
        bad = [k for k, ok in checks.items() if not ok]
        if bad:
            raise ValueError(f"audit setting(s) out of range: {', '.join(f'{k}={getattr(self, k)!r}' for k in bad)}.")

    @property
    def ph_arl0(self) -> float:
        """Two-sided in-control ARL of the Page-Hinkley settings (Siegmund 1985 approximation)."""
        one = cusum_arl_siegmund(self.ph_delta, self.ph_lambda, 0.0)
        return two_sided_arl(one, one)

    def rules(self) -> list[str]:
        return [r.format(support_share=self.support_share, oof_share=self.oof_share, min_n=self.min_n)
                for r in VERDICT_RULES]


@dataclass
class AuditResult:
    """Everything one audit found (see :func:`audit_frames`)."""

    verdict: str
    reasons: list[str]
    notes: list[str]
    settings: AuditSettings
    coverage_nominal: float
    surveys: Any            # DataFrame: one row per survey, with match columns
    readings: Any           # DataFrame: the readings, with their survey and match
    unmatched: Any          # DataFrame: surveys/readings not compared, with the reason
    summaries: dict         # target -> residual summary dict
    calibration: Any        # DataFrame: target, level, empirical, n
    drift: dict             # target -> {"dates", "z", "result": PageHinkleyResult}
    feature_drift: Any      # DataFrame or None
    model: dict = field(default_factory=dict)
    report_path: Path | None = None
    challenger: dict | None = None
    audit_id: int | None = None

    def summary(self) -> dict:
        """Plain JSON-able summary (stored in the history's ``audits`` table)."""
        fd = self.feature_drift
        out = {
            "verdict": self.verdict,
            "reasons": list(self.reasons),
            "notes": list(self.notes),
            "coverage_nominal": self.coverage_nominal,
            "n_surveys": int(len(self.surveys)),
            "n_matched": int(self.surveys["matched"].sum()) if len(self.surveys) else 0,
            "targets": {t: {k: v for k, v in s.items()} for t, s in self.summaries.items()},
            "page_hinkley": {t: {"alarm": d["result"].alarm if d["result"] is not None else False,
                                 "alarm_date": d.get("alarm_date"),
                                 "direction": d["result"].direction if d["result"] is not None else None}
                             for t, d in self.drift.items()},
            "features_drifted": [] if fd is None else list(fd.loc[fd["drifted"], "feature"]),
            "settings": self.settings.__dict__.copy(),
            "model": dict(self.model),
        }
        if self.challenger:
            out["challenger"] = {k: str(v) for k, v in self.challenger.items()}
        return out


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
    import pandas as pd

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
        raise ValueError(
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
    import pandas as pd

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
    import pandas as pd

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
    from scipy import stats

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
    from scipy import stats

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
    import pandas as pd

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
    import pandas as pd

    s = settings or AuditSettings()
    surveys, rd, excluded = reading_targets(readings, nominal_thickness_mm=nominal_thickness_mm,
                                            path_length_mm=path_length_mm, settings=s)
    if surveys.empty:
        raise ValueError("no reading lies on a path span of the model's family; nothing to audit.")
    m = match_surveys(surveys, scores, window_days=s.window_days)
    matched = m[m["matched"]].copy()
    notes: list[str] = []
    if matched.empty:
        first = m["match_reason"].iloc[0]
        raise ValueError(
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
    import pandas as pd

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
    from waneguide.operations.scoring import check_limit_pct

    limit_pct = check_limit_pct(limit_pct, "limit_pct (--limit-pct)")
    if report_path is not None:
        from waneguide.core.atomic import check_output_path

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
    import pandas as pd

    from waneguide.operations.history import History, resolve_db_url, sqlite_file
    from waneguide.operations.readings import read_readings

    limit_pct = check_audit_options(limit_pct=limit_pct, report_path=report_path)
    db_file = sqlite_file(resolve_db_url(db_url))
    if db_file is not None and not db_file.is_file():
        # auditing reads the history; never create an empty database for a mistyped path
        raise ValueError(f"history database {str(db_file)!r} does not exist; give the --db the captures were "
                         "scored into (`waneguide score --db ...`).")
    if isinstance(bundle, (str, Path)):
        from waneguide.models.bundle import load_bundle

        bundle = load_bundle(bundle)
    s = settings or AuditSettings()
    readings = read_readings(readings_csv)
    ident = model_identity(bundle)
    hist = History(db_url)
    try:
        scores = hist.scores(model_version=ident["model_version"])
        if scores.empty:
            raise ValueError(
                f"the history {hist._safe_url()} holds no captures scored by model version "
                f"{ident['model_version']}; run `waneguide score --model ... --db ...` first."
            )
        recent_feats = None
        ref = _reference_sample(bundle)
        if ref is not None:
            t = _times(scores["captured_at"])
            last = t.max()
            recent = scores[(t >= last - pd.Timedelta(days=s.recent_days)).to_numpy() &
                            (scores["status"] == "scored").to_numpy()]
            recent_feats = hist.features(model_version=ident["model_version"],
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
        result.audit_id = hist.add_audit(model_version=ident["model_version"], verdict=result.verdict,
                                         summary=result.summary(), readings_file=str(readings_csv))
        if report_path is not None:
            from waneguide.operations.report import write_report

            result.report_path = write_report(report_path, scores=scores, audit=result, model=ident,
                                               limit_pct=limit_pct)
    finally:
        hist.close()
    return result


def _recalibrate(bundle, hist, result: AuditResult, *, tracking_uri=None) -> dict:
    """Refit calibration with the matched readings; save and register a challenger."""
    import pandas as pd

    m = result.surveys
    m = m[m["matched"]]
    if "est_in_family" in m:
        m = m[m["est_in_family"].astype("boolean").fillna(False).astype(bool).to_numpy()]
    if len(m) < result.settings.min_n:
        raise ValueError(
            f"--recalibrate needs at least {result.settings.min_n} matched in-family readings; "
            f"got {len(m)}. Take more hands-on readings or widen the time window."
        )
    feats = hist.features(model_version=result.model["model_version"], content_hashes=m["est_content_hash"])
    missing = [h for h in m["est_content_hash"] if h not in feats.index]
    if missing:
        raise ValueError(f"{len(missing)} matched capture(s) have no stored features in the history; "
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
            raise ValueError(f"refusing to overwrite {target}: a model with version {new.version} is already there.")
        target = new.save(target)
    info: dict[str, Any] = {"bundle_path": target, "model_version": new.version,
                            "parent_version": result.model["model_version"]}
    from waneguide.operations.registry import register_bundle
    from waneguide.operations.tracking import TrackedRun, experiment_name

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
    from waneguide.core.caution import CAUTION

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
                     + "; the model in service is unchanged")
    if result.report_path:
        lines.append(f"report: {result.report_path}")
    lines.append(CAUTION)
    return "\n".join(lines)
