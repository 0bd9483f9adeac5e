"""The self-contained HTML report: scores from the history, and the audit when there is one.

One file, no network: every plot is a matplotlib PNG embedded as base64, the style
sheet is inline, and there is no script, font, link or image from anywhere else.

Sections: model and family identity; the verdict with the rules that produced it;
key numbers; per-path trend of estimated wall loss with its band, the limit line and
the hands-on readings overlaid; estimate vs reading; calibration (nominal vs
empirical coverage); residual drift (Page-Hinkley statistics); feature drift against
the training domain; the mismatch list (out-of-family captures with their reasons,
rejected captures with their quality flags); readings not compared and why; the
stated settings; the safety caution.

Every number a reader may check carries an ``id`` or a ``data-key`` attribute, so
tests can compare the page with the database.
"""
from __future__ import annotations

import base64
import html
import io
import math
from pathlib import Path
from typing import Any, Mapping

import matplotlib
import matplotlib.dates as mdates
import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from waneguide.core.atomic import atomic_write_text
from waneguide.core.caution import CAUTION
from waneguide.operations.drift import PSI_MAJOR, PSI_MODERATE

__all__ = ["write_report", "render_report", "figure_to_data_uri"]

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,Helvetica,Arial,sans-serif;margin:1.5rem auto;
max-width:1150px;color:#1b1f24;line-height:1.4;padding:0 1rem}
h1{font-size:1.6rem;margin-bottom:.2rem}h2{font-size:1.25rem;border-bottom:2px solid #d0d7de;padding-bottom:.2rem;
margin-top:2rem}h3{font-size:1.05rem}
.caution{border:2px solid #b35900;background:#fff4e5;padding:.7rem 1rem;border-radius:6px;font-weight:600}
.invented{background:#eef3ff;border:1px solid #9db3e8;padding:.4rem .8rem;border-radius:6px}
table{border-collapse:collapse;margin:.5rem 0;font-size:.9rem}th,td{border:1px solid #d0d7de;padding:.25rem .5rem;
text-align:left;vertical-align:top}th{background:#f3f5f7}td.num{text-align:right;font-variant-numeric:tabular-nums}
.verdict{font-size:1.3rem;font-weight:700;padding:.5rem 1rem;border-radius:6px;display:inline-block}
.v-in-control{background:#e6f4ea;color:#0b5d1e}.v-recalibrate{background:#fff4ce;color:#6b4e00}
.v-retrain{background:#fde7e9;color:#8a1020}.v-none{background:#eef0f2}
img.plot{max-width:100%;height:auto;border:1px solid #e1e4e8;margin:.3rem 0}
.muted{color:#57606a;font-size:.9rem}
"""


def figure_to_data_uri(fig) -> str:
    """PNG of a matplotlib figure as a ``data:`` URI (no metadata pointing anywhere)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110, bbox_inches="tight", metadata={"Software": None})
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def _esc(v: Any) -> str:
    return html.escape("" if v is None else str(v), quote=True)


def _fmt(v: Any, digits: int = 2, pct: bool = False) -> str:
    if isinstance(v, (int, np.integer)) and not isinstance(v, (bool, np.bool_)) and not pct:
        return str(int(v))
    try:
        f = float(v)
    except (TypeError, ValueError):
        return _esc(v)
    if not math.isfinite(f):
        return "n/a"
    if pct:
        return f"{100 * f:.0f}%"
    return f"{f:.{digits}f}"


def _times(values):
    return pd.to_datetime(pd.Series(list(values), dtype=object), utc=True, errors="coerce", format="ISO8601")


def _fig(w=8.0, h=3.6):
    fig = Figure(figsize=(w, h))
    return fig


def _date_axis(ax):
    loc = mdates.AutoDateLocator(minticks=3, maxticks=8)
    ax.xaxis.set_major_locator(loc)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(loc))


def _naive(ts):
    """tz-aware timestamps -> naive UTC datetimes for matplotlib."""
    return [t.tz_convert("UTC").tz_localize(None).to_pydatetime() if hasattr(t, "tz_convert") else t for t in ts]


def _trend_figure(path_id, rows, surveys, limit_pct):
    fig = _fig(8.0, 3.4)
    ax = fig.add_subplot(1, 1, 1)
    t = _naive(_times(rows["captured_at"]))
    est = rows["max_loss_pct"].to_numpy(float)
    # wall loss lies in [0, 100] % of nominal: an infinite band edge is drawn at +-100 %
    lo_raw = rows["max_loss_pct_lower"].to_numpy(float)
    lo = np.clip(lo_raw, -100.0, 100.0)
    hi = np.clip(rows["max_loss_pct_upper"].to_numpy(float), -100.0, 100.0)
    ax.fill_between(t, lo, hi, color="#4c78a8", alpha=0.25, linewidth=0, label="max loss band")
    ax.plot(t, est, "-", color="#1f4e79", lw=1.4, label="max loss estimate")
    if "mean_loss_pct" in rows:
        ax.plot(t, rows["mean_loss_pct"].to_numpy(float), "--", color="#59a14f", lw=1.1, label="mean loss estimate")
    oof = ~rows["in_family"].astype("boolean").fillna(True).to_numpy(bool)
    if oof.any():
        ax.plot(np.array(t, dtype=object)[oof], est[oof], "x", color="#d62728", ms=7, mew=2,
                label="out of family")
    if limit_pct is not None and math.isfinite(limit_pct):
        ax.axhline(limit_pct, color="#b22222", ls=":", lw=1.6, label=f"limit {limit_pct:g} %")
    if surveys is not None and len(surveys):
        s = surveys[surveys["path_id"] == path_id]
        if len(s):
            u = s["u_max_loss_pct"].to_numpy(float)
            u = np.where(np.isfinite(u), 2 * u, 0.0)
            ax.errorbar(_naive(s["date"]), s["max_loss_pct"].to_numpy(float), yerr=u, fmt="D", color="black",
                        ms=6, capsize=3, label="hands-on reading (max loss)")
    ax.set_ylabel("wall loss [% of nominal]")
    ax.set_xlabel("capture date (UTC)")
    ax.set_title(f"path {path_id}")
    finite_lo = lo_raw[np.isfinite(lo_raw)]
    ax.set_ylim(bottom=min(0.0, float(finite_lo.min())) if finite_lo.size else 0.0)
    ax.grid(alpha=0.3)
    _date_axis(ax)
    ax.legend(fontsize=7, loc="upper left", ncol=2)
    return fig


def _calibration_figure(calib):
    fig = _fig(4.6, 4.2)
    ax = fig.add_subplot(1, 1, 1)
    ax.plot([40, 100], [40, 100], color="grey", lw=1, ls="--", label="ideal (empirical = nominal)")
    for (target, grp), mk in zip(calib.groupby("target", sort=False), ("o", "s", "^")):
        g = grp.dropna(subset=["empirical"])
        if len(g):
            ax.plot(g["level"] * 100, g["empirical"] * 100, marker=mk, lw=1.2,
                    label=f"{target} (n={int(g['n'].iloc[0])})")
    ax.set_xlim(40, 100)
    ax.set_ylim(0, 100)
    ax.set_xlabel("nominal coverage [%]")
    ax.set_ylabel("empirical coverage [%]")
    ax.set_title("band calibration")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8, loc="lower right")
    return fig


def _scatter_figure(matched, coverage):
    fig = _fig(4.6, 4.2)
    ax = fig.add_subplot(1, 1, 1)
    top = 1.0
    for target, col, mk in (("max_loss_pct", "#1f4e79", "o"), ("mean_loss_pct", "#59a14f", "s")):
        est = matched.get(f"est_{target}")
        if est is None:
            continue
        y = est.to_numpy(float)
        x = matched[target].to_numpy(float)
        ok = np.isfinite(x) & np.isfinite(y)
        if not ok.any():
            continue
        lo = matched[f"est_{target}_lower"].to_numpy(float)[ok]
        hi = matched[f"est_{target}_upper"].to_numpy(float)[ok]
        # an infinite band (tiny calibration set) is drawn to the plot edge, not to infinity
        finite_hi = hi[np.isfinite(hi)]
        top = max(top, float(finite_hi.max()) if finite_hi.size else 0.0, float(np.nanmax(x[ok])))
        edge = 1.05 * max(top, float(np.nanmax(y[ok])))
        lo, hi = np.clip(lo, -edge, edge), np.clip(hi, -edge, edge)
        ax.errorbar(x[ok], y[ok], yerr=[y[ok] - lo, hi - y[ok]], fmt=mk, color=col, ms=5, capsize=2,
                    alpha=0.85, label=f"{target} ({coverage:.0%} band)")
    ax.plot([0, top * 1.05], [0, top * 1.05], color="grey", ls="--", lw=1, label="estimate = reading")
    ax.set_xlabel("wall loss from readings [% of nominal]")
    ax.set_ylabel("estimated wall loss [% of nominal]")
    ax.set_title("estimate vs hands-on reading")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7, loc="upper left")
    return fig


def _drift_figure(drift, settings):
    items = [(t, d) for t, d in drift.items() if d.get("result") is not None and len(d["z"])]
    fig = _fig(8.0, 2.6 * max(1, len(items)) + 0.4)
    if not items:
        ax = fig.add_subplot(1, 1, 1)
        ax.text(0.5, 0.5, "no matched readings", ha="center", va="center")
        ax.set_axis_off()
        return fig
    for k, (t, d) in enumerate(items):
        ax = fig.add_subplot(len(items), 1, k + 1)
        x = _naive([__import__("pandas").Timestamp(v) for v in d["dates"]])
        r = d["result"]
        ax.plot(x, r.statistic_up, "-o", ms=3, color="#d62728", label="increase statistic")
        ax.plot(x, r.statistic_down, "-o", ms=3, color="#1f77b4", label="decrease statistic")
        ax.axhline(settings.ph_lambda, color="black", ls="--", lw=1, label=f"threshold lambda = {settings.ph_lambda:g}")
        ax2 = ax.twinx()
        ax2.plot(x, d["z"], "D", ms=4, color="grey", alpha=0.7, label="standardised residual")
        ax2.axhline(0.0, color="grey", lw=0.6)
        ax2.set_ylabel("standardised residual [-] (grey diamonds)", fontsize=8)
        if r.alarm:
            ax.axvline(x[r.alarm_index], color="#b35900", lw=2, label="alarm")
        ax.set_ylabel("Page-Hinkley statistic [sigma]")
        ax.set_title(f"{t}: residual drift (delta = {settings.ph_delta:g}, lambda = {settings.ph_lambda:g})",
                     fontsize=10)
        ax.grid(alpha=0.3)
        _date_axis(ax)
        ax.legend(fontsize=7, loc="upper left")
    ax.set_xlabel("reading date (UTC)")
    fig.tight_layout()
    return fig


def _feature_drift_figure(ft, top=15):
    g = ft.dropna(subset=["psi"]).sort_values("psi", ascending=False).head(top)[::-1]
    fig = _fig(8.0, 0.32 * max(len(g), 3) + 1.2)
    ax = fig.add_subplot(1, 1, 1)
    colors = ["#d62728" if d else "#4c78a8" for d in g["drifted"]]
    ax.barh(g["feature"], g["psi"], color=colors)
    ax.axvline(PSI_MODERATE, color="#b35900", ls=":", lw=1, label=f"moderate shift ({PSI_MODERATE:g})")
    ax.axvline(PSI_MAJOR, color="#8a1020", ls="--", lw=1, label=f"major shift ({PSI_MAJOR:g})")
    ax.set_xlabel("population stability index vs training sample [-] (red: KS drift after BH)")
    ax.set_title("feature drift of recent captures")
    ax.tick_params(axis="y", labelsize=7)
    ax.grid(alpha=0.3, axis="x")
    ax.legend(fontsize=7, loc="lower right")
    return fig


def _table(df, columns, *, num=(), key_prefix=None, key_col=None, max_rows=500) -> str:
    head = "".join(f"<th>{_esc(label)}</th>" for _, label in columns)
    body = []
    for _, row in df.head(max_rows).iterrows():
        cells = []
        for col, _ in columns:
            v = row.get(col)
            attrs = ""
            if key_prefix and key_col is not None:
                attrs = f' data-key="{_esc(key_prefix)}:{_esc(row.get(key_col))}:{_esc(col)}"'
            if col in num:
                cells.append(f'<td class="num"{attrs}>{_fmt(v)}</td>')
            else:
                cells.append(f"<td{attrs}>{_esc(v)}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    more = f'<p class="muted">{len(df) - max_rows} more rows not shown.</p>' if len(df) > max_rows else ""
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>{more}"


def _img(fig, alt: str, ident: str) -> str:
    uri = figure_to_data_uri(fig)
    return f'<img class="plot" id="{_esc(ident)}" alt="{_esc(alt)}" src="{uri}">'


def render_report(*, scores, audit=None, model: Mapping[str, Any] | None = None,
                  limit_pct: float | None = None, title: str | None = None) -> str:
    """The report as one HTML string (see :func:`write_report`).

    User strings (path ids, file names, notes) are plain text in the plots: matplotlib's mathtext
    is off (``text.parse_math``), so a ``$...$`` in a path id is drawn as typed, never parsed.
    """
    with matplotlib.rc_context({"text.parse_math": False}):
        return _render_report(scores=scores, audit=audit, model=model, limit_pct=limit_pct, title=title)


def _render_report(*, scores, audit, model, limit_pct, title) -> str:
    model = dict(model or {})
    if audit is not None and not model:
        model = dict(audit.model)
    sc = scores.copy()
    if limit_pct is None and "limit_pct" in sc and sc["limit_pct"].notna().any():
        limit_pct = float(sc["limit_pct"].dropna().mode().iloc[0])
    sc["_t"] = _times(sc["captured_at"]).to_numpy()
    sc = sc.sort_values(["path_id", "_t"], kind="stable")
    scored = sc[sc.get("status", "scored").fillna("scored") == "scored"] if "status" in sc else sc
    rejected = sc[sc["status"] == "rejected"] if "status" in sc else sc.iloc[:0]
    in_fam = scored["in_family"].astype("boolean").fillna(True).astype(bool)
    oof = scored[~in_fam.to_numpy()]

    name = model.get("family_name", "?")
    ttl = title or f"waneguide report: family {name}, model {model.get('model_version', '?')}"
    parts = [f"<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\">"
             f"<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
             f"<title>{_esc(ttl)}</title><style>{_CSS}</style></head><body>"]
    parts.append(f"<h1>{_esc(ttl)}</h1>")
    parts.append(f'<p class="caution" id="caution">{_esc(CAUTION)}</p>')
    if model.get("family_invented"):
        parts.append('<p class="invented" id="invented">This family is INVENTED demo data (the invented Lowmoor '
                     'test rig); it describes no real structure.</p>')

    # identity
    ident_rows = [
        ("model version", model.get("model_version")), ("model id", model.get("model_id")), ("family", name),
        ("family fingerprint", model.get("family_fingerprint")), ("family description", model.get("family_description")),
        ("material", model.get("material")), ("nominal flange thickness [mm]", model.get("nominal_thickness_mm")),
        ("path length (transducer spacing) [mm]", model.get("path_length_mm")),
        ("nominal band coverage", _fmt(model.get("coverage_nominal"), pct=True)),
        ("calibration source", model.get("calibration_source")), ("bundle", model.get("bundle_path")),
        ("limit for exceedance [% of nominal]", limit_pct),
    ]
    parts.append("<h2>Model and family</h2><table><tbody>" + "".join(
        f'<tr><th>{_esc(k)}</th><td data-key="model:{_esc(k)}">{_esc(v)}</td></tr>'
        for k, v in ident_rows if v is not None) + "</tbody></table>")

    # verdict
    if audit is not None:
        vcls = "v-" + audit.verdict.replace(" ", "-")
        parts.append(f'<h2>Audit verdict</h2><p><span class="verdict {vcls}" id="verdict">{_esc(audit.verdict)}</span></p>')
        parts.append("<ul>" + "".join(f"<li>{_esc(r)}</li>" for r in audit.reasons) + "</ul>")
        if audit.notes:
            parts.append("<p class=\"muted\">Notes:</p><ul class=\"muted\">" +
                         "".join(f"<li>{_esc(n)}</li>" for n in audit.notes) + "</ul>")
        parts.append("<h3>Rules</h3><ol>" + "".join(f"<li>{_esc(r)}</li>" for r in audit.settings.rules()) + "</ol>")
        if audit.challenger:
            parts.append(f'<p id="challenger">Recalibrated challenger written: version '
                         f'{_esc(audit.challenger.get("model_version"))} at {_esc(audit.challenger.get("bundle_path"))} '
                         f'(registered as challenger; the model in service is unchanged).</p>')

    # key numbers
    n_paths = scored["path_id"].nunique()
    key = [("n_captures", "captures in the history for this model", len(sc)),
           ("n_scored", "scored", len(scored)),
           ("n_rejected", "rejected by the quality gate", len(rejected)),
           ("n_out_of_family", "flagged out of family", len(oof)),
           ("n_paths", "paths", n_paths)]
    if audit is not None:
        key += [("n_surveys", "hands-on surveys", len(audit.surveys)),
                ("n_matched", f"surveys matched within {audit.settings.window_days:g} days",
                 int(audit.surveys["matched"].sum()))]
    parts.append("<h2>Key numbers</h2><table><tbody>" + "".join(
        f'<tr><th>{_esc(label)}</th><td class="num" id="{k}" data-key="{k}">{v}</td></tr>' for k, label, v in key)
        + "</tbody></table>")
    if audit is not None:
        rows = []
        for t, s in audit.summaries.items():
            rows.append({"target": t, **s})
        sdf = pd.DataFrame(rows)
        cols = [("target", "target"), ("n", "n"), ("bias", "bias [%]"), ("bias_lower", "bias CI low [%]"),
                ("bias_upper", "bias CI high [%]"), ("rmse", "RMSE [%]"), ("mae", "MAE [%]"),
                ("coverage", "empirical coverage"), ("coverage_lower", "coverage CI low"),
                ("coverage_upper", "coverage CI high"), ("coverage_nominal", "nominal coverage")]
        parts.append("<h3>Residuals (estimate minus reading, % of nominal thickness)</h3>" +
                     _table(sdf, cols, num={c for c, _ in cols if c != "target"}, key_prefix="residual",
                            key_col="target"))

    # latest per path
    latest = scored.groupby("path_id", sort=True).tail(1)
    cols = [("path_id", "path"), ("captured_at", "last capture"), ("temperature_c", "temperature [degC]"),
            ("max_loss_pct", "max loss [%]"), ("max_loss_pct_lower", "band low [%]"),
            ("max_loss_pct_upper", "band high [%]"), ("mean_loss_pct", "mean loss [%]"),
            ("exceed_probability", "P(max loss > limit)"), ("in_family", "in family")]
    parts.append("<h2>Latest estimate per path</h2>" + _table(
        latest, cols, num={"temperature_c", "max_loss_pct", "max_loss_pct_lower", "max_loss_pct_upper",
                           "mean_loss_pct", "exceed_probability"}, key_prefix="latest", key_col="path_id"))

    # trends
    parts.append("<h2>Trend per path</h2><p class=\"muted\">Line: estimated maximum wall loss; shaded: its "
                 f"{_fmt(model.get('coverage_nominal'), pct=True)} band; dashed green: mean loss over the path; "
                 "dotted red: the limit; black diamonds: maximum loss from hands-on readings (bars: 2 standard "
                 "uncertainties); red crosses: captures flagged out of family.</p>")
    surveys = audit.surveys if audit is not None else None
    for pid, rows in scored.groupby("path_id", sort=True):
        fig = _trend_figure(pid, rows, surveys, limit_pct)
        parts.append(_img(fig, f"trend of estimated wall loss on path {pid}", f"trend-{pid}"))

    if audit is not None:
        matched = audit.surveys[audit.surveys["matched"]]
        parts.append("<h2>Estimate vs reading, and calibration</h2>")
        parts.append(_img(_scatter_figure(matched, audit.coverage_nominal), "estimate vs reading", "scatter"))
        parts.append(_img(_calibration_figure(audit.calibration), "nominal vs empirical coverage", "calibration"))
        parts.append("<p class=\"muted\">Coverage at levels other than nominal scales the band's sides by the "
                     "ratio of Gaussian quantiles (an approximation); the point at the nominal level is exact.</p>")
        parts.append("<h2>Residual drift</h2>")
        s = audit.settings
        parts.append(f"<p>Two-sided Page-Hinkley (CUSUM) test on residuals standardised by the band and the "
                     f"reading uncertainty, in reading-date order: drift allowance delta = {s.ph_delta:g}, threshold "
                     f"lambda = {s.ph_lambda:g} standard deviations; in-control average run length about "
                     f"<span id=\"ph-arl0\">{s.ph_arl0:.0f}</span> readings between false alarms "
                     f"(Siegmund's approximation).</p>")
        parts.append(_img(_drift_figure(audit.drift, s), "Page-Hinkley statistics of the residuals", "drift"))
        parts.append("<h2>Feature drift against the training domain</h2>")
        ft = audit.feature_drift
        if ft is None or not len(ft):
            parts.append("<p>Not checked (no training-domain sample in the model, or no recent captures).</p>")
        else:
            parts.append(f"<p>Recent captures (last {s.recent_days:g} days of scores) against the training "
                         f"sample: two-sample Kolmogorov-Smirnov per feature, Benjamini-Hochberg adjusted at "
                         f"false discovery rate {s.drift_alpha:g}; PSI over 10 quantile bins. "
                         f"<span id=\"n-drifted\">{int(ft['drifted'].sum())}</span> of {len(ft)} features "
                         f"drifted.</p>")
            parts.append(_img(_feature_drift_figure(ft), "feature drift", "feature-drift"))
            cols = [("feature", "feature"), ("n_recent", "n recent"), ("ks_statistic", "KS D"),
                    ("p_value", "p"), ("q_value", "BH q"), ("psi", "PSI"), ("psi_band", "PSI band"),
                    ("outside_share", "share outside training range"), ("drifted", "drifted")]
            parts.append(_table(ft.head(25), [c for c in cols if c[0] in ft.columns],
                                num={"ks_statistic", "p_value", "q_value", "psi", "outside_share"}))

    # mismatch list
    parts.append("<h2>Mismatch list</h2>")
    if len(oof) == 0 and len(rejected) == 0:
        parts.append('<p id="no-mismatch">No capture was flagged out of family or rejected.</p>')
    if len(oof):
        parts.append("<h3>Out of family (estimates not to be used)</h3>" + _table(
            oof, [("file", "file"), ("path_id", "path"), ("captured_at", "captured"),
                  ("mismatch_p_value", "p-value"), ("mismatch_reasons", "reasons")],
            num={"mismatch_p_value"}, key_prefix="oof", key_col="content_hash"))
    if len(rejected):
        parts.append("<h3>Rejected by the quality gate</h3>" + _table(
            rejected, [("file", "file"), ("path_id", "path"), ("captured_at", "captured"),
                       ("quality_flags", "quality flags"), ("mismatch_reasons", "message")]))

    if audit is not None:
        parts.append("<h2>Readings</h2>")
        m = audit.surveys.copy()
        m["date"] = m["date"].dt.strftime("%Y-%m-%d")
        cols = [("path_id", "path"), ("date", "date"), ("n_readings", "readings"), ("min_remaining_mm", "thinnest [mm]"),
                ("max_loss_pct", "max loss [%]"), ("mean_loss_pct", "mean loss [%]"), ("methods", "method"),
                ("dt_days", "capture minus reading [days]"), ("est_max_loss_pct", "estimated max loss [%]"),
                ("match_reason", "match")]
        parts.append(_table(m, cols, num={"min_remaining_mm", "max_loss_pct", "mean_loss_pct", "dt_days",
                                          "est_max_loss_pct"}, key_prefix="survey", key_col="survey_id"))
        if len(audit.unmatched):
            u = audit.unmatched.copy()
            u["date"] = [d.strftime("%Y-%m-%d") if hasattr(d, "strftime") else d for d in u["date"]]
            parts.append("<h3>Not compared</h3>" + _table(u, [("path_id", "path"), ("date", "date"),
                                                              ("lines", "CSV lines"), ("reason", "reason")]))
        s = audit.settings
        parts.append("<h2>Settings</h2><table><tbody>" + "".join(
            f"<tr><th>{_esc(k)}</th><td>{_esc(v)}</td></tr>" for k, v in s.__dict__.items()) + "</tbody></table>")

    parts.append(f'<p class="caution">{_esc(CAUTION)}</p>')
    parts.append('<p class="muted">Generated by waneguide. Self-contained: no external resources.</p>')
    parts.append("</body></html>")
    return "\n".join(parts)


def write_report(path, *, scores, audit=None, model: Mapping[str, Any] | None = None,
                 limit_pct: float | None = None, title: str | None = None) -> Path:
    """Write the self-contained HTML report atomically; returns its path.

    Parameters
    ----------
    path : path
        Output ``.html`` file.
    scores : DataFrame
        History rows of one model version (:meth:`models.history.History.scores`).
    audit : AuditResult, optional
        Adds the verdict, residuals, calibration, drift and readings sections.
    model : mapping, optional
        Model identity (:func:`models.audit.model_identity`); taken from ``audit`` if omitted.
    limit_pct : float, optional
        Limit line [% of nominal]; default: the limit stored with the scores.
    """

    text = render_report(scores=scores, audit=audit, model=model, limit_pct=limit_pct, title=title)
    return atomic_write_text(path, text)
