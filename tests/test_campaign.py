"""Campaign runner: reproducible bytes, resume after interruption, joblib and Dask equal the serial run."""
from __future__ import annotations

import hashlib
import json
import os
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.stats import qmc

import waneguide.simulation.campaign as campaign_mod
from waneguide.core.errors import InputError, MissingInputError
from waneguide.features.io import read_capture
from waneguide.simulation.campaign import load_campaign, plan_campaign, run_campaign
from waneguide.simulation.export import export_campaign_captures
from waneguide.simulation.profiles import TRUTH_COLUMNS

N_CASES = 36
CHUNK = 8  # 5 chunks, the last one short


def _files(root: Path) -> dict[str, bytes]:
    return {str(p.relative_to(root)): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def reference(tmp_path_factory, family_fb2):
    out = tmp_path_factory.mktemp("ref") / "camp"
    run_campaign(family_fb2, N_CASES, out, seed=7, chunk_size=CHUNK, progress=False)
    return out


def test_layout_and_contract(reference, family_fb2):
    camp = load_campaign(reference)
    assert sorted(p.name for p in reference.iterdir()) == ["cases.parquet", "chunks", "manifest.json"]
    assert sorted(p.name for p in (reference / "chunks").iterdir()) == [f"chunk_{k:05d}.npz" for k in range(5)]
    man = json.loads((reference / "manifest.json").read_text())
    assert man["status"] == "complete"
    assert man["family_fingerprint"] == family_fb2.fingerprint == camp.family_fingerprint
    assert man["seed"] == 7 and man["n_cases"] == N_CASES and man["code_version"]["waneguide"]
    assert camp.fingerprint == man["campaign_fingerprint"] and len(camp.fingerprint) == 16
    cases = camp.cases
    assert len(cases) == N_CASES and cases["case_id"].is_unique
    for col in ("case_id", "specimen_id", *TRUTH_COLUMNS, "temperature_c", "baseline_temperature_c", "snr_db"):
        assert col in cases.columns
    assert camp.sample_rate_hz == pytest.approx(10e6) and camp.pretrigger_s == pytest.approx(20e-6)
    # states_per_specimen = 4 in the demo family: specimens of 4 consecutive cases
    assert (cases.groupby("specimen_id").size() == 4).all()
    n_seen = 0
    for sl, waves, bases in camp.iter_chunks():
        assert waves.dtype == np.float32 and bases.dtype == np.float32
        assert waves.shape == bases.shape == (len(sl), family_fb2.acquisition.record_length)
        n_seen += len(sl)
        # one baseline per specimen, shared by its states; specimen-level columns agree
        for _, grp in sl.groupby("specimen_id"):
            rows = [sl.index.get_loc(i) for i in grp.index]
            for r in rows[1:]:
                np.testing.assert_array_equal(bases[r], bases[rows[0]])
            assert grp["baseline_temperature_c"].nunique() == 1 and grp["coupling_tx_db"].nunique() == 1
    assert n_seen == N_CASES
    cap, base = camp.capture(9), camp.baseline(9)
    assert cap.temperature_c == pytest.approx(cases["temperature_c"].iloc[9])
    assert base.temperature_c == pytest.approx(cases["baseline_temperature_c"].iloc[9])
    assert cap.path_id == base.path_id == cases["specimen_id"].iloc[9]
    assert not np.array_equal(cap.amplitude_v, base.amplitude_v)


def test_truth_columns_match_the_stored_profiles(reference):
    camp = load_campaign(reference)
    for i in range(0, N_CASES, 5):
        truth = camp.profile(i).truth()
        row = camp.cases.iloc[i]
        for k in TRUTH_COLUMNS:
            # float32 storage of the profile: 1e-5 of the nominal thickness
            assert truth[k] == pytest.approx(row[k], rel=1e-4, abs=1e-3), k
        assert row["max_loss_pct"] == pytest.approx(row["max_loss_target_pct"], abs=1e-9)


def test_same_seed_same_bytes_different_seed_differs(reference, tmp_path, family_fb2):
    again = tmp_path / "again"
    run_campaign(family_fb2, N_CASES, again, seed=7, chunk_size=CHUNK, progress=False)
    assert _files(again) == _files(reference)
    other = tmp_path / "other"
    run_campaign(family_fb2, N_CASES, other, seed=8, chunk_size=CHUNK, progress=False)
    a, b = load_campaign(reference), load_campaign(other)
    assert not np.allclose(a.cases["temperature_c"], b.cases["temperature_c"])
    assert not np.array_equal(a.capture(0).amplitude_v, b.capture(0).amplitude_v)
    assert a.fingerprint != b.fingerprint


def test_joblib_workers_write_the_same_bytes(reference, tmp_path, family_fb2):
    out = tmp_path / "par"
    run_campaign(family_fb2, N_CASES, out, seed=7, chunk_size=CHUNK, n_jobs=2, progress=False)
    assert _files(out) == _files(reference)


def test_dask_local_cluster_writes_the_same_bytes(reference, tmp_path, family_fb2):
    from dask.distributed import Client, LocalCluster

    with LocalCluster(host="127.0.0.1", protocol="tcp://", n_workers=2, threads_per_worker=1, processes=False,
                      dashboard_address=None) as cluster, Client(cluster) as client:
        out = tmp_path / "dask"
        run_campaign(family_fb2, N_CASES, out, seed=7, chunk_size=CHUNK, scheduler=client, progress=False)
        # the scheduler address form as well (what `--scheduler tcp://...` passes)
        out2 = tmp_path / "dask_addr"
        run_campaign(family_fb2, N_CASES, out2, seed=7, chunk_size=CHUNK, scheduler=cluster.scheduler_address,
                     progress=False)
    assert cluster.scheduler_address.startswith("tcp://127.0.0.1:")
    assert _files(out) == _files(reference)
    assert _files(out2) == _files(reference)


def test_interrupted_run_resumes_without_redoing_finished_chunks(reference, tmp_path, family_fb2, monkeypatch):
    out = tmp_path / "resume"
    real = campaign_mod._simulate_chunk
    calls = []

    def flaky(fm, plan, seed):
        calls.append(int(plan["case_index"].iloc[0]))
        if len(calls) == 3:
            raise KeyboardInterrupt  # the user pressed Ctrl-C during the third chunk
        return real(fm, plan, seed)

    monkeypatch.setattr(campaign_mod, "_simulate_chunk", flaky)
    with pytest.raises(KeyboardInterrupt):
        run_campaign(family_fb2, N_CASES, out, seed=7, chunk_size=CHUNK, progress=False)
    done = sorted((out / "chunks").glob("chunk_*.npz"))
    assert [p.name for p in done] == ["chunk_00000.npz", "chunk_00001.npz"]
    assert not (out / "cases.parquet").exists()
    assert json.loads((out / "manifest.json").read_text())["status"] == "running"
    with pytest.raises(ValueError, match="incomplete .2 of 5 chunks.*resume"):
        load_campaign(out)
    # a temporary file left by a write that was cut off is cleaned up, never taken for a chunk
    (out / "chunks" / ".chunk_00002.npz.abc.part").write_bytes(b"half")
    before = {p.name: (os.stat(p).st_ino, os.stat(p).st_mtime_ns, p.read_bytes()) for p in done}

    calls.clear()
    monkeypatch.setattr(campaign_mod, "_simulate_chunk", lambda fm, plan, seed: (calls.append(
        int(plan["case_index"].iloc[0])), real(fm, plan, seed))[1])
    run_campaign(family_fb2, N_CASES, out, seed=7, chunk_size=CHUNK, progress=False)
    assert calls == [16, 24, 32]  # only the three missing chunks were computed
    for p in done:
        assert (os.stat(p).st_ino, os.stat(p).st_mtime_ns, p.read_bytes()) == before[p.name]
    assert _files(out) == _files(reference)
    # a finished campaign is returned as it is
    calls.clear()
    run_campaign(family_fb2, N_CASES, out, seed=7, chunk_size=CHUNK, progress=False)
    assert calls == []


def test_other_campaigns_and_foreign_folders_are_never_overwritten(reference, tmp_path, family_fb2, family_st3):
    before = _files(reference)
    with pytest.raises(ValueError, match="holds another campaign.*nothing was overwritten"):
        run_campaign(family_fb2, N_CASES, reference, seed=8, chunk_size=CHUNK, progress=False)
    with pytest.raises(ValueError, match="holds another campaign"):
        run_campaign(family_st3, N_CASES, reference, seed=7, chunk_size=CHUNK, progress=False)
    assert _files(reference) == before
    junk = tmp_path / "junk"
    junk.mkdir()
    (junk / "notes.txt").write_text("mine")
    with pytest.raises(ValueError, match="not empty and holds no campaign"):
        run_campaign(family_fb2, 4, junk, progress=False)
    with pytest.raises(ValueError, match="n_cases must be a positive whole number; got 0"):
        run_campaign(family_fb2, 0, tmp_path / "x", progress=False)
    with pytest.raises(ValueError, match="seed must be a non-negative"):
        run_campaign(family_fb2, 4, tmp_path / "x", seed=-1, progress=False)


def _flip_a_byte(path: Path) -> None:
    data = bytearray(path.read_bytes())
    data[-100] ^= 0xFF  # inside the last array's data: the zip still opens, the numbers changed
    path.write_bytes(bytes(data))


def test_verify_detects_a_changed_chunk(reference, tmp_path):
    import shutil

    copy = tmp_path / "copy"
    shutil.copytree(reference, copy)
    camp = load_campaign(copy)
    camp.verify()
    _flip_a_byte(copy / "chunks" / "chunk_00001.npz")
    with pytest.raises(InputError, match="chunk_00001.npz does not match its SHA-256"):
        camp.verify()


def test_a_tampered_chunk_is_refused_when_read_and_the_fix_repairs_it(reference, tmp_path, family_fb2):
    import shutil

    copy = tmp_path / "tampered"
    shutil.copytree(reference, copy)
    chunk = copy / "chunks" / "chunk_00002.npz"
    expected = json.loads((copy / "manifest.json").read_text())["chunks"][2]["sha256"]
    _flip_a_byte(chunk)
    found = hashlib.sha256(chunk.read_bytes()).hexdigest()  # the outside reference for the digest
    camp = load_campaign(copy)
    camp.capture(0)  # chunk 0 is sound
    message = (rf"{re.escape(str(chunk))} does not match its SHA-256 in manifest.json \(expected {expected}, "
               rf"found {found}\).*Delete that chunk and re-run `waneguide simulate` with the same arguments")
    with pytest.raises(InputError, match=message):
        camp.capture(2 * CHUNK)  # first case of chunk 2
    with pytest.raises(InputError, match=message):
        list(camp.iter_chunks())
    # rerunning over the tampered chunk refuses to take it over
    with pytest.raises(InputError, match=message):
        run_campaign(family_fb2, N_CASES, copy, seed=7, chunk_size=CHUNK, progress=False)
    # the fix the message gives: delete the chunk and rerun with the same arguments
    chunk.unlink()
    with pytest.raises(MissingInputError, match="chunk_00002.npz is missing. Re-run `waneguide simulate`"):
        load_campaign(copy)
    camp = run_campaign(family_fb2, N_CASES, copy, seed=7, chunk_size=CHUNK, progress=False)
    assert camp.run_info["computed_chunks"] == 1 and camp.run_info["reused_chunks"] == 4
    assert _files(copy) == _files(reference)


def test_plan_is_space_filling_and_respects_the_domain(family_fb2):
    # Scrambled Sobol points have a lower centred L2-discrepancy than i.i.d. uniform points
    # (Owen 1997; discrepancy computed by scipy.stats.qmc.discrepancy, the reference
    # implementation). 512 cases, state dimensions rescaled back to the unit cube.
    dom = family_fb2.domain
    plan = plan_campaign(family_fb2, 512, seed=3)
    unit = lambda col, pair: (plan[col] - pair[0]) / (pair[1] - pair[0])  # noqa: E731
    pts = np.column_stack([unit("temperature_c", dom.temperature_c), unit("snr_db", dom.snr_db),
                           unit("coupling_drift_tx_db", dom.coupling_drift_db),
                           unit("coupling_drift_rx_db", dom.coupling_drift_db)])
    rnd = np.random.default_rng(0).random(pts.shape)
    assert qmc.discrepancy(pts) < 0.5 * qmc.discrepancy(rnd)
    assert plan["temperature_c"].between(*dom.temperature_c).all()
    assert set(plan["shape"]) == set(dom.shapes) and set(plan["sides"]) == set(dom.sides)
    assert plan["n_patches"].between(1, dom.max_patches).all()
    # pristine fraction: a Sobol coordinate below 0.1 -> 10 % of the states, to within the
    # Sobol balance on 512 points (a few points)
    assert plan["pristine"].mean() == pytest.approx(dom.pristine_fraction, abs=0.01)
    assert (plan.loc[plan["pristine"], "max_loss_target_pct"] == 0).all()
    pd.testing.assert_frame_equal(plan, plan_campaign(family_fb2, 512, seed=3))


def test_a_stated_share_of_specimens_has_its_damage_under_a_transducer(family_fb2):
    # The plan's site_at is cut from its own Sobol coordinate (_plan.TRANSDUCER_SITE_SHARE):
    # on 512 specimens each share holds to within the Sobol balance (a few points, 0.01).
    # A transducer site is centred within half a patch of its disc on the path side, so the
    # disc centre lies inside the patch: every damaged state of such a specimen has loss
    # under that disc (no more than the deepest loss), seen through the chunk's own truth.
    from waneguide.simulation._chunk import simulate_chunk
    from waneguide.simulation._plan import TRANSDUCER_SITE_SHARE
    from waneguide.simulation.forward import ForwardModel

    plan = plan_campaign(family_fb2, 512 * 4, seed=3)
    spec = plan.drop_duplicates("specimen_id")
    L = family_fb2.path_length_m
    for at, share in TRANSDUCER_SITE_SHARE.items():
        assert (spec["site_at"] == at).mean() == pytest.approx(share, abs=0.01)
    half_mm = 0.5 * spec["patch_length_mm"]
    from_tx = spec["position_fraction"] * L * 1e3
    assert (from_tx[spec["site_at"] == "transmitter"] <= half_mm[spec["site_at"] == "transmitter"]).all()
    assert (L * 1e3 - from_tx[spec["site_at"] == "receiver"] <= half_mm[spec["site_at"] == "receiver"]).all()
    sub = plan.iloc[:256]
    arrays = simulate_chunk(ForwardModel(family_fb2), sub, 3)
    damaged = arrays["truth_max_loss_mm"] > 0
    for at, col in (("transmitter", "truth_loss_under_tx_mm"), ("receiver", "truth_loss_under_rx_mm")):
        rows = damaged & (sub["site_at"].to_numpy() == at)
        assert rows.sum() >= 4
        assert (arrays[col][rows] > 0).all()
        assert (arrays[col] <= arrays["truth_max_loss_mm"] + 1e-12).all()


def test_export_writes_readable_captures_with_baselines(reference, tmp_path):
    out = tmp_path / "files"
    index = export_campaign_captures(reference, out, cases=[0, 1, 5, "C0000009"], fmt="csv")
    assert list(index["case_id"]) == ["C0000000", "C0000001", "C0000005", "C0000009"]
    assert sorted(p.name for p in out.iterdir()) == sorted(
        ["C0000000.csv", "C0000001.csv", "C0000005.csv", "C0000009.csv", "S000000_baseline.csv",
         "S000001_baseline.csv", "S000002_baseline.csv", "index.csv"])
    camp = load_campaign(reference)
    for pos, (_, row) in zip([0, 1, 5, 9], index.iterrows()):
        cap = read_capture(out / row["file"])
        base = read_capture(out / row["baseline_file"])
        # CSV keeps full float repr: the round trip is exact
        np.testing.assert_array_equal(cap.amplitude_v, camp.capture(pos).amplitude_v)
        np.testing.assert_array_equal(base.amplitude_v, camp.baseline(pos).amplitude_v)
        assert cap.path_id == base.path_id == row["specimen_id"]
        assert cap.temperature_c == pytest.approx(row["temperature_c"])
    assert pd.read_csv(out / "index.csv")["max_loss_pct"].tolist() == pytest.approx(index["max_loss_pct"].tolist())
    with pytest.raises(ValueError, match="already exist.*nothing was overwritten"):
        export_campaign_captures(reference, out, cases=[0])
    with pytest.raises(ValueError, match="fmt must be one of"):
        export_campaign_captures(reference, tmp_path / "y", fmt="wav")
    idx = export_campaign_captures(reference, tmp_path / "npz", cases=[2], fmt="npz")
    np.testing.assert_array_equal(read_capture(tmp_path / "npz" / idx["file"][0]).amplitude_v,
                                  camp.capture(2).amplitude_v)


def test_cli_simulate_writes_and_summarises(tmp_path, family_fb2):
    import io
    from contextlib import redirect_stderr, redirect_stdout

    from tests.conftest import FAMILY_FB2
    from waneguide.cli.main import main

    def cli(*argv):
        out, err = io.StringIO(), io.StringIO()
        with redirect_stdout(out), redirect_stderr(err):
            rc = main(list(argv))
        return rc, out.getvalue(), err.getvalue()

    dest = tmp_path / "cli"
    rc, out, err = cli("simulate", "--family", str(FAMILY_FB2), "--cases", "8", "--out", str(dest), "--seed", "2")
    assert rc == 0, err
    assert f"wrote {dest}" in out
    assert "8 cases on 2 specimens" in out and "free-plate S0/A0 model" in out
    camp = load_campaign(dest)
    assert camp.seed == 2 and len(camp) == 8
    rc, out, err = cli("simulate", "--family", str(FAMILY_FB2), "--cases", "0", "--out", str(tmp_path / "z"))
    assert rc == 2 and "n_cases must be a positive whole number; got 0" in err and "Traceback" not in err
    rc, out, err = cli("simulate", "--family", str(tmp_path / "missing.toml"), "--cases", "3", "--out", str(tmp_path / "z"))
    assert rc == 2 and "does not exist" in err
    assert not (tmp_path / "z").exists()


def test_a_campaign_too_large_for_this_machine_is_refused_before_any_work(tmp_path, family_fb2):
    # issue 11: `--cases 1000000000` ran out of memory; the estimate (Family.campaign_memory_bytes)
    # is checked against the machine's physical memory first, and nothing is written
    from waneguide.core.errors import InputError
    from waneguide.simulation.campaign import run_campaign

    with pytest.raises(InputError, match=r"would need about .* GiB of memory .*this machine has"):
        run_campaign(family_fb2, 1_000_000_000, tmp_path / "huge", seed=0, progress=False)
    assert not any((tmp_path / "huge").glob("**/*")) if (tmp_path / "huge").exists() else True


def test_a_changed_case_table_is_refused_and_the_fix_rebuilds_it(reference, tmp_path, family_fb2):
    # issue 11: cases.parquet (the ground truth) was covered by no hash; 16 flipped bytes changed 85
    # values silently. Now its SHA-256 is in the manifest and checked on load.
    import shutil

    copy = tmp_path / "cases-tampered"
    shutil.copytree(reference, copy)
    original = (copy / "cases.parquet").read_bytes()
    _flip_a_byte(copy / "cases.parquet")
    with pytest.raises(InputError, match=r"case table .*cases.parquet does not match its SHA-256"):
        load_campaign(copy)
    # the fix the message names: delete the table and re-run with the same arguments
    (copy / "cases.parquet").unlink()
    man = json.loads((copy / "manifest.json").read_text())
    run_campaign(family_fb2, man["n_cases"], copy, seed=man["seed"], chunk_size=man["chunk_size"], progress=False)
    assert (copy / "cases.parquet").read_bytes() == original
