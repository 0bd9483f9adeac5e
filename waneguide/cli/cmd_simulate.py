"""``waneguide simulate``: a simulated thinning campaign of one stiffener family."""
from __future__ import annotations

ORDER = 20

from pathlib import Path


def register(sub) -> None:
    p = sub.add_parser("simulate", help="simulate a thinning campaign (captures + baselines + truth) for a family")
    p.add_argument("--family", required=True, type=Path, metavar="FAMILY.toml", help="stiffener family definition")
    p.add_argument("--cases", required=True, type=int, metavar="N", help="number of thinning cases")
    p.add_argument("--out", required=True, type=Path, metavar="DIR",
                   help="campaign folder (new, or an interrupted run of the same campaign to resume)")
    p.add_argument("--seed", type=int, default=0, metavar="S", help="random seed (default 0); same seed, same bytes")
    p.add_argument("--workers", type=int, default=1, metavar="K", help="processes on this machine (default 1)")
    p.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="Dask scheduler address, e.g. tcp://127.0.0.1:8786 (overrides --workers)")
    p.set_defaults(func=run)


def run(args) -> int:
    from waneguide.simulation.campaign import run_campaign

    import sys

    try:
        camp = run_campaign(args.family, args.cases, args.out, seed=args.seed, workers=args.workers,
                            scheduler=args.scheduler, progress=True)
    except KeyboardInterrupt:
        print(f"finished chunks are kept in {args.out}; rerun the same command to resume", file=sys.stderr)
        raise
    print(f"wrote {camp.path}")
    print(camp.summary())
    return 0
