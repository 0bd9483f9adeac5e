"""The feature arithmetic: rows of captures and baselines in, every core feature column out.

:func:`compute_features` runs one step per feature group of :func:`features.schema.feature_groups`
(arrivals, energy, compensation, physics_check, temperature, differential), each
vectorised over the rows of a block, and checks that every step produced exactly the
columns its group declares. Two columns are filled by the extractor's doors instead
(:data:`DOOR_COLUMNS`): the SNR estimate of the quality gate and the number of baselines
the optimal baseline selection chose from.

Per mode the capture and baseline windows are gated and transformed once
(:class:`_Spectra`); the arrival, energy, compensation and gauge steps read those spectra.
"""
from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np
import scipy.fft as sfft

from waneguide.features._extract_plan import ModePlan, Plan
from waneguide.features.arrivals import envelope_peak_index, phase_delay_from_dft, threshold_crossing_index, xcorr_delay_from_spectra
from waneguide.features.compensation import measure_packets
from waneguide.features.schema import feature_groups
from waneguide.features.signals import decimated_analytic, parabolic_peak
from waneguide.features.temperature import ThermalModel, baseline_stretch

__all__ = ["compute_features", "DOOR_COLUMNS", "CORE_COLUMNS", "GROUPS"]

#: Columns of each feature group (the schema's declaration).
GROUPS = feature_groups()
#: Columns the extractor's doors fill (not the core): source of each.
DOOR_COLUMNS = {"snr_db": "the quality gate's SNR estimate", "n_baselines": "the optimal baseline selection"}
#: Columns :func:`compute_features` returns.
_GROUP_OF = {c: g for g, cols in GROUPS.items() for c in cols}
if not set(DOOR_COLUMNS) <= set(_GROUP_OF):
    raise RuntimeError(f"door columns {sorted(set(DOOR_COLUMNS) - set(_GROUP_OF))} are not in features.schema.")
CORE_COLUMNS = frozenset(_GROUP_OF) - set(DOOR_COLUMNS)


@dataclass
class _Spectra:
    """One mode's gated windows of captures (first ``n_rows`` rows) and baselines, and their rfft."""

    xs: np.ndarray
    bs: np.ndarray
    XR: np.ndarray
    n_rows: int

    @property
    def X(self) -> np.ndarray:
        return self.XR[: self.n_rows]

    @property
    def R(self) -> np.ndarray:
        return self.XR[self.n_rows:]


def _spectra(mp: ModePlan, W: np.ndarray, B: np.ndarray) -> _Spectra:
    xs = W[:, mp.start:mp.stop] * mp.gate
    bs = B[:, mp.start:mp.stop] * mp.gate
    XR = sfft.rfft(np.concatenate([xs, bs]), mp.n_fft, axis=-1)
    return _Spectra(xs, bs, XR, W.shape[0])


def _arrivals(plan: Plan, mp: ModePlan, sp: _Spectra, f0: float, fraction: float) -> tuple[dict, np.ndarray]:
    """Arrival columns of one mode, and the envelope peak value of every row (captures, then baselines)."""
    fs, pre, n_rows, p = plan.sample_rate_hz, plan.pretrigger_s, sp.n_rows, mp.mode.lower()
    length = mp.stop - mp.start
    D = plan.stride
    env = np.abs(decimated_analytic(sp.XR, mp.n_fft, D)[:, : -(-length // D)])
    pk_idx, pk_val = envelope_peak_index(env, half_width=plan.peak_half_width)
    ipk = np.clip(np.rint(pk_idx).astype(int), 0, env.shape[-1] - 1)
    thr_idx = threshold_crossing_index(env, fraction, peak_index=ipk, peak_value=pk_val,
                                       fit_half_width=plan.edge_half_width)
    pk_idx, thr_idx = pk_idx * D, thr_idx * D

    def to_s(i):
        return (mp.start + i) / fs - pre

    arr_env, base_env = to_s(pk_idx[:n_rows]), to_s(pk_idx[n_rows:])
    arr_thr, base_thr = to_s(thr_idx[:n_rows]), to_s(thr_idx[n_rows:])
    norm = np.sqrt((sp.xs * sp.xs).sum(-1) * (sp.bs * sp.bs).sum(-1))
    d = xcorr_delay_from_spectra(sp.X, sp.R, mp.n_fft, max_lag=mp.max_lag, band_bins=mp.band_bins, norm=norm)
    ph = phase_delay_from_dft(sp.xs @ mp.dft, sp.bs @ mp.dft, f0 / fs, near=d.phase_slope)
    out = {
        f"{p}_arrival_envelope_s": arr_env,
        f"{p}_arrival_threshold_s": arr_thr,
        f"{p}_arrival_xcorr_s": base_env + d.phase_slope / fs,
        f"{p}_arrival_phase_s": base_env + ph / fs,
        f"{p}_baseline_arrival_envelope_s": base_env,
        f"{p}_baseline_arrival_threshold_s": base_thr,
        f"{p}_shift_envelope_s": arr_env - base_env,
        f"{p}_shift_threshold_s": arr_thr - base_thr,
        f"{p}_shift_xcorr_s": d.parabolic / fs,
        f"{p}_shift_xcorr_phase_slope_s": d.phase_slope / fs,
        f"{p}_shift_phase_s": ph / fs,
        f"{p}_xcorr_coefficient": d.peak_correlation,
    }
    return out, pk_val


def _energy(mp: ModePlan, sp: _Spectra, peak_value: np.ndarray, record_energy: np.ndarray) -> dict:
    """Windowed energy, envelope peak and band transmission of one mode."""
    n_rows, p = sp.n_rows, mp.mode.lower()
    ex = (sp.xs * sp.xs).sum(-1)
    eb = (sp.bs * sp.bs).sum(-1)
    out = {}
    with np.errstate(divide="ignore", invalid="ignore"):
        out[f"{p}_energy_ratio_db"] = 10 * np.log10(ex / eb)
        out[f"{p}_energy_fraction"] = ex / record_energy
        out[f"{p}_peak_amplitude_v"] = peak_value[:n_rows]
        pw = np.abs(sp.XR) ** 2
        for name, bins in zip(("low", "centre", "high"), mp.sub_bands):
            out[f"{p}_transmission_{name}_db"] = 10 * np.log10(pw[:n_rows, bins].sum(-1) / pw[n_rows:, bins].sum(-1))
    return out


def _compensation(mp: ModePlan, sp: _Spectra) -> dict:
    """Wilcox compensation at nominal thickness and the sharpest-thickness search of one mode."""
    n_rows, p = sp.n_rows, mp.mode.lower()
    op = mp.operator
    U = sp.XR[:, mp.band_bins]
    foc = op.focus(U)
    jf, fmax = parabolic_peak(foc, np.argmax(foc, axis=-1))
    thick = op.thickness_m[0] + jf * mp.step_m
    meas = measure_packets(np.abs(op.profile(U)), op.distance_m)
    pos = meas.position_m
    with np.errstate(divide="ignore", invalid="ignore"):
        return {
            f"{p}_comp_position_m": pos[:n_rows],
            f"{p}_comp_position_shift_m": pos[:n_rows] - pos[n_rows:],
            f"{p}_comp_width_m": meas.width_m[:n_rows],
            f"{p}_comp_width_ratio": meas.width_m[:n_rows] / meas.width_m[n_rows:],
            f"{p}_comp_peak_ratio_db": 20 * np.log10(meas.peak[:n_rows] / meas.peak[n_rows:]),
            f"{p}_sharpest_thickness_m": thick[:n_rows],
            f"{p}_comp_focus": fmax[:n_rows],
            f"{p}_sharpest_thickness_ratio": thick[:n_rows] / thick[n_rows:],
        }


def _a0_gauge(plan: Plan, mp: ModePlan, sp: _Spectra, Tb: np.ndarray) -> dict:
    """Baseline flange thickness from its A0 window (features.thickness_gauge)."""
    # a baseline usually serves several captures: gauge each distinct (baseline, temperature) once
    n_rows = sp.n_rows
    Rb = sp.R[:, mp.band_bins]
    Tb_rows = np.broadcast_to(np.asarray(Tb, dtype=float), (n_rows,))
    key = np.concatenate([np.ascontiguousarray(Rb).view(np.float64).reshape(n_rows, -1), Tb_rows[:, None]], axis=1)
    _, first, inverse = np.unique(key, axis=0, return_index=True, return_inverse=True)
    ratio = plan.a0_gauge.thickness_ratio(Rb[first], Tb_rows[first])
    return {"baseline_a0_thickness_ratio": ratio[np.asarray(inverse).ravel()]}


def _thermal_shift(thermal: ThermalModel, mode: str, T: np.ndarray, Tb: np.ndarray, envelope_shift: np.ndarray) -> dict:
    """Predicted thermal shift of one mode and the envelope (group) shift corrected by it."""
    p = mode.lower()
    shift = thermal.thermal_shift_s(mode, T, Tb)
    # the thermal model predicts group delays: compare with the envelope (group) shift
    return {f"{p}_thermal_shift_s": shift, f"{p}_shift_corrected_s": envelope_shift - shift}


def _stretch(plan: Plan, W: np.ndarray, B: np.ndarray, T: np.ndarray, Tb: np.ndarray, s0_shift: np.ndarray,
             s0_baseline_arrival: np.ndarray) -> dict:
    """Baseline signal stretch over the S0-to-A0 window, per-mode residuals and the temperature columns."""
    st = baseline_stretch(W, B, sample_rate_hz=plan.sample_rate_hz, pretrigger_s=plan.pretrigger_s,
                          start=plan.sig_start, stop=plan.sig_stop, max_stretch=plan.max_stretch,
                          origin_s=plan.burst_centre_s, stride=plan.stride)
    xw = W[:, plan.sig_start:plan.sig_stop]
    out = {}
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
    out["stretch_excess"] = (st.factor - 1.0) - plan.s0_coefficient_per_k * dT
    out["stretch_residual"] = st.residual
    out["unstretched_residual"] = st.unstretched_residual
    with np.errstate(divide="ignore", invalid="ignore"):
        out["s0_stretch_factor"] = 1.0 + s0_shift / (s0_baseline_arrival - plan.burst_centre_s)
    return out


def _differential(out: dict, r: float) -> dict:
    """A0 against S0: temperature (shift), coupling (energy) and thickness-ratio differentials."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return {
            "a0_s0_differential_shift_s": out["a0_shift_envelope_s"] - r * out["s0_shift_envelope_s"],
            "a0_s0_differential_energy_db": out["a0_energy_ratio_db"] - out["s0_energy_ratio_db"],
            "a0_s0_differential_thickness_ratio": out["a0_sharpest_thickness_ratio"] / out["s0_sharpest_thickness_ratio"],
        }


def _spectral_peak(plan: Plan, W: np.ndarray, s0_baseline_arrival: np.ndarray) -> dict:
    """Physics-check columns: spectral peak of the S0-to-A0 window, baseline S0 arrival, sample rate."""
    fs = plan.sample_rate_hz
    seg = W[:, plan.sig_start:plan.sig_stop] * plan.sig_gate
    spec = np.abs(sfft.rfft(seg, plan.sig_n_fft, axis=-1))
    spec[:, 0] = 0.0
    kf, _ = parabolic_peak(spec, np.argmax(spec, axis=-1))
    return {
        "capture_peak_frequency_hz": kf * fs / plan.sig_n_fft,
        "baseline_s0_arrival_s": s0_baseline_arrival.copy(),
        "sample_rate_hz": np.full(W.shape[0], fs),
    }


class _Columns(dict):
    """The output columns; :meth:`put` times a step and checks its columns belong to its group."""

    def __init__(self, timings: dict):
        super().__init__()
        self.timings = timings

    def put(self, group: str, t0: float, columns: dict) -> None:
        stray = [c for c in columns if _GROUP_OF.get(c) != group or c in self]
        if stray:
            raise RuntimeError(f"feature step {group!r} produced column(s) {stray} that the schema does not "
                               f"declare in that group (features.schema) or that another step produced.")
        self.update(columns)
        self.timings[group] = self.timings.get(group, 0.0) + (time.perf_counter() - t0)

    def check_complete(self) -> None:
        missing = sorted(CORE_COLUMNS - set(self))
        if missing:
            raise RuntimeError(f"feature columns {missing} declared in features.schema were not computed.")


def compute_features(plan: Plan, thermal: ThermalModel, W: np.ndarray, B: np.ndarray, T: np.ndarray,
                     Tb: np.ndarray, *, threshold_fraction: float, timings: dict | None = None) -> dict[str, np.ndarray]:
    """Every column of :data:`CORE_COLUMNS` for rows of capture ``W`` and baseline ``B`` (same plan).

    ``T`` and ``Tb`` are the capture and baseline temperatures [degC]; ``timings`` is filled with
    seconds per feature group.
    """
    tick = time.perf_counter
    out = _Columns(timings if timings is not None else {})
    f0 = plan.centre_frequency_hz
    t0 = tick()
    record_energy = (W * W).sum(-1)
    out.put("energy", t0, {"record_energy_ratio_db": _record_energy_ratio(record_energy, B)})
    for mode, mp in plan.modes.items():
        t0 = tick()
        sp = _spectra(mp, W, B)
        cols, peak_value = _arrivals(plan, mp, sp, f0, threshold_fraction)
        out.put("arrivals", t0, cols)
        if mode == "A0" and plan.a0_gauge is not None:
            t0 = tick()
            out.put("physics_check", t0, _a0_gauge(plan, mp, sp, Tb))
        t0 = tick()
        out.put("energy", t0, _energy(mp, sp, peak_value, record_energy))
        t0 = tick()
        out.put("compensation", t0, _compensation(mp, sp))
        t0 = tick()
        out.put("temperature", t0, _thermal_shift(thermal, mode, T, Tb, out[f"{mode.lower()}_shift_envelope_s"]))
    t0 = tick()
    out.put("temperature", t0, _stretch(plan, W, B, T, Tb, out["s0_shift_envelope_s"],
                                        out["s0_baseline_arrival_envelope_s"]))
    t0 = tick()
    out.put("differential", t0, _differential(out, plan.a0_over_s0_ratio))
    t0 = tick()
    out.put("physics_check", t0, _spectral_peak(plan, W, out["s0_baseline_arrival_envelope_s"]))
    out.check_complete()
    return dict(out)


def _record_energy_ratio(record_energy: np.ndarray, B: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        return 10 * np.log10(record_energy / (B * B).sum(-1))
