"""``waneguide demo``: the whole job on the bundled, invented demo scenario."""
from __future__ import annotations

ORDER = 0

from pathlib import Path


def register(sub) -> None:
    p = sub.add_parser("demo", help="run the bundled invented demo end to end")
    p.add_argument("--out", type=Path, default=Path("demo-output"), help="output folder (default demo-output)")
    p.set_defaults(func=run)


def run(args) -> int:
    from waneguide_cli.demo import run_demo

    run_demo(args.out)
    return 0
