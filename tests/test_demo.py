"""The reduced demo end to end (``run_demo(quick=True)``), checked against its own known truth.

The season's captures are simulated from explicit thickness profiles, so the true wall
loss of every capture is known (``season/truth.csv``) and the estimates can be held to
it; the hands-on readings are sampled from the same profiles.
"""
from __future__ import annotations

import pandas as pd
import pytest
from scipy import stats

from waneguide.core.caution import CAUTION

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    import contextlib
    import io

    from waneguide.cli.demo import run_demo, scenario

    out = tmp_path_factory.mktemp("demo")
    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        paths = run_demo(out, quick=True, progress=False, workers=2)
    return {"paths": paths, "stdout": buf.getvalue(), "scenario": scenario(quick=True)}


def _joined(demo):
    scores = pd.read_csv(demo["paths"]["scores_csv"])
    truth = pd.read_csv(demo["paths"]["season_truth_csv"])
    return scores.merge(truth[["file", "week", "true_max_loss_pct", "true_mean_loss_pct", "note"]], on="file")


def test_outputs_written_and_caution_printed(demo):
    for key, p in demo["paths"].items():
        assert p.exists(), key
    out = demo["stdout"]
    assert CAUTION in out and "INVENTED" in out
    assert "[6/6]" in out and str(demo["paths"]["report"]) in out


def test_every_capture_scored_once(demo):
    from waneguide.operations.history import History

    sc = demo["scenario"]
    with History(f"sqlite:///{demo['paths']['history_db']}") as h:
        df = h.scores()
    assert len(df) == len(sc.paths) * sc.n_weeks and df["content_hash"].is_unique
    # the dead-channel capture is rejected by the quality gate, not estimated
    rejected = df[df["status"] == "rejected"]
    assert len(rejected) == 1 and "constant" in rejected["quality_flags"].iloc[0]


def test_growing_patch_trends_upward_and_sound_paths_stay_low(demo):
    j = _joined(demo)
    j = j[j["status"] == "scored"]
    for pid in demo["scenario"].growth:
        g = j[j["path_id"] == pid].sort_values("week")
        rho = stats.spearmanr(g["week"], g["max_loss_pct"]).statistic
        assert rho >= 0.7, (pid, g[["week", "true_max_loss_pct", "max_loss_pct"]])
        # end of season vs start: the estimate rose by at least half the true growth
        grow = g["true_max_loss_pct"].iloc[-1] - g["true_max_loss_pct"].iloc[0]
        assert g["max_loss_pct"].tail(3).mean() - g["max_loss_pct"].head(3).mean() >= 0.5 * grow
    sound = j[~j["path_id"].isin(list(demo["scenario"].growth)) & (j["note"].fillna("") == "")]
    assert sound["max_loss_pct"].median() < 5.0
    # known truth inside the band: nominal 90 %; with ~40 captures, >= 75 % (binomial(40, 0.9):
    # P(X < 30) ~ 0.2 %) -- checks the calibration against the truth of the simulation
    inside = (j["true_max_loss_pct"] >= j["max_loss_pct_lower"]) & (j["true_max_loss_pct"] <= j["max_loss_pct_upper"])
    assert inside.mean() >= 0.75


def test_readings_matched_and_audit_recorded(demo):
    from waneguide.operations.history import History
    from waneguide.operations.readings import read_readings

    sc = demo["scenario"]
    r = read_readings(demo["paths"]["readings_csv"])
    n_surveys = len(sc.survey_weeks) * len(sc.growth) + len(sc.spot_weeks)
    assert r.groupby(["path_id", r["date"].dt.floor("D")]).ngroups == n_surveys
    with History(f"sqlite:///{demo['paths']['history_db']}") as h:
        audits = h.audits()
    import json

    summary = json.loads(audits["summary_json"].iloc[-1])
    assert summary["n_surveys"] == n_surveys and summary["n_matched"] == n_surveys
    assert summary["verdict"] in ("in control", "recalibrate", "retrain")
    # readings are the truth plus 0.02 mm gauge scatter: the residual RMSE reflects the model, and the
    # mean-loss surveys (10 mm scans) give a mean-loss target for every scan
    assert summary["targets"]["mean_loss_pct"]["n"] == len(sc.survey_weeks) * len(sc.growth)


def test_report_is_self_contained(demo):
    from test_report import assert_no_external_references, parse_report

    text = demo["paths"]["report"].read_text(encoding="utf-8")
    parsed = parse_report(text)
    assert_no_external_references(text, parsed)
    ids = {im.get("id") for im in parsed.images}
    assert {f"trend-{p}" for p in demo["scenario"].paths} <= ids and "calibration" in ids
    assert parsed.keyed["n_matched"] == parsed.keyed["n_surveys"]
