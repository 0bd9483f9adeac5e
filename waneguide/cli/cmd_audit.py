"""``waneguide audit``: compare a model in service with hands-on thickness readings."""
from __future__ import annotations

from pathlib import Path

ORDER = 60


def register(sub) -> None:
    p = sub.add_parser(
        "audit",
        help="audit a model against hands-on readings: residuals, coverage, drift, verdict",
        description="Match hands-on thickness readings to the nearest scored capture of the same path and "
                    "report residuals, bias, band coverage, residual drift (Page-Hinkley), feature drift "
                    "against the training domain, and a verdict: in control, recalibrate or retrain.",
    )
    p.add_argument("--model", required=True, metavar="MODEL_DIR_OR_REGISTRY_NAME",
                   help="the model in service: bundle folder (or model store), or a registered model name")
    p.add_argument("--readings", required=True, type=Path, metavar="FILE.csv",
                   help="readings CSV: path_id,date,position_mm,remaining_thickness_mm,method[,uncertainty_mm]")
    p.add_argument("--db", default=None, metavar="URL",
                   help="history database (default sqlite:///waneguide-history.db, or $WANEGUIDE_DB)")
    p.add_argument("--report", type=Path, default=None, metavar="audit.html", help="write the HTML report")
    p.add_argument("--recalibrate", action="store_true",
                   help="refit calibration and residual correction with the readings; write a new model "
                        "version, log it in MLflow and register it as challenger (nothing is overwritten)")
    p.add_argument("--window-days", type=float, default=7.0, metavar="D",
                   help="match a reading to a capture at most D days away (default 7)")
    p.add_argument("--limit-pct", type=float, default=None, metavar="L",
                   help="limit line in the report [%% of nominal] (default: the family file's [limits] wall_loss_limit_pct, else the limit used when scoring)")
    p.add_argument("--tracking-uri", default=None, metavar="URI",
                   help="MLflow tracking URI (default sqlite:///mlflow.db)")
    p.set_defaults(func=run)


def run(args) -> int:
    from waneguide.operations.audit import (
        AuditSettings,
        check_audit_options,
        format_audit,
        run_audit,
    )
    from waneguide.operations.scoring import load_model

    check_audit_options(limit_pct=args.limit_pct, report_path=args.report)  # before loading the model
    bundle = load_model(args.model, tracking_uri=args.tracking_uri)
    result = run_audit(bundle, args.readings, db_url=args.db, report_path=args.report,
                       recalibrate=args.recalibrate, settings=AuditSettings(window_days=args.window_days),
                       tracking_uri=args.tracking_uri, limit_pct=args.limit_pct)
    print(format_audit(result))
    return 0
