"""``waneguide demo``: the whole job on the bundled, invented demo scenario."""
from __future__ import annotations

ORDER = 0

from pathlib import Path


def register(sub) -> None:
    p = sub.add_parser("demo", help="run the bundled invented demo end to end (simulate, train, score, audit, report)")
    p.add_argument("--out", type=Path, default=Path("demo-output"), help="output folder (default demo-output)")
    p.add_argument("--quick", action="store_true", help="the reduced scenario (fewer cases, paths and weeks)")
    p.add_argument("--workers", type=int, default=2, metavar="N", help="worker processes (default 2)")
    p.add_argument("--no-progress", action="store_true", help="no progress bars")
    p.set_defaults(func=run)


def run(args) -> int:
    from waneguide.cli.demo import run_demo

    if args.workers < 1:
        raise ValueError(f"--workers must be a positive integer; got {args.workers}.")
    from waneguide.core.atomic import check_output_dir

    check_output_dir(args.out, "demo output folder (--out)")
    run_demo(args.out, quick=args.quick, progress=not args.no_progress, workers=args.workers)
    return 0
