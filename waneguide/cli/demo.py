"""The bundled demo: the whole job on an INVENTED scenario (the Lowmoor test rig).

Everything here is invented for the demo: the rig, its six pitch-catch paths on the
floor-beam flange FB-2 (family ``configs/families/demo_fb2.toml``), the season of
captures, the corrosion and the hands-on readings. It describes no real structure.

Steps (:func:`run_demo`):

1. simulate a training campaign for the family (:func:`waneguide.simulation.campaign.run_campaign`);
2. train a model bundle on it, log and register it in the demo's own MLflow store
   (:func:`waneguide.operations.train.train_and_register`);
3. make a season of measured-like captures with the forward model
   (:func:`waneguide.simulation.forward.simulate_capture`): weekly captures on every path with
   temperature swings on all of them; a flat-bottom corrosion patch grows slowly on
   path P02 and a pit on path P04; plus baselines at three temperatures per path, one
   capture after the receiver was re-bonded 30 mm further along (a 10 % longer path: out
   of family) and one from a dead channel (rejected by the quality gate);
4. score the season into a history database (:func:`waneguide.operations.scoring.score_captures`);
5. write invented hands-on readings (thickness scans along the corroding paths, spot
   checks on a sound one) and audit the model against them (:func:`waneguide.operations.audit.run_audit`);
6. write the self-contained HTML report.

Everything the demo writes goes under its output folder: the campaign, the model store, the
MLflow store ``mlflow.db`` with its artifacts in ``mlflow-artifacts/``, the history database,
the season, the readings and the report. Nothing is written into the working directory.
"""
from __future__ import annotations

import logging
import time
import warnings
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from tqdm.auto import tqdm

from waneguide.configs import config_path
from waneguide.core.atomic import atomic_path
from waneguide.core.caution import CAUTION
from waneguide.features.family import family_from_mapping, load_family
from waneguide.features.io import write_capture
from waneguide.operations.audit import format_audit, run_audit
from waneguide.operations.history import History
from waneguide.operations.readings import write_readings
from waneguide.operations.scoring import format_scores, score_captures, write_scores_csv
from waneguide.operations.train import train_and_register
from waneguide.simulation.campaign import run_campaign
from waneguide.simulation.forward import simulate_capture
from waneguide.simulation.profiles import flat_patch_profile, pit_profile, pristine_profile
from waneguide.training.pipeline import TrainConfig, format_summary

__all__ = ["DemoScenario", "run_demo", "scenario"]

FAMILY_FILE = config_path("families", "demo_fb2.toml")
START_DATE = np.datetime64("2025-03-03T08:00")


@dataclass(frozen=True)
class DemoScenario:
    """Sizes of the invented scenario (``quick`` shrinks every one of them)."""

    n_cases: int
    n_weeks: int
    paths: tuple[str, ...]
    growth: dict  # path -> (shape, centre fraction, length_mm, final max loss %, onset week)
    survey_weeks: tuple[int, ...]
    spot_weeks: tuple[int, ...]
    seed: int = 2025


def scenario(quick: bool = False) -> DemoScenario:
    """The demo scenario; ``quick=True`` is the reduced one the tests run."""
    if quick:
        return DemoScenario(
            n_cases=500, n_weeks=12, paths=("P01", "P02", "P04", "P06"),
            growth={"P02": ("flat", 0.45, 40.0, 22.0, 2), "P04": ("pit", 0.30, 25.0, 14.0, 3)},
            survey_weeks=(5, 11), spot_weeks=(6, 11),
        )
    return DemoScenario(
        n_cases=3000, n_weeks=26, paths=("P01", "P02", "P03", "P04", "P05", "P06"),
        growth={"P02": ("flat", 0.45, 40.0, 22.0, 4), "P04": ("pit", 0.30, 25.0, 14.0, 6)},
        survey_weeks=(8, 16, 25), spot_weeks=(12, 25),
    )


def _say(msg: str) -> None:
    print(msg, flush=True)


def _iso(week: int, *, days: float = 0.0) -> str:
    t = START_DATE + np.timedelta64(int(round((7 * week + days) * 24 * 60)), "m")
    return str(t) + ":00+00:00"


def _profile(family, path_id: str, week: int, sc: DemoScenario):
    """Thickness profile of a path in a given week (invented corrosion growth)."""
    L = family.path_length_m
    t0 = family.nominal_thickness_m
    x = np.linspace(0.0, L, 601)
    g = sc.growth.get(path_id)
    if g is None:
        return pristine_profile(x, t0, path_length_m=L)
    shape, centre, length_mm, final, onset = g
    frac = max(0.0, (week - onset) / max(1, sc.n_weeks - 1 - onset))
    loss = final * frac
    if loss <= 0:
        return pristine_profile(x, t0, path_length_m=L)
    if shape == "flat":
        return flat_patch_profile(x, t0, centre_m=centre * L, length_m=length_mm * 1e-3, max_loss_pct=loss,
                                  path_length_m=L)
    return pit_profile(x, t0, centre_m=centre * L, length_m=length_mm * 1e-3, max_loss_pct=loss, path_length_m=L)


def _temperature(week: int, rng) -> float:
    # invented weather: a swing of +-14 degC every ~9 weeks around 20 degC, plus day-to-day scatter
    return float(20.0 + 14.0 * np.sin(2 * np.pi * week / 9.0) + rng.normal(0.0, 2.0))


def make_season(family, folder: Path, sc: DemoScenario, *, progress: bool = True) -> dict[str, Any]:
    """Write the season's captures and baselines; returns the truth table (one row per capture)."""
    rng = np.random.default_rng(sc.seed)
    caps = folder / "captures"
    base = folder / "baselines"
    caps.mkdir(parents=True, exist_ok=True)
    base.mkdir(parents=True, exist_ok=True)
    L = family.path_length_m
    t0 = family.nominal_thickness_m
    x = np.linspace(0.0, L, 601)
    for pid in sc.paths:
        for k, temp in enumerate((5.0, 20.0, 35.0)):
            b = simulate_capture(family, x_m=x, thickness_m=np.full_like(x, t0), temperature_c=temp,
                                 rng=rng, snr_db=40.0, path_id=pid, captured_at=_iso(0, days=-3 + k))
            write_capture(b, base / f"{pid}_baseline_{int(temp):02d}C.npz")
    rows = []
    items = [(w, pid) for w in range(sc.n_weeks) for pid in sc.paths]
    bar = None
    if progress:
        bar = tqdm(total=len(items), desc="season captures", unit="capture", leave=False)
    odd_week = sc.n_weeks - 4
    data = family.model_dump(mode="json")
    data["path"]["transducer_spacing_mm"] = round(family.path.transducer_spacing_mm * 1.1, 3)
    moved = family_from_mapping(data, where="demo: moved receiver")
    for w, pid in items:
        prof = _profile(family, pid, w, sc)
        temp = _temperature(w, rng)
        note = ""
        fam_w, x_w, th_w = family, x, prof.thickness_m
        if pid == sc.paths[-1] and w == odd_week:
            # invented: after a repair the receiver was re-bonded 30 mm further along the flange, so
            # the path is 10 % longer than the family's: a capture the model must flag out of family
            fam_w, x_w = moved, np.linspace(0.0, moved.path_length_m, 601)
            th_w = np.full_like(x_w, t0)
            note = "receiver re-bonded 30 mm further along (out of family)"
        cap = simulate_capture(fam_w, x_m=x_w, thickness_m=th_w, temperature_c=temp, rng=rng,
                               snr_db=float(rng.uniform(30.0, 42.0)),
                               # transducer coupling drifts a little from the baseline's (within the
                               # campaign's drift range of +-1 dB)
                               coupling_db=(float(rng.uniform(-0.5, 0.5)), float(rng.uniform(-0.5, 0.5))),
                               path_id=pid, captured_at=_iso(w))
        if fam_w is not family:
            # a field capture carries no family fingerprint: nothing but its signal tells the change
            cap = replace(cap, extra={k: v for k, v in (cap.extra or {}).items()
                                      if k not in ("family", "family_fingerprint")})
        if pid == sc.paths[-1] and w == odd_week - 2:
            cap = replace(cap, amplitude_v=np.zeros_like(np.asarray(cap.amplitude_v)))
            note = "dead channel (rejected)"
        f = caps / f"{pid}_w{w:02d}.npz"
        write_capture(cap, f)
        t = prof.truth()
        rows.append({"file": str(f), "path_id": pid, "week": w, "captured_at": _iso(w), "temperature_c": temp,
                     "true_max_loss_pct": t["max_loss_pct"], "true_mean_loss_pct": t["mean_loss_pct"], "note": note})
        if bar is not None:
            bar.update()
    if bar is not None:
        bar.close()
    truth = pd.DataFrame(rows)
    return {"captures": caps, "baselines": base, "truth": truth}


def make_readings(family, path: Path, sc: DemoScenario, *, seed: int | None = None) -> Path:
    """Invented hands-on readings: UT thickness scans (5 mm pitch) on the corroding paths,
    spot checks on a sound path. Gauge scatter 0.02 mm (stated uncertainty)."""
    rng = np.random.default_rng(sc.seed + 1 if seed is None else seed)
    L_mm = family.path.transducer_spacing_mm
    rows = []
    for w in sc.survey_weeks:
        for pid in sc.growth:
            prof = _profile(family, pid, w, sc)
            pos = np.arange(0.0, L_mm + 1e-9, 5.0)
            # the inspector adds a reading at the thinnest spot found (common practice, no source)
            pos = np.unique(np.r_[pos, prof.x_m[np.argmin(prof.thickness_m)] * 1e3])
            th = prof.resample(pos * 1e-3) * 1e3 + rng.normal(0.0, 0.02, pos.size)
            for p, t in zip(pos, th):
                rows.append({"path_id": pid, "date": _iso(w, days=1.1), "position_mm": round(float(p), 1),
                             "remaining_thickness_mm": round(float(t), 3), "method": "UT scan, 5 mm pitch",
                             "uncertainty_mm": 0.02})
    sound = sc.paths[0]
    for w in sc.spot_weeks:
        for p in (0.25 * L_mm, 0.5 * L_mm, 0.75 * L_mm):
            t = family.section.flange_thickness_mm + rng.normal(0.0, 0.02)
            rows.append({"path_id": sound, "date": _iso(w, days=0.9), "position_mm": round(p, 1),
                         "remaining_thickness_mm": round(float(t), 3), "method": "UT gauge spot check",
                         "uncertainty_mm": 0.02})
    df = pd.DataFrame(rows)
    df["date"] = pd.to_datetime(df["date"], utc=True)
    return write_readings(df, path)


def _train(family, campaign_dir: Path, out: Path, *, tracking_uri: str, progress: bool, quick: bool, n_jobs: int):
    """train_and_register with settings sized for the demo's time budget (stated in the model's metrics)."""
    # LightGBM on one thread: on these small tables threads cost more than they give (measured: 10 s vs
    # 120 s for the quick demo on a busy 2-core machine)
    cfg = TrainConfig(gp_points=150 if quick else 300, n_estimators=120 if quick else 200, n_jobs=1)
    res = train_and_register(family, campaign_dir, out, tracking_uri=tracking_uri, random_state=0,
                             progress=progress, config=cfg, shift_study=not quick, n_jobs=n_jobs)
    return Path(res.bundle_path), res


def run_demo(out_dir: str | Path, *, quick: bool = False, progress: bool = True, n_jobs: int = 2) -> dict[str, Path]:
    """Run the whole invented demo into ``out_dir``; returns the paths it wrote.

    Parameters
    ----------
    out_dir : path
        Output folder (created). A rerun into the same folder reuses the finished campaign
        and does not count already scored captures twice.
    quick : bool
        The reduced scenario (fewer cases, paths and weeks) used by the tests.
    progress : bool
        Show progress bars.
    n_jobs : int
        Processes for the campaign, the feature extraction and scoring.
    """
    with warnings.catch_warnings():
        # scikit-learn's robust covariance warns on rank-deficient simulated features; the
        # mismatch detector handles that (ridge precision), so the warning is noise here
        warnings.filterwarnings("ignore", category=UserWarning, module="sklearn")
        warnings.filterwarnings("ignore", message=".*type hints.*", category=UserWarning)
        mlflow_log = logging.getLogger("mlflow")
        level = mlflow_log.level
        mlflow_log.setLevel(logging.WARNING)
        try:
            return _run(out_dir, quick=quick, progress=progress, n_jobs=n_jobs)
        finally:
            mlflow_log.setLevel(level)


def _run(out_dir, *, quick: bool, progress: bool, n_jobs: int) -> dict[str, Path]:
    t_start = time.time()
    out = Path(out_dir).resolve()
    out.mkdir(parents=True, exist_ok=True)
    sc = scenario(quick)
    family = load_family(FAMILY_FILE)
    db_url = f"sqlite:///{out / 'history.db'}"
    tracking_uri = f"sqlite:///{out / 'mlflow.db'}"
    _say("waneguide demo -- an INVENTED scenario: the Lowmoor test rig, floor-beam flange family "
         f"{family.name} ({family.build_material().name}, {family.section.flange_thickness_mm:g} mm flange, "
         f"{family.path.transducer_spacing_mm:g} mm pitch-catch paths). No real structure is described.")

    def step(i, text):
        _say(f"[{i}/6] {text} ({time.time() - t_start:.0f} s elapsed)")

    step(1, f"simulating a training campaign of {sc.n_cases} cases")
    camp_dir = out / "campaign"
    run_campaign(family, sc.n_cases, camp_dir, seed=sc.seed, n_jobs=n_jobs, progress=progress)

    step(2, "training the model (LightGBM + GP, conformal bands, mismatch detector)")
    models_dir = out / "models"
    bundle_path, train_res = _train(family, camp_dir, models_dir, tracking_uri=tracking_uri, progress=progress,
                                    quick=quick, n_jobs=n_jobs)
    _say("      " + format_summary(train_res).replace("\n", "\n      "))

    step(3, f"simulating a season of measured-like captures: {len(sc.paths)} paths x {sc.n_weeks} weeks, "
            f"temperature swings on all, corrosion growing on {', '.join(sc.growth)}")
    season = make_season(family, out / "season", sc, progress=progress)
    truth_csv = out / "season" / "truth.csv"
    with atomic_path(truth_csv) as tmp:
        season["truth"].to_csv(tmp, index=False)

    step(4, f"scoring the season into the history ({db_url})")
    scores = score_captures(bundle_path, season["captures"], baselines=season["baselines"],
                            db_url=db_url, n_jobs=n_jobs, progress=progress, tracking_uri=tracking_uri)
    results_csv = out / "scores.csv"
    write_scores_csv(scores, results_csv)
    latest = scores.sort_values("captured_at").groupby("path_id").tail(1)
    _say(format_scores(latest).rsplit("\n", 1)[0])

    step(5, "auditing the model against invented hands-on readings")
    readings_csv = make_readings(family, out / "readings.csv", sc)
    report = out / "report.html"
    result = run_audit(bundle_path, readings_csv, db_url=db_url, report_path=report,
                       tracking_uri=tracking_uri)
    _say(format_audit(result).rsplit("\n", 1)[0])

    step(6, "report written")
    with History(db_url) as h:
        n_hist = h.count()
    paths = {
        "report": report,
        "scores_csv": results_csv,
        "readings_csv": readings_csv,
        "history_db": out / "history.db",
        "model_bundle": bundle_path,
        "campaign": camp_dir,
        "season_captures": season["captures"],
        "season_truth_csv": truth_csv,
        "mlflow_db": out / "mlflow.db",
        "mlflow_artifacts": out / "mlflow-artifacts",
    }
    _say(f"\nDone in {time.time() - t_start:.0f} s. {n_hist} captures in the history; verdict: {result.verdict}.")
    _say("Outputs:")
    for key, p in paths.items():
        _say(f"  {key:17s} {p}")
    _say(f"Open the report in a browser: {report.as_uri()}")
    _say(CAUTION)
    return paths
