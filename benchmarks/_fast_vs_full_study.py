"""The abrupt-patch A0 delay study of benchmarks/bench_fast_vs_full.py (part 2 there), and the families it uses.

Mode-pure runs: pin-force pairs on both surfaces in phase drive S0 only, in opposition A0 only
(symmetric and antisymmetric in-plane surface displacement, Graff 1975 sec. 8.1); the receivers
on both surfaces split the arrivals the same way, and by superposition the top-surface pair of
the family is half the sum of the two drives' top records.
"""
from __future__ import annotations

import math
import time
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import scipy.fft as sfft

from waneguide.core.runner import run_tasks
from waneguide.features.dispersion import fundamental_dispersion
from waneguide.features.extractor import FeatureExtractor
from waneguide.features.family import family_from_mapping
from waneguide.simulation._fullwave_runs import calibrate
from waneguide.simulation.forward import ForwardModel
from waneguide.simulation.fullwave import (
    BurstSpec,
    PlateRun,
    broadband_pulse,
    build_plate,
    bursts_from_broadband,
    design_grid,
    footprint,
)
from waneguide.simulation.fullwave.source import band_edges_hz, disc_pair_response, peak_frequency_for, pulse_length_s
from waneguide.simulation.profiles import loss_flat_patch

ROOT = Path(__file__).resolve().parent.parent
DX_PROFILE_M = 0.05e-3  # profile sampling handed to both simulators
FAST_SEGMENT_MM = 0.25
LONG_PATCH_M = 0.2  # study: steps 25 mm from each disc, reverberation between them 143 us after the direct A0


def load_mapping(path: Path) -> dict:
    return tomllib.loads(Path(path).read_text())


def bench_family(data: dict, where: str):
    data = {k: dict(v) if isinstance(v, dict) else v for k, v in data.items()}
    data["domain"]["segment_mm"] = FAST_SEGMENT_MM
    return family_from_mapping(data, where=where)


def study_mapping() -> dict:
    data = load_mapping(ROOT / "configs" / "families" / "demo_fb2.toml")
    data["family"].update(name="study-3mm-200khz", description="bench: 3 mm plate, 200 kHz, 250 mm path")
    data["section"].update(flange_thickness_mm=3.0, web_thickness_mm=3.0)
    data["excitation"]["centre_frequency_khz"] = 200.0
    data["path"].update(transducer_spacing_mm=250.0)
    data["acquisition"]["record_length"] = 2048
    data["domain"].update(max_loss_pct=[0.0, 40.0], patch_length_mm=[5.0, 100.0])
    return data


def _mode_pure_task(top, bottom, *, family, x, grid, interior=None) -> dict:
    """A0-only and S0-only drives (pin-force pairs on both surfaces); raw records of both surfaces at L (or inside)."""
    mat, t, L = family.build_material(), family.nominal_thickness_m, family.path_length_m
    a = family.path.transducer_diameter_mm * 0.5e-3
    burst = BurstSpec.from_family(family)
    acq = family.acquisition
    p = build_plate(mat, grid, t, x_start_m=-(a + 0.01), x_end_m=L + a + 0.01, x_m=x, top_loss_m=top,
                    bottom_loss_m=bottom)
    fp, dt = peak_frequency_for((burst,)), grid.dt_s
    n = int(math.ceil((acq.record_length / acq.sample_rate_hz - acq.pretrigger_s + pulse_length_s(fp)) / dt)) + 2
    q = broadband_pulse(fp, dt, int(math.ceil(pulse_length_s(fp) / dt)) + 1)
    src = [footprint(p, "pin_force", 0.0, a, surface=s) for s in ("top", "bottom")]
    at = [L, 0.0] if interior is None else list(interior)  # the receiver, and the transmitter for reflections
    recs = [footprint(p, "pin_force", xr, a, receiver=True, surface=s) for xr in at for s in ("top", "bottom")]
    resp = disc_pair_response(family)
    out = {}
    for drive, sign in (("A0", -1.0), ("S0", 1.0)):
        if interior is not None and drive == "S0":
            continue
        s = (np.concatenate([src[0][0], src[1][0]]), np.concatenate([src[0][1], sign * src[1][1]]))
        tr = PlateRun(p, pml_f0_hz=fp).run(n, s, q, recs)
        out[drive] = np.stack([bursts_from_broadband(r, q, dt, (burst,), sample_rate_hz=acq.sample_rate_hz,
                                                     n_samples=int(acq.record_length), pretrigger_s=acq.pretrigger_s,
                                                     response=resp)[0] for r in tr])
    return out


def _study_cases(family, x) -> dict:
    L = family.path_length_m
    cases = {}
    for length in (20e-3, 40e-3, 80e-3):
        for side in ("top", "bottom", "sym"):
            d = 0.5e-3 if side == "sym" else 1e-3
            u = loss_flat_patch(x, centre_m=L / 2, length_m=length, depth_m=d, taper_m=1e-9)
            cases[f"abrupt {side} {length * 1e3:.0f} mm"] = {"top": (u, None), "bottom": (None, u), "sym": (u, u)}[side]
    for side in ("top", "sym"):  # long patches: the steps' own delay, their reverberation out of the gate
        d = 0.5e-3 if side == "sym" else 1e-3
        u = loss_flat_patch(x, centre_m=L / 2, length_m=LONG_PATCH_M, depth_m=d, taper_m=1e-9)
        cases[f"abrupt {side} {LONG_PATCH_M * 1e3:.0f} mm"] = {"top": (u, None), "sym": (u, u)}[side]
    for length in (40e-3, 80e-3):
        for side in ("top", "bottom", "sym"):
            d = 0.5e-3 if side == "sym" else 1e-3
            u = loss_flat_patch(x, centre_m=L / 2, length_m=length, depth_m=d, taper_m=0.5 * length)
            cases[f"smooth {side} {length * 1e3:.0f} mm"] = {"top": (u, None), "bottom": (None, u), "sym": (u, u)}[side]
    return cases


def wkb_delays(mat, t0: float, x, loss, f_hz) -> tuple[np.ndarray, np.ndarray]:
    """Rayleigh-Lamb phase integration of the A0 group and phase delay change [s] at frequencies f (the fast model's physics)."""
    th = np.round(t0 - loss, 8)
    uniq, inv = np.unique(th, return_inverse=True)
    d = fundamental_dispersion(mat, uniq, np.atleast_1d(f_hz))
    cg, cp = d.group_velocity_m_s[:, 1, :], d.phase_velocity_m_s[:, 1, :]
    i_nom = int(np.argmin(np.abs(uniq - t0)))
    dx = np.gradient(x)
    return dx @ (1 / cg[inv] - 1 / cg[i_nom]), dx @ (1 / cp[inv] - 1 / cp[i_nom])


def _transfer(y, y0, fs: float, fc: float, half_band: float = 0.15):
    """H = Y / Y0 near fc: (f, group delay tau_g(f) [s], phase [rad] unwrapped, |H|)."""
    n = 16384
    f = sfft.rfftfreq(n, 1 / fs)
    sel = np.abs(f - fc) <= half_band * fc
    H = (sfft.rfft(y, n) / sfft.rfft(y0, n))[sel]
    ph = np.unwrap(np.angle(H))
    return f[sel], -np.gradient(ph, 2 * np.pi * f[sel]), ph, np.abs(H)


def _shift_at_fc(y, y0, fs, fc, wkb_phase_s):
    """(group-delay shift: mean tau_g over the band [s], phase-delay shift at fc on the branch nearest WKB [s], |H(fc)| dB)."""
    f, tau, ph, mag = _transfer(y, y0, fs, fc)
    k = int(np.argmin(np.abs(f - fc)))
    period = 1 / fc
    p = -ph[k] / (2 * np.pi * fc)
    p += period * np.round((wkb_phase_s - p) / period)
    w = np.interp(f, [f[0], fc, f[-1]], [0, 1, 0])  # triangular weight: the burst's energy sits at fc
    return float(np.sum(w * tau) / np.sum(w)), float(p), float(20 * np.log10(mag[k]))


def _gate(y, fs: float, fc: float, half_bursts: float) -> np.ndarray:
    """``y`` times a flat-topped gate ``half_bursts`` burst lengths (5 cycles) either side of its largest sample."""
    k0, half = int(np.argmax(np.abs(y))), int(half_bursts * 5 / fc * fs)
    g = np.zeros_like(y)
    lo, hi = max(k0 - half, 0), min(k0 + half, y.size)
    g[lo:hi] = np.hanning(hi - lo) ** 0.25
    return y * g


def _interior_velocity(rec, fs, fc, dx_m, mat, t_m):
    """A0 phase and group velocity between two receivers dx_m apart from A0 records (2, N), against Rayleigh-Lamb at t_m."""
    d = fundamental_dispersion(mat, t_m, np.array([fc]))
    cp_rl, cg_rl = float(d.phase_velocity_m_s[0, 1, 0]), float(d.group_velocity_m_s[0, 1, 0])
    gated = [_gate(y, fs, fc, 1.5) for y in rec]  # each receiver's direct A0 packet
    f, tau, ph, _ = _transfer(gated[1], gated[0], fs, fc, half_band=0.1)
    k = int(np.argmin(np.abs(f - fc)))
    phase = -ph[k]
    phase += 2 * np.pi * np.round((2 * np.pi * fc * dx_m / cp_rl - phase) / (2 * np.pi))
    cp = 2 * np.pi * fc * dx_m / phase
    cg = dx_m / float(np.mean(tau[np.abs(f - fc) < 0.05 * fc]))
    return {"cp": cp, "cg": cg, "cp_rl": cp_rl, "cg_rl": cg_rl}


def run_study(jobs: int, cells: int = 18) -> dict:
    family = bench_family(study_mapping(), "study family (3 mm, 200 kHz)")
    mat, t0, L = family.build_material(), family.nominal_thickness_m, family.path_length_m
    fs, fc = family.acquisition.sample_rate_hz, family.excitation.centre_frequency_hz
    burst = BurstSpec.from_family(family)
    grid = design_grid(mat, t0, band_edges_hz((burst,), floor=1e-2), min_wall_cells=cells, sample_rate_hz=fs,
                       f_low_hz=fc)
    x = np.arange(0.0, L + DX_PROFILE_M / 2, DX_PROFILE_M)
    cases = _study_cases(family, x)
    long = loss_flat_patch(x, centre_m=L / 2, length_m=LONG_PATCH_M, depth_m=1e-3, taper_m=1e-9)
    xs = (L / 2 - 0.04, L / 2 + 0.02)
    x_all = np.array([-1.0, 1.0 + L])
    tasks = {"pristine": (None, None), **cases, "interior patch": (long, None),
             "interior uniform 2 mm": (np.array([1e-3, 1e-3]), None), "interior uniform 3 mm": (None, None)}
    shared = {"family": family, "grid": grid}
    t_start = time.perf_counter()
    got = {}
    for key, res in run_tasks(_study_task, {k: (k, *v) for k, v in tasks.items()}, n_jobs=jobs,
                              shared={**shared, "x": x, "x_all": x_all, "interior": xs}, progress=True,
                              desc="study 3 mm plate", unit="case"):
        got[key] = res
    seconds = time.perf_counter() - t_start
    P = got["pristine"]
    fam_pair = lambda r: 0.5 * (r["S0"][0] + r["A0"][0])  # noqa: E731  top drive, top receiver (superposition)
    fm = ForwardModel(family)
    cal = calibrate(fm, fam_pair(P))
    scale = cal["amplitude_scale_v_per_unit"]
    names = list(cases)
    full_pair = fm.confound(scale * np.stack([fam_pair(P)] + [fam_pair(got[k]) for k in names]), 20.0)
    thick = np.stack([np.full(fm.x_m.size, t0)] + [
        fm.thickness_on_segments(x, t0 - sum(v for v in cases[k] if v is not None)) for k in names])
    fast = fm.synthesize(thick, 20.0, echoes=False)
    fast_a0 = fm.synthesize(thick, 20.0, echoes=False, modes=("A0",))  # the fast model's A0 -> A0 transfer
    fx = FeatureExtractor(family)
    ff = fx.extract_batch(full_pair[1:], full_pair[0], temperature_c=20.0, baseline_temperature_c=20.0, on_reject="nan")
    fs_ = fx.extract_batch(fast[1:], fast[0], temperature_c=20.0, baseline_temperature_c=20.0, on_reject="nan")
    aa = lambda r: 0.5 * (r["A0"][0] - r["A0"][1])  # noqa: E731
    a_s = lambda r: 0.5 * (r["A0"][0] + r["A0"][1])  # noqa: E731
    e_aa0 = float(np.sum(aa(P) ** 2))
    after = fm.time_s > 45e-6  # at the transmitter, after its own drive: the A0 reflected by the patch (<= 80 mm)

    def reflected(r):
        return float(np.sum((0.5 * (r["A0"][2] - r["A0"][3]))[after] ** 2))

    rows, curves = [], {}
    for j, k in enumerate(names):
        loss = sum(v for v in cases[k] if v is not None)
        g_w, p_w = (float(v[0]) for v in wkb_delays(mat, t0, x, loss, fc))
        gd, pd_, mag = _shift_at_fc(aa(got[k]), aa(P), fs, fc, p_w)
        gd_fast = _shift_at_fc(fast_a0[j + 1], fast_a0[0], fs, fc, p_w)[0]
        gd_gated = _shift_at_fc(_gate(aa(got[k]), fs, fc, 0.8), _gate(aa(P), fs, fc, 0.8), fs, fc, p_w)[0]
        refl = reflected(got[k]) if not k.endswith(f"{LONG_PATCH_M * 1e3:.0f} mm") else 0.0
        f, tau, _, _ = _transfer(aa(got[k]), aa(P), fs, fc)
        curves[k] = (f, tau, wkb_delays(mat, t0, x, loss, f)[0])
        rows.append({"case": k, "WKB group us": g_w * 1e6, "fast A0 group us": gd_fast * 1e6,
                     "A0->A0 group us": gd * 1e6, "fast/full group": gd_fast / gd, "WKB phase us": p_w * 1e6, "A0->A0 phase us": pd_ * 1e6,
                     "A0->A0 gated us": gd_gated * 1e6,
                     "|T_AA| dB": mag, "A0->S0 dB": 10 * np.log10(np.sum(a_s(got[k]) ** 2) / e_aa0),
                     "A0 reflected dB": 10 * np.log10(refl / e_aa0) if refl > 0 else np.nan,
                     "pair env fast us": fs_["a0_shift_envelope_s"].iloc[j] * 1e6,
                     "pair env full us": ff["a0_shift_envelope_s"].iloc[j] * 1e6,
                     "pair xcorr fast us": fs_["a0_shift_xcorr_phase_slope_s"].iloc[j] * 1e6,
                     "pair xcorr full us": ff["a0_shift_xcorr_phase_slope_s"].iloc[j] * 1e6})
    interior = {}
    for k, t_m in (("interior patch", t0 - 1e-3), ("interior uniform 2 mm", t0 - 1e-3), ("interior uniform 3 mm", t0)):
        r = got[k]["A0"]
        interior[k] = _interior_velocity(0.5 * (r[0::2] - r[1::2]), fs, fc, xs[1] - xs[0], mat, t_m)
        r_s = 0.5 * (r[0::2] + r[1::2])
        interior[k]["S0 leak dB"] = float(10 * np.log10(np.sum(r_s ** 2) / np.sum((0.5 * (r[0::2] - r[1::2])) ** 2)))
    return {"table": pd.DataFrame(rows), "interior": interior, "curves": curves, "family": family, "grid": grid,
            "full_pair": full_pair, "fast": fast, "names": names, "seconds": seconds, "runs": 2 * len(tasks),
            "aa": {k: aa(got[k]) for k in ("pristine", *names)}, "as": {k: a_s(got[k]) for k in names},
            "time_s": fm.time_s}


def _study_task(name, top, bottom, *, family, grid, x, x_all, interior):
    """One study case: the mode-pure runs at the receiver, or (interior cases) A0 receivers inside the patch."""
    if name.startswith("interior"):
        xx = x if top is None or top.size == x.size else x_all
        return _mode_pure_task(top, bottom, family=family, x=xx, grid=grid, interior=interior)
    return _mode_pure_task(top, bottom, family=family, x=x, grid=grid)


def step_delays(st: dict) -> tuple[float, dict]:
    """(grid dispersion error [s per m of 2 mm section], A0 group delay per abrupt step [us] by side).

    The grid's own error: the 2 mm section against the 3 mm plate it replaces, from the group
    velocities measured in uniform plates on the same grid. Per step: the gated direct packet
    of the long patch, minus the fast model and the grid error, halved.
    """
    cg = {k: st["interior"][f"interior uniform {k} mm"] for k in ("2", "3")}
    grid_err = (1 / cg["2"]["cg"] - 1 / cg["2"]["cg_rl"]) - (1 / cg["3"]["cg"] - 1 / cg["3"]["cg_rl"])
    tb = st["table"].set_index("case")
    per = {}
    for side in ("sym", "top"):
        k = f"abrupt {side} {LONG_PATCH_M * 1e3:.0f} mm"
        per[side] = (tb.loc[k, "A0->A0 gated us"] - tb.loc[k, "fast A0 group us"] - grid_err * LONG_PATCH_M * 1e6) / 2
    return grid_err, per


def findings(st: dict) -> list[str]:
    tb = st["table"].set_index("case")
    r = lambda k, c: tb.loc[k, c]  # noqa: E731
    lines = []
    for k in ("abrupt top 40 mm", "abrupt sym 40 mm", "smooth top 80 mm", "smooth sym 80 mm"):
        lines.append(f"{k}: A0 group-delay change {r(k, 'A0->A0 group us'):.3f} us full-wave (mode-pure A0->A0) "
                     f"against {r(k, 'fast A0 group us'):.3f} us fast (phase integration; Rayleigh-Lamb at the "
                     f"centre frequency {r(k, 'WKB group us'):.3f} us): fast/full = "
                     f"{r(k, 'fast/full group'):.2f}; A0->S0 conversion {r(k, 'A0->S0 dB'):.1f} dB re the pristine A0.")
    for side in ("sym", "top"):
        ex = [r(f"abrupt {side} {n} mm", "A0->A0 group us") - r(f"abrupt {side} {n} mm", "fast A0 group us")
              for n in (20, 40, 80)]
        lines.append(f"Abrupt {side} patches of 20 / 40 / 80 mm: group delay full - fast = "
                     + " / ".join(f"{e:.2f}" for e in ex) + " us (band-mean over +-15 % of the centre frequency).")
    grid_err, per_step = step_delays(st)
    for side in ("sym", "top"):
        k = f"abrupt {side} {LONG_PATCH_M * 1e3:.0f} mm"
        ex = r(k, "A0->A0 gated us") - r(k, "fast A0 group us")
        lines.append(f"{k}, direct A0 packet gated (reverberation between the steps 143 us later, out of the gate): "
                     f"full - fast {ex:.3f} us, of which the grid's dispersion over the 2 mm section "
                     f"{grid_err * LONG_PATCH_M * 1e6:+.3f} us: {per_step[side]:.3f} us per step.")
    ref = [r(f"abrupt {side} 40 mm", "A0 reflected dB") for side in ("sym", "top")]
    lines.append(f"A0 reflected back to the transmitter by the 40 mm abrupt patch: {ref[0]:.1f} dB (symmetric steps), "
                 f"{ref[1]:.1f} dB (one-sided) re the pristine A0 at the receiver; smooth 80 mm: "
                 f"{r('smooth sym 80 mm', 'A0 reflected dB'):.1f} dB.")
    for k, v in st["interior"].items():
        lines.append(f"{k}: A0 between two receivers inside: phase velocity {v['cp']:.1f} m/s (Rayleigh-Lamb "
                     f"{v['cp_rl']:.1f}, {100 * (v['cp'] / v['cp_rl'] - 1):+.2f} %), group velocity {v['cg']:.1f} m/s "
                     f"({100 * (v['cg'] / v['cg_rl'] - 1):+.2f} %); symmetric-mode leak {v['S0 leak dB']:.1f} dB.")
    return lines


def interpretation(st: dict) -> list[str]:
    """Why phase integration misses the abrupt patch's A0 delay, with this run's numbers."""
    tb = st["table"].set_index("case")
    r = lambda k, c: tb.loc[k, c]  # noqa: E731
    ip, u2 = st["interior"]["interior patch"], st["interior"]["interior uniform 2 mm"]
    grid_err, per_step = step_delays(st)
    excess = r("abrupt top 40 mm", "A0->A0 group us") - r("abrupt top 40 mm", "fast A0 group us")
    grid_40 = grid_err * 0.04 * 1e6
    smooth = [r(k, "fast/full group") for k in tb.index if k.startswith("smooth")]
    return [
        "The thinned section is not the cause. Inside a flat-bottomed one-sided patch the A0 phase velocity is "
        f"{ip['cp']:.1f} m/s against {u2['cp']:.1f} m/s in a uniform symmetric 2 mm plate on the same grid "
        f"({100 * (ip['cp'] / u2['cp'] - 1):+.2f} %): in the 2-D section the remaining ligament is a free plate "
        "about its own mid-plane, so the local-thickness wavenumber of the phase integral is right there.",
        "The steps are. (1) Reflection: an abrupt 3 -> 2 mm step reflects A0 (the 40 mm patch sends "
        f"{r('abrupt sym 40 mm', 'A0 reflected dB'):.1f} dB back to the transmitter, symmetric steps); the wave "
        "reverberating between the two steps trails the direct packet by 2 l / c_g (29 us for 40 mm) and ripples "
        "the group delay with frequency (period c_g / 2 l, 35 kHz for 40 mm, figure), so at the burst's "
        "centre the patch delay is off by a fraction of that ripple, of either sign; the phase integral has no "
        "reflection at all. (2) Transmission phase: with the reverberation gated out (200 mm patch) and the grid's "
        f"dispersion taken off, each step adds {per_step['sym']:.3f} us (symmetric) or {per_step['top']:.3f} us "
        "(one-sided) of A0 group delay. For the 1 mm x 40 mm one-sided patch the "
        f"{excess:.2f} us that phase integration misses split into {grid_40:.2f} us grid dispersion, "
        f"{2 * per_step['top']:.2f} us for the two steps and {excess - grid_40 - 2 * per_step['top']:.2f} us of "
        "reverberation and A0-S0-A0 interference at the centre frequency. "        "(3) Mid-plane offset: a one-sided step converts A0 to S0 "
        f"({r('abrupt top 40 mm', 'A0->S0 dB'):.1f} dB for the 40 mm patch, none for symmetric steps, "
        f"{r('smooth top 80 mm', 'A0->S0 dB'):.1f} dB for smooth one-sided edges): A0 loses "
        f"{-r('abrupt top 40 mm', '|T_AA| dB'):.2f} dB, the doubly converted A0-S0-A0 packet arrives early inside "
        "the A0 packet, and a disc pair on one surface also receives the singly converted packets, whose sign "
        "depends on the side of the loss: with the family's top-surface discs the A0 envelope shift of the 40 mm "
        f"patch is {r('abrupt top 40 mm', 'pair env full us'):.2f} us (loss on the disc side) and "
        f"{r('abrupt bottom 40 mm', 'pair env full us'):.2f} us (far side) against {r('abrupt top 40 mm', 'pair env fast us'):.2f}"
        " us fast; cross-correlation delays jump by whole cycles. Together, for the mode-pure A0 of the 1 mm x 40 mm "
        f"one-sided patch: fast/full = {r('abrupt top 40 mm', 'fast/full group'):.2f} (symmetric steps "
        f"{r('abrupt sym 40 mm', 'fast/full group'):.2f}).",
        "Smooth edges match only as far as the grid lets them: the solver's surfaces are staircases of one cell "
        f"({st['grid'].dx_m * 1e3:.3f} mm), and each stair step reflects like a small abrupt step (smooth 80 mm: "
        f"{r('smooth sym 80 mm', 'A0 reflected dB'):.1f} dB, changing with the cell size: a grid artefact), which "
        f"keeps smooth cases at fast/full {min(smooth):.2f}-{max(smooth):.2f}. Grid dispersion (measured in uniform plates on this grid: "
        f"A0 group velocity {100 * (u2['cg'] / u2['cg_rl'] - 1):+.2f} % at 2 mm, "
        f"{100 * (st['interior']['interior uniform 3 mm']['cg'] / st['interior']['interior uniform 3 mm']['cg_rl'] - 1):+.2f}"
        f" % at 3 mm) adds {grid_40:.2f} us per 40 mm of 2 mm section.",
        "Correction physics (not implemented): per step, complex A0/S0 transmission, reflection and conversion "
        "coefficients as functions of f d, step height and side (Lamb-mode matching at the step), and in the "
        "synthesis the extra paths they open (reverberation between the steps of a patch, A0-S0 conversion with its "
        "side-dependent sign, each with its own phase integral); for tapered edges a coupled-mode correction whose "
        "coupling scales with the slope of the mid-plane and of the thickness, which vanishes in the adiabatic "
        "limit the fast model already has. On the full-wave side, sub-cell (conformal) surfaces would remove the "
        "staircase reflections of smooth profiles.",
    ]
