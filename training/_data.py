"""Training data from files: the family, a campaign's feature table (cached) and measured cases.

The feature cache lives in the model store (``<store>/.cache/``). Its key is a SHA-256 over
everything the table depends on: the campaign's fingerprint, the family's fingerprint, the
feature schema version and the extractor's settings (every keyword of
:class:`~waneguide.features.extractor.FeatureExtractor`). Changing any of them misses the
cache; a key that cannot be formed (a setting the extractor does not expose) bypasses it.
"""
from __future__ import annotations

import hashlib
import inspect
import json
import logging
from pathlib import Path

import numpy as np
import pandas as pd
from tqdm.auto import tqdm

from waneguide.core.atomic import atomic_path
from waneguide.core.errors import InputError, MissingInputError
from waneguide.features.extractor import FeatureExtractor
from waneguide.features.family import Family, load_family
from waneguide.features.io import read_capture
from waneguide.features.schema import FEATURE_SCHEMA_VERSION
from waneguide.models.bundle import TARGETS

__all__ = ["campaign_features", "cached_campaign_features", "extractor_settings", "feature_cache_key",
           "load_family_and_text", "read_measured"]

log = logging.getLogger(__name__)

#: How the campaign's feature table treats a case the quality gate rejects (a row of NaN).
_ON_REJECT = "nan"


def load_family_and_text(family) -> tuple[Family, str | None]:
    """(Family, its TOML text) from a Family or the path of a family TOML (text None for a Family)."""
    if isinstance(family, Family):
        return family, None
    p = Path(family)
    return load_family(p), p.read_text()


def campaign_features(family, campaign, *, progress: bool = True, n_jobs: int = 1,
                      extractor: FeatureExtractor | None = None) -> pd.DataFrame:
    """Feature table of every case of ``campaign`` (extractor array path, chunk by chunk).

    ``extractor``: the extractor to use (default ``FeatureExtractor(family)``).
    """
    ex = extractor if extractor is not None else FeatureExtractor(family)
    parts = []
    n_chunks = len(campaign.manifest.get("chunks", [])) or None
    for cases, waves, bases in tqdm(campaign.iter_chunks(), total=n_chunks, desc="features", disable=not progress):
        parts.append(ex.extract_batch(
            waves, bases, temperature_c=cases["temperature_c"].to_numpy(dtype=float),
            baseline_temperature_c=cases["baseline_temperature_c"].to_numpy(dtype=float), n_jobs=n_jobs,
            sample_rate_hz=campaign.sample_rate_hz, pretrigger_s=campaign.pretrigger_s,
            path_id=cases["specimen_id"].astype(str).to_numpy(), on_reject=_ON_REJECT))
    return pd.concat(parts, ignore_index=True)


def extractor_settings(extractor: FeatureExtractor) -> dict | None:
    """Every keyword setting of ``extractor`` as plain values, or None when one cannot be read.

    The settings are the keyword-only parameters of the extractor's ``__init__``, read back
    from the attributes of the same name (the scikit-learn convention).
    """
    out = {}
    for name, p in inspect.signature(type(extractor).__init__).parameters.items():
        if p.kind is not inspect.Parameter.KEYWORD_ONLY:
            continue
        if not hasattr(extractor, name):
            return None
        value = getattr(extractor, name)
        out[name] = list(value) if isinstance(value, tuple) else value
    return out


def feature_cache_key(extractor: FeatureExtractor, campaign) -> str | None:
    """Cache key of the feature table of ``campaign`` extracted by ``extractor`` (None: do not cache)."""
    settings = extractor_settings(extractor)
    if settings is None:
        return None
    payload = {"campaign_fingerprint": campaign.fingerprint, "family_fingerprint": extractor.family.fingerprint,
               "feature_schema_version": FEATURE_SCHEMA_VERSION, "extractor": settings, "on_reject": _ON_REJECT}
    try:
        text = json.dumps(payload, sort_keys=True, allow_nan=False)
    except (TypeError, ValueError):
        return None
    return hashlib.sha256(text.encode()).hexdigest()[:24]


def cached_campaign_features(extractor: FeatureExtractor, campaign, cache_dir: Path, *, progress: bool,
                             n_jobs: int) -> pd.DataFrame:
    """:func:`campaign_features`, read from / written to ``cache_dir`` under :func:`feature_cache_key`."""
    key = feature_cache_key(extractor, campaign)
    if key is None:
        log.info("feature cache bypassed: the extractor's settings cannot be read back")
        return campaign_features(extractor.family, campaign, progress=progress, n_jobs=n_jobs, extractor=extractor)
    f = Path(cache_dir) / f"features_{key}.parquet"
    if f.is_file():
        df = pd.read_parquet(f)
        if len(df) == len(campaign.cases):
            return df
    df = campaign_features(extractor.family, campaign, progress=progress, n_jobs=n_jobs, extractor=extractor)
    with atomic_path(f, suffix=".parquet.part") as tmp:
        df.to_parquet(tmp, index=False)
    return df


def _measured_table(csv_path: Path) -> tuple[pd.DataFrame, list[str]]:
    """The measured-cases CSV with its target columns checked and made numeric."""
    if not csv_path.exists():
        raise MissingInputError(f"measured CSV {str(csv_path)!r} does not exist; give the CSV of measured cases "
                                "(--measured)")
    if not csv_path.is_file():
        raise InputError(f"measured CSV {str(csv_path)!r} is not a file (it is a folder); give the CSV of measured "
                         "cases (--measured)")
    try:
        tab = pd.read_csv(csv_path)
    except (pd.errors.EmptyDataError, pd.errors.ParserError, UnicodeDecodeError) as exc:
        raise InputError(f"{csv_path}: not a readable measured-cases CSV ({str(exc).strip().splitlines()[0]}); "
                         "expected a header line with 'file' and target columns") from None
    if "file" not in tab.columns:
        raise InputError(f"{csv_path}: needs a 'file' column (capture path relative to the CSV); "
                         f"got columns {list(tab.columns)}")
    tcols = [t for t in TARGETS if t in tab.columns]
    if not tcols:
        raise InputError(f"{csv_path}: needs at least one target column of {list(TARGETS)}; got {list(tab.columns)}")
    for t in tcols:  # blank = not measured; anything else must be a loss in range
        raw = tab[t]
        num = pd.to_numeric(raw, errors="coerce")
        upper = 100.0 if t.endswith("_pct") else np.inf
        bad = (raw.notna() & num.isna()) | ~(num.isna() | ((num >= 0) & (num < upper)))
        if bad.any():
            i = int(np.flatnonzero(bad.to_numpy())[0])
            rule = "a wall loss from 0 to below 100 [% of nominal]" if upper == 100.0 else "a wall loss >= 0 [mm]"
            raise InputError(f"{csv_path}: row {i + 2}, column {t}: must be {rule} (or blank when not measured); "
                             f"got {str(raw.iloc[i])!r}")
        tab[t] = num
    return tab, tcols


def _confined(csv_path: Path, root: Path, name, i: int, column: str) -> Path:
    """``root / name``, refused when it leaves the CSV's folder (``../``, an absolute path, a link out).

    The file's name is not echoed from anywhere but the CSV itself; the content of a file outside
    the folder is never read.
    """
    target = (root / str(name)).resolve()
    if not target.is_relative_to(root.resolve()):
        raise InputError(f"{csv_path}: row {i + 2}, column {column}: {str(name)[:200]!r} lies outside the CSV's "
                         f"folder {str(root)!r}; list captures by paths inside that folder")
    return target


def read_measured(csv_path, family) -> tuple[pd.DataFrame, pd.DataFrame, np.ndarray]:
    """Features, targets and groups (path) of measured cases listed in a CSV.

    Columns: ``file`` (capture, relative to the CSV), target columns (any of ``max_loss_pct,
    max_loss_mm, mean_loss_pct``), optional ``path_id`` (else the capture's own) and optional
    ``baseline`` (baseline capture per row). Without ``baseline``, the rows of a path whose
    targets are all zero serve as that path's baselines (and are not used as cases).
    Row numbers in messages are file lines (the header is line 1).
    """
    csv_path = Path(csv_path)
    tab, tcols = _measured_table(csv_path)
    root = csv_path.parent
    caps = [read_capture(_confined(csv_path, root, f, i, "file")) for i, f in enumerate(tab["file"])]
    paths = (tab["path_id"].astype(str).tolist() if "path_id" in tab.columns
             else [c.path_id or f"row{i}" for i, c in enumerate(caps)])
    ex = FeatureExtractor(family)
    rows, keep = [], []
    if "baseline" in tab.columns:
        for i, c in enumerate(caps):
            rows.append(ex.extract(c, read_capture(_confined(csv_path, root, tab["baseline"].iloc[i], i, "baseline"))))
            keep.append(i)
    else:
        zero = (tab[tcols].fillna(-1) == 0).all(axis=1).to_numpy()
        base: dict[str, list] = {}
        for i in np.flatnonzero(zero):
            base.setdefault(paths[i], []).append(caps[i])
        for i, c in enumerate(caps):
            if zero[i]:
                continue
            if paths[i] not in base:
                raise InputError(f"{csv_path}: row {i + 2} (path {paths[i]!r}) has no baseline: add a 'baseline' "
                                 f"column or a row of that path with zero loss")
            rows.append(ex.extract(c, base[paths[i]]))
            keep.append(i)
    if not rows:
        raise InputError(f"{csv_path}: no measured cases left after taking out the baselines; add rows with a "
                         "non-zero loss")
    feats = pd.DataFrame(rows)
    feats["path_id"] = [paths[i] for i in keep]
    return feats, tab.iloc[keep][tcols].reset_index(drop=True), np.asarray([paths[i] for i in keep])
