"""``waneguide demo``: the whole job on the bundled, invented demo scenario."""
from __future__ import annotations

from pathlib import Path

ORDER = 0


def register(sub) -> None:
    p = sub.add_parser("demo", help="run the bundled invented demo end to end (simulate, train, score, audit, report)",
                       description="Run the whole job on the bundled, invented demo scenario. Everything it writes "
                                   "(campaign, model store, MLflow store and artifacts, history database, report) "
                                   "goes under --out.")
    p.add_argument("--out", type=Path, default=Path("demo-output"), help="output folder (default demo-output)")
    p.add_argument("--quick", action="store_true", help="the reduced scenario (fewer cases, paths and weeks)")
    p.add_argument("--jobs", type=int, default=2, metavar="N", help="worker processes (default 2; -1: every core)")
    p.set_defaults(func=run)


def run(args) -> int:
    from waneguide.cli.demo import run_demo
    from waneguide.core.atomic import check_output_dir
    from waneguide.core.runner import check_n_jobs

    check_n_jobs(args.jobs, option="--jobs")
    check_output_dir(args.out, "demo output folder (--out)")
    run_demo(args.out, quick=args.quick, progress=not getattr(args, "no_progress", False), n_jobs=args.jobs)
    return 0
