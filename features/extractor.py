"""The feature extractor: a capture and its baseline in, one documented feature row out.

Two doors, one computation. :meth:`FeatureExtractor.extract` takes a
:class:`~features.capture.Capture` and its baseline(s) (several temperatures
allowed: the optimal baseline is chosen first); :meth:`FeatureExtractor.extract_batch`
takes whole arrays of a campaign chunk. Both run the same vectorised core on rows,
so the same data give the same values (tests/test_extractor.py checks it).

This module is the orchestration: quality gate, baseline matching and selection, blocks
of rows (serial or joblib), the table. The arithmetic is in :mod:`features._extract_plan`
(what is precomputed per record layout: gates, FFT sizes, bands, compensation operators)
and :mod:`features._extract_core` (one step per feature group: per mode (S0, A0) the
window of :func:`features.windows.mode_windows` is gated and transformed once, then the
arrival estimators (:mod:`features.arrivals`), the energy and transmission ratios, the
Wilcox compensation for a grid of candidate thicknesses
(:class:`features.compensation.CompensationOperator`); then the baseline stretch and the
thermal model (:mod:`features.temperature`) give the temperature features and the
differential ones). Column names, units, meanings and groups: :mod:`features.schema`.
"""
from __future__ import annotations

import math
import time
from typing import Iterable, Sequence

import numpy as np
import pandas as pd

from waneguide.core.atomic import check_output_path
from waneguide.core.errors import InputError
from waneguide.core.runner import check_n_jobs, run_tasks
from waneguide.features._extract_core import GROUPS, compute_features
from waneguide.features._extract_plan import Plan, build_plan
from waneguide.features.capture import Capture
from waneguide.features.family import Family, load_family
from waneguide.features.io import read_captures
from waneguide.features.quality import CaptureRejected, QualityReport, assess_quality, assess_quality_arrays
from waneguide.features.schema import FEATURE_SCHEMA_VERSION, METADATA_COLUMNS, feature_columns, write_feature_table
from waneguide.features.temperature import ThermalModel, select_baseline
from waneguide.features.windows import mode_windows

__all__ = ["FeatureExtractor", "extract_feature_table", "build_feature_file", "FEATURE_GROUPS"]

#: Feature groups (features.schema), each computed in one step; timings are reported per group.
FEATURE_GROUPS = tuple(GROUPS)
_BLOCK_ROWS = 128


class FeatureExtractor:
    """Physics features of captures against their baselines, for one family.

    Parameters
    ----------
    family : Family
    threshold_fraction : float, default 0.5
        Fraction of the packet maximum for the threshold-crossing arrival.
    thickness_grid : (lo, hi, step), default (0.5, 1.15, 0.025)
        Candidate thicknesses for the sharpest-thickness search, as fractions of nominal.

    Notes
    -----
    The time axis has t = 0 at the trigger, taken as the start of the excitation burst;
    the burst centre is at cycles / (2 f0).
    """

    def __init__(self, family: Family, *, threshold_fraction: float = 0.5,
                 thickness_grid: tuple[float, float, float] = (0.5, 1.15, 0.025)):
        if not isinstance(family, Family):
            raise TypeError(f"family must be a Family (features.family.load_family); got {type(family).__name__}.")
        self.family = family
        self.threshold_fraction = float(threshold_fraction)
        self.thickness_grid = tuple(float(v) for v in thickness_grid)
        self.thermal = ThermalModel(family)
        self.windows = mode_windows(family)
        self._plans: dict[tuple, Plan] = {}

    # ------------------------------------------------------------------ plans
    def _plan(self, sample_rate_hz: float, pretrigger_s: float, n_samples: int) -> Plan:
        key = (float(sample_rate_hz), float(pretrigger_s), int(n_samples))
        if key not in self._plans:
            self._plans[key] = build_plan(self.family, self.windows, self.thermal, *key,
                                          thickness_grid=self.thickness_grid)
        return self._plans[key]

    # ------------------------------------------------------------------ core
    def _core(self, plan: Plan, W: np.ndarray, B: np.ndarray, T: np.ndarray, Tb: np.ndarray,
              timings: dict | None = None) -> dict[str, np.ndarray]:
        """All core feature columns for rows of capture ``W`` and baseline ``B`` (same plan)."""
        return compute_features(plan, self.thermal, W, B, T, Tb, threshold_fraction=self.threshold_fraction,
                                timings=timings)

    def _run_core(self, plan, W, B, T, Tb, n_jobs=1, timings=None):
        n_rows = W.shape[0]
        blocks = [slice(s, min(s + _BLOCK_ROWS, n_rows)) for s in range(0, n_rows, _BLOCK_ROWS)]
        # numpy blocks release the GIL: threads, through the project's one runner
        tasks = {i: (plan, W[s], B[s], T[s], Tb[s]) for i, s in enumerate(blocks)}
        res = dict(run_tasks(_core_job, tasks, n_jobs=n_jobs, shared={"extractor": self}, prefer="threads"))
        parts = [res[i][0] for i in range(len(blocks))]
        if timings is not None:
            for i in range(len(blocks)):
                for k, v in res[i][1].items():
                    timings[k] = timings.get(k, 0.0) + v
        return {k: np.concatenate([p[k] for p in parts]) for k in parts[0]}

    # ------------------------------------------------------------------ batch door
    def extract_batch(
        self,
        waveforms_v: np.ndarray,
        baselines_v: np.ndarray,
        *,
        temperature_c,
        baseline_temperature_c,
        n_jobs: int = 1,
        sample_rate_hz: float | None = None,
        pretrigger_s: float | None = None,
        path_id=None,
        captured_at=None,
        file=None,
        on_reject: str = "raise",
        timings: dict | None = None,
    ) -> pd.DataFrame:
        """Feature table of a chunk: row i is ``waveforms_v[i]`` against ``baselines_v[i]``.

        Parameters
        ----------
        waveforms_v, baselines_v : array, shape (n, N) or baselines (N,)
            Captures and their baselines [V] (float32 accepted; computed in float64).
        temperature_c, baseline_temperature_c : float or array (n,)
            Capture and baseline temperatures [degC].
        n_jobs : int
            joblib workers over blocks of 128 rows.
        sample_rate_hz, pretrigger_s : float, optional
            Default: the family's acquisition settings.
        path_id, captured_at, file : scalar or sequence, optional
            Metadata columns.
        on_reject : {"raise", "nan"}
            A row failing a fatal quality check raises :class:`CaptureRejected`, or gets
            NaN features and its flags in ``quality_flags``.
        timings : dict, optional
            Filled with seconds per feature group (for the benchmark).
        """
        if on_reject not in ("raise", "nan"):
            raise InputError(f"on_reject must be 'raise' or 'nan'; got {on_reject!r}.")
        W = np.atleast_2d(np.asarray(waveforms_v, dtype=np.float64))
        B = np.asarray(baselines_v, dtype=np.float64)
        if B.ndim == 1:
            B = np.broadcast_to(B, W.shape)
        if B.shape != W.shape:
            raise ValueError(f"baselines_v must have the shape of waveforms_v {W.shape} or one row; got {B.shape}.")
        n_rows = W.shape[0]
        T = np.broadcast_to(np.asarray(temperature_c, dtype=float), (n_rows,)).copy()
        Tb = np.broadcast_to(np.asarray(baseline_temperature_c, dtype=float), (n_rows,)).copy()
        acq = self.family.acquisition
        fs = acq.sample_rate_hz if sample_rate_hz is None else float(sample_rate_hz)
        pre = acq.pretrigger_s if pretrigger_s is None else float(pretrigger_s)
        tm = timings if timings is not None else {}
        t0 = time.perf_counter()
        names = None if file is None else np.broadcast_to(np.asarray(file, dtype=object), (n_rows,))
        reps = assess_quality_arrays(W, self.family, sample_rate_hz=fs, pretrigger_s=pre, temperature_c=T,
                                     sources=names if names is not None else [f"row {i}" for i in range(n_rows)])
        breps = assess_quality_arrays(B, self.family, sample_rate_hz=fs, pretrigger_s=pre, temperature_c=Tb,
                                      sources=[f"baseline of row {i}" for i in range(n_rows)])
        tm["quality"] = tm.get("quality", 0.0) + time.perf_counter() - t0
        bad = np.array([r.fatal or b.fatal for r, b in zip(reps, breps)])
        if bad.any() and on_reject == "raise":
            i = int(np.flatnonzero(bad)[0])
            (reps[i] if reps[i].fatal else breps[i]).raise_if_fatal()
        good = np.flatnonzero(~bad)
        cols = feature_columns()
        feats = {c: np.full(n_rows, np.nan) for c in cols}
        if good.size:
            plan = self._plan(fs, pre, W.shape[1])
            sub = good if bad.any() else slice(None)
            vals = self._run_core(plan, W[sub], B[sub], T[sub], Tb[sub], n_jobs=n_jobs, timings=tm)
            for c in cols:
                if c in vals:
                    feats[c][sub] = vals[c]
            feats["n_baselines"][sub] = 1.0
        snr = np.array([r.snr_db for r in reps])
        feats["snr_db"] = snr
        flags = [";".join(r.flags + [f"baseline_{f}" for f in b.flags]) for r, b in zip(reps, breps)]
        meta = {
            "file": _column(file, n_rows, ""),
            "path_id": _column(path_id, n_rows, ""),
            "captured_at": _column(captured_at, n_rows, None),
            "temperature_c": T,
            "quality_flags": flags,
            "baseline_file": _column(None, n_rows, ""),
        }
        return self._frame(meta, feats)

    def _frame(self, meta: dict, feats: dict) -> pd.DataFrame:
        df = pd.DataFrame({**{k: meta[k] for k in METADATA_COLUMNS}, **{c: feats[c] for c in feature_columns()}})
        df.attrs.update(
            feature_schema_version=FEATURE_SCHEMA_VERSION,
            family=self.family.name,
            family_fingerprint=self.family.fingerprint,
        )
        return df

    # ------------------------------------------------------------------ capture door
    def _check_pair(self, capture: Capture, baseline: Capture) -> None:
        if baseline.path_id != capture.path_id:
            raise InputError(
                f"baseline {baseline.source or '(in memory)'} is from path {baseline.path_id!r} but capture "
                f"{capture.source or '(in memory)'} is from path {capture.path_id!r}; a baseline must come from "
                "the same transducer path. Give baselines recorded on that path."
            )
        # equal within rounding: a CSV without a sample_rate_hz header gets its rate from the time
        # column (features.io.csv_format), which differs from the header value in the last digits
        fs = baseline.sample_rate_hz
        if not math.isclose(fs, capture.sample_rate_hz, rel_tol=1e-6) or baseline.n_samples != capture.n_samples \
                or abs(baseline.pretrigger_s - capture.pretrigger_s) > 1e-2 / fs:
            raise InputError(
                f"baseline {baseline.source or '(in memory)'} ({baseline.n_samples} samples at "
                f"{baseline.sample_rate_hz:g} Hz, pretrigger {baseline.pretrigger_s:g} s) does not match capture "
                f"{capture.source or '(in memory)'} ({capture.n_samples} samples at {capture.sample_rate_hz:g} Hz, "
                f"pretrigger {capture.pretrigger_s:g} s); record both with the same settings."
            )

    def _prepare(self, capture: Capture, baselines) -> tuple[Capture, QualityReport, int]:
        """Quality gate, path check and optimal baseline selection for one capture."""
        if isinstance(baselines, Capture):
            baselines = [baselines]
        baselines = list(baselines)
        if not baselines:
            raise InputError(
                f"no baseline for capture {capture.source or '(in memory)'} on path {capture.path_id!r}; "
                "give at least one baseline recorded on that path."
            )
        rep = assess_quality(capture, self.family)
        rep.raise_if_fatal()
        for b in baselines:
            self._check_pair(capture, b)
            brep = assess_quality(b, self.family)
            if brep.fatal:
                raise CaptureRejected(f"baseline {b.source or '(in memory)'}: rejected: " + " ".join(
                    m for f, m in zip(brep.flags, brep.messages) if f in brep.fatal_flags), brep)
        if len(baselines) == 1:
            return baselines[0], rep, 1
        plan = self._plan(capture.sample_rate_hz, capture.pretrigger_s, capture.n_samples)
        temps = [np.nan if b.temperature_c is None else b.temperature_c for b in baselines]
        idx, _ = select_baseline(
            capture.amplitude_v, np.stack([b.amplitude_v for b in baselines]), temps, capture.temperature_c,
            sample_rate_hz=plan.sample_rate_hz, pretrigger_s=plan.pretrigger_s, start=plan.sig_start,
            stop=plan.sig_stop, max_stretch=plan.max_stretch, origin_s=plan.burst_centre_s, stride=plan.stride,
        )
        return baselines[idx], rep, len(baselines)

    def extract(self, capture: Capture, baselines: Capture | Sequence[Capture]) -> dict:
        """One feature row (dict: metadata columns then :func:`~features.schema.feature_columns`).

        Raises
        ------
        CaptureRejected
            When the capture or a baseline fails a fatal quality check.
        InputError
            When a baseline is from another path or recorded with other settings.
        """
        return self._extract_many([capture], [baselines]).iloc[0].to_dict()

    def _extract_many(self, captures: Sequence[Capture], baselines_per_capture: Sequence, *, n_jobs: int = 1,
                      on_reject: str = "raise", timings: dict | None = None) -> pd.DataFrame:
        chosen, reports, counts, keep = [], [], [], []
        for c, bl in zip(captures, baselines_per_capture):
            try:
                b, rep, nb = self._prepare(c, bl)
            except CaptureRejected as exc:
                if on_reject == "raise":
                    raise
                chosen.append(None)
                reports.append(exc.report or QualityReport(flags=["rejected"], messages=[str(exc)]))
                counts.append(np.nan)
                keep.append(False)
                continue
            chosen.append(b)
            reports.append(rep)
            counts.append(float(nb))
            keep.append(True)
        n_rows = len(captures)
        cols = feature_columns()
        feats = {c: np.full(n_rows, np.nan) for c in cols}
        groups: dict[tuple, list[int]] = {}
        for i, c in enumerate(captures):
            if keep[i]:
                groups.setdefault((c.sample_rate_hz, c.pretrigger_s, c.n_samples), []).append(i)
        for key, rows in groups.items():
            plan = self._plan(*key)
            W = np.stack([np.asarray(captures[i].amplitude_v, dtype=np.float64) for i in rows])
            B = np.stack([np.asarray(chosen[i].amplitude_v, dtype=np.float64) for i in rows])
            T = np.array([captures[i].temperature_c for i in rows], dtype=float)
            Tb = np.array([np.nan if chosen[i].temperature_c is None else chosen[i].temperature_c for i in rows])
            vals = self._run_core(plan, W, B, T, Tb, n_jobs=n_jobs, timings=timings)
            for c in cols:
                if c in vals:
                    feats[c][rows] = vals[c]
        feats["n_baselines"] = np.asarray(counts, dtype=float)
        feats["snr_db"] = np.array([r.snr_db for r in reports])
        meta = {
            "file": [c.source or "" for c in captures],
            "path_id": [c.path_id for c in captures],
            "captured_at": [c.captured_at for c in captures],
            "temperature_c": np.array([np.nan if c.temperature_c is None else c.temperature_c for c in captures]),
            "quality_flags": [r.flags_text() for r in reports],
            "baseline_file": ["" if b is None else (b.source or "") for b in chosen],
        }
        return self._frame(meta, feats)


def _core_job(plan, W, B, T, Tb, *, extractor):
    tm: dict = {}
    return extractor._core(plan, W, B, T, Tb, tm), tm


def _column(value, n, default):
    if value is None:
        return [default] * n
    if isinstance(value, (str, bytes)) or np.ndim(value) == 0:
        return [value] * n
    vals = list(value)
    if len(vals) != n:
        raise ValueError(f"metadata sequence has {len(vals)} entries for {n} rows.")
    return vals


#: Default-settings extractors by family fingerprint, so that a batch scored chunk by chunk builds
#: each plan (windows, dispersion tables, gauge) once per process, not once per chunk.
_SHARED: dict[str, FeatureExtractor] = {}
_SHARED_MAX = 8


def shared_extractor(family: Family) -> FeatureExtractor:
    """The process-wide :class:`FeatureExtractor` with default settings for ``family`` (plans cached)."""
    key = family.fingerprint
    ex = _SHARED.get(key)
    if ex is None:
        if len(_SHARED) >= _SHARED_MAX:
            _SHARED.pop(next(iter(_SHARED)))
        ex = _SHARED[key] = FeatureExtractor(family)
    return ex


def extract_feature_table(
    family: Family,
    captures: Iterable[Capture],
    baselines: Iterable[Capture],
    n_jobs: int = 1,
    *,
    on_reject: str = "raise",
    progress: bool = False,
) -> pd.DataFrame:
    """Feature table of captures, each matched to the baselines of its path (by ``path_id``).

    Several baselines per path are allowed (optimal baseline selection picks one per
    capture). A capture whose path has no baseline is refused with a message that
    lists the paths the baselines cover.
    """
    if on_reject not in ("raise", "skip", "nan"):
        raise InputError(f"on_reject must be 'raise', 'skip' or 'nan'; got {on_reject!r}.")
    captures = list(captures)
    if not captures:
        raise InputError("no captures given: name at least one capture file or folder.")
    by_path: dict[str, list[Capture]] = {}
    for b in baselines:
        by_path.setdefault(b.path_id, []).append(b)
    per = []
    for c in captures:
        if c.path_id not in by_path:
            raise InputError(
                f"capture {c.source or '(in memory)'} is from path {c.path_id!r}, but no baseline is from that "
                f"path (baselines cover: {', '.join(sorted(map(repr, by_path))) or 'none'}). Add a baseline "
                "recorded on that path when the metal was sound."
            )
        per.append(by_path[c.path_id])
    ex = shared_extractor(family)
    df = ex._extract_many(captures, per, n_jobs=n_jobs, on_reject="raise" if on_reject == "raise" else "nan")
    if on_reject == "skip":
        attrs = dict(df.attrs)
        df = df[np.isfinite(df["sample_rate_hz"].to_numpy())].reset_index(drop=True)
        df.attrs.update(attrs)
    return df


def build_feature_file(family_path, captures, baselines, out_path, *, n_jobs: int = 1,
                       on_reject: str = "raise") -> pd.DataFrame:
    """Library side of ``waneguide features``: read, extract, write Parquet atomically."""
    n_jobs = check_n_jobs(n_jobs)
    check_output_path(out_path, "feature table (--out)")
    family = load_family(family_path)
    caps = read_captures(captures)
    bases = read_captures(baselines)
    df = extract_feature_table(family, caps, bases, n_jobs=n_jobs, on_reject=on_reject)
    df.attrs["n_rejected"] = len(caps) - len(df)
    write_feature_table(df, out_path)
    return df
