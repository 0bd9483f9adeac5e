"""History database: append-only, one row per (capture, model version), crash-safe, concurrent.

Durability claims are checked against SQLite's own guarantees (atomic commit,
https://www.sqlite.org/atomiccommit.html; WAL, https://www.sqlite.org/wal.html): a
process killed with SIGKILL mid-batch must leave every committed batch and nothing
of the uncommitted one; several processes writing one file must lose no row.
"""
from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import textwrap
import time

import numpy as np
import pytest

from waneguide.features.capture import Capture
from waneguide.operations.history import History, capture_content_hash, resolve_db_url


def _row(h, v="v1", **kw):
    return {"content_hash": h, "model_version": v, "path_id": kw.pop("path_id", "P1"),
            "captured_at": kw.pop("captured_at", "2024-01-01T00:00:00+00:00"), "max_loss_pct": 1.0, **kw}


def test_duplicates_are_not_counted_twice(tmp_path):
    h = History(f"sqlite:///{tmp_path / 'h.db'}")
    assert h.add_scores([_row("a"), _row("b"), _row("a")]) == 2        # duplicate inside a batch
    assert h.add_scores([_row("a"), _row("c")]) == 1                   # duplicate of a stored row
    assert h.add_scores([_row("a", v="v2")]) == 1                      # same capture, another model
    assert h.count() == 4 and h.count(model_version="v1") == 3
    assert h.scored_hashes("v1") == {"a", "b", "c"}
    # the stored row is the first one: a rescore never rewrites history
    assert h.add_scores([_row("b", max_loss_pct=99.0)]) == 0
    assert h.scores(model_version="v1").set_index("content_hash").loc["b", "max_loss_pct"] == 1.0


def test_rows_round_trip_and_missing_key_is_refused(tmp_path):
    h = History(str(tmp_path / "plain-path.db"))           # a bare path means an SQLite file
    assert h.url.startswith("sqlite:///")
    h.add_scores([_row("x", in_family=False, mismatch_reasons="S0 arrival outside range",
                       features_json='{"f": 1.5}', max_loss_pct=float("nan"))])
    df = h.scores()
    # every stored field comes back as written: the boolean as pandas' nullable boolean (History.scores
    # docstring), False and not missing; the text verbatim; NaN as NaN; the feature value exactly
    assert str(df["in_family"].dtype) == "boolean"
    assert df["in_family"].notna().all() and not df.loc[0, "in_family"]
    assert df.loc[0, "mismatch_reasons"] == "S0 arrival outside range"
    assert (df.loc[0, "content_hash"], df.loc[0, "model_version"], df.loc[0, "path_id"]) == ("x", "v1", "P1")
    assert np.isnan(df.loc[0, "max_loss_pct"])
    assert h.features().loc["x", "f"] == 1.5          # 1.5 is exact in binary and in JSON text
    with pytest.raises(ValueError, match="content_hash is required"):
        h.add_scores([{"model_version": "v1"}])


def test_sqlite_file_uses_wal_and_busy_timeout(tmp_path):
    db = tmp_path / "w.db"
    h = History(f"sqlite:///{db}", busy_timeout_s=12.5)
    h.add_scores([_row("a")])
    with h.engine.connect() as conn:
        assert conn.exec_driver_sql("PRAGMA journal_mode").scalar() == "wal"
        # SQLite's busy_timeout is in milliseconds (sqlite.org/pragma.html#pragma_busy_timeout)
        assert conn.exec_driver_sql("PRAGMA busy_timeout").scalar() == 12500
    # WAL is a property of the file: a plain sqlite3 connection sees it too (sqlite.org/wal.html)
    con = sqlite3.connect(db)
    assert con.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    con.close()


def test_bad_url_and_missing_folder_are_clear(tmp_path):
    with pytest.raises(ValueError, match="folder .* does not exist"):
        History(f"sqlite:///{tmp_path / 'nope' / 'h.db'}").count()
    with pytest.raises(ValueError, match="cannot open history database"):
        History("nosuchdialect://user@127.0.0.1/db").count()


def test_content_hash_ignores_file_name_but_not_samples():
    a = Capture(np.arange(10.0), sample_rate_hz=1e6, path_id="P1", source="a.csv")
    b = Capture(np.arange(10.0), sample_rate_hz=1e6, path_id="P1", source="copy/b.csv")
    c = Capture(np.arange(10.0) + 1e-9, sample_rate_hz=1e6, path_id="P1")
    d = Capture(np.arange(10.0), sample_rate_hz=1e6, path_id="P2")
    assert capture_content_hash(a) == capture_content_hash(b)
    assert len({capture_content_hash(x) for x in (a, c, d)}) == 3


def test_env_var_sets_default(monkeypatch, tmp_path):
    monkeypatch.setenv("WANEGUIDE_DB", f"sqlite:///{tmp_path / 'env.db'}")
    assert resolve_db_url(None).endswith("env.db")
    assert resolve_db_url("sqlite:///x.db") == "sqlite:///x.db"


_WRITER = textwrap.dedent(
    """
    import sys, time
    from waneguide.operations.history import History
    url, start, n, batch, pause = sys.argv[1], int(sys.argv[2]), int(sys.argv[3]), int(sys.argv[4]), float(sys.argv[5])
    h = History(url)
    done = h.scored_hashes("v1")
    todo = [f"cap{i:05d}" for i in range(start, start + n) if f"cap{i:05d}" not in done]
    for i in range(0, len(todo), batch):
        h.add_scores([{"content_hash": c, "model_version": "v1", "path_id": "P1"} for c in todo[i:i + batch]])
        print("batch", flush=True)
        time.sleep(pause)
    print("done", flush=True)
    """
)


def _env():
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([os.getcwd(), env.get("PYTHONPATH", "")])
    return env


def test_sigkill_midway_then_resume_gives_each_row_once(tmp_path, repo_root):
    url = f"sqlite:///{tmp_path / 'k.db'}"
    cmd = [sys.executable, "-c", _WRITER, url, "0", "400", "20", "0.02"]
    proc = subprocess.Popen(cmd, cwd=repo_root, stdout=subprocess.PIPE, text=True, env=_env())
    seen = 0
    while seen < 5:                       # let five batches commit, then kill without warning
        line = proc.stdout.readline()
        assert line, "writer ended early"
        seen += line.startswith("batch")
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=30)
    assert proc.returncode == -signal.SIGKILL
    h = History(url)
    after_kill = h.count()
    # the writer prints "batch" after each commit: five lines seen means at least 5 x 20 rows are durable;
    # a kill mid-batch leaves whole batches only (SQLite atomic commit)
    assert 100 <= after_kill < 400 and after_kill % 20 == 0
    rc = subprocess.run(cmd[:-1] + ["0"], cwd=repo_root, capture_output=True, text=True, env=_env(), timeout=120)
    assert rc.returncode == 0 and "done" in rc.stdout
    df = h.scores()
    assert len(df) == 400 and df["content_hash"].is_unique
    assert set(df["content_hash"]) == {f"cap{i:05d}" for i in range(400)}


def test_concurrent_sqlite_writers_lose_no_rows(tmp_path, repo_root):
    url = f"sqlite:///{tmp_path / 'c.db'}"
    History(url).count()                        # create the schema once
    procs = []
    # four writers: two on disjoint ranges, two overlapping them (duplicates must collapse)
    for start in (0, 300, 150, 450):
        procs.append(subprocess.Popen([sys.executable, "-c", _WRITER, url, str(start), "300", "2", "0"],
                                      cwd=repo_root, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                      text=True, env=_env()))
    t0 = time.time()
    for p in procs:
        out, err = p.communicate(timeout=300)
        assert p.returncode == 0, err
    df = History(url).scores()
    # ranges 0-299, 300-599, 150-449, 450-749 cover 0..749 once each after duplicates collapse
    assert len(df) == 750 and df["content_hash"].is_unique, f"after {time.time() - t0:.1f} s"
    assert set(df["content_hash"]) == {f"cap{i:05d}" for i in range(750)}
