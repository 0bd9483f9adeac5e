"""Benchmark: out-of-family detection on shifted families, and in-family false alarms (issue 16).

Trains a bundle on an in-family campaign of the demo family (fast forward model), then simulates a
campaign of each shifted family of the training's calibration (thickness +-8/15 %, shear and
longitudinal speed +-1.5/3 %, density +3 %, path +2 %, the other alloy; every case its own path
and baseline) and small in-family campaigns where false alarms are most likely (baselines and
captures at either end of the temperature range with the deepest fifth of the loss range). Prints the
flagged fraction per shift (all reasons, and the physics checks alone) against the targets

    >= 0.95 for flange thickness +-15 % and shear speed -3 %,  >= 0.8 for shear speed -1.5 %,

(AUROC: of the whole verdict, and of the statistical p-value alone) and the in-family false-alarm rates (held-out cases and the edge campaigns) against the stated
rates (0.01 statistical + 0.005 per physics check), with the one-sided 95 % Clopper-Pearson
upper bound. Campaigns are cached under the system temp folder (waneguide-bench-oof/).

    .venv/bin/python benchmarks/bench_out_of_family.py [--cases 2000] [--shift-cases 96] [--cache DIR]
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

#: Issue 16 targets on the flagged fraction.
TARGETS = {"flange thickness -15 %": 0.95, "flange thickness +15 %": 0.95, "shear speed -3 %": 0.95,
           "shear speed -1.5 %": 0.8}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cases", type=int, default=2000, help="in-family training campaign")
    ap.add_argument("--shift-cases", type=int, default=96, help="cases (= paths) per shifted family")
    ap.add_argument("--cache", type=Path, default=Path(tempfile.gettempdir()) / "waneguide-bench-oof")
    args = ap.parse_args(argv)

    from waneguide.features.extractor import FeatureExtractor
    from waneguide.features.family import load_family
    from waneguide.models.bundle import TARGETS as LOSS_TARGETS
    from waneguide.models.conformal import grouped_split
    from waneguide.simulation.campaign import load_campaign, run_campaign
    from waneguide.training.pipeline import (
        TrainConfig,
        cached_campaign_features,
        false_alarms_by_group,
        fit_bundle,
        mismatch_study,
    )

    fam_path = Path(__file__).resolve().parent.parent / "configs" / "families" / "demo_fb2.toml"
    fam = load_family(fam_path)
    camp_dir = args.cache / f"campaign_{args.cases}"
    if not (camp_dir / "manifest.json").is_file():
        run_campaign(fam, args.cases, camp_dir, seed=2016, n_jobs=2, progress=True)
    camp = load_campaign(camp_dir)
    feats = cached_campaign_features(FeatureExtractor(fam), camp, args.cache / "features", progress=False, n_jobs=2)
    cases = camp.cases.reset_index(drop=True)
    groups = cases["specimen_id"].astype(str).to_numpy()
    test = grouped_split(groups, 0.2, 0)
    cfg = TrainConfig(n_estimators=200, gp_points=300)
    t0 = time.perf_counter()
    bundle, _ = fit_bundle(fam, feats[~test], cases.loc[~test, list(LOSS_TARGETS)], groups[~test], config=cfg,
                           random_state=0)
    print(f"trained on {int((~test).sum())} in-family cases in {time.perf_counter() - t0:.1f} s; "
          f"{len(bundle.meta.get('dropped_features', {}))} degenerate feature(s) left out: "
          f"{', '.join(bundle.meta.get('dropped_features', {}))}")
    Ft, Ct = feats[test].reset_index(drop=True), cases[test].reset_index(drop=True)
    pred = bundle.predict_frame(Ft)
    mx = Ct["max_loss_pct"].to_numpy(float)
    lo, hi = fam.domain.temperature_c
    tb = Ct["baseline_temperature_c"].to_numpy(float)
    held = false_alarms_by_group(pred, {"pristine": mx == 0, "max loss >= 25 %": mx >= 25,
                                        "baseline temperature at an end of the range":
                                            (tb <= lo + 0.1 * (hi - lo)) | (tb >= hi - 0.1 * (hi - lo))})
    t0 = time.perf_counter()
    study = mismatch_study(bundle, fam, pred, n_cases=args.shift_cases,
                           seed=7, work_dir=args.cache / "shifts", progress=False)
    print(f"shifted-family study ({args.shift_cases} paths each) in {time.perf_counter() - t0:.1f} s\n")

    print(f"{'shifted family':<28}{'flagged':>9}{'physics':>9}{'AUROC':>8}{'stat.':>7}   target")
    ok = True
    for name, r in study["shifts"].items():
        target = TARGETS.get(name)
        verdict = "" if target is None else f">= {target:.2f}  {'OK' if r['flag_rate'] >= target else 'BELOW'}"
        ok &= target is None or r["flag_rate"] >= target
        print(f"{name:<28}{r['flag_rate']:>9.3f}{r['physics_flag_rate']:>9.3f}{r['auroc']:>8.3f}"
              f"{r['auroc_statistical']:>7.3f}   {verdict}")
    stated = cfg.false_alarm_rate + 2 * cfg.physics_false_alarm_rate
    print(f"\nin-family false alarms (stated: {cfg.false_alarm_rate:g} statistical + "
          f"{cfg.physics_false_alarm_rate:g} per physics check = {stated:g} at most)")
    for kind, table in (("held-out", held), ("campaign", study["edges"])):
        for name, r in table.items():
            print(f"  {kind:<9}{name:<46} {r['flagged']:>3}/{r['n']:<5} rate {r['rate']:.3f}  "
                  f"95 % upper {r['upper_95']:.3f}")
    return 0 if ok else 1


if __name__ == "__main__":
    raise SystemExit(main())
