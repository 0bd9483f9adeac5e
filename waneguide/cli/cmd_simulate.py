"""``waneguide simulate``: a simulated thinning campaign of one stiffener family."""
from __future__ import annotations

from pathlib import Path

ORDER = 20


def register(sub) -> None:
    p = sub.add_parser("simulate", help="simulate a thinning campaign (captures + baselines + truth) for a family")
    p.add_argument("--family", required=True, type=Path, metavar="FAMILY.toml", help="stiffener family definition")
    p.add_argument("--cases", required=True, type=int, metavar="N", help="number of thinning cases")
    p.add_argument("--out", required=True, type=Path, metavar="DIR",
                   help="campaign folder (new, or an interrupted run of the same campaign to resume)")
    p.add_argument("--seed", type=int, default=0, metavar="S", help="random seed (default 0); same seed, same bytes")
    p.add_argument("--jobs", type=int, default=1, metavar="N",
                   help="worker processes on this machine (default 1: in this process; -1: every core)")
    p.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="Dask scheduler address, e.g. tcp://127.0.0.1:8786, or 'local' (overrides --jobs)")
    p.add_argument("--fidelity", choices=("fast", "full"), default="fast",
                   help="fast: modal-synthesis model (default); full: full-wave solver, one run per case and "
                        "baseline (seconds each), same campaign layout, confounders and noise")
    p.set_defaults(func=run)


def run(args) -> int:
    import sys

    from waneguide.simulation.campaign import run_campaign

    try:
        camp = run_campaign(args.family, args.cases, args.out, seed=args.seed, n_jobs=args.jobs,
                            scheduler=args.scheduler, progress=not args.no_progress, fidelity=args.fidelity)
    except KeyboardInterrupt:
        print(f"finished chunks are kept in {args.out}; rerun the same command to resume", file=sys.stderr)
        raise
    print(f"wrote {camp.path}")
    print(camp.summary())
    return 0
