"""``waneguide train``: features, fit, calibrate, evaluate, write the bundle, log and register the run."""
from __future__ import annotations

from pathlib import Path

ORDER = 40


def register(sub) -> None:
    p = sub.add_parser("train", help="train a calibrated wall-loss model bundle for one family",
                       description="Train a model bundle for one stiffener family from a simulated campaign "
                                   "(and optionally measured captures with known loss); evaluate it on held-out "
                                   "specimens, log the run to MLflow and register the bundle.")
    p.add_argument("--family", required=True, type=Path, metavar="FAMILY.toml", help="family definition")
    p.add_argument("--campaign", required=True, type=Path, metavar="DIR", help="simulated campaign folder")
    p.add_argument("--measured", type=Path, default=None, metavar="FILE.csv",
                   help="measured cases: CSV with a 'file' column (capture path relative to the CSV), target "
                        "columns max_loss_pct / max_loss_mm / mean_loss_pct, optional 'path_id' and 'baseline' "
                        "(else the zero-loss rows of a path are its baselines)")
    p.add_argument("--out", required=True, type=Path, metavar="MODEL_DIR",
                   help="model store; the bundle goes to its next vNNN folder (nothing is overwritten)")
    p.add_argument("--tracking-uri", default=None, metavar="URI",
                   help="MLflow tracking URI (default sqlite:///mlflow.db in the working directory, with the run "
                        "artifacts in mlflow-artifacts/ beside it)")
    p.add_argument("--no-tracking", action="store_true", help="do not log the run to MLflow")
    p.add_argument("--no-shift-study", action="store_true",
                   help="skip the shifted-geometry mismatch study (faster, no AUROC figures)")
    p.add_argument("--coverage", type=float, default=0.9, metavar="C", help="band coverage (default 0.9)")
    p.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    p.add_argument("--jobs", type=int, default=1, metavar="N",
                   help="worker processes for the feature extraction (default 1; -1: every core)")
    p.set_defaults(func=run)


def run(args) -> int:
    from waneguide.core.caution import CAUTION
    from waneguide.core.runner import check_n_jobs
    from waneguide.operations.train import train_and_register
    from waneguide.training.pipeline import TrainConfig, format_summary

    check_n_jobs(args.jobs, option="--jobs")
    res = train_and_register(args.family, args.campaign, args.out, measured_csv=args.measured,
                             tracking_uri=args.tracking_uri, random_state=args.seed,
                             progress=not getattr(args, "no_progress", False),
                             config=TrainConfig(coverage=args.coverage),
                             track=not args.no_tracking, shift_study=not args.no_shift_study, n_jobs=args.jobs)
    print(format_summary(res))
    print(CAUTION)
    return 0
