"""``waneguide score``: estimates for incoming captures, into the history database."""
from __future__ import annotations

from pathlib import Path

ORDER = 50


def register(sub) -> None:
    p = sub.add_parser(
        "score",
        help="score captures with a model: wall-loss estimates, bands, exceedance, mismatch verdict",
        description="Score captures with a model bundle and store every estimate in the history database "
                    "(a capture already scored by the same model version is not scored or counted again).",
    )
    p.add_argument("--model", required=True, metavar="MODEL_DIR_OR_REGISTRY_NAME",
                   help="model bundle folder (or model store), or a registered model name")
    p.add_argument("--captures", required=True, nargs="+", metavar="DIR_OR_FILES",
                   help="capture files (.csv .mat .h5 .npz) or folders of them")
    p.add_argument("--baselines", type=Path, default=None, metavar="DIR",
                   help="baseline captures (sound metal) of every path; default: a 'baselines' folder inside "
                        "or beside the captures folder")
    p.add_argument("--limit-pct", type=float, default=None, metavar="L",
                   help="limit on the maximum wall loss [%% of nominal thickness] for the exceedance probability (default: the family file's [limits] wall_loss_limit_pct, if stated)")
    p.add_argument("--db", default=None, metavar="URL",
                   help="history database, any SQLAlchemy URL (default sqlite:///waneguide-history.db, "
                        "or $WANEGUIDE_DB)")
    p.add_argument("--out", type=Path, default=None, metavar="results.csv", help="also write the table as CSV")
    p.add_argument("--jobs", type=int, default=1, metavar="N", help="worker processes (joblib; default 1)")
    p.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="score on a Dask cluster: scheduler address (tcp://127.0.0.1:8786) or 'local'")
    p.add_argument("--chunk-size", type=int, default=32, metavar="N",
                   help="captures per task and per database transaction (default 32)")
    p.add_argument("--tracking-uri", default=None, metavar="URI",
                   help="MLflow tracking URI for registry names (default sqlite:///mlflow.db)")
    p.set_defaults(func=run)


def run(args) -> int:
    from waneguide.core.atomic import check_output_path
    from waneguide.operations.scoring import (
        format_scores,
        score_captures,
        write_scores_csv,
    )

    if args.out is not None:  # fail before scoring, not after
        check_output_path(args.out, "results CSV (--out)")
    captures = args.captures[0] if len(args.captures) == 1 else args.captures
    df = score_captures(
        args.model, captures, baselines=args.baselines, limit_pct=args.limit_pct, db_url=args.db,
        n_jobs=args.jobs, scheduler=args.scheduler, chunk_size=args.chunk_size,
        progress=not args.no_progress, tracking_uri=args.tracking_uri,
    )
    print(format_scores(df))
    if args.out is not None:
        write_scores_csv(df, args.out)
        print(f"wrote {args.out}")
    return 0
