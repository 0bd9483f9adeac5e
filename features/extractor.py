"""The feature extractor: a capture and its baseline in, one documented feature row out.

Two doors, one computation. :meth:`FeatureExtractor.extract` takes a
:class:`~features.capture.Capture` and its baseline(s) (several temperatures
allowed: the optimal baseline is chosen first); :meth:`FeatureExtractor.extract_batch`
takes whole arrays of a campaign chunk. Both run the same vectorised core on rows,
so the same data give the same values (tests/test_extractor.py checks it).

Per mode (S0, A0) the core gates the mode window (:func:`features.signals.mode_windows`),
takes one FFT of the gated capture and baseline, and from those spectra computes the
arrival estimators (:mod:`features.arrivals`), the energy and transmission ratios, and
the Wilcox compensation for a grid of candidate thicknesses
(:class:`features.compensation.CompensationOperator`); then the baseline stretch and the
thermal model (:mod:`features.temperature`) give the temperature features and the
differential ones. Column names, units and meanings: :mod:`features.schema`.
"""
from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Iterable, Sequence

import numpy as np
import pandas as pd
import scipy.fft as sfft

from waneguide.features.arrivals import envelope_peak_index, phase_delay_from_dft, threshold_crossing_index, xcorr_delay_from_spectra
from waneguide.features.capture import Capture
from waneguide.features.compensation import CompensationOperator, candidate_thicknesses, measure_packets
from waneguide.features.dispersion import fundamental_dispersion
from waneguide.features.family import Family
from waneguide.features.quality import CaptureRejected, QualityReport, assess_quality, assess_quality_arrays
from waneguide.features.schema import FEATURE_SCHEMA_VERSION, METADATA_COLUMNS, feature_columns
from waneguide.features.signals import decimated_analytic, excitation_band_hz, mode_windows, parabolic_peak, tukey_gate
from waneguide.features.temperature import ThermalModel, baseline_stretch, select_baseline
from waneguide.features.thickness_gauge import BaselineThicknessGauge

__all__ = ["FeatureExtractor", "extract_feature_table", "build_feature_file", "FEATURE_GROUPS"]

#: Groups reported by the benchmark (share of time per group).
FEATURE_GROUPS = ("quality", "arrivals", "energy", "compensation", "temperature", "physics_check")
_MODES = ("S0", "A0")
_BLOCK_ROWS = 128
_COMP_POINTS = 128
_TAPER_FRACTION = 0.1


@dataclass
class _ModePlan:
    mode: str
    start: int
    stop: int
    gate: np.ndarray
    n_fft: int
    band_bins: np.ndarray
    sub_bands: tuple[np.ndarray, np.ndarray, np.ndarray]
    dft: np.ndarray
    max_lag: int
    operator: CompensationOperator
    vg_candidates: np.ndarray
    step_m: float


@dataclass
class _Plan:
    sample_rate_hz: float
    pretrigger_s: float
    n_samples: int
    modes: dict[str, _ModePlan]
    sig_start: int
    sig_stop: int
    sig_gate: np.ndarray
    sig_n_fft: int
    max_stretch: float
    burst_centre_s: float
    peak_half_width: int
    edge_half_width: int
    stride: int
    a0_gauge: BaselineThicknessGauge | None = None


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
        self._plans: dict[tuple, _Plan] = {}
        self._r = self.thermal.a0_over_s0_ratio
        self._s0_coeff = self.thermal.relative_coefficient_per_k("S0")

    # ------------------------------------------------------------------ plans
    def _plan(self, sample_rate_hz: float, pretrigger_s: float, n_samples: int) -> _Plan:
        key = (float(sample_rate_hz), float(pretrigger_s), int(n_samples))
        if key not in self._plans:
            self._plans[key] = self._build_plan(*key)
        return self._plans[key]

    def _build_plan(self, fs: float, pre: float, n: int) -> _Plan:
        fam = self.family
        f0 = fam.excitation.centre_frequency_hz
        cycles = fam.excitation.cycles
        lo, hi = excitation_band_hz(fam)
        mat = fam.build_material()
        cand, j_nom = candidate_thicknesses(fam.nominal_thickness_m, *self.thickness_grid)
        burst_centre = cycles / (2.0 * f0)
        # envelope decimation D: the analytic signal is evaluated every D samples by folding
        # its spectrum below fs / D (exact for content below fs / D; D keeps fs / D >= 8 f0)
        stride = max(1, int(fs / (8.0 * f0)))
        modes: dict[str, _ModePlan] = {}
        for mode in _MODES:
            w = self.windows[mode]
            i0, i1 = w.indices(fs, pre, n)
            length = i1 - i0
            if length < 16:
                raise ValueError(
                    f"the {mode} window ({w.start_s * 1e6:.1f} to {w.stop_s * 1e6:.1f} us) holds only {length} "
                    f"samples of a {n}-sample record at {fs:g} Hz; the record is too short for family {fam.name!r}."
                )
            gate = tukey_gate(length, 0, length, taper_samples=int(_TAPER_FRACTION * length))
            n_fft = stride * sfft.next_fast_len(-(-2 * length // stride), real=True)
            f_bins = np.arange(n_fft // 2 + 1) * fs / n_fft
            band = np.flatnonzero((f_bins >= lo) & (f_bins <= hi))
            half = 1.0 / cycles
            subs = tuple(
                np.flatnonzero((f_bins >= f0 * (1 + a * half)) & (f_bins < f0 * (1 + b * half)))
                for a, b in ((-1.5, -0.5), (-0.5, 0.5), (0.5, 1.5))
            )
            t_seg0 = i0 / fs - pre
            dft = np.exp(-2j * np.pi * (f0 / fs) * (i0 + np.arange(length)))
            curves = fundamental_dispersion(mat, cand, np.r_[f_bins[band], f0])
            m = curves.mode_index(mode)
            k = curves.wavenumber_rad_m[:, m, :-1]
            vg = curves.group_velocity_m_s[:, m, -1]
            x = vg[j_nom] * (np.linspace(w.start_s, w.stop_s, _COMP_POINTS) - burst_centre)
            op = CompensationOperator.build(
                band_frequency_hz=f_bins[band], wavenumber_rad_m=k, thickness_m=cand, distance_m=x,
                path_m=fam.path.spacing_m, segment_start_s=t_seg0, burst_centre_s=burst_centre,
                nominal_index=j_nom,
            )
            modes[mode] = _ModePlan(
                mode, i0, i1, gate, n_fft, band, subs, dft, max(1, length // 2), op, vg,
                float(cand[1] - cand[0]),
            )
        s0, a0 = modes["S0"], modes["A0"]
        f_a0 = np.arange(a0.n_fft // 2 + 1) * fs / a0.n_fft
        gauge = BaselineThicknessGauge(fam, self.thermal, f_a0[a0.band_bins], a0.start / fs - pre)
        sig_start, sig_stop = s0.start, max(s0.stop, a0.stop)
        sig_len = sig_stop - sig_start
        sig_gate = tukey_gate(sig_len, 0, sig_len, taper_samples=int(_TAPER_FRACTION * sig_len / 2))
        env = fam.environment
        max_stretch = 1.25 * abs(self._s0_coeff) * (env.max_temperature_c - env.min_temperature_c)
        burst_samples = cycles / f0 * fs
        return _Plan(fs, pre, n, modes, sig_start, sig_stop, sig_gate,
                     sfft.next_fast_len(2 * sig_len, real=True), max(max_stretch, 0.004), burst_centre,
                     max(1, int(burst_samples / 8 / stride)), max(0, int(burst_samples / 14 / stride)), stride,
                     gauge)

    # ------------------------------------------------------------------ core
    def _core(self, plan: _Plan, W: np.ndarray, B: np.ndarray, T: np.ndarray, Tb: np.ndarray,
              timings: dict | None = None) -> dict[str, np.ndarray]:
        """All feature columns for rows of capture ``W`` and baseline ``B`` (same plan)."""
        tick = time.perf_counter
        tm = timings if timings is not None else {}

        def add(group, t0):
            tm[group] = tm.get(group, 0.0) + (tick() - t0)

        fs, pre = plan.sample_rate_hz, plan.pretrigger_s
        f0 = self.family.excitation.centre_frequency_hz
        n_rows = W.shape[0]
        out: dict[str, np.ndarray] = {}
        t0 = tick()
        e_rec_w = (W * W).sum(-1)
        e_rec_b = (B * B).sum(-1)
        add("energy", t0)
        for mode, mp in plan.modes.items():
            p = mode.lower()
            t0 = tick()
            xs = W[:, mp.start:mp.stop] * mp.gate
            bs = B[:, mp.start:mp.stop] * mp.gate
            XR = sfft.rfft(np.concatenate([xs, bs]), mp.n_fft, axis=-1)
            X, R = XR[:n_rows], XR[n_rows:]
            length = mp.stop - mp.start
            D = plan.stride
            env = np.abs(decimated_analytic(XR, mp.n_fft, D)[:, : -(-length // D)])
            pk_idx, pk_val = envelope_peak_index(env, half_width=plan.peak_half_width)
            ipk = np.clip(np.rint(pk_idx).astype(int), 0, env.shape[-1] - 1)
            thr_idx = threshold_crossing_index(env, self.threshold_fraction, peak_index=ipk, peak_value=pk_val,
                                               fit_half_width=plan.edge_half_width)
            pk_idx, thr_idx = pk_idx * D, thr_idx * D
            to_s = lambda i: (mp.start + i) / fs - pre  # noqa: E731
            arr_env, base_env = to_s(pk_idx[:n_rows]), to_s(pk_idx[n_rows:])
            arr_thr, base_thr = to_s(thr_idx[:n_rows]), to_s(thr_idx[n_rows:])
            norm = np.sqrt((xs * xs).sum(-1) * (bs * bs).sum(-1))
            d = xcorr_delay_from_spectra(X, R, mp.n_fft, max_lag=mp.max_lag, band_bins=mp.band_bins, norm=norm)
            P = xs @ mp.dft
            Q = bs @ mp.dft
            ph = phase_delay_from_dft(P, Q, f0 / fs, near=d.phase_slope)
            out[f"{p}_arrival_envelope_s"] = arr_env
            out[f"{p}_arrival_threshold_s"] = arr_thr
            out[f"{p}_arrival_xcorr_s"] = base_env + d.phase_slope / fs
            out[f"{p}_arrival_phase_s"] = base_env + ph / fs
            out[f"{p}_baseline_arrival_envelope_s"] = base_env
            out[f"{p}_baseline_arrival_threshold_s"] = base_thr
            out[f"{p}_shift_envelope_s"] = arr_env - base_env
            out[f"{p}_shift_threshold_s"] = arr_thr - base_thr
            out[f"{p}_shift_xcorr_s"] = d.parabolic / fs
            out[f"{p}_shift_xcorr_phase_slope_s"] = d.phase_slope / fs
            out[f"{p}_shift_phase_s"] = ph / fs
            out[f"{p}_xcorr_coefficient"] = d.peak_correlation
            add("arrivals", t0)
            if mode == "A0" and plan.a0_gauge is not None:
                t0 = tick()
                # a baseline usually serves several captures: gauge each distinct (baseline, temperature) once
                Rb = R[:, mp.band_bins]
                Tb_rows = np.broadcast_to(np.asarray(Tb, dtype=float), (n_rows,))
                key = np.concatenate([np.ascontiguousarray(Rb).view(np.float64).reshape(n_rows, -1),
                                      Tb_rows[:, None]], axis=1)
                _, first, inverse = np.unique(key, axis=0, return_index=True, return_inverse=True)
                ratio = plan.a0_gauge.thickness_ratio(Rb[first], Tb_rows[first])
                out["baseline_a0_thickness_ratio"] = ratio[np.asarray(inverse).ravel()]
                add("physics_check", t0)

            t0 = tick()
            ex = (xs * xs).sum(-1)
            eb = (bs * bs).sum(-1)
            with np.errstate(divide="ignore", invalid="ignore"):
                out[f"{p}_energy_ratio_db"] = 10 * np.log10(ex / eb)
                out[f"{p}_energy_fraction"] = ex / e_rec_w
                out[f"{p}_peak_amplitude_v"] = pk_val[:n_rows]
                pw = np.abs(XR) ** 2
                for name, bins in zip(("low", "centre", "high"), mp.sub_bands):
                    sx = pw[:n_rows, bins].sum(-1)
                    sb = pw[n_rows:, bins].sum(-1)
                    out[f"{p}_transmission_{name}_db"] = 10 * np.log10(sx / sb)
            add("energy", t0)

            t0 = tick()
            op = mp.operator
            U = XR[:, mp.band_bins]
            foc = op.focus(U)
            jf, fmax = parabolic_peak(foc, np.argmax(foc, axis=-1))
            thick = op.thickness_m[0] + jf * mp.step_m
            meas = measure_packets(np.abs(op.profile(U)), op.distance_m)
            pos = meas.position_m
            with np.errstate(divide="ignore", invalid="ignore"):
                out[f"{p}_comp_position_m"] = pos[:n_rows]
                out[f"{p}_comp_position_shift_m"] = pos[:n_rows] - pos[n_rows:]
                out[f"{p}_comp_width_m"] = meas.width_m[:n_rows]
                out[f"{p}_comp_width_ratio"] = meas.width_m[:n_rows] / meas.width_m[n_rows:]
                out[f"{p}_comp_peak_ratio_db"] = 20 * np.log10(meas.peak[:n_rows] / meas.peak[n_rows:])
                out[f"{p}_sharpest_thickness_m"] = thick[:n_rows]
                out[f"{p}_comp_focus"] = fmax[:n_rows]
                out[f"{p}_sharpest_thickness_ratio"] = thick[:n_rows] / thick[n_rows:]
            add("compensation", t0)

            t0 = tick()
            thermal = self.thermal.thermal_shift_s(mode, T, Tb)
            out[f"{p}_thermal_shift_s"] = thermal
            # the thermal model predicts group delays: compare with the envelope (group) shift
            out[f"{p}_shift_corrected_s"] = out[f"{p}_shift_envelope_s"] - thermal
            add("temperature", t0)

        t0 = tick()
        st = baseline_stretch(W, B, sample_rate_hz=fs, pretrigger_s=pre, start=plan.sig_start,
                              stop=plan.sig_stop, max_stretch=plan.max_stretch, origin_s=plan.burst_centre_s,
                              stride=plan.stride)
        xw = W[:, plan.sig_start:plan.sig_stop]
        for mode, mp in plan.modes.items():
            a, b = mp.start - plan.sig_start, mp.stop - plan.sig_start
            xm = xw[:, a:b] * mp.gate
            bm = st.stretched_baseline[:, a:b] * mp.gate
            with np.errstate(divide="ignore", invalid="ignore"):
                rho = (xm * bm).sum(-1) / np.sqrt((xm * xm).sum(-1) * (bm * bm).sum(-1))
            out[f"{mode.lower()}_stretch_residual"] = 1.0 - rho**2
        dT = T - Tb
        out["capture_temperature_c"] = T.copy()
        out["baseline_temperature_c"] = Tb.copy()
        out["delta_temperature_k"] = dT
        out["stretch_factor"] = st.factor
        out["stretch_excess"] = (st.factor - 1.0) - self._s0_coeff * dT
        out["stretch_residual"] = st.residual
        out["unstretched_residual"] = st.unstretched_residual
        with np.errstate(divide="ignore", invalid="ignore"):
            out["s0_stretch_factor"] = 1.0 + out["s0_shift_envelope_s"] / (
                out["s0_baseline_arrival_envelope_s"] - plan.burst_centre_s)
            out["a0_s0_differential_shift_s"] = out["a0_shift_envelope_s"] - self._r * out["s0_shift_envelope_s"]
            out["a0_s0_differential_energy_db"] = out["a0_energy_ratio_db"] - out["s0_energy_ratio_db"]
            out["a0_s0_differential_thickness_ratio"] = (
                out["a0_sharpest_thickness_ratio"] / out["s0_sharpest_thickness_ratio"]
            )
            out["record_energy_ratio_db"] = 10 * np.log10(e_rec_w / e_rec_b)
        add("temperature", t0)

        t0 = tick()
        seg = xw * plan.sig_gate
        spec = np.abs(sfft.rfft(seg, plan.sig_n_fft, axis=-1))
        spec[:, 0] = 0.0
        kf, _ = parabolic_peak(spec, np.argmax(spec, axis=-1))
        out["capture_peak_frequency_hz"] = kf * fs / plan.sig_n_fft
        out["baseline_s0_arrival_s"] = out["s0_baseline_arrival_envelope_s"].copy()
        out["sample_rate_hz"] = np.full(n_rows, fs)
        add("physics_check", t0)
        return out

    def _run_core(self, plan, W, B, T, Tb, n_jobs=1, timings=None):
        n_rows = W.shape[0]
        blocks = [slice(s, min(s + _BLOCK_ROWS, n_rows)) for s in range(0, n_rows, _BLOCK_ROWS)]
        if n_jobs == 1 or len(blocks) == 1:
            parts = [self._core(plan, W[s], B[s], T[s], Tb[s], timings) for s in blocks]
        else:
            from joblib import Parallel, delayed

            res = Parallel(n_jobs=n_jobs, prefer="threads")(
                delayed(_core_job)(self, plan, W[s], B[s], T[s], Tb[s]) for s in blocks
            )
            parts = [r[0] for r in res]
            if timings is not None:
                for _, tm in res:
                    for k, v in tm.items():
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
            raise ValueError(f"on_reject must be 'raise' or 'nan'; got {on_reject!r}.")
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
        plan = self._plan(fs, pre, W.shape[1])
        good = np.flatnonzero(~bad)
        cols = feature_columns()
        feats = {c: np.full(n_rows, np.nan) for c in cols}
        if good.size:
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
            raise ValueError(
                f"baseline {baseline.source or '(in memory)'} is from path {baseline.path_id!r} but capture "
                f"{capture.source or '(in memory)'} is from path {capture.path_id!r}; a baseline must come from "
                "the same transducer path. Give baselines recorded on that path."
            )
        # equal within rounding: a CSV without a sample_rate_hz header gets its rate from the time
        # column (features.io.csv_format), which differs from the header value in the last digits
        fs = baseline.sample_rate_hz
        if not math.isclose(fs, capture.sample_rate_hz, rel_tol=1e-6) or baseline.n_samples != capture.n_samples \
                or abs(baseline.pretrigger_s - capture.pretrigger_s) > 1e-2 / fs:
            raise ValueError(
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
            raise ValueError(
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
        ValueError
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


def _core_job(extractor, plan, W, B, T, Tb):
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
        raise ValueError(f"on_reject must be 'raise', 'skip' or 'nan'; got {on_reject!r}.")
    captures = list(captures)
    if not captures:
        raise ValueError("no captures given.")
    by_path: dict[str, list[Capture]] = {}
    for b in baselines:
        by_path.setdefault(b.path_id, []).append(b)
    per = []
    for c in captures:
        if c.path_id not in by_path:
            raise ValueError(
                f"capture {c.source or '(in memory)'} is from path {c.path_id!r}, but no baseline is from that "
                f"path (baselines cover: {', '.join(sorted(map(repr, by_path))) or 'none'}). Add a baseline "
                "recorded on that path when the metal was sound."
            )
        per.append(by_path[c.path_id])
    ex = FeatureExtractor(family)
    df = ex._extract_many(captures, per, n_jobs=n_jobs, on_reject="raise" if on_reject == "raise" else "nan")
    if on_reject == "skip":
        attrs = dict(df.attrs)
        df = df[np.isfinite(df["sample_rate_hz"].to_numpy())].reset_index(drop=True)
        df.attrs.update(attrs)
    return df


def build_feature_file(family_path, captures, baselines, out_path, *, n_jobs: int = 1,
                       on_reject: str = "raise") -> pd.DataFrame:
    """Library side of ``waneguide features``: read, extract, write Parquet atomically."""
    from waneguide.core.atomic import check_output_path
    from waneguide.features.family import load_family
    from waneguide.features.io import read_captures
    from waneguide.features.schema import write_feature_table

    if isinstance(n_jobs, bool) or int(n_jobs) != n_jobs or n_jobs == 0 or n_jobs < -1:
        raise ValueError(f"n_jobs (--jobs) must be a positive integer (or -1 for all cores); got {n_jobs!r}.")
    check_output_path(out_path, "feature table (--out)")
    family = load_family(family_path)
    caps = read_captures(captures)
    bases = read_captures(baselines)
    df = extract_feature_table(family, caps, bases, n_jobs=n_jobs, on_reject=on_reject)
    df.attrs["n_rejected"] = len(caps) - len(df)
    write_feature_table(df, out_path)
    return df
