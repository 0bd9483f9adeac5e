"""End-to-end training on a small simulated campaign, the CLI, and the mismatch AUROC requirement.

Checks against outside references: the conventional single-mode inversion (features.conventional)
as the baseline the model must beat on the path-averaged loss; the conformal guarantee for
coverage; sklearn's roc_auc_score for the AUROC; MLflow's own client for what was tracked.

The fast tests train on a tiny campaign with tiny settings: they check the pipeline's
bookkeeping (versions, cache, where files go), not the model's accuracy.
"""
from __future__ import annotations

import json
import os
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest

from tests.conftest import FAMILY_FB2
from waneguide.training.pipeline import TrainConfig

#: Settings that make a training take about a second (accuracy is not what these tests check).
TINY = TrainConfig(n_estimators=20, gp_points=0, mismatch_estimators=20, min_child_samples=5)


@pytest.fixture(scope="module")
def tiny_campaign(tmp_path_factory, family_fb2):
    from waneguide.simulation.campaign import run_campaign

    d = tmp_path_factory.mktemp("tiny") / "campaign"
    run_campaign(family_fb2, 80, d, seed=3, progress=False)
    return d


@pytest.fixture(scope="module")
def trained(tmp_path_factory, family_fb2):
    from waneguide.operations.train import train_and_register
    from waneguide.simulation.campaign import run_campaign

    root = tmp_path_factory.mktemp("train")
    run_campaign(family_fb2, 500, root / "campaign", seed=11, progress=False)
    cfg = TrainConfig(n_estimators=150, gp_points=200)
    res = train_and_register(FAMILY_FB2, root / "campaign", root / "models",
                             tracking_uri=f"sqlite:///{root}/mlflow.db", progress=False, config=cfg)
    return res, root


def test_two_trainings_into_one_store_each_name_their_own_version(tiny_campaign, tmp_path):
    """A second ``train`` into the same store used to write v002/model_card.md saying v001."""
    from waneguide.models.bundle import load_bundle
    from waneguide.training.pipeline import train_model

    store = tmp_path / "store"
    first = train_model(FAMILY_FB2, tiny_campaign, store, progress=False, config=TINY, shift_study=False)
    second = train_model(FAMILY_FB2, tiny_campaign, store, progress=False, config=TINY, shift_study=False)
    assert (first.bundle_path.name, second.bundle_path.name) == ("v001", "v002")
    for res, version in ((first, "v001"), (second, "v002")):
        d = res.bundle_path
        card = (d / "model_card.md").read_text()
        assert card.splitlines()[0] == f"# Model card: demo-fb2 ({version})"
        assert json.loads((d / "manifest.json").read_text())["version"] == version
        assert json.loads((d / "bundle.json").read_text())["version"] == version
        assert load_bundle(d).version == version and res.bundle.model_card == card
    assert "v001" not in (second.bundle_path / "model_card.md").read_text()
    # the second training read the first one's feature table from the cache: still one table
    assert len(list((store / ".cache").glob("features_*.parquet"))) == 1


def test_feature_cache_is_keyed_by_extractor_settings_and_family(tmp_path, family_fb2, monkeypatch):
    from waneguide.features.extractor import FeatureExtractor
    from waneguide.features.family import family_from_mapping
    from waneguide.training import _data

    calls = []

    def fake_features(family, campaign, *, progress, n_jobs, extractor):
        calls.append((family.fingerprint, extractor.threshold_fraction))
        return pd.DataFrame({"x": np.arange(len(campaign.cases), dtype=float)})

    monkeypatch.setattr(_data, "campaign_features", fake_features)
    camp = SimpleNamespace(fingerprint="c0ffee", cases=pd.DataFrame(index=range(5)))
    data = family_fb2.model_dump(mode="json")
    data["family"]["name"] = "demo-fb2-renamed"
    other_family = family_from_mapping(data, where="test")
    assert other_family.fingerprint != family_fb2.fingerprint

    def extract(ex):
        return _data.cached_campaign_features(ex, camp, tmp_path, progress=False, n_jobs=1)

    extract(FeatureExtractor(family_fb2))
    extract(FeatureExtractor(family_fb2))  # same settings, same family: a hit
    assert len(calls) == 1
    extract(FeatureExtractor(family_fb2, threshold_fraction=0.4))  # another extractor setting: a miss
    extract(FeatureExtractor(family_fb2, thickness_grid=(0.6, 1.1, 0.05)))  # and another
    extract(FeatureExtractor(other_family))  # another family: a miss
    assert calls == [(family_fb2.fingerprint, 0.5), (family_fb2.fingerprint, 0.4), (family_fb2.fingerprint, 0.5),
                     (other_family.fingerprint, 0.5)]
    assert len(list(tmp_path.glob("features_*.parquet"))) == 4
    # every setting the extractor takes is part of the key
    assert set(_data.extractor_settings(FeatureExtractor(family_fb2))) == {"threshold_fraction", "thickness_grid"}


def test_artifacts_go_beside_a_sqlite_store(tmp_path, monkeypatch):
    from waneguide.operations.tracking import artifact_location

    monkeypatch.chdir(tmp_path)
    assert artifact_location(f"sqlite:///{tmp_path}/st/m.db", "waneguide-x") == \
        (tmp_path / "st" / "m-artifacts" / "waneguide-x").as_uri()
    # a relative database path is relative to the working directory, as for SQLite itself
    assert artifact_location("sqlite:///rel/mlflow.db", "e") == (tmp_path / "rel" / "mlflow-artifacts" / "e").as_uri()
    assert artifact_location("http://127.0.0.1:5000", "e") is None
    assert artifact_location("sqlite:///:memory:", "e") is None


def test_train_without_tracking_uri_writes_only_the_documented_defaults(tiny_campaign, tmp_path, monkeypatch):
    """Default store: ``mlflow.db`` in the working directory (waneguide.core.settings), artifacts beside it."""
    from mlflow.tracking import MlflowClient

    from waneguide.core.settings import DEFAULT_TRACKING_FILE, default_tracking_uri
    from waneguide.operations.train import train_and_register

    cwd = tmp_path / "cwd"
    cwd.mkdir()
    monkeypatch.chdir(cwd)
    res = train_and_register(FAMILY_FB2, tiny_campaign, tmp_path / "store", progress=False, config=TINY,
                             shift_study=False)
    assert sorted(os.listdir(cwd)) == sorted([DEFAULT_TRACKING_FILE, "mlflow-artifacts"])
    run = MlflowClient(default_tracking_uri(cwd)).get_run(res.run_id)
    assert run.info.artifact_uri.startswith((cwd / "mlflow-artifacts").as_uri() + "/")
    assert res.model_version == "1"


@pytest.mark.slow
def test_pipeline_metrics_and_bundle(trained):
    from waneguide.models.bundle import load_bundle

    res, root = trained
    m = res.metrics
    ev = m["evaluation"]
    assert res.bundle_path.name == "v001"
    b = load_bundle(root / "models")
    assert b.version == "v001" and b.calibration_source == "simulated"
    for t in ("max_loss_pct", "max_loss_mm", "mean_loss_pct"):
        # conformal: marginal coverage >= 90 % in expectation (Vovk et al. 2005); ~100 held-out cases
        # give sd ~ 0.03, so 0.8 is > 3 sd below
        assert ev[t]["coverage"] >= 0.8, (t, ev[t])
        # a 90 % band of a roughly symmetric error is ~3.3 error sd wide, the MAE ~0.8 sd (normal
        # distribution, analytic): the band must be wider than the mean error
        assert ev[t]["mae"] < ev[t]["mean_width"]
    # the physics of one path: the band of the maximum is much wider relative to its range than the
    # band of the path-averaged loss (deep-short vs shallow-long patches give the same shift); the
    # factor 2 is a regression value of this code (the README quotes about 7x on the demo family)
    assert ev["max_loss_pct"]["relative_width"] > 2 * ev["mean_loss_pct"]["relative_width"]
    # the model must beat the conventional single-mode inversion on the quantity it estimates
    # (ratio of their MAEs > 1: the requirement itself, no tolerance)
    assert m["conventional_ratio"] > 1.0
    card = (res.bundle_path / "model_card.md").read_text()
    assert card.splitlines()[0] == "# Model card: demo-fb2 (v001)"
    assert "path-averaged loss" in card and "deep, short patch" in card and "Caution" in card
    assert "by_group" in ev["mean_loss_pct"] and "temperature_band" in ev["mean_loss_pct"]["by_group"]


@pytest.mark.slow
def test_mismatch_auroc_flange_thickness(trained):
    from scipy.stats import binom

    res, _ = trained
    mm = res.metrics["mismatch"]
    shifts = mm["shifts"]
    # issue 5 requirement: AUROC >= 0.95 for a flange 15 % thicker than nominal
    assert shifts["flange thickness +15 %"]["auroc"] >= 0.95
    # issue 16 targets on the shifted-family calibration (48 paths each): flagged >= 0.95 for thickness
    # +-15 % and shear speed -3 %, >= 0.8 for shear speed -1.5 % (the requirement itself)
    for name in ("flange thickness -15 %", "flange thickness +15 %", "shear speed -3 %"):
        assert shifts[name]["flag_rate"] >= 0.95, (name, shifts[name])
    assert shifts["shear speed -1.5 %"]["flag_rate"] >= 0.8, shifts["shear speed -1.5 %"]
    # stated rate 0.01 on ~100 held-out cases (binomial sd 0.01), plus the physics checks' own share:
    # 0.05 is a regression value of this code
    assert mm["in_family_false_alarm_rate"] <= 0.05
    # in-family edges (heavy loss, temperature ends): at most the stated 0.01 + 2 x 0.005, except with
    # probability 0.001 (binomial)
    for name, r in {**mm["edges"], **mm["held_out"]}.items():
        assert r["flagged"] <= binom.ppf(0.999, r["n"], 0.02), (name, r)
    card = (res.bundle_path / "model_card.md").read_text()
    assert "Power per shifted family" in card and "| shear speed -1.5 % |" in card
    assert "`s0_sharpest_thickness_m`" in card  # left out as degenerate, and said so
    assert "s0_sharpest_thickness_m" not in res.bundle.feature_columns


@pytest.mark.slow
def test_run_tracked_and_registered(trained):
    from mlflow.tracking import MlflowClient

    from waneguide.operations.registry import resolve_model

    res, root = trained
    uri = f"sqlite:///{root}/mlflow.db"
    assert res.run_id and res.model_version == "1"
    run = MlflowClient(uri).get_run(res.run_id)
    assert run.data.tags["family_fingerprint"] == res.bundle.family_fingerprint
    # the logged metric is the evaluation's own number (float64 round trip through SQLite: exact)
    assert run.data.metrics["evaluation.mean_loss_pct.mae"] == res.metrics["evaluation"]["mean_loss_pct"]["mae"]
    assert run.info.artifact_uri.startswith((root / "mlflow-artifacts").as_uri() + "/")
    assert resolve_model("demo-fb2", tracking_uri=uri) == res.bundle_path


@pytest.mark.slow
def test_measured_recalibration_and_cli(trained, tmp_path, family_fb2, capsys):
    """Measured CSV: captures written by the forward model with a known flat patch."""
    from waneguide.features.io import write_capture
    from waneguide.simulation.forward import simulate_capture
    from waneguide.cli.main import main
    from waneguide.core.caution import CAUTION

    res, root = trained
    rng = np.random.default_rng(5)
    x = np.linspace(0, family_fb2.path_length_m, 301)
    d0 = family_fb2.nominal_thickness_m
    rows = []
    for p in range(6):
        pid = f"M{p}"
        base = simulate_capture(family_fb2, x_m=x, thickness_m=np.full_like(x, d0), temperature_c=20.0, rng=rng,
                                path_id=pid)
        write_capture(base, tmp_path / f"{pid}_base.npz")
        rows.append({"file": f"{pid}_base.npz", "path_id": pid, "max_loss_pct": 0.0, "max_loss_mm": 0.0,
                     "mean_loss_pct": 0.0})
        for k in range(3):
            depth = rng.uniform(0.05, 0.35)
            length = rng.uniform(0.03, 0.12)
            th = np.where(np.abs(x - 0.15) < length / 2, d0 * (1 - depth), d0)
            cap = simulate_capture(family_fb2, x_m=x, thickness_m=th, temperature_c=20.0, rng=rng, path_id=pid)
            name = f"{pid}_{k}.npz"
            write_capture(cap, tmp_path / name)
            mean = 100 * np.mean(1 - th / d0)
            rows.append({"file": name, "path_id": pid, "max_loss_pct": 100 * depth, "max_loss_mm": depth * d0 * 1e3,
                         "mean_loss_pct": mean})
    pd.DataFrame(rows).to_csv(tmp_path / "measured.csv", index=False)
    rc = main(["train", "--family", str(FAMILY_FB2), "--campaign", str(root / "campaign"), "--measured",
               str(tmp_path / "measured.csv"), "--out", str(root / "models"), "--no-tracking", "--no-shift-study",
               "--no-progress"])
    out = capsys.readouterr().out
    assert rc == 0
    assert "v002" in out and "bands calibrated on measured cases" in out and CAUTION in out
    assert "measured mean_loss_pct: MAE" in out
    assert (root / "models" / "v001" / "bundle.json").is_file()  # earlier version kept
    assert (root / "models" / "v002" / "model_card.md").read_text().splitlines()[0] == "# Model card: demo-fb2 (v002)"


def test_cli_bad_campaign(tmp_path, capsys):
    from waneguide.cli.main import main

    rc = main(["train", "--family", str(FAMILY_FB2), "--campaign", str(tmp_path / "nope"), "--out",
               str(tmp_path / "m"), "--no-tracking"])
    assert rc == 2
    err = capsys.readouterr().err
    assert err.startswith("waneguide train: error: ") and "nope" in err and "Traceback" not in err
    assert not (tmp_path / "m").exists()


def test_cli_refuses_jobs_below_one(tmp_path, capsys):
    from waneguide.cli.main import main

    rc = main(["train", "--family", str(FAMILY_FB2), "--campaign", str(tmp_path), "--out", str(tmp_path / "m"),
               "--no-tracking", "--jobs", "0"])
    err = capsys.readouterr().err
    assert rc == 2 and "--jobs must be a positive whole number" in err and "got 0" in err
    assert not (tmp_path / "m").exists()


@pytest.mark.parametrize("name", ["../outside.npz", "/etc/passwd", "sub/../../outside.npz"])
def test_measured_csv_cannot_reach_outside_its_folder(tmp_path, family_fb2, name):
    # issue 11: the measured-cases CSV read files outside its folder and echoed a foreign first line
    from waneguide.core.errors import InputError
    from waneguide.training._data import read_measured

    folder = tmp_path / "coupons"
    folder.mkdir()
    (tmp_path / "outside.npz").write_text("SECRET FIRST LINE\n")
    csv = folder / "measured.csv"
    csv.write_text(f"file,max_loss_pct\n{name},10\n")
    with pytest.raises(InputError, match="lies outside the CSV's folder") as info:
        read_measured(csv, family_fb2)
    assert "SECRET" not in str(info.value) and "root:" not in str(info.value)
