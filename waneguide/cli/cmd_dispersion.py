"""``waneguide dispersion``: Rayleigh-Lamb curves of a free plate to CSV (and a plot)."""
from __future__ import annotations

from pathlib import Path

ORDER = 11


def register(sub) -> None:
    p = sub.add_parser("dispersion", help="Rayleigh-Lamb dispersion curves of a free plate")
    p.add_argument("--material", required=True, metavar="NAME_OR_FILE",
                   help="built-in material name (see `waneguide materials`) or a material TOML file")
    p.add_argument("--thickness-mm", required=True, type=float, metavar="T", help="plate thickness [mm]")
    p.add_argument("--fmax-khz", required=True, type=float, metavar="F", help="highest frequency [kHz]")
    p.add_argument("--points", type=int, default=500, metavar="N", help="number of frequencies (default 500)")
    p.add_argument("--temperature-c", type=float, default=None, metavar="C",
                   help="temperature [degC] (default: the material's reference temperature)")
    p.add_argument("--out", required=True, type=Path, metavar="curves.csv", help="output CSV")
    p.add_argument("--plot", type=Path, default=None, metavar="curves.png", help="also write a PNG plot")
    p.set_defaults(func=run)


def run(args) -> int:
    from waneguide.core.atomic import check_output_path
    from waneguide.features.curves_io import (
        compute_dispersion_table,
        plot_dispersion,
        write_dispersion_csv,
    )

    check_output_path(args.out, "curves CSV (--out)")  # both outputs checked before any is written
    if args.plot is not None:
        check_output_path(args.plot, "plot (--plot)")
    curves = compute_dispersion_table(
        args.material,
        thickness_mm=args.thickness_mm,
        fmax_khz=args.fmax_khz,
        points=args.points,
        temperature_c=args.temperature_c,
    )
    write_dispersion_csv(curves, args.out)
    print(f"wrote {args.out} ({len(curves.modes)} modes: {', '.join(curves.modes)})")
    if args.plot is not None:
        plot_dispersion(curves, args.plot)
        print(f"wrote {args.plot}")
    return 0
