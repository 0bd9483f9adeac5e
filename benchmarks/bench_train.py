"""Benchmark: training on 20,000 simulated cases, and scoring captures end to end.

Targets (issue 5): training on 20,000 simulated cases with features already extracted in under
3 minutes on 2 cores; one capture end to end (read, features, predict, band, mismatch) in under
20 ms; 1,000 captures in under 5 s. Prints each figure and its ratio to the target.

The campaign and its features are cached under the system temp folder
(waneguide-bench-train/), so only the first run pays for the simulation.

    .venv/bin/python benchmarks/bench_train.py [--cases 20000] [--cache DIR]
"""
from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("MLFLOW_DISABLE_TELEMETRY", "true")
sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402


def _report(name: str, seconds: float, target: float) -> None:
    print(f"{name:<48} {seconds:9.3f} s   target {target:7.3f} s   ratio {seconds / target:5.2f}"
          f"  {'OK' if seconds <= target else 'OVER'}")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cases", type=int, default=20_000)
    ap.add_argument("--cache", type=Path, default=Path(tempfile.gettempdir()) / "waneguide-bench-train")
    args = ap.parse_args(argv)

    from waneguide.features.extractor import FeatureExtractor, extract_feature_table
    from waneguide.features.family import load_family
    from waneguide.features.io import read_capture, write_capture
    from waneguide.features.schema import feature_columns
    from waneguide.models.bundle import TARGETS, load_bundle
    from waneguide.models.conformal import grouped_split
    from waneguide.simulation.campaign import load_campaign, run_campaign
    from waneguide.training.pipeline import TrainConfig, cached_campaign_features, evaluate_bundle, fit_bundle

    fam_path = Path(__file__).resolve().parent.parent / "configs" / "families" / "demo_fb2.toml"
    fam = load_family(fam_path)
    cache = args.cache
    camp_dir = cache / f"campaign_{args.cases}"
    if not (camp_dir / "manifest.json").is_file():
        print(f"simulating {args.cases} cases into {camp_dir} (once) ...")
        t0 = time.perf_counter()
        run_campaign(fam, args.cases, camp_dir, seed=2024, n_jobs=2, progress=True)
        print(f"  simulated in {time.perf_counter() - t0:.1f} s")
    camp = load_campaign(camp_dir)
    # the training pipeline's own feature cache: keyed by the campaign and family fingerprints, the
    # feature schema version and the extractor's settings, so a change of any of them recomputes
    t0 = time.perf_counter()
    feats = cached_campaign_features(FeatureExtractor(fam), camp, cache / "features", progress=True, n_jobs=2)
    print(f"  features in {time.perf_counter() - t0:.1f} s (cached after the first run; not part of the "
          "training target)")
    cases = camp.cases.reset_index(drop=True)
    cols = [c for c in feature_columns() if c in feats.columns]
    groups = cases["specimen_id"].astype(str).to_numpy()
    test = grouped_split(groups, 0.2, 0)
    print(f"cores: {os.cpu_count()}, load average {os.getloadavg()[0]:.1f}; cases {len(cases)} "
          f"(train+calibration {int((~test).sum())}, held-out {int(test.sum())}), {len(cols)} features")

    # --- 1. training (features done) ------------------------------------------------
    t0 = time.perf_counter()
    bundle, diag = fit_bundle(fam, feats[~test], cases.loc[~test, list(TARGETS)], groups[~test],
                              config=TrainConfig(), feature_columns=cols, random_state=0, progress=False,
                              family_toml=fam_path.read_text())
    t_fit = time.perf_counter() - t0
    ev = evaluate_bundle(bundle, feats[test].reset_index(drop=True), cases[test].reset_index(drop=True))
    out = bundle.save_version(cache / "models")
    t_train = time.perf_counter() - t0
    _report(f"train on {len(cases)} cases (fit+evaluate+save)", t_train, 180.0)
    print(f"  fit {t_fit:.1f} s; per target {', '.join(f'{k} {v:.1f}' for k, v in diag['timings_s'].items())}")
    for t in TARGETS:
        r = ev[t]
        print(f"  {t:<14} MAE {r['mae']:.3f}  RMSE {r['rmse']:.3f}  coverage {r['coverage']:.3f}  "
              f"width {r['mean_width']:.3f}")
    print(f"  in-family false-alarm rate {ev['in_family_false_alarm_rate']:.4f} (stated 0.01)")

    # --- 2. one capture end to end --------------------------------------------------
    b = load_bundle(out)
    scratch = cache / "captures"
    scratch.mkdir(exist_ok=True)
    n_files = 1000
    spec = cases["specimen_id"].astype(str).to_numpy()
    for i in range(n_files):
        f = scratch / f"cap_{i:04d}.npz"
        if not f.is_file():
            write_capture(camp.capture(i), f)
        fb = scratch / f"baseline_{spec[i]}.npz"
        if not fb.is_file():
            write_capture(camp.baseline(i), fb)
    ex = FeatureExtractor(b.family)
    times = []
    for i in range(60):
        t0 = time.perf_counter()
        cap = read_capture(scratch / f"cap_{i:04d}.npz")
        base = read_capture(scratch / f"baseline_{spec[i]}.npz")  # read as well: the conservative count
        row = ex.extract(cap, base)
        res = b.predict_frame(pd.DataFrame([row]), limit_pct=30.0)
        times.append(time.perf_counter() - t0)
    t_one = float(np.median(times[10:]))
    _report("score 1 capture (read, features, predict, band, mismatch)", t_one, 0.020)
    print(f"  p90 {np.percentile(times[10:], 90) * 1e3:.1f} ms; example: max_loss_pct "
          f"{res['max_loss_pct'].iloc[0]:.1f} [{res['max_loss_pct_lower'].iloc[0]:.1f}, "
          f"{res['max_loss_pct_upper'].iloc[0]:.1f}] %, in family {bool(res['in_family'].iloc[0])}")

    # --- 3. 1,000 captures --------------------------------------------------------------
    t0 = time.perf_counter()
    caps = [read_capture(scratch / f"cap_{i:04d}.npz") for i in range(n_files)]
    bases = [read_capture(scratch / f"baseline_{s}.npz") for s in sorted(set(spec[:n_files]))]
    t_read = time.perf_counter() - t0
    table = extract_feature_table(b.family, caps, bases, n_jobs=2, on_reject="nan")
    t_feat = time.perf_counter() - t0 - t_read
    res = b.predict_frame(table, limit_pct=30.0)
    t_all = time.perf_counter() - t0
    _report(f"score {n_files} captures", t_all, 5.0)
    print(f"  read {t_read:.2f} s, features {t_feat:.2f} s, predict+band+mismatch {t_all - t_read - t_feat:.2f} s; "
          f"{int((~res['in_family']).sum())} flagged")
    return 0


if __name__ == "__main__":
    sys.exit(main())
