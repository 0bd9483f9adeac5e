"""Markdown model card of a bundle: what it is for, how well it does, and where it must not be trusted."""
from __future__ import annotations

import math

from waneguide.core.caution import CAUTION

__all__ = ["render_model_card", "OBSERVABILITY_NOTE"]

_SHIFT_HELD = {"thickness": "flange thickness scaled", "spacing": "transducer spacing scaled",
               "shear": "bulk shear speed scaled (density, longitudinal speed held)",
               "longitudinal": "bulk longitudinal speed scaled (density, shear speed held)",
               "density": "density scaled (E and nu held: every speed scales by density^-1/2)",
               "alloy": "built-in alloy swapped (2024-T3 <-> 7075-T6)"}

#: Why one path pins down the mean loss but not the maximum (physics of the measurement).
OBSERVABILITY_NOTE = (
    "A single pitch-catch path measures travel time integrated along the path: the arrival shift of a mode "
    "is the sum over the path of (1/c(d(x)) - 1/c(d_nominal)) dx. That fixes the **path-averaged loss "
    "(`mean_loss_pct`)** well. It does **not** fix the **maximum loss (`max_loss_pct`, `max_loss_mm`)**: a deep, "
    "short patch and a shallow, long one give the same shift. Amplitude and mode-conversion features carry "
    "some shape information, but the maximum stays only partly determined; its bands are correspondingly "
    "wider, and that width is the honest answer, not a defect to tune away."
)


def _fmt(v, digits=3):
    if v is None:
        return "-"
    try:
        f = float(v)
    except (TypeError, ValueError):
        return str(v)
    if math.isinf(f):
        return "inf"
    if math.isnan(f):
        return "-"
    return f"{f:.{digits}g}"


def render_model_card(bundle) -> str:
    """Markdown text for ``bundle`` (a :class:`waneguide.models.bundle.ModelBundle`)."""
    fam = bundle.family
    m = bundle.metrics or {}
    lines = [
        f"# Model card: {fam.name} ({bundle.version})",
        "",
        f"> **Caution.** {CAUTION}",
        "",
    ]
    if getattr(fam.family, "invented", False):
        lines += ["*This family is INVENTED demo data (the invented Lowmoor test rig); "
                  "the model is for demonstration only.*", ""]
    lines += [
        "## What it estimates",
        "",
        f"Wall loss of the {fam.section.flange_thickness_mm:g} mm {fam.build_material().name} flange of family "
        f"`{fam.name}` (fingerprint `{bundle.family_fingerprint}`) along a "
        f"{fam.path.transducer_spacing_mm:g} mm pitch-catch path at {fam.excitation.centre_frequency_khz:g} kHz, "
        "from guided-wave features of a capture compared with its baseline(s):",
        "",
        "| target | meaning | unit |",
        "| --- | --- | --- |",
        "| `max_loss_pct` | deepest loss along the path | % of nominal flange thickness |",
        "| `max_loss_mm` | deepest loss along the path | mm |",
        "| `mean_loss_pct` | loss averaged along the path | % of nominal flange thickness |",
        "",
        "Each estimate comes with a conformal band of nominal coverage "
        f"**{bundle.coverage:.0%}**, calibrated on **{bundle.calibration_source}** cases, an exceedance "
        "probability for a user limit on `max_loss_pct` (conservative end of the conformal predictive "
        "distribution), and an out-of-family verdict (robust Mahalanobis + IsolationForest conformal p-value, "
        "plus physics checks). Out-of-family captures still get numbers, marked out of domain.",
        "",
        "## What one path can and cannot tell",
        "",
        OBSERVABILITY_NOTE,
        "",
    ]
    ev = m.get("evaluation", {})
    if ev:
        lines += ["## Held-out evaluation (simulated cases of unseen specimens)", "",
                  "| target | MAE | RMSE | coverage | mean band width | width / target range |",
                  "| --- | --- | --- | --- | --- | --- |"]
        for t, r in ev.items():
            if isinstance(r, dict) and "mae" in r:
                lines.append(f"| `{t}` | {_fmt(r.get('mae'))} | {_fmt(r.get('rmse'))} | {_fmt(r.get('coverage'))} | "
                             f"{_fmt(r.get('mean_width'))} | {_fmt(r.get('relative_width'))} |")
        lines.append("")
        rel = {t: r.get("relative_width") for t, r in ev.items() if isinstance(r, dict)}
        if rel.get("max_loss_pct") is not None and rel.get("mean_loss_pct") is not None:
            lines += [f"The `max_loss_pct` band is {_fmt(rel['max_loss_pct'] / max(rel['mean_loss_pct'], 1e-12), 2)}x "
                      "as wide (relative to its range) as the `mean_loss_pct` band: the measurement's own limit.", ""]
    if m.get("conventional_ratio") is not None:
        lines += [f"Conventional single-mode arrival-shift inversion vs this model on `mean_loss_pct` "
                  f"(MAE ratio conventional / model): {_fmt(m['conventional_ratio'])}.", ""]
    lines += _mismatch_section(bundle)
    if m.get("measured"):
        lines += ["## Measured data", "", "Accuracy on measured cases (grouped cross-validation by path):", "",
                  "| target | MAE simulated model only | MAE with residual correction | correction |",
                  "| --- | --- | --- | --- |"]
        for t, r in m["measured"].items():
            lines.append(f"| `{t}` | {_fmt(r.get('mae_without'))} | {_fmt(r.get('mae_with'))} | "
                         f"{r.get('correction', '-')} |")
        lines.append("")
    gp = m.get("gp", {})
    hits = [f"- `{t}`: {h}" for t, r in gp.items() if isinstance(r, dict) for h in r.get("bound_hits", [])]
    lines += ["## Model", "",
              "- Central model: LightGBM with monotone constraints where physics fixes the sign "
              "(more A0 delay never means less loss), persisted in LightGBM's text format.",
              "- Gaussian process (Matern 5/2, ARD, white noise; standardised features) on a space-filling subset "
              "of the campaign restricted to the most important features; blended with LightGBM only when "
              "grouped cross-validation (groups = specimen) shows a gain and the blend stays monotone on a probe grid.",
              "- Band: split-conformal on residuals normalised by a LightGBM scale model, order statistic "
              "k = ceil((n+1)(1-alpha)) (infinite band when k > n); CV+ when calibrated on measured cases.",
              ""]
    if hits:
        lines += ["GP length scales / noise at a search bound (logged, not hidden):", ""] + hits + [""]
    lines += ["## Limits", "",
              "- Trained on simulated thinning of a free plate of the flange thickness (the web only sets echo "
              "delays); real flanges, bonds, fasteners and sealant are outside the simulation.",
              "- Valid only inside the training domain (feature ranges in `training_domain.json`) and for the "
              "family's geometry, alloy, excitation and sample rate; the mismatch detector flags departures "
              "but cannot prove a capture is in family.",
              "- Coverage is marginal (on average over the calibration population), not per capture.",
              "",
              f"> **Caution.** {CAUTION}", ""]
    return "\n".join(lines)


def _rate_rows(table: dict) -> list[str]:
    rows = ["| cases | n | flagged | rate | 95 % upper bound |", "| --- | --- | --- | --- | --- |"]
    for name, r in table.items():
        rows.append(f"| {name} | {r.get('n', '-')} | {r.get('flagged', '-')} | {_fmt(r.get('rate'))} | "
                    f"{_fmt(r.get('upper_95'))} |")
    return rows + [""]


def _physics_lines(bundle) -> list[str]:
    chk = bundle.checker
    st = getattr(chk, "state", None) or {}
    if not st.get("plate"):
        return []
    p = chk.params()
    plate = st["plate"]
    lines = ["Plate check (physics, per path): each baseline's S0 group delay (temperature-compensated, "
             "Rayleigh-Lamb) and A0 thickness gauge against the family's plate. Low-frequency S0 travels at the "
             "plate velocity sqrt(E / (rho (1 - nu^2))) (Graff, *Wave Motion in Elastic Solids*), whatever the "
             "thickness, and wall loss only speeds it up, so a slower S0 is another alloy or a longer path; A0 "
             "gauges the thickness, and no loss reads thicker. In-family box: path within "
             f"{_fmt(p['path_tolerance_mm'])} mm, plate velocity within {_fmt(100 * p['velocity_tolerance'])} %, "
             f"temperature within {_fmt(p['temperature_uncertainty_k'])} K of the recorded one, thickness within "
             f"{_fmt(100 * p['thickness_rel_tol'])} %; flagged beyond {_fmt(plate.get('threshold'))} in-family "
             f"standard deviations (pooled over the baselines of a path; threshold from "
             f"{plate.get('n_baselines', '-')} training baselines and the chi-square quantile at "
             f"{_fmt(p['false_alarm_rate'])})."]
    if st.get("s0"):
        lines[-1] += (f" In-family scatter of the S0 delay {_fmt(100 * st['s0'].get('sd', float('nan')))} %, of the "
                      f"gauge {_fmt(100 * st.get('gauge', {}).get('sd', float('nan')))} % of nominal.")
    neg = st.get("negative_loss")
    if neg:
        lines += ["", "Negative apparent loss (physics, per capture): a capture whose A0 packet refocuses at a larger "
                  "thickness than its baseline's and sits ahead of it after compensation, both beyond "
                  f"{_fmt(neg.get('threshold'))} robust standard deviations of {neg.get('n_pristine', '-')} pristine "
                  "in-family captures, without the A0 transmission loss that heavy in-family loss brings, is flagged "
                  "instead of being clipped silently to 0 % (reason "
                  "\"negative apparent loss\", column `negative_apparent_loss` of the scores)."]
    return lines + [""]


def _mismatch_section(bundle) -> list[str]:
    m = bundle.metrics or {}
    mm = m.get("mismatch")
    if not mm:
        return []
    phys = mm.get("physics_false_alarm_rate")
    lines = ["## Out-of-family detection", "",
             f"Stated false-alarm rates: {_fmt(mm.get('false_alarm_rate'))} for the statistical detector (conformal "
             "p-value of robust Mahalanobis + IsolationForest novelty)"
             + (f", {_fmt(phys)} for the plate check (per path) and {_fmt(phys)} for the negative-loss check "
                f"(per capture), at most {_fmt(mm.get('false_alarm_rate', 0) + 2 * phys)} together" if phys else "")
             + f". Observed on held-out in-family cases: {_fmt(mm.get('in_family_false_alarm_rate'))}.", ""]
    lines += _physics_lines(bundle)
    if mm.get("held_out"):
        lines += ["In-family false alarms, held-out cases (95 % upper bound: one-sided Clopper-Pearson):", ""]
        lines += _rate_rows(mm["held_out"])
    if mm.get("edges"):
        lines += ["In-family false alarms, small campaigns where they are most likely:", ""]
        lines += _rate_rows(mm["edges"])
    if mm.get("shifts"):
        lines += ["Power per shifted family (campaigns of the tool's own forward model with one thing changed, "
                  "processed with this family; each case its own path and baseline). AUROC against held-out in-family "
                  "cases, of the whole verdict (flagged rows first, then by p-value) and of the statistical "
                  "p-value alone:", "",
                  "| shifted family | what changes | n | flagged | by the physics | AUROC | AUROC, statistical "
                  "p-value alone |", "| --- | --- | --- | --- | --- | --- | --- |"]
        for name, r in mm["shifts"].items():
            lines.append(f"| {name} | {_SHIFT_HELD.get(r.get('change'), r.get('change', '-'))} | {r.get('n', '-')} | "
                         f"{_fmt(r.get('flag_rate'))} | {_fmt(r.get('physics_flag_rate'))} | {_fmt(r.get('auroc'))} | "
                         f"{_fmt(r.get('auroc_statistical'))} |")
        lines.append("")
    dropped = (bundle.meta or {}).get("dropped_features") or {}
    if dropped:
        lines += ["Features left out because they are degenerate on the training campaign (no usable spread; any "
                  "other value in the field would read as a huge z-score):", ""]
        lines += [f"- `{c}`: {why}" for c, why in dropped.items()] + [""]
    return lines
