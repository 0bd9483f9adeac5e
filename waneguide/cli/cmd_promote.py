"""``waneguide promote`` and ``waneguide rollback``: move the version in service of a model store."""
from __future__ import annotations

from pathlib import Path

ORDER = 65


def _common(p) -> None:
    p.add_argument("--model", required=True, type=Path, metavar="MODEL_STORE",
                   help="model store folder (written by `waneguide train --out`)")
    p.add_argument("--note", required=True, metavar="TEXT", help="why (required; kept with the record)")
    p.add_argument("--db", default=None, metavar="URL",
                   help="history database that records the move (default sqlite:///waneguide-history.db, "
                        "or $WANEGUIDE_DB)")
    p.add_argument("--tracking-uri", default=None, metavar="URI",
                   help="MLflow store whose in-service alias moves too (default sqlite:///mlflow.db)")
    p.add_argument("--no-tracking", action="store_true", help="leave MLflow alone")


def register(sub) -> None:
    p = sub.add_parser("promote", help="put a version of a model store in service (with a note)",
                       description="Put VERSION of a model store in service: every command given the store "
                                   "then uses it. The move is recorded in the store, the history database "
                                   "and, if the version is registered, MLflow's in-service alias.")
    p.add_argument("--version", required=True, metavar="vNNN", help="the version to put in service")
    _common(p)
    p.set_defaults(func=run_promote)
    r = sub.add_parser("rollback", help="put back the version in service before the last move (with a note)",
                       description="Undo the last promote or rollback of a model store, with a note.")
    _common(r)
    r.set_defaults(func=run_rollback)


def _say(rec) -> None:
    print(f"{rec['action']}: {rec['store']}: {rec['from_version']} -> {rec['to_version']} in service "
          f"(model id {rec['model_id']}, by {rec['os_user']}): {rec['note']}")


def run_promote(args) -> int:
    from waneguide.operations.service import promote

    _say(promote(args.model, args.version, note=args.note, db_url=args.db, tracking_uri=args.tracking_uri,
                 track=not args.no_tracking))
    return 0


def run_rollback(args) -> int:
    from waneguide.operations.service import rollback

    _say(rollback(args.model, note=args.note, db_url=args.db, tracking_uri=args.tracking_uri,
                  track=not args.no_tracking))
    return 0
