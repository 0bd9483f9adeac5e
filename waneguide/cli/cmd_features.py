"""``waneguide features``: captures + baselines -> feature table (Parquet)."""
from __future__ import annotations

from pathlib import Path

ORDER = 30


def register(sub) -> None:
    p = sub.add_parser("features", help="physics feature table of captures against their baselines")
    p.add_argument("--family", required=True, type=Path, metavar="FAMILY.toml", help="stiffener family definition")
    p.add_argument("--captures", required=True, nargs="+", metavar="DIR_OR_FILES",
                   help="capture files and/or directories of them (.csv, .mat, .h5, .hdf5, .npz)")
    p.add_argument("--baselines", required=True, nargs="+", metavar="DIR",
                   help="baselines (same formats), matched to captures by path_id")
    p.add_argument("--out", required=True, type=Path, metavar="features.parquet", help="output Parquet file")
    p.add_argument("--jobs", type=int, default=1, metavar="N", help="parallel workers (default 1)")
    p.add_argument("--skip-rejected", action="store_true",
                   help="leave out captures that fail a fatal quality check instead of stopping")
    p.set_defaults(func=run)


def run(args) -> int:
    from waneguide.features.extractor import build_feature_file

    df = build_feature_file(args.family, args.captures, args.baselines, args.out, n_jobs=args.jobs,
                            on_reject="skip" if args.skip_rejected else "raise")
    flagged = int((df["quality_flags"] != "").sum())
    print(f"wrote {args.out}: {len(df)} capture(s), {df.attrs.get('n_rejected', 0)} rejected, "
          f"{flagged} with quality warnings, feature schema v{df.attrs['feature_schema_version']}")
    return 0
