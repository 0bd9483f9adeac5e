"""Scoring throughput and history write rate.

Targets (ours, for a weekly batch of a fleet's captures on a 2-core machine):
- scoring: 1,000 captures in under 3 s with 2 workers (features + model + history: issue 11's
  target), i.e. at least 333 captures/s;
- history: at least 2,000 rows/s inserted into SQLite in chunks of 32.

Prints the figures and their ratio to the target. Invented demo family; small model.
"""
from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

import numpy as np  # noqa: E402

TARGET_CAPTURES_S = 1000 / 3.0
TARGET_ROWS_S = 2000.0


def main() -> int:
    import warnings

    warnings.filterwarnings("ignore")
    from waneguide.features.family import load_family
    from waneguide.features.io import write_capture
    from waneguide.operations.history import History
    from waneguide.operations.scoring import score_captures
    from waneguide.simulation.campaign import run_campaign
    from waneguide.simulation.forward import simulate_capture
    from waneguide.training.pipeline import TrainConfig, train_model

    fam = load_family(Path(__file__).resolve().parent.parent / "configs" / "families" / "demo_fb2.toml")
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        run_campaign(fam, 400, tmp / "camp", seed=3, n_jobs=2, progress=False)
        res = train_model(fam, tmp / "camp", tmp / "models", progress=False, shift_study=False,
                          config=TrainConfig(n_estimators=150, gp_points=200, n_jobs=1))
        rng = np.random.default_rng(0)
        L = fam.path_length_m
        x = np.linspace(0, L, 301)
        caps = tmp / "caps"
        (caps / "baselines").mkdir(parents=True)
        n = 1000
        for p in range(4):
            b = simulate_capture(fam, x_m=x, thickness_m=np.full_like(x, fam.nominal_thickness_m), temperature_c=20.0,
                                 rng=rng, path_id=f"P{p}", captured_at="2025-01-01T00:00:00+00:00")
            write_capture(b, caps / "baselines" / f"P{p}.npz")
        for i in range(n):
            c = simulate_capture(fam, x_m=x, thickness_m=np.full_like(x, fam.nominal_thickness_m),
                                 temperature_c=float(rng.uniform(5, 35)), rng=rng, path_id=f"P{i % 4}",
                                 captured_at=f"2025-02-01T00:{i // 60:02d}:{i % 60:02d}+00:00")
            write_capture(c, caps / f"c{i:04d}.npz")
        for jobs in (1, 2):
            t = time.perf_counter()
            score_captures(res.bundle_path, caps, db_url=f"sqlite:///{tmp / f'h{jobs}.db'}", n_jobs=jobs)
            dt = time.perf_counter() - t
            rate = n / dt
            print(f"scoring, {jobs} worker(s): {n} captures in {dt:.1f} s = {rate:.1f} captures/s "
                  f"(target {TARGET_CAPTURES_S:.0f} with 2 workers: ratio {rate / TARGET_CAPTURES_S:.2f})")
        h = History(f"sqlite:///{tmp / 'rows.db'}")
        rows = [{"content_hash": f"{i:08d}", "model_version": "v1", "model_id": "m1", "path_id": "P1",
                 "max_loss_pct": 1.0}
                for i in range(20000)]
        t = time.perf_counter()
        for i in range(0, len(rows), 32):
            h.add_scores(rows[i:i + 32])
        dt = time.perf_counter() - t
        print(f"history: {len(rows)} rows in {dt:.2f} s = {len(rows) / dt:.0f} rows/s "
              f"(target {TARGET_ROWS_S:g}: ratio {len(rows) / dt / TARGET_ROWS_S:.2f})")
        h.close()
    return 0


if __name__ == "__main__":
    sys.exit(main())
