"""Audit settings, verdict rules and the result record (see :mod:`waneguide.operations.audit`)."""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from waneguide.core.errors import InputError
from waneguide.operations.drift import (
    cusum_arl_siegmund,
    two_sided_arl,
)

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
            raise InputError(f"audit setting(s) out of range: {', '.join(f'{k}={getattr(self, k)!r}' for k in bad)}.")

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

