"""Held-out evaluation of a bundle and the shifted-family calibration of its mismatch detector.

:func:`evaluate_bundle` is arithmetic on a feature table with known targets;
:func:`mismatch_study` simulates small campaigns of the family with one thing changed (flange
thickness, shear or longitudinal speed, density, path length, the alloy: :data:`DEFAULT_SHIFTS`)
with the fast forward model, processes them as the field would (with the configured family),
and states per shift how often the detector flags them (all reasons, the physics alone) and the
AUROC of its statistical p-value against in-family captures (sklearn's ``roc_auc_score``). It
also simulates small in-family campaigns at the ends of the temperature range and with heavy
loss, whose flag rates are the in-family false alarms where they are most likely.
:func:`false_alarms_by_group` gives the same figures on any in-family table.
"""
from __future__ import annotations

import math
from pathlib import Path
from typing import Any, Mapping

import numpy as np
import pandas as pd
from scipy.stats import beta
from sklearn.metrics import roc_auc_score
from tqdm.auto import tqdm

from waneguide.features.extractor import FeatureExtractor
from waneguide.features.family import family_from_mapping
from waneguide.models._plate_physics import shifted_material
from waneguide.models.conformal import coverage_by_group
from waneguide.simulation.campaign import load_campaign, run_campaign
from waneguide.training._data import campaign_features

__all__ = ["DEFAULT_SHIFTS", "EDGE_CAMPAIGNS", "DEFAULT_SHIFT_CASES", "evaluate_bundle", "false_alarms_by_group",
           "mismatch_study", "shifted_family", "edge_family", "binomial_upper", "verdict_score"]


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


#: Shifted families of the calibration: (name, what changes, factor). Thickness and path scale the
#: family's flange thickness and transducer spacing; shear / longitudinal scale that bulk speed
#: (density and the other speed held); density scales rho with E and nu held; "alloy" swaps the
#: built-in alloy (2024-T3 <-> 7075-T6).
DEFAULT_SHIFTS = (
    ("flange thickness -15 %", "thickness", 0.85),
    ("flange thickness -8 %", "thickness", 0.92),
    ("flange thickness +8 %", "thickness", 1.08),
    ("flange thickness +15 %", "thickness", 1.15),
    ("shear speed -3 %", "shear", 0.97),
    ("shear speed -1.5 %", "shear", 0.985),
    ("shear speed +1.5 %", "shear", 1.015),
    ("shear speed +3 %", "shear", 1.03),
    ("longitudinal speed -3 %", "longitudinal", 0.97),
    ("longitudinal speed -1.5 %", "longitudinal", 0.985),
    ("longitudinal speed +1.5 %", "longitudinal", 1.015),
    ("longitudinal speed +3 %", "longitudinal", 1.03),
    ("density +3 %", "density", 1.03),
    ("path length +2 %", "spacing", 1.02),
    ("alloy swapped", "alloy", None),
)
#: Cases per shifted family (one baseline each: every case is its own path).
DEFAULT_SHIFT_CASES = 48
#: In-family campaigns where false alarms are most likely: (name, domain overrides as fractions of
#: the family's own ranges). Baselines and captures in the outer tenth of the temperature range at
#: either end, the captures with the deepest fifth of the loss range (both risks at once).
EDGE_CAMPAIGNS = (
    ("cold end of the temperature range, heavy loss",
     {"temperature_c": (0.0, 0.1), "max_loss_pct": (0.8, 1.0), "pristine_fraction": 0.0}),
    ("hot end of the temperature range, heavy loss",
     {"temperature_c": (0.9, 1.0), "max_loss_pct": (0.8, 1.0), "pristine_fraction": 0.0}),
)


def shifted_family(family, what: str, factor: float | None, *, states_per_specimen: int | None = None):
    """A copy of ``family`` with one thing changed (see :data:`DEFAULT_SHIFTS`)."""
    data = family.model_dump(mode="json", exclude_none=True)
    data["family"]["name"] = f"{family.name}-shifted"
    if what == "thickness":
        data["section"]["flange_thickness_mm"] = round(data["section"]["flange_thickness_mm"] * factor, 6)
    elif what == "spacing":
        data["path"]["transducer_spacing_mm"] = round(data["path"]["transducer_spacing_mm"] * factor, 6)
    elif what == "alloy":
        current = data["material"].get("builtin")
        data["material"] = {"builtin": "al-7075-t6" if current != "al-7075-t6" else "al-2024-t3"}
    elif what in ("shear", "longitudinal", "density"):
        m = shifted_material(family.build_material(), **{what: float(factor)})
        data["material"] = {"name": m.name, "youngs_modulus_pa": m.youngs_modulus_pa, "poisson_ratio": m.poisson_ratio,
                            "density_kg_m3": m.density_kg_m3, "dE_dT_pa_per_k": m.dE_dT_pa_per_k,
                            "thermal_expansion_per_k": m.thermal_expansion_per_k,
                            "reference_temperature_c": m.reference_temperature_c,
                            "min_temperature_c": m.min_temperature_c, "max_temperature_c": m.max_temperature_c,
                            "source": m.source}
    else:
        raise ValueError(f"unknown shift {what!r}; use thickness, spacing, shear, longitudinal, density or alloy")
    if states_per_specimen is not None:
        data["domain"]["states_per_specimen"] = int(states_per_specimen)
    return family_from_mapping(data, where=f"shifted family ({what})")


def edge_family(family, name: str, overrides: dict):
    """``family`` with parts of its simulation domain narrowed (same plate: an in-family campaign)."""
    data = family.model_dump(mode="json", exclude_none=True)
    dom = data["domain"]
    for key, value in overrides.items():
        if isinstance(value, tuple):
            lo, hi = dom[key]
            dom[key] = [lo + value[0] * (hi - lo), lo + value[1] * (hi - lo)]
        else:
            dom[key] = value
    dom["states_per_specimen"] = 1
    data["family"]["name"] = f"{family.name}-edge"
    return family_from_mapping(data, where=f"in-family campaign ({name})")


def _auroc(score_in, score_out) -> float:
    """AUROC of a novelty score (larger = less like the family), in-family against shifted rows."""
    y = np.r_[np.zeros(len(score_in)), np.ones(len(score_out))]
    return float(roc_auc_score(y, np.r_[score_in, score_out]))


def verdict_score(pred: pd.DataFrame) -> np.ndarray:
    """Novelty score of the whole verdict: rows with a reason first (2 - p), the rest by 1 - p.

    The conformal p-value lies in (0, 1], so every flagged row ranks above every unflagged one, and
    within each group a smaller p-value ranks higher.
    """
    p = pred["mismatch_p_value"].to_numpy(dtype=float)
    p = np.where(np.isfinite(p), p, 1.0)
    return np.where(pred["in_family"].to_numpy(dtype=bool), 1.0 - p, 2.0 - p)


def _physics_flags(bundle, feats) -> np.ndarray:
    if bundle.checker is None:
        return np.zeros(len(feats), dtype=bool)
    return bundle.checker.assess(feats)["reasons"].map(bool).to_numpy()


def binomial_upper(k: int, n: int, confidence: float = 0.95) -> float:
    """One-sided Clopper-Pearson upper bound of a rate seen k times in n (Clopper & Pearson 1934)."""
    if n == 0 or k >= n:
        return 1.0
    return float(beta.ppf(confidence, k + 1, n - k))


def false_alarms_by_group(pred: pd.DataFrame, groups: Mapping[str, np.ndarray]) -> dict:
    """Flag rate of in-family rows overall and per named row mask, with counts and the 95 % upper bound."""
    flagged = ~pred["in_family"].to_numpy(dtype=bool)
    out = {}
    for name, mask in {"all": np.ones(len(pred), dtype=bool), **groups}.items():
        m = np.asarray(mask, dtype=bool)
        k, n = int(flagged[m].sum()), int(m.sum())
        out[name] = {"n": n, "flagged": k, "rate": (k / n) if n else math.nan, "upper_95": binomial_upper(k, n)}
    return out


def _campaign_features(fam_s, n_cases, seed, work_dir, tag, *, family, extractor):
    """The (cached) campaign of ``fam_s``, its features extracted with ``family``.

    The field processes a shifted structure with the configured family; ``path_id`` is the
    case's specimen (each specimen one path with one baseline).
    """
    d = Path(work_dir) / f"{tag}_{fam_s.fingerprint[:12]}_s{seed}_n{n_cases}"
    if not (d / "manifest.json").is_file() or len(load_campaign(d).cases) != n_cases:
        run_campaign(fam_s, n_cases, d, seed=seed, progress=False)
    return campaign_features(family, load_campaign(d), progress=False, extractor=extractor)


def mismatch_study(bundle, family, pred_in_family: pd.DataFrame, *, shifts=DEFAULT_SHIFTS,
                   n_cases: int = DEFAULT_SHIFT_CASES, seed: int = 0, work_dir: Path, progress: bool = False,
                   edges=EDGE_CAMPAIGNS) -> dict:
    """Flag rates and AUROC of the detector on small campaigns of shifted families, and in-family edges.

    Each shifted campaign has ``n_cases`` cases, each with its own baseline (one state per
    specimen), so the flag rate of the per-path plate check rests on ``n_cases`` paths. The
    campaigns are kept in ``work_dir`` under a name that carries the simulated family's
    fingerprint, the seed and the case count, so a later study reuses only an identical campaign.

    ``pred_in_family``: :meth:`~waneguide.models.bundle.ModelBundle.predict_frame` of held-out
    in-family cases, the other side of the AUROCs.

    Returns ``{"shifts": {name: {...}}, "edges": {name: {...}}}``: per shift the flag rate (any
    reason), the physics checks' own flag rate, the AUROC of the whole verdict
    (:func:`verdict_score`) and of the statistical p-value alone, the count and what changed; per
    in-family edge campaign the flag rate with its count and 95 % upper bound.
    """
    s_in = verdict_score(pred_in_family)
    p_in = -pred_in_family["mismatch_p_value"].to_numpy(dtype=float)
    tasks = {("shift", name): (shifted_family(family, what, factor, states_per_specimen=1), n_cases, seed, work_dir,
                               f"shift_{what}_{factor}") for name, what, factor in shifts}
    tasks.update({("edge", name): (edge_family(family, name, overrides), n_cases, seed, work_dir, "edge")
                  for name, overrides in edges})
    ex = FeatureExtractor(family)  # one extractor for every campaign: its plans are built once
    # serial: on 2 cores neither threads (the Rayleigh-Lamb tables hold the GIL) nor processes
    # (start-up) made the study faster (measured: 9.5 s serial, 9.2 s on 2 threads, 13 s on 2 processes)
    feats = {key: _campaign_features(*args, family=family, extractor=ex)
             for key, args in tqdm(tasks.items(), desc="shifted families", disable=not progress)}
    out: dict = {"shifts": {}, "edges": {}}
    for name, what, factor in shifts:
        f = feats[("shift", name)]
        pred = bundle.predict_frame(f)
        p = pred["mismatch_p_value"].to_numpy(dtype=float)
        flagged = ~pred["in_family"].to_numpy(dtype=bool)
        out["shifts"][name] = {"auroc": _auroc(s_in, verdict_score(pred)), "auroc_statistical": _auroc(p_in, -p),
                               "flag_rate": float(flagged.mean()),
                               "physics_flag_rate": float(_physics_flags(bundle, f).mean()),
                               "n": int(len(p)), "change": what, "factor": factor}
    for name, _ in edges:
        out["edges"][name] = false_alarms_by_group(bundle.predict_frame(feats[("edge", name)]), {})["all"]
    return out
