"""Score incoming captures with a model bundle, into the history database.

:func:`score_captures` is what ``waneguide score`` runs:

1. **Check** every capture (and baseline) against the model before anything is scored:
   a capture made for another family (its ``family_fingerprint`` header differs from
   the model's) or at a sample rate the model cannot use (more than 0.1 % from the
   family's) is refused with a ``ValueError`` naming the file; so is a capture whose
   path has no baseline (baselines are matched by ``path_id``: a baseline from another
   path is never used).
2. **Skip** captures the history already holds for this model version (same content
   hash): a rerun after an interruption only scores the rest, and a capture scored
   twice is counted once.
3. **Score** the rest in chunks, serially, with joblib processes (``n_jobs``) or on a
   Dask cluster (``scheduler``): quality gate and features
   (:func:`features.extractor.extract_feature_table`), then
   :meth:`models.bundle.ModelBundle.predict_frame`. A capture the quality gate rejects
   gets a ``rejected`` row with its flags and no estimate.
4. **Store** each finished chunk in one transaction (:class:`models.history.History`),
   so a killed batch keeps every finished chunk.

The result has :data:`SCORE_OUTPUT_COLUMNS` first (the ``--out`` CSV contract), then
``content_hash, model_version, status, newly_scored, limit_pct``, the estimates in mm and
``negative_apparent_loss`` (the capture reads thicker than its baseline: its estimate is clipped
to 0 % and flagged, never silently; :data:`waneguide.models.mismatch.NEGATIVE_LOSS_REASON`).
"""
from __future__ import annotations

import json
import math
import os
import uuid
from dataclasses import replace
from pathlib import Path
from typing import Any, Sequence

import numpy as np
import pandas as pd

from waneguide.core.atomic import atomic_path
from waneguide.core.caution import CAUTION
from waneguide.core.errors import InputError
from waneguide.core.settings import FUTURE_TOLERANCE_S
from waneguide.core.runner import check_n_jobs, check_scheduler, run_tasks
from waneguide.features.capture import Capture
from waneguide.features.extractor import extract_feature_table
from waneguide.features.io import capture_files, read_capture
from waneguide.models.bundle import ModelBundle, load_bundle
from waneguide.models.mismatch import has_negative_loss
from waneguide.operations.history import History, capture_content_hash
from waneguide.operations.registry import resolve_model

__all__ = [
    "SCORE_OUTPUT_COLUMNS",
    "SAMPLE_RATE_TOLERANCE",
    "score_captures",
    "load_model",
    "format_scores",
    "write_scores_csv",
]

#: Columns of ``waneguide score --out``, in this order (more may follow).
SCORE_OUTPUT_COLUMNS = (
    "file", "path_id", "captured_at", "temperature_c",
    "max_loss_pct", "max_loss_pct_lower", "max_loss_pct_upper",
    "mean_loss_pct", "mean_loss_pct_lower", "mean_loss_pct_upper",
    "exceed_probability", "in_family", "mismatch_p_value", "mismatch_reasons", "quality_flags",
)
_EXTRA_COLUMNS = ("content_hash", "model_version", "model_id", "status", "newly_scored", "limit_pct",
                  "max_loss_mm", "max_loss_mm_lower", "max_loss_mm_upper", "negative_apparent_loss")
_PREDICTION_COLUMNS = ("max_loss_pct", "max_loss_pct_lower", "max_loss_pct_upper", "max_loss_mm",
                       "max_loss_mm_lower", "max_loss_mm_upper", "mean_loss_pct", "mean_loss_pct_lower",
                       "mean_loss_pct_upper", "exceed_probability", "in_family", "mismatch_p_value",
                       "mismatch_reasons")
#: Relative sample-rate difference the model accepts (the quality gate's rule, features.quality).
SAMPLE_RATE_TOLERANCE = 1e-3
DEFAULT_CHUNK = 32


# --------------------------------------------------------------------------------------
def load_model(model, *, tracking_uri: str | None = None):
    """A :class:`~models.bundle.ModelBundle` from a bundle, a bundle folder or a registry name."""

    if isinstance(model, ModelBundle):
        return model
    p = Path(str(model))
    if p.exists():
        return load_bundle(p)
    return load_bundle(resolve_model(str(model), tracking_uri=tracking_uri))


def _is_capture(x) -> bool:
    return isinstance(x, Capture)


def _items(captures) -> list:
    """Capture objects and file paths, in input order (directories expanded, sorted)."""

    if captures is None:
        raise InputError("no captures given; pass a folder, files, or Capture objects.")
    if _is_capture(captures) or isinstance(captures, (str, os.PathLike)):
        captures = [captures]
    out: list = []
    paths: list = []
    for c in captures:
        if _is_capture(c):
            if paths:
                out.extend(capture_files(paths))
                paths = []
            out.append(c)
        else:
            paths.append(c)
    if paths:
        out.extend(capture_files(paths))
    if not out:
        raise InputError("no captures given.")
    return out


def _read(item):
    if _is_capture(item):
        return item
    cap = read_capture(item)
    if not cap.source:
        cap = replace(cap, source=str(item))
    return cap


def _label(cap) -> str:
    return cap.source or f"(in-memory capture of path {cap.path_id!r} at {cap.captured_at})"


def check_fits_model(cap, family, *, role: str = "capture") -> str | None:
    """Why ``cap`` cannot be scored by a model of ``family`` (None when it can)."""
    fp = (cap.extra or {}).get("family_fingerprint")
    if fp not in (None, "") and str(fp) != family.fingerprint:
        return (f"{role} {_label(cap)} was recorded for family fingerprint {fp} "
                f"({(cap.extra or {}).get('family', 'unnamed')}), but the model is for family {family.name} "
                f"(fingerprint {family.fingerprint}); score it with a model of its own family.")
    fs = float(cap.sample_rate_hz)
    want = family.acquisition.sample_rate_hz
    if not math.isfinite(fs) or abs(fs - want) > SAMPLE_RATE_TOLERANCE * want:
        return (f"{role} {_label(cap)} is sampled at {fs:g} Hz but the model's family {family.name} is "
                f"acquired at {want:g} Hz (tolerance {SAMPLE_RATE_TOLERANCE:.1%}); its features would not "
                "fit the model. Resample at the family's rate or use a model trained for this rate.")
    if not cap.path_id:
        return f"{role} {_label(cap)} has no path_id; set it in the capture header."
    return None


def _baselines(baselines, captures_arg, family) -> dict[str, list]:
    """Baselines by path_id, each checked against the model."""
    if baselines is None:
        # default: a "baselines" folder inside (or beside) the captures folder
        cand = None
        if isinstance(captures_arg, (str, os.PathLike)) and Path(captures_arg).is_dir():
            for d in (Path(captures_arg) / "baselines", Path(captures_arg).parent / "baselines"):
                if d.is_dir():
                    cand = d
                    break
        if cand is None:
            raise InputError(
                "no baselines given: pass --baselines DIR (captures of each path recorded when the metal was "
                "sound), or put them in a 'baselines' folder inside the captures folder."
            )
        baselines = cand
    by_path: dict[str, list] = {}
    for item in _items(baselines):
        b = _read(item)
        why = check_fits_model(b, family, role="baseline")
        if why:
            raise InputError(why)
        by_path.setdefault(b.path_id, []).append(b)
    return by_path


def _check_item(item, family, hashes_done: set, baseline_paths) -> tuple[str, str, str | None, bool]:
    """(content hash, path_id, refusal or None, already scored) for one capture."""

    cap = _read(item)
    why = check_fits_model(cap, family)
    if why is None and cap.path_id not in baseline_paths:
        why = (f"capture {_label(cap)} is from path {cap.path_id!r}, but no baseline is from that path "
               f"(baselines cover: {', '.join(sorted(map(repr, baseline_paths))) or 'none'}); a baseline from "
               "another path cannot be used. Add a baseline recorded on that path when the metal was sound.")
    h = capture_content_hash(cap)
    return h, cap.path_id, why, h in hashes_done


def _check_task(items, *, family, done, baseline_paths) -> list[tuple]:
    """Runner task: :func:`_check_item` for a chunk of captures."""
    return [_check_item(it, family, done, baseline_paths) for it in items]


def _score_chunk(bundle, items: Sequence, baselines_by_path: dict, limit_pct, batch_id: str) -> list[dict]:
    """Score one chunk; returns history rows (worker side: no database access)."""


    caps = [_read(it) for it in items]
    family = bundle.family
    bl = [b for pid in sorted({c.path_id for c in caps}) for b in baselines_by_path[pid]]
    feats = extract_feature_table(family, caps, bl, on_reject="nan")
    ok = np.isfinite(pd.to_numeric(feats["sample_rate_hz"], errors="coerce").to_numpy(float))
    pred = pd.DataFrame(index=feats.index, columns=list(_PREDICTION_COLUMNS), dtype=object)
    if ok.any():
        p = bundle.predict_frame(feats[ok], limit_pct=limit_pct)
        for c in _PREDICTION_COLUMNS:
            if c in p:
                pred.loc[ok, c] = p[c].to_numpy(object)
    now = pd.Timestamp.now(tz="UTC")
    num_cols = [c for c in feats.columns if c not in ("file", "path_id", "captured_at", "quality_flags",
                                                     "baseline_file") and pd.api.types.is_numeric_dtype(feats[c])]
    # whole columns to plain Python once (row-by-row pandas indexing cost more than the features)
    num = feats[num_cols].to_numpy(float)
    flags = (feats["quality_flags"].tolist() if "quality_flags" in feats else [""] * len(caps))
    pred_rows = pred.to_dict(orient="records")
    rows = []
    for i, cap in enumerate(caps):
        rec: dict[str, Any] = {
            "content_hash": capture_content_hash(cap),
            "model_version": str(bundle.version),
            "model_id": bundle.model_id,
            "family_name": family.name,
            "family_fingerprint": bundle.family_fingerprint,
            "file": cap.source or "",
            "path_id": cap.path_id,
            "captured_at": cap.captured_at,
            "temperature_c": cap.temperature_c,
            "quality_flags": flags[i],
            "limit_pct": limit_pct,
            "batch_id": batch_id,
        }
        if ok[i]:
            rec["status"] = "scored"
            rec.update(pred_rows[i])
            vals = {c: float(v) for c, v in zip(num_cols, num[i]) if np.isfinite(v)}
            rec["features_json"] = json.dumps(vals, separators=(",", ":"))
            future = _future_reason(cap.captured_at, now)
            if future:  # a clock error must not pass as the newest state of the structure
                rec["in_family"] = False
                rec["mismatch_reasons"] = "; ".join(x for x in (future, rec.get("mismatch_reasons")) if x)
        else:
            rec["status"] = "rejected"
            rec["in_family"] = False
            rec["mismatch_reasons"] = "rejected by the quality gate: " + str(flags[i])
        rows.append(rec)
    return rows


def _future_reason(captured_at, now: pd.Timestamp) -> str | None:
    """A mismatch reason when ``captured_at`` lies more than :data:`FUTURE_TOLERANCE_S` after ``now``."""
    if not captured_at:
        return None
    try:
        ts = pd.Timestamp(captured_at)
    except (ValueError, TypeError):
        return None
    ts = ts.tz_localize("UTC") if ts.tzinfo is None else ts.tz_convert("UTC")
    if ts <= now + pd.Timedelta(seconds=FUTURE_TOLERANCE_S):
        return None
    return (f"captured_at {captured_at} lies in the future (now {now.isoformat(timespec='minutes')}): check the "
            "acquisition unit's clock; the estimate is kept but not counted as in family")


def _chunks(seq: list, size: int) -> list[list]:
    return [seq[i:i + size] for i in range(0, len(seq), size)]


def _score_task(items, *, bundle, baselines_by_path, limit_pct, batch_id) -> list[dict]:
    """Runner task: score one chunk (the bundle and baselines are shared by every task)."""
    return _score_chunk(bundle, items, baselines_by_path, limit_pct, batch_id)


def _exceedance_for(stored, bundle, hist: History, limit_pct: float | None):
    """Stored rows with ``exceed_probability`` for the limit asked now, not the one they were scored with.

    The history keeps what was issued (append-only); a capture shown again for another limit gets
    the exceedance recomputed from its stored features, and ``limit_pct`` says which limit it is.
    """
    stored = stored.copy()
    old = pd.to_numeric(stored["limit_pct"], errors="coerce").to_numpy(float)
    want = np.nan if limit_pct is None else float(limit_pct)
    differs = ~((old == want) | (np.isnan(old) & np.isnan(want)))
    stored.loc[differs, "limit_pct"] = want
    stored.loc[differs, "exceed_probability"] = np.nan
    redo = differs & (stored["status"] == "scored").to_numpy() & np.isfinite(want)
    if redo.any():
        hashes = stored.loc[redo, "content_hash"]
        feats = hist.features(model_id=bundle.model_id, content_hashes=hashes).reindex(hashes)
        stored.loc[redo, "exceed_probability"] = bundle.exceedance(feats.reset_index(drop=True), want)
    return stored


def check_limit_pct(limit_pct, option: str = "limit_pct") -> float | None:
    """The exceedance limit as a float, 0 < L < 100 [% of nominal thickness], or None."""
    if limit_pct is None:
        return None
    lp = float(limit_pct)
    if not (math.isfinite(lp) and 0 < lp < 100):
        raise InputError(f"{option} must be a wall loss in percent of nominal thickness, 0 < L < 100; "
                         f"got {limit_pct!r}.")
    return lp


def score_captures(bundle, captures, *, baselines=None, limit_pct: float | None = None,
                   db_url: str | None = None, n_jobs: int = 1, scheduler=None,
                   chunk_size: int = DEFAULT_CHUNK, progress: bool = False,
                   tracking_uri: str | None = None):
    """Score captures into the history; returns one row per capture, in input order.

    Parameters
    ----------
    bundle : ModelBundle, bundle folder or registry name
    captures : folder, file, Capture, or a list of them
    baselines : folder, file, Capture or list, optional
        Baseline captures (sound metal) of every path; default: the ``baselines`` folder
        inside or beside the captures folder. Matched to captures by ``path_id``.
    limit_pct : float, optional
        Limit on the maximum wall loss [% of nominal] for ``exceed_probability``; default: the
        family file's ``[limits] wall_loss_limit_pct``, if it states one (else no exceedance).
    db_url : str, optional
        History database URL (default ``sqlite:///waneguide-history.db``).
    n_jobs : int
        joblib worker processes (1: in this process). With ``scheduler``, the number of
        local Dask workers for ``scheduler="local"``.
    scheduler : str or distributed.Client, optional
        A Dask scheduler address (``tcp://127.0.0.1:8786``), ``"local"``, or a Client.
    chunk_size : int
        Captures per task and per database transaction.
    progress : bool
        Show a tqdm bar (stderr).

    Returns
    -------
    DataFrame
        :data:`SCORE_OUTPUT_COLUMNS`, then ``content_hash, model_version, status,
        newly_scored, limit_pct, max_loss_mm...``.

    Raises
    ------
    ValueError
        A capture or baseline that cannot fit the model (family fingerprint, sample
        rate, missing path_id), a capture without a baseline of its path, a bundle that
        fails its integrity check, bad ``limit_pct``/``n_jobs``/``chunk_size``.
    """
    limit_pct = check_limit_pct(limit_pct, "limit_pct (--limit-pct)")
    n_jobs = check_n_jobs(n_jobs, "n_jobs (--jobs)")
    scheduler = check_scheduler(scheduler)
    if int(chunk_size) < 1:
        raise InputError(f"chunk_size must be a positive integer; got {chunk_size!r}.")
    bundle = load_model(bundle, tracking_uri=tracking_uri)
    if not bundle.model_id:
        raise InputError("the model bundle has no content id: it was never saved. Save it (ModelBundle.save) or "
                         "give its folder; the history keys every estimate by the saved bundle's id.")
    family = bundle.family
    if limit_pct is None:  # the family file may state the limit ([limits] wall_loss_limit_pct)
        limit_pct = family.limits.wall_loss_limit_pct
    items = _items(captures)
    by_path = _baselines(baselines, captures, family)
    hist = History(db_url)
    try:
        done = hist.scored_hashes(model_id=bundle.model_id)
        # the checks read every capture once (hash, family fit, baseline path): on the same workers
        check_chunks = _chunks(list(range(len(items))), max(int(chunk_size), 64))
        checked = dict(run_tasks(_check_task, {k: ([items[i] for i in idx],) for k, idx in enumerate(check_chunks)},
                                 n_jobs=n_jobs, scheduler=scheduler, progress=progress, desc="checking",
                                 unit="capture", weight=lambda k: len(check_chunks[k]),
                                 shared={"family": family, "done": done, "baseline_paths": frozenset(by_path)}))
        checks = [c for k in range(len(check_chunks)) for c in checked[k]]
        refusals = [c[2] for c in checks if c[2]]
        if refusals:
            more = f" (and {len(refusals) - 1} more)" if len(refusals) > 1 else ""
            raise InputError(f"refused: {refusals[0]}{more}; nothing was scored.")
        hashes = [c[0] for c in checks]
        todo_idx: list[int] = []
        seen: set[str] = set()
        for i, (h, _, _, was_done) in enumerate(checks):
            if not was_done and h not in seen:
                todo_idx.append(i)
                seen.add(h)
        batch_id = uuid.uuid4().hex[:12]
        chunks = _chunks([items[i] for i in todo_idx], int(chunk_size))
        new_hashes: set[str] = set()
        shared = {"bundle": bundle, "baselines_by_path": by_path, "limit_pct": limit_pct, "batch_id": batch_id}
        for _, rows in run_tasks(_score_task, {k: (ch,) for k, ch in enumerate(chunks)}, n_jobs=n_jobs,
                                 scheduler=scheduler, shared=shared, progress=progress, desc="scoring",
                                 unit="capture", weight=lambda k: len(chunks[k])):
            hist.add_scores(rows)
            new_hashes.update(r["content_hash"] for r in rows)
        stored = hist.scores(model_id=bundle.model_id, content_hashes=hashes)
        stored = _exceedance_for(stored, bundle, hist, limit_pct)
    finally:
        hist.close()
    stored = stored.drop_duplicates("content_hash").set_index("content_hash")
    out = stored.reindex(hashes).reset_index()
    # the file name of *this* run (a copy of an already scored capture keeps its own name here)
    out["file"] = [str(it) if not _is_capture(it) else (it.source or "") for it in items]
    out["newly_scored"] = [h in new_hashes for h in hashes]
    out["in_family"] = out["in_family"].astype("boolean")
    # a capture reading thicker than its baseline: its loss estimate is clipped to 0 %, never silently
    out["negative_apparent_loss"] = has_negative_loss(out["mismatch_reasons"])
    cols = list(SCORE_OUTPUT_COLUMNS) + [c for c in _EXTRA_COLUMNS if c not in SCORE_OUTPUT_COLUMNS]
    for c in cols:
        if c not in out:
            out[c] = np.nan
    return out[cols]


def write_scores_csv(df, path) -> Path:
    """Write the score table as CSV atomically (``--out``)."""

    with atomic_path(path) as tmp:
        df.to_csv(tmp, index=False, lineterminator="\n")
    return Path(path)


def format_scores(df, *, max_rows: int = 60) -> str:
    """The score table for the terminal (a few columns, rounded) with the caution."""

    view = df.copy()
    view["file"] = [Path(str(f)).name for f in view["file"]]
    band = [("n/a" if not (np.isfinite(lo) and np.isfinite(hi)) else f"[{lo:5.1f}, {hi:5.1f}]")
            for lo, hi in zip(view["max_loss_pct_lower"].astype(float), view["max_loss_pct_upper"].astype(float))]
    table = {
        "file": view["file"], "path": view["path_id"], "captured_at": view["captured_at"].astype(str).str[:19],
        "T_degC": view["temperature_c"].astype(float).round(1),
        "max_loss_%": view["max_loss_pct"].astype(float).round(1), "band_%": band,
        "mean_loss_%": view["mean_loss_pct"].astype(float).round(1),
        "P_exceed": view["exceed_probability"].astype(float).round(3),
        "in_family": view["in_family"].map({True: "yes", False: "NO"}).fillna("-"),
        "status": view["status"],
    }

    t = pd.DataFrame(table)
    text = t.head(max_rows).to_string(index=False, na_rep="-")
    if len(t) > max_rows:
        text += f"\n... {len(t) - max_rows} more rows (see --out)"
    n_new = int(view["newly_scored"].sum()) if "newly_scored" in view else len(view)
    n_oof = int((view["in_family"] == False).sum())  # noqa: E712
    lines = [text, "", f"{len(view)} capture(s): {n_new} newly scored, {len(view) - n_new} already in the history; "
                       f"{n_oof} flagged out of family or rejected (their estimates are not to be used)."]
    reasons = view.loc[view["in_family"] == False, ["file", "mismatch_reasons"]].head(10)  # noqa: E712
    for f, r in reasons.itertuples(index=False):
        lines.append(f"  {f}: {r}")
    lines.append(CAUTION)
    return "\n".join(lines)
