"""HTML report: one self-contained file whose numbers are the database's.

Self-contained is checked by parsing the HTML (Python's html.parser): every ``src`` and
``href`` is a ``data:`` URI or an in-page anchor and no ``http(s)://``, ``//host`` or
``url(...)`` appears anywhere. Plots must be real PNGs (signature per the PNG spec,
ISO/IEC 15948 sec. 5.2) that are not blank.

The report prints its numbers with two decimals, so a printed value is held to the stored one
within half a unit of the last digit, abs 0.005.
"""
from __future__ import annotations

import base64
import html
import io
import re
from html.parser import HTMLParser

import matplotlib.image as mpimg
import numpy as np
import pandas as pd
import pytest

from waneguide.core.caution import CAUTION
from waneguide.operations.audit import audit_frames
from waneguide.operations.history import History
from waneguide.operations.readings import read_readings
from waneguide.operations.report import _scatter_figure, _trend_figure, write_report

MODEL = {"model_version": "test-v1", "family_name": "demo-fb2", "family_fingerprint": "0123456789abcdef",
         "family_invented": True, "coverage_nominal": 0.9, "calibration_source": "simulated",
         "nominal_thickness_mm": 2.0, "path_length_mm": 300.0, "material": "al-2024-t3"}


def build_example(tmp_path, *, n_weeks=20):
    """A small history (3 paths, weekly captures, one growing patch) plus readings and an audit.

    Invented numbers for a report test only; the audit arithmetic itself is checked in test_audit.py.
    """
    rng = np.random.default_rng(4)
    db = f"sqlite:///{tmp_path / 'hist.db'}"
    hist = History(db)
    dates = pd.date_range("2024-01-01", periods=n_weeks, freq="7D", tz="UTC")
    rows = []
    for p, growth in (("P01", 0.0), ("P02", 1.0), ("P03", 0.0)):
        for i, d in enumerate(dates):
            true = growth * i
            est = true + rng.normal(0, 1.0)
            oof = p == "P03" and i == 5
            rows.append({
                "content_hash": f"{p}-{i}", "model_version": MODEL["model_version"], "file": f"{p}_{i:03d}.npz",
                "path_id": p, "captured_at": d.isoformat(), "temperature_c": 20 + 10 * np.sin(i / 3),
                "status": "scored", "max_loss_pct": est, "max_loss_pct_lower": est - 3, "max_loss_pct_upper": est + 3,
                "mean_loss_pct": est / 3, "mean_loss_pct_lower": est / 3 - 1, "mean_loss_pct_upper": est / 3 + 1,
                "exceed_probability": float(est > 15), "limit_pct": 15.0, "in_family": not oof,
                "mismatch_p_value": 0.001 if oof else 0.5,
                "mismatch_reasons": "S0 arrival outside the training range <&>" if oof else "",
                "quality_flags": "",
            })
    rows.append({"content_hash": "rej", "model_version": MODEL["model_version"], "file": "P01_bad.npz",
                 "path_id": "P01", "captured_at": dates[3].isoformat(), "status": "rejected",
                 "quality_flags": "clipped", "mismatch_reasons": "capture clipped at the ADC rail"})
    hist.add_scores(rows)
    lines = ["path_id,date,position_mm,remaining_thickness_mm,method,uncertainty_mm"]
    for k in (4, 10, 16):
        d = dates[k].date()
        lines.append(f"P02,{d},150,{2.0 * (1 - k / 100):.4f},UT gauge,0.02")
        lines.append(f"P01,{d},150,2.0,UT gauge,0.02")
    lines.append(f"P09,{dates[4].date()},150,2.0,UT gauge,0.02")
    rp = tmp_path / "readings.csv"
    rp.write_text("\n".join(lines) + "\n")
    scores = hist.scores(model_version=MODEL["model_version"])
    ref = pd.DataFrame({"f_a": rng.normal(0, 1, 300), "f_b": rng.normal(5, 1, 300)})
    recent = pd.DataFrame({"f_a": rng.normal(0, 1, 60), "f_b": rng.normal(6.5, 1, 60)})
    audit = audit_frames(scores, read_readings(rp), nominal_thickness_mm=2.0, path_length_mm=300.0,
                         coverage_nominal=0.9, reference_features=ref, recent_features=recent, model=MODEL)
    out = write_report(tmp_path / "report.html", scores=scores, audit=audit, model=MODEL)
    return {"db": db, "history": hist, "scores": scores, "audit": audit, "report": out}


class _Collector(HTMLParser):
    def __init__(self):
        super().__init__()
        self.urls: list[tuple[str, str, str]] = []
        self.images: list[dict] = []
        self.keyed: dict[str, str] = {}
        self._key = None
        self.tags: set[str] = set()

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.add(tag)
        for name in ("src", "href", "action", "poster", "srcset", "data"):
            if name in a and a[name] is not None:
                self.urls.append((tag, name, a[name]))
        if tag == "img":
            self.images.append(a)
        k = a.get("data-key") or a.get("id")
        self._key = k

    def handle_data(self, data):
        if self._key is not None:
            self.keyed[self._key] = self.keyed.get(self._key, "") + data

    def handle_endtag(self, tag):
        self._key = None


def parse_report(text):
    c = _Collector()
    c.feed(text)
    return c


def png_pixels(data: bytes) -> np.ndarray:
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    return mpimg.imread(io.BytesIO(data), format="png")


def assert_no_external_references(text: str, parsed: _Collector) -> None:
    for tag, attr, url in parsed.urls:
        assert url.startswith("data:") or url.startswith("#"), f"<{tag} {attr}> points outside: {url[:80]}"
    low = text.lower()
    assert "http://" not in low and "https://" not in low
    assert not re.search(r"""(src|href)\s*=\s*["']?//""", low)
    assert "url(" not in low and "@import" not in low
    assert not ({"script", "link", "iframe", "object", "embed"} & parsed.tags)


def test_report_is_self_contained_and_plots_are_not_blank(tmp_path):
    ex = build_example(tmp_path)
    text = ex["report"].read_text(encoding="utf-8")
    parsed = parse_report(text)
    assert_no_external_references(text, parsed)
    ids = {im.get("id") for im in parsed.images}
    assert {"trend-P01", "trend-P02", "trend-P03", "calibration", "drift", "feature-drift", "scatter"} <= ids
    for im in parsed.images:
        data = base64.b64decode(im["src"].split(",", 1)[1])
        px = png_pixels(data)
        # at least 300 x 200 px, below which axis labels cannot be read (common practice, no source;
        # these plots are 275-450 px high and 470-860 px wide, regression values)
        assert px.shape[0] > 200 and px.shape[1] > 300
        # not blank: a blank canvas has std 0; lines and text on white give 0.13-0.33 here (regression
        # values), 0.05 is a floor well under that (common practice, no source)
        assert px[..., :3].std() > 0.05
        assert im.get("alt")


def test_report_numbers_match_the_database(tmp_path):
    ex = build_example(tmp_path)
    parsed = parse_report(ex["report"].read_text(encoding="utf-8"))
    db = History(ex["db"]).scores(model_version=MODEL["model_version"])
    k = parsed.keyed
    assert int(k["n_captures"]) == len(db) == 61
    assert int(k["n_rejected"]) == int((db["status"] == "rejected").sum()) == 1
    assert int(k["n_out_of_family"]) == int((db["in_family"] == False).sum()) == 1  # noqa: E712
    assert int(k["n_paths"]) == 3
    last = db[db["status"] == "scored"].groupby("path_id").tail(1).set_index("path_id")
    for pid, row in last.iterrows():
        assert float(k[f"latest:{pid}:max_loss_pct"]) == pytest.approx(row["max_loss_pct"], abs=0.005)
        assert k[f"latest:{pid}:captured_at"] == row["captured_at"]
    s = ex["audit"].summaries["max_loss_pct"]
    assert float(k["residual:max_loss_pct:bias"]) == pytest.approx(s["bias"], abs=0.005)
    assert int(k["residual:max_loss_pct:n"]) == s["n"] == 6
    # the residuals recomputed from the database and build_example's readings, outside the audit code:
    # each survey falls on a capture date (dt = 0), truth k % on P02 in weeks 4, 10, 16 (2.0 (1 - k/100) mm)
    # and 0 % on P01 (2.0 mm); P09 has no capture
    est = db.set_index("content_hash")["max_loss_pct"]
    r = np.array([est[f"P02-{w}"] - w for w in (4, 10, 16)] + [est[f"P01-{w}"] for w in (4, 10, 16)])
    assert float(k["residual:max_loss_pct:bias"]) == pytest.approx(r.mean(), abs=0.005)
    assert float(k["residual:max_loss_pct:rmse"]) == pytest.approx(np.sqrt(np.mean(r**2)), abs=0.005)
    assert float(k["residual:max_loss_pct:mae"]) == pytest.approx(np.mean(np.abs(r)), abs=0.005)
    # all six readings lie in their +-3 % bands (unit-sigma errors; checked here, not assumed), so the
    # coverage is 6/6 and its Clopper-Pearson 95 % lower end is 0.025^(1/6) = 0.541 (Beta(6, 1) CDF x^6)
    assert np.all(np.abs(r) <= 3.0)
    assert float(k["residual:max_loss_pct:coverage"]) == pytest.approx(1.0, abs=0.005)
    assert float(k["residual:max_loss_pct:coverage_lower"]) == pytest.approx(0.025 ** (1 / 6), abs=0.005)
    assert k["verdict"] == ex["audit"].verdict
    assert int(k["n_matched"]) == 6 and int(k["n_surveys"]) == 7
    # family identity and the caution are on the page
    assert k["model:family fingerprint"] == MODEL["family_fingerprint"]
    assert k["caution"] == CAUTION


def test_report_escapes_text_and_lists_mismatches(tmp_path):
    ex = build_example(tmp_path)
    text = ex["report"].read_text(encoding="utf-8")
    assert "S0 arrival outside the training range &lt;&amp;&gt;" in text
    assert "capture clipped at the ADC rail" in text
    assert "no scored capture of path P09" in text
    assert "INVENTED" in text


def test_scores_only_report(tmp_path):
    ex = build_example(tmp_path)
    out = write_report(tmp_path / "scores.html", scores=ex["scores"], model=MODEL)
    text = out.read_text(encoding="utf-8")
    parsed = parse_report(text)
    assert_no_external_references(text, parsed)
    assert "verdict" not in parsed.keyed and len(parsed.images) == 3   # one trend per path, no audit plots
    assert "limit 15 %" not in text  # legends are inside the PNG, not the HTML
    assert parsed.keyed["model:limit for exceedance [% of nominal]"] == "15.0"


def test_figures_draw_infinite_bands_without_error():
    # k = ceil((n+1)(1-alpha)) > n gives an infinite conformal band (Vovk et al. 2005): the trend
    # and scatter figures must still render, with the band drawn to finite limits.
    rows = pd.DataFrame({"captured_at": pd.to_datetime(["2025-03-01", "2025-03-08"], utc=True),
                         "max_loss_pct": [5.0, 6.0], "max_loss_pct_lower": [-np.inf, 2.0],
                         "max_loss_pct_upper": [np.inf, 9.0], "mean_loss_pct": [1.0, 1.2],
                         "in_family": [True, True]})
    fig = _trend_figure("P01", rows, None, 15.0)
    lo, hi = fig.axes[0].get_ylim()
    # finite limits that still show the finite band's top (9.0) and the estimates (5, 6)
    assert np.isfinite(lo) and np.isfinite(hi) and hi >= 9.0 and lo <= 5.0
    matched = pd.DataFrame({"max_loss_pct": [4.0, 7.0], "est_max_loss_pct": [5.0, 6.0],
                            "est_max_loss_pct_lower": [-np.inf, 2.0], "est_max_loss_pct_upper": [np.inf, 9.0]})
    fig2 = _scatter_figure(matched, 0.9)
    lo2, hi2 = fig2.axes[0].get_ylim()
    assert np.isfinite(lo2) and np.isfinite(hi2) and lo2 <= 5.0 and hi2 >= 6.0   # the estimates are in view


def test_a_path_id_with_mathtext_markup_is_plain_text(tmp_path):
    # issue 11: a path_id of `$\undefinedmacro{x}$` killed the report through matplotlib's mathtext
    ex = build_example(tmp_path)
    odd = ex["scores"].copy()
    odd["path_id"] = odd["path_id"].replace({"P02": r"$\undefinedmacro{x}$"})
    out = write_report(tmp_path / "odd.html", scores=odd, model=MODEL)
    text = out.read_text(encoding="utf-8")
    assert r"$\undefinedmacro{x}$" in html.unescape(text)
    assert len(parse_report(text).images) == 3
