"""``waneguide score`` end to end on simulated captures with known wall loss.

The model is a small one trained here on a simulated campaign of the invented demo family;
the captures come from the forward model (training.forward.simulate_capture) with a known
thickness profile, so the truth is known: a pristine path and a path whose Gaussian pit
deepens from 0 to 25 % of the nominal thickness.
"""
from __future__ import annotations

import io
import os
import shutil
import signal
import subprocess
import sys
import time
from contextlib import redirect_stderr, redirect_stdout
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from waneguide.operations.history import History
from waneguide.training.pipeline import TrainConfig, train_model
from waneguide.operations.scoring import SCORE_OUTPUT_COLUMNS, load_model, score_captures
from waneguide.cli.main import main
from waneguide.core.caution import CAUTION

DEPTHS = (0.0, 0.05, 0.10, 0.15, 0.20, 0.25)


def run_cli(*argv):
    out, err = io.StringIO(), io.StringIO()
    with redirect_stdout(out), redirect_stderr(err):
        rc = main([str(a) for a in argv])
    return rc, out.getvalue(), err.getvalue()


def make_bundle(family, work: Path, *, n_cases: int = 400) -> Path:
    """Train a small bundle on a simulated campaign with the project's own pipeline (no MLflow)."""
    from waneguide.simulation.campaign import run_campaign
    from waneguide.training.pipeline import TrainConfig, train_model

    camp = work / "campaign"
    run_campaign(family, n_cases, camp, seed=1, n_jobs=1, progress=False)
    res = train_model(family, camp, work / "models", random_state=0, progress=False,
                      shift_study=False, config=TrainConfig(n_estimators=150, gp_points=200, n_jobs=1))
    return Path(res.bundle_path)


def make_captures(family, folder: Path, *, seed: int = 7, n_repeat: int = 1) -> dict:
    """Baselines and captures of two paths; P02 carries a deepening pit. Returns truth per file."""
    from waneguide.features.io import write_capture
    from waneguide.simulation.forward import simulate_capture

    rng = np.random.default_rng(seed)
    (folder / "baselines").mkdir(parents=True, exist_ok=True)
    L = family.path_length_m
    t0 = family.nominal_thickness_m
    x = np.linspace(0.0, L, 301)
    truth = {}
    for pid in ("P01", "P02"):
        b = simulate_capture(family, x_m=x, thickness_m=np.full_like(x, t0), temperature_c=20.0, rng=rng,
                             path_id=pid, captured_at="2024-01-01T00:00:00+00:00")
        write_capture(b, folder / "baselines" / f"{pid}_baseline.npz")
        k = 0
        for rep in range(n_repeat):
            for depth in DEPTHS:
                d = depth if pid == "P02" else 0.0
                th = t0 * (1.0 - d * np.exp(-0.5 * ((x - 0.4 * L) / 0.015) ** 2))
                day = 1 + k
                c = simulate_capture(family, x_m=x, thickness_m=th, temperature_c=15.0 + 3.0 * (k % 5), rng=rng,
                                     path_id=pid, captured_at=f"2024-{1 + day // 28:02d}-{1 + day % 28:02d}T08:00:00+00:00")
                f = folder / f"{pid}_{k:03d}.npz"
                write_capture(c, f)
                truth[f.name] = 100.0 * d
                k += 1
    return truth


@pytest.fixture(scope="module")
def setup(tmp_path_factory, family_fb2):
    work = tmp_path_factory.mktemp("score")
    bundle = make_bundle(family_fb2, work)
    caps = work / "caps"
    truth = make_captures(family_fb2, caps)
    return {"work": work, "bundle": bundle, "caps": caps, "truth": truth}


def test_cli_score_writes_exact_columns_and_history(setup, tmp_path):
    db = f"sqlite:///{tmp_path / 'h.db'}"
    out = tmp_path / "results.csv"
    rc, stdout, err = run_cli("score", "--model", setup["bundle"], "--captures", setup["caps"], "--limit-pct", 15,
                              "--db", db, "--out", out, "--no-progress")
    assert rc == 0, err
    table = pd.read_csv(out)
    assert list(table.columns[:len(SCORE_OUTPUT_COLUMNS)]) == list(SCORE_OUTPUT_COLUMNS)
    assert len(table) == 12 and table["newly_scored"].all()
    assert CAUTION in stdout and "12 newly scored" in stdout
    hist = History(db).scores()
    assert len(hist) == 12 and set(hist["content_hash"]) == set(table["content_hash"])
    # bands contain their estimate; probabilities are probabilities
    assert np.all(table["max_loss_pct_lower"] <= table["max_loss_pct"] + 1e-9)
    assert np.all(table["max_loss_pct"] <= table["max_loss_pct_upper"] + 1e-9)
    assert table["exceed_probability"].between(0, 1).all()

    # the known truth: P02's pit deepens 0 -> 25 %; the estimates follow it
    t = table.assign(name=[Path(f).name for f in table["file"]])
    t["truth"] = t["name"].map(setup["truth"])
    p2 = t[t["path_id"] == "P02"].sort_values("captured_at")
    rho = stats.spearmanr(p2["truth"], p2["max_loss_pct"]).statistic
    assert rho >= 0.8, p2[["truth", "max_loss_pct"]]
    # deepest pit (25 %) vs the pristine path: clearly apart
    assert p2["max_loss_pct"].iloc[-1] > t[t["path_id"] == "P01"]["max_loss_pct"].max() + 5.0
    # probability of exceeding 15 % grows with the pit
    assert p2["exceed_probability"].iloc[-1] > p2["exceed_probability"].iloc[0]


def test_rescoring_counts_nothing_twice(setup, tmp_path):
    db = f"sqlite:///{tmp_path / 'h.db'}"
    first = score_captures(setup["bundle"], setup["caps"], db_url=db)
    # a copy of a capture under another name is the same capture
    extra = tmp_path / "again"
    shutil.copytree(setup["caps"], extra)
    shutil.copy(extra / "P01_000.npz", extra / "renamed_copy.npz")
    again = score_captures(setup["bundle"], extra, db_url=db)
    assert first["newly_scored"].all() and not again["newly_scored"].any()
    assert len(again) == 13 and History(db).count() == 12
    a = again.set_index("file").loc[str(extra / "renamed_copy.npz")]
    b = first.set_index("content_hash").loc[a["content_hash"]]
    assert a["max_loss_pct"] == b["max_loss_pct"]


def test_limit_defaults_to_the_family_file(setup, tmp_path):
    # the demo family states [limits] wall_loss_limit_pct = 15; without --limit-pct that limit is used
    # (issue 9, "--limit-pct defaulting to a limit the family file may state")
    bundle = load_model(setup["bundle"])
    assert bundle.family.limits.wall_loss_limit_pct == 15.0
    default = score_captures(bundle, setup["caps"], db_url=f"sqlite:///{tmp_path / 'a.db'}")
    given = score_captures(bundle, setup["caps"], db_url=f"sqlite:///{tmp_path / 'b.db'}", limit_pct=15.0)
    assert (default["limit_pct"] == 15.0).all()
    np.testing.assert_array_equal(default["exceed_probability"], given["exceed_probability"])


def test_parallel_joblib_gives_the_serial_numbers(setup, tmp_path):
    serial = score_captures(setup["bundle"], setup["caps"], db_url=f"sqlite:///{tmp_path / 'a.db'}", chunk_size=3)
    par = score_captures(setup["bundle"], setup["caps"], db_url=f"sqlite:///{tmp_path / 'b.db'}", n_jobs=2,
                         chunk_size=3)
    cols = ["content_hash", "max_loss_pct", "max_loss_pct_upper", "mean_loss_pct", "mismatch_p_value"]
    pd.testing.assert_frame_equal(serial[cols], par[cols])


@pytest.mark.slow
def test_dask_local_scheduler_gives_the_serial_numbers(setup, tmp_path):
    serial = score_captures(setup["bundle"], setup["caps"], db_url=f"sqlite:///{tmp_path / 'a.db'}")
    dask = score_captures(setup["bundle"], setup["caps"], db_url=f"sqlite:///{tmp_path / 'b.db'}",
                          scheduler="local", n_jobs=2, chunk_size=4)
    pd.testing.assert_frame_equal(serial[["content_hash", "max_loss_pct"]], dask[["content_hash", "max_loss_pct"]])


def _rewrite(src: Path, dst: Path, **changes):
    from dataclasses import replace

    from waneguide.features.io import read_capture, write_capture

    cap = read_capture(src)
    extra = dict(cap.extra or {})
    extra.update(changes.pop("extra", {}))
    write_capture(replace(cap, extra=extra, **changes), dst)


def test_refusals_are_clear(setup, tmp_path, family_st3):
    caps = setup["caps"]
    db = f"sqlite:///{tmp_path / 'h.db'}"
    # sample rate the model cannot use
    bad = tmp_path / "rate"
    bad.mkdir()
    _rewrite(caps / "P01_000.npz", bad / "slow.npz", sample_rate_hz=5e6)
    rc, _, err = run_cli("score", "--model", setup["bundle"], "--captures", bad, "--baselines", caps / "baselines",
                         "--db", db, "--no-progress")
    assert rc == 2 and "sampled at 5e+06 Hz but the model's family demo-fb2 is acquired at 1e+07 Hz" in err
    assert "slow.npz" in err and History(db).count() == 0
    # a capture recorded for another family
    other = tmp_path / "other"
    other.mkdir()
    _rewrite(caps / "P01_000.npz", other / "foreign.npz", extra={"family_fingerprint": family_st3.fingerprint,
                                                                  "family": family_st3.name})
    with pytest.raises(ValueError, match=f"family fingerprint {family_st3.fingerprint}"):
        score_captures(setup["bundle"], other, baselines=caps / "baselines", db_url=db)
    # a baseline from another path only
    only = tmp_path / "onlyP01"
    only.mkdir()
    shutil.copy(caps / "baselines" / "P01_baseline.npz", only)
    with pytest.raises(ValueError, match="no baseline is from that path .*another path cannot be used"):
        score_captures(setup["bundle"], [caps / "P02_003.npz"], baselines=only, db_url=db)
    # no baselines at all
    with pytest.raises(ValueError, match="no baselines given"):
        score_captures(setup["bundle"], [caps / "P02_003.npz"], db_url=db)
    # a bundle that fails its integrity check
    tampered = tmp_path / "tampered"
    shutil.copytree(setup["bundle"], tampered)
    victim = next(p for p in sorted(tampered.iterdir()) if p.suffix == ".txt")
    victim.write_text(victim.read_text() + "\n")
    rc, _, err = run_cli("score", "--model", tampered, "--captures", caps, "--db", db, "--no-progress")
    assert rc == 2 and err.startswith("waneguide score: error:") and "Traceback" not in err
    assert History(db).count() == 0
    # bad limit
    with pytest.raises(ValueError, match=r"limit_pct \(--limit-pct\) must be"):
        score_captures(setup["bundle"], caps, db_url=db, limit_pct=150)


def test_quality_rejected_capture_is_recorded_not_estimated(setup, tmp_path):
    from dataclasses import replace

    from waneguide.features.io import read_capture, write_capture

    caps = tmp_path / "q"
    shutil.copytree(setup["caps"], caps)
    cap = read_capture(caps / "P01_001.npz")
    amp = np.array(cap.amplitude_v, dtype=float)
    amp[:] = 0.0                                 # a dead channel: constant record
    write_capture(replace(cap, amplitude_v=amp), caps / "P01_001.npz")
    df = score_captures(setup["bundle"], caps, db_url=f"sqlite:///{tmp_path / 'h.db'}")
    row = df.set_index(df["file"].map(lambda f: Path(f).name)).loc["P01_001.npz"]
    assert row["status"] == "rejected" and np.isnan(row["max_loss_pct"])
    assert "constant" in row["quality_flags"] and row["in_family"] == False  # noqa: E712
    assert (df["status"] == "scored").sum() == 11


def _env():
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(Path(__file__).resolve().parent.parent), env.get("PYTHONPATH", "")])
    return env


@pytest.mark.slow
def test_sigkill_during_cli_scoring_then_resume(setup, tmp_path, family_fb2):
    caps = tmp_path / "many"
    make_captures(family_fb2, caps, seed=11, n_repeat=4)        # 48 captures
    n = len(list(caps.glob("*.npz")))
    db_path = tmp_path / "kill.db"
    db = f"sqlite:///{db_path}"
    cmd = [sys.executable, "-m", "waneguide", "score", "--model", str(setup["bundle"]), "--captures", str(caps),
           "--db", db, "--chunk-size", "1", "--no-progress"]
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, env=_env())
    hist = History(db)
    t0 = time.time()
    count = 0
    while time.time() - t0 < 240:
        if proc.poll() is not None:
            break
        if db_path.exists():
            try:
                count = hist.count()
            except Exception:  # noqa: BLE001 - the writer may be creating the schema
                count = 0
            if count >= 3:
                break
        time.sleep(0.01)
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=30)
    assert proc.returncode == -signal.SIGKILL, proc.stderr.read().decode()
    after_kill = hist.count()
    assert 3 <= after_kill < n, "the batch finished before it could be killed; give it more captures"
    rc = subprocess.run(cmd + ["--out", str(tmp_path / "r.csv")], capture_output=True, text=True, env=_env(),
                        timeout=300)
    assert rc.returncode == 0, rc.stderr
    df = hist.scores()
    assert len(df) == n and df["content_hash"].is_unique
    out = pd.read_csv(tmp_path / "r.csv")
    assert len(out) == n and int(out["newly_scored"].sum()) == n - after_kill


def _readings_for(truth_by_file: dict, scores: pd.DataFrame, family, path: Path) -> Path:
    """Readings at the pit of P02, one day after some captures (thickness from the known truth)."""
    rows = ["path_id,date,position_mm,remaining_thickness_mm,method,uncertainty_mm"]
    s = scores.assign(name=[Path(f).name for f in scores["file"]])
    nominal = family.section.flange_thickness_mm
    for _, r in s[s["path_id"] == "P02"].iterrows():
        t = pd.Timestamp(r["captured_at"]) + pd.Timedelta(days=1)
        remaining = nominal * (1 - truth_by_file[r["name"]] / 100.0)
        rows.append(f"P02,{t.date()},{0.4 * family.path.transducer_spacing_mm:.1f},{remaining:.4f},UT gauge,0.02")
    path.write_text("\n".join(rows) + "\n")
    return path


@pytest.mark.slow
def test_audit_cli_with_recalibration_registers_a_challenger(setup, tmp_path, family_fb2):
    import hashlib

    from waneguide.operations.registry import resolve_model

    db = f"sqlite:///{tmp_path / 'h.db'}"
    scores = score_captures(setup["bundle"], setup["caps"], db_url=db, limit_pct=15)
    readings = _readings_for(setup["truth"], scores, family_fb2, tmp_path / "readings.csv")
    # the model under audit lives in a model store; recalibration must add a version beside it
    store = tmp_path / "store"
    shutil.copytree(setup["bundle"], store / setup["bundle"].name)
    bundle_dir = store / setup["bundle"].name
    before = {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in bundle_dir.iterdir()}
    uri = f"sqlite:///{tmp_path / 'mlflow.db'}"
    report = tmp_path / "audit.html"
    rc, out, err = run_cli("audit", "--model", bundle_dir, "--readings", readings, "--db", db, "--report", report,
                           "--recalibrate", "--tracking-uri", uri)
    assert rc == 0, err
    assert "verdict:" in out and CAUTION in out and report.stat().st_size > 50_000
    # 6 readings one day after the 6 P02 captures: all matched, 1 day apart
    assert "surveys: 6, matched within 7 days: 6" in out
    new_dirs = sorted(p for p in store.iterdir() if p.name != bundle_dir.name)
    assert len(new_dirs) == 1 and "challenger: version" in out
    after = {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in bundle_dir.iterdir()}
    assert after == before                          # nothing overwritten
    challenger = resolve_model("demo-fb2@challenger", tracking_uri=uri)
    assert Path(challenger).resolve() == new_dirs[0].resolve()
    from waneguide.models.bundle import load_bundle

    nb = load_bundle(new_dirs[0])
    assert nb.calibration_source == "measured" and nb.meta["parent_version"] == "v001"
    audits = History(db).audits()
    assert len(audits) == 1 and audits.loc[0, "model_version"] == "v001"


def test_two_models_with_one_version_label_never_share_history_rows(setup, tmp_path, family_fb2):
    # issue 11: two different models that are both "v001" (two stores) must not share rows; the
    # history is keyed by the bundle's content id (the safety rule of this project, no source)
    other = train_model(family_fb2, setup["work"] / "campaign", tmp_path / "other-store", random_state=1,
                        progress=False, shift_study=False,
                        config=TrainConfig(n_estimators=60, gp_points=100, n_jobs=1)).bundle_path
    a, b = load_model(setup["bundle"]), load_model(other)
    assert a.version == b.version == "v001" and a.model_id != b.model_id
    db = f"sqlite:///{tmp_path / 'h.db'}"
    first = score_captures(a, setup["caps"], db_url=db)
    second = score_captures(b, setup["caps"], db_url=db)
    assert first["newly_scored"].all() and second["newly_scored"].all()
    assert History(db).count() == 2 * len(first)
    assert set(second["model_id"]) == {b.model_id}
    # the second model's own numbers, not the first one's (LightGBM fits with other seeds and sizes)
    assert not np.allclose(first["max_loss_pct"], second["max_loss_pct"])


def test_rescoring_with_another_limit_gives_that_limits_exceedance(setup, tmp_path):
    # issue 11: a stored capture shown again for another --limit-pct gets the exceedance of that limit,
    # equal to a fresh scoring with it (same model, same features: identical numbers expected, up to
    # float64 rounding of the stored JSON features, ~1e-15 relative: tolerance 1e-9 absolute)
    db = f"sqlite:///{tmp_path / 'h.db'}"
    score_captures(setup["bundle"], setup["caps"], db_url=db, limit_pct=15.0)
    again = score_captures(setup["bundle"], setup["caps"], db_url=db, limit_pct=5.0)
    fresh = score_captures(setup["bundle"], setup["caps"], db_url=f"sqlite:///{tmp_path / 'f.db'}", limit_pct=5.0)
    assert not again["newly_scored"].any() and (again["limit_pct"] == 5.0).all()
    np.testing.assert_allclose(again["exceed_probability"], fresh["exceed_probability"], rtol=0, atol=1e-9)
    # a lower limit is exceeded at least as often (monotone in the limit: a probability of exceedance)
    first = History(db).scores().set_index("content_hash").loc[again["content_hash"], "exceed_probability"]
    assert np.all(again["exceed_probability"].to_numpy() >= first.to_numpy() - 1e-12)


def test_concurrent_saves_into_one_store_each_get_their_own_version(setup, tmp_path):
    # issue 11: two `train` runs into one store lost a model ("Directory not empty: v001"); version
    # folders are claimed with an atomic mkdir (POSIX: mkdir fails with EEXIST if the name exists)
    from concurrent.futures import ThreadPoolExecutor
    from threading import Barrier

    from waneguide.models.bundle import load_bundle

    store = tmp_path / "store"
    bundles = [load_bundle(setup["bundle"]) for _ in range(4)]
    gate = Barrier(len(bundles))

    def save(b):
        gate.wait()
        return b.save_version(store).name

    with ThreadPoolExecutor(len(bundles)) as pool:
        names = sorted(pool.map(save, bundles))
    assert names == ["v001", "v002", "v003", "v004"]
    for name in names:  # every saved version loads, and says its own version
        assert load_bundle(store / name).version == name


def test_a_capture_dated_in_the_future_is_flagged_not_trusted(setup, tmp_path):
    # issue 11: a captured_at in 2999 was scored without a flag and moved the audit's recent window
    future = tmp_path / "future"
    future.mkdir()
    _rewrite(setup["caps"] / "P01_000.npz", future / "P01_future.npz", captured_at="2999-01-01T00:00:00+00:00")
    out = score_captures(setup["bundle"], future, baselines=setup["caps"] / "baselines",
                         db_url=f"sqlite:///{tmp_path / 'h.db'}")
    assert out["in_family"].tolist() == [False]
    assert "lies in the future" in out["mismatch_reasons"].iloc[0]
    assert np.isfinite(out["max_loss_pct"].iloc[0])  # the numbers are kept, marked


def test_a_reading_dated_in_the_future_is_refused(tmp_path):
    from waneguide.operations.readings import read_readings

    f = tmp_path / "r.csv"
    f.write_text("path_id,date,position_mm,remaining_thickness_mm,method\nP01,2999-01-01,10,1.9,UT gauge\n")
    with pytest.raises(ValueError, match=r"r\.csv.*line 2.*date.*lies in the future"):
        read_readings(f)
