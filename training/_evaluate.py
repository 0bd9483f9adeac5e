"""Held-out evaluation of a bundle and the shifted-geometry mismatch study.

:func:`evaluate_bundle` is arithmetic on a feature table with known targets;
:func:`mismatch_study` simulates small campaigns of a family with one thing changed (flange
thickness, path length, alloy) and measures how well the bundle's mismatch detector tells
them from in-family captures (AUROC, sklearn's ``roc_auc_score``).
"""
from __future__ import annotations

import math
from pathlib import Path
from typing import Any, Mapping

import numpy as np
import pandas as pd
from sklearn.metrics import roc_auc_score

from waneguide.features.family import family_from_mapping
from waneguide.models.conformal import coverage_by_group
from waneguide.simulation.campaign import load_campaign, run_campaign
from waneguide.training._data import campaign_features

__all__ = ["DEFAULT_SHIFTS", "evaluate_bundle", "mismatch_study", "shifted_family"]


def evaluate_bundle(bundle, features: pd.DataFrame, targets: pd.DataFrame, *, group_labels: Mapping | None = None,
                    ) -> dict:
    """MAE, RMSE, coverage and mean width per target on held-out cases (+ per-group coverage).

    ``group_labels``: mapping name -> array of labels (e.g. thickness band, temperature band).
    ``relative_width`` is the mean band width over the target's observed range.
    """
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


#: Shifted geometries of the mismatch study: (name, what changes, how much).
DEFAULT_SHIFTS = (
    ("flange thickness +15 %", "thickness", 1.15),
    ("path length +10 %", "spacing", 1.10),
    ("alloy swapped", "alloy", None),
)


def shifted_family(family, what: str, factor: float | None):
    """A copy of ``family`` with its flange thickness, path length or alloy changed (mismatch study)."""
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
        raise ValueError(f"unknown shift {what!r}; use thickness, spacing or alloy")  # programming error
    return family_from_mapping(data, where=f"shifted family ({what})")


def _auroc(p_in, p_out) -> float:
    y = np.r_[np.zeros(len(p_in)), np.ones(len(p_out))]
    return float(roc_auc_score(y, -np.r_[p_in, p_out]))


def mismatch_study(bundle, family, p_in_family, *, shifts=DEFAULT_SHIFTS, n_cases: int = 120, seed: int = 0,
                   work_dir: Path, progress: bool = False) -> dict:
    """AUROC and flag rate of the detector on small campaigns simulated with shifted geometry.

    The shifted campaigns are kept in ``work_dir`` under a name that carries the shifted family's
    fingerprint, the seed and the case count, so a later study reuses only an identical campaign.
    """
    out = {}
    for name, what, factor in shifts:
        fam_s = shifted_family(family, what, factor)
        d = Path(work_dir) / f"shift_{what}_{factor}_{fam_s.fingerprint[:12]}_s{seed}_n{n_cases}"
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
