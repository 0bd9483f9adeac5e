"""Fast model against the full-wave solver over a family's domain, and the abrupt-patch A0 delay study (issue 10).

Part 1, domain (``--family``, default the demo FB-2 family; ``--cases N``): N loss profiles
stratified over the kinds of the family's domain (flat, pit, rough; one side and both) with
depths, lengths and positions drawn across its ranges and, for flat patches, edge tapers from
abrupt to gradual. Each is simulated noise-free at the reference temperature by the fast model
(no echoes, no confounders; its segments refined to 0.25 mm so it sees the same profile) and by
the full-wave solver on the campaign grid (simulation._fullwave_runs: pin-force discs on the top
surface, the fast model's band and the campaign's amplitude scale). Reported per kind and per
edge steepness (equivalent ramp length of the steepest edge, ``depth / max slope``, over the A0
wavelength at the burst centre): S0 and A0 arrival error, full minus fast, of the feature
extractor's envelope-peak arrival (group delay) and of its cross-correlation arrival; the
loss-induced A0 envelope shift (against each model's own pristine record) of fast over full;
the zero-lag waveform correlation over the S0-to-A0 windows; the S0 and A0 energy-ratio error
(full minus fast, dB).

Part 2, study: a 3 mm 2024-T3 plate at 200 kHz over 250 mm, 1 mm deep milled patches of 20, 40
and 80 mm (abrupt steps; or raised-cosine edges 0.5 x the length), on the top, the bottom or
half on each surface (a symmetric 2 mm section), on a grid of 18 cells through the wall (so 0.5
and 1 mm are whole cells). Every case is run twice, driven by pin-force pairs on both surfaces in
phase (S0 only) and in opposition (A0 only), recording both surfaces: the mode-pure A0 -> A0
transfer (its group delay against Rayleigh-Lamb phase integration, its amplitude), the A0 -> S0
conversion and, by superposition, the family's own top-surface transducer pair (what a user and
the feature extractor see). A third run puts A0 receivers on both surfaces inside a 200 mm
one-sided patch: the A0 phase and group velocity of the thinned section against Rayleigh-Lamb.

Part 2 lives in benchmarks/_fast_vs_full_study.py. Writes a self-contained HTML report (matplotlib figures as base64 PNG, no network) and prints
the tables. Run:

    .venv/bin/python benchmarks/bench_fast_vs_full.py [--family F.toml] [--cases 24] [--jobs 2]
        [--out bench_fast_vs_full.html] [--skip-domain] [--skip-study]
"""
from __future__ import annotations

import argparse
import base64
import html
import io
import math
import time
from pathlib import Path

import matplotlib
import numpy as np
import pandas as pd

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402

from waneguide.core.runner import run_tasks  # noqa: E402
from waneguide.features.dispersion import fundamental_dispersion  # noqa: E402
from waneguide.features.extractor import FeatureExtractor  # noqa: E402
from waneguide.features.windows import mode_windows  # noqa: E402
from waneguide.simulation._fullwave_runs import FullwaveSetup, calibrate  # noqa: E402
from waneguide.simulation.forward import ForwardModel  # noqa: E402
from waneguide.simulation.fullwave import simulate_fullwave  # noqa: E402
from waneguide.simulation.profiles import PatchSpec, loss_flat_patch  # noqa: E402

from _fast_vs_full_study import (  # noqa: E402  (a sibling module of this script)
    DX_PROFILE_M,
    ROOT,
    bench_family,
    findings,
    interpretation,
    load_mapping,
    run_study,
)

STEEPNESS_BINS = ((0.0, 0.1, "abrupt (< 0.1 lambda_A0)"), (0.1, 0.5, "steep (0.1-0.5 lambda)"),
                  (0.5, np.inf, "gradual (> 0.5 lambda)"))
KINDS = [(s, d) for d in ("one", "two") for s in ("flat", "pit", "rough")]
# ----------------------------------------------------------------------------------------- families
# ----------------------------------------------------------------------------------------- domain cases
def domain_cases(family, n: int, seed: int) -> list[dict]:
    """Profiles stratified over KINDS (module docstring); loss on the fine grid x (top, bottom) [m]."""
    rng = np.random.default_rng(seed)
    dom, L, t = family.domain, family.path_length_m, family.nominal_thickness_m
    a = family.path.transducer_diameter_mm * 0.5e-3
    x = np.arange(0.0, L + DX_PROFILE_M / 2, DX_PROFILE_M)
    out = []
    for i in range(n):
        shape, sides = KINDS[i % len(KINDS)]
        depth = t * rng.uniform(max(10.0, dom.max_loss_pct[0]), dom.max_loss_pct[1]) / 100
        length = min(rng.uniform(*dom.patch_length_mm) * 1e-3, 0.5 * L)
        lo, hi = a + 5e-3 + length / 2, L - a - 5e-3 - length / 2
        centre = rng.uniform(max(lo, dom.position_fraction[0] * L), min(hi, dom.position_fraction[1] * L))
        taper = (0.02, 0.08, 0.25)[(i // len(KINDS)) % 3] * length
        kind = shape if shape != "pit" else ("gaussian", "elliptical")[(i // len(KINDS)) % 2]
        seed_i = int(rng.integers(2**62))

        def loss(c, ln, side_seed):
            if kind == "flat":
                return loss_flat_patch(x, centre_m=c, length_m=ln, depth_m=1.0, taper_m=taper * ln / length)
            return PatchSpec(kind, c, ln, 1.0, "top", side_seed).loss(x, 1.0)

        top, bottom = loss(centre, length, seed_i), np.zeros_like(x)
        if sides == "two":
            split = rng.uniform(0.3, 0.7)
            bottom = (1 - split) * loss(centre + rng.uniform(-0.15, 0.15) * length, length * rng.uniform(0.6, 1.0),
                                        seed_i + 1)
            top = split * top
        peak = (top + bottom).max()
        top, bottom = top * depth / peak, bottom * depth / peak
        out.append({"case": i, "shape": shape, "kind": kind, "sides": sides, "depth_mm": depth * 1e3,
                    "length_mm": length * 1e3, "centre_mm": centre * 1e3, "x": x, "top": top, "bottom": bottom})
    return out


def edge_length_m(c: dict) -> float:
    """Equivalent ramp length of the steepest edge: each surface's depth over its largest slope (the shorter)."""
    ells = []
    for s in (c["top"], c["bottom"]):
        if s.max() > 0:
            ells.append(s.max() / np.abs(np.gradient(s, c["x"])).max())
    return min(ells)


def _fullwave_task(top, bottom, *, family, x, grid) -> tuple[np.ndarray, float]:
    t0 = time.perf_counter()
    top = top if top is not None and top.any() else None
    bottom = bottom if bottom is not None and bottom.any() else None
    res = simulate_fullwave(family, top, bottom, x if (top is not None or bottom is not None) else None, grid=grid)
    return res.waveforms[0], time.perf_counter() - t0


def run_domain(family, n: int, seed: int, jobs: int) -> dict:
    cases = domain_cases(family, n, seed)
    fm = ForwardModel(family)
    t_ref = family.environment.reference_temperature_c
    grid = FullwaveSetup.for_family(family).grid_at(family, t_ref)
    x = cases[0]["x"] if cases else np.arange(0.0, family.path_length_m, DX_PROFILE_M)
    tasks = {"pristine": (None, None), **{c["case"]: (c["top"], c["bottom"]) for c in cases}}
    got = dict(run_tasks(_fullwave_task, tasks, n_jobs=jobs, shared={"family": family, "x": x, "grid": grid},
                         progress=True, desc=f"full-wave {family.name}", unit="run"))
    cal = calibrate(fm, got["pristine"][0])
    scale = cal["amplitude_scale_v_per_unit"]
    keys = ["pristine", *[c["case"] for c in cases]]
    full = fm.confound(scale * np.stack([got[k][0] for k in keys]), t_ref)
    thick = np.stack([np.full(fm.x_m.size, fm.nominal_thickness_m)]
                     + [fm.thickness_on_segments(c["x"], fm.nominal_thickness_m - c["top"] - c["bottom"]) for c in cases])
    fast = fm.synthesize(thick, t_ref, echoes=False)
    fx = FeatureExtractor(family)
    feats = {name: fx.extract_batch(w[1:], w[0], temperature_c=t_ref, baseline_temperature_c=t_ref, on_reject="nan")
             for name, w in (("fast", fast), ("full", full))}
    lam_a0 = fundamental_dispersion(family.build_material(), family.nominal_thickness_m,
                                    family.excitation.centre_frequency_hz).phase_velocity_m_s[0, 1, 0] \
        / family.excitation.centre_frequency_hz
    win = mode_windows(family)
    i0 = win["S0"].indices(fm.sample_rate_hz, fm.pretrigger_s, fm.n_samples)[0]
    i1 = win["A0"].indices(fm.sample_rate_hz, fm.pretrigger_s, fm.n_samples)[1]
    rows = []
    for j, c in enumerate(cases):
        ff, fs_ = feats["full"].iloc[j], feats["fast"].iloc[j]
        ell = edge_length_m(c) / lam_a0
        row = {k: c[k] for k in ("case", "shape", "kind", "sides", "depth_mm", "length_mm", "centre_mm")}
        row["edge_over_lambda"] = ell
        row["steepness"] = next(lbl for lo, hi, lbl in STEEPNESS_BINS if lo <= ell < hi)
        for m in ("s0", "a0"):
            row[f"{m}_arr_env_err_us"] = (ff[f"{m}_arrival_envelope_s"] - fs_[f"{m}_arrival_envelope_s"]) * 1e6
            row[f"{m}_arr_xcorr_err_us"] = (ff[f"{m}_arrival_xcorr_s"] - fs_[f"{m}_arrival_xcorr_s"]) * 1e6
            row[f"{m}_shift_full_us"] = ff[f"{m}_shift_envelope_s"] * 1e6
            row[f"{m}_shift_fast_us"] = fs_[f"{m}_shift_envelope_s"] * 1e6
            row[f"{m}_energy_err_db"] = ff[f"{m}_energy_ratio_db"] - fs_[f"{m}_energy_ratio_db"]
        a, b = full[j + 1, i0:i1], fast[j + 1, i0:i1]
        row["corr"] = float(np.dot(a, b) / math.sqrt(np.dot(a, a) * np.dot(b, b)))
        row["full_run_s"] = got[c["case"]][1]
        rows.append(row)
    return {"table": pd.DataFrame(rows), "calibration": cal, "full": full, "fast": fast, "cases": cases,
            "family": family, "grid": grid, "pristine_run_s": got["pristine"][1], "time_s": fm.time_s}


def summarise(df: pd.DataFrame) -> pd.DataFrame:
    """Per kind, per steepness and overall: means of |errors|, the median A0 shift ratio fast / full, mean correlation."""
    def agg(g: pd.DataFrame) -> dict:
        big = g["a0_shift_full_us"].abs() > 0.1  # shift ratios of shifts under 0.1 us are noise
        return {"n": len(g),
                "S0 |d arr| env us": g["s0_arr_env_err_us"].abs().mean(),
                "A0 |d arr| env us": g["a0_arr_env_err_us"].abs().mean(),
                "A0 |d arr| xcorr us": g["a0_arr_xcorr_err_us"].abs().mean(),
                "A0 shift fast/full": (g["a0_shift_fast_us"] / g["a0_shift_full_us"])[big].median(),
                "corr": g["corr"].mean(),
                "S0 |dE| dB": g["s0_energy_err_db"].abs().mean(),
                "A0 |dE| dB": g["a0_energy_err_db"].abs().mean()}
    parts = [{"group": f"{s} / {d}-sided", **agg(g)} for (s, d), g in df.groupby(["shape", "sides"], sort=False)]
    parts += [{"group": lbl, **agg(g)} for lbl, g in df.groupby("steepness", sort=False)]
    parts.append({"group": "all", **agg(df)})
    return pd.DataFrame(parts)


# ----------------------------------------------------------------------------------------- study
# ----------------------------------------------------------------------------------------- report
def _png(fig) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90, bbox_inches="tight")
    plt.close(fig)
    return '<img alt="figure" src="data:image/png;base64,' + base64.b64encode(buf.getvalue()).decode() + '">'


def _colour(kind: tuple[str, str]) -> str:
    return f"C{KINDS.index(kind)}"


def domain_figures(res: dict) -> list[str]:
    df = res["table"]
    figs = []
    fig, axs = plt.subplots(1, 2, figsize=(11, 4.5))
    for ax, m in zip(axs, ("a0", "s0")):
        for kind, g in df.groupby(["shape", "sides"], sort=False):
            ax.scatter(g[f"{m}_shift_full_us"], g[f"{m}_shift_fast_us"], c=_colour(kind), label=f"{kind[0]}/{kind[1]}")
        lim = np.nanmax(np.abs(df[[f"{m}_shift_full_us", f"{m}_shift_fast_us"]].to_numpy())) * 1.1 + 1e-3
        ax.plot([-lim, lim], [-lim, lim], "k:", lw=1)
        ax.set(xlabel="full-wave envelope shift [us]", ylabel="fast envelope shift [us]",
               title=f"{m.upper()}: loss-induced envelope delay")
    axs[0].legend(fontsize=8)
    figs.append(_png(fig))
    fig, axs = plt.subplots(1, 3, figsize=(15, 4.2))
    for kind, g in df.groupby(["shape", "sides"], sort=False):
        kw = dict(c=_colour(kind), label=f"{kind[0]}/{kind[1]}")
        axs[0].scatter(g["edge_over_lambda"], g["a0_arr_env_err_us"], **kw)
        axs[1].scatter(g["edge_over_lambda"], g["corr"], **kw)
        axs[2].scatter(g["edge_over_lambda"], g["a0_energy_err_db"], **kw)
    for ax, lab in zip(axs, ("A0 arrival error full - fast [us]", "waveform correlation", "A0 energy-ratio error [dB]")):
        ax.set_xscale("log")
        ax.set(xlabel="edge ramp length / A0 wavelength", ylabel=lab)
        for lo, _, _ in STEEPNESS_BINS[1:]:
            ax.axvline(lo, color="0.7", lw=0.8)
    axs[0].legend(fontsize=7)
    figs.append(_png(fig))
    worst = df.sort_values("corr").iloc[[0, len(df) // 2]]
    fig, axs = plt.subplots(len(worst), 1, figsize=(11, 2.8 * len(worst)), sharex=True)
    t = res["time_s"] * 1e6
    for ax, (_, r) in zip(np.atleast_1d(axs), worst.iterrows()):
        j = int(r["case"]) + 1
        ax.plot(t, res["full"][j], lw=0.9, label="full-wave")
        ax.plot(t, res["fast"][j], "--", lw=0.9, label="fast")
        ax.set_title(f"case {int(r['case'])}: {r['kind']} {r['sides']}-sided, {r['depth_mm']:.2f} mm deep, "
                     f"{r['length_mm']:.0f} mm, edge {r['edge_over_lambda']:.2f} lambda, corr {r['corr']:.3f}")
        ax.legend(fontsize=8)
    np.atleast_1d(axs)[-1].set_xlabel("time after trigger [us]")
    figs.append(_png(fig))
    return figs


def study_figures(st: dict) -> list[str]:
    t = st["time_s"] * 1e6
    figs = []
    names = st["names"]
    show = ["abrupt top 40 mm", "abrupt bottom 40 mm", "abrupt sym 40 mm", "smooth top 80 mm"]
    fig, axs = plt.subplots(len(show), 1, figsize=(11, 2.6 * len(show)), sharex=True)
    for ax, k in zip(axs, show):
        j = names.index(k) + 1
        ax.plot(t, st["full_pair"][0], color="0.75", lw=0.8, label="full-wave, pristine")
        ax.plot(t, st["full_pair"][j], lw=0.9, label="full-wave")
        ax.plot(t, st["fast"][j], "--", lw=0.9, label="fast")
        ax.set_title(f"{k}: the family's top-surface disc pair")
        ax.set_xlim(30, 150)
        ax.legend(fontsize=8)
    axs[-1].set_xlabel("time after trigger [us]")
    figs.append(_png(fig))
    fig, axs = plt.subplots(1, 2, figsize=(13, 4.2))
    for k in ("abrupt top 40 mm", "abrupt sym 40 mm"):
        axs[0].plot(t, st["aa"][k], lw=0.9, label=f"A0->A0, {k}")
        axs[0].plot(t, st["as"][k], lw=0.9, label=f"A0->S0, {k}")
    axs[0].plot(t, st["aa"]["pristine"], color="0.7", lw=0.8, label="A0->A0, pristine")
    axs[0].set(xlim=(30, 150), xlabel="time after trigger [us]", title="mode-pure drive and reception")
    axs[0].legend(fontsize=7)
    for i, k in enumerate(("abrupt top 40 mm", "abrupt sym 40 mm", "abrupt top 80 mm", "smooth top 80 mm",
                           "smooth sym 80 mm")):
        f, tau, wkb = st["curves"][k]
        axs[1].plot(f / 1e3, tau * 1e6, f"C{i}", label=f"full-wave, {k}")
        axs[1].plot(f / 1e3, wkb * 1e6, f"C{i}:", lw=1)
    axs[1].set(xlabel="frequency [kHz]", ylabel="A0 -> A0 group-delay change [us]",
               title="group delay of the patch (solid) and phase integration (dotted)")
    axs[1].legend(fontsize=7)
    figs.append(_png(fig))
    return figs


def _table_html(df: pd.DataFrame) -> str:
    return df.to_html(index=False, float_format=lambda v: f"{v:.3g}", border=0, classes="t")


def write_report(path: Path, dom: dict | None, st: dict | None) -> None:
    parts = ["<!doctype html><html><head><meta charset='utf-8'><title>fast vs full-wave</title><style>",
             "body{font-family:sans-serif;max-width:1300px;margin:2em auto;line-height:1.4}"
             "table.t{border-collapse:collapse;font-size:13px}table.t td,table.t th{padding:2px 8px;"
             "border-bottom:1px solid #ddd;text-align:right}img{max-width:100%}</style></head><body>",
             "<h1>Fast model against the full-wave solver</h1>",
             f"<p>{html.escape(__doc__.split(chr(10) + chr(10))[1])}</p>"]
    if dom is not None:
        fam, cal, g = dom["family"], dom["calibration"], dom["grid"]
        df = dom["table"]
        parts += [f"<h2>Domain of {html.escape(fam.name)}: {len(df)} cases</h2>",
                  f"<p>Full-wave grid dx = {g.dx_m * 1e3:.4f} mm, dt = {g.dt_s * 1e9:.2f} ns, {g.npml} absorbing "
                  f"columns per end; {np.mean(df['full_run_s']):.1f} s per full-wave run (pristine "
                  f"{dom['pristine_run_s']:.1f} s). Amplitude scale {cal['amplitude_scale_v_per_unit']:.4g} V per "
                  f"(m/s per N/m); pristine S0 / A0 peaks full/fast {cal['s0_peak_full_over_fast']:.2f} / "
                  f"{cal['a0_peak_full_over_fast']:.2f}, arrivals full-fast {cal['s0_arrival_full_minus_fast_s'] * 1e6:.2f}"
                  f" / {cal['a0_arrival_full_minus_fast_s'] * 1e6:.2f} us.</p>",
                  _table_html(summarise(df)), *domain_figures(dom), "<h3>Cases</h3>",
                  _table_html(df.drop(columns=["case"]))]
    if st is not None:
        parts += ["<h2>Study: abrupt 1 mm patch in a 3 mm plate at 200 kHz</h2>",
                  f"<p>Grid dx = {st['grid'].dx_m * 1e3:.4f} mm ({st['family'].nominal_thickness_m / st['grid'].dx_m:.0f}"
                  f" cells through the wall), {st['runs']} runs in {st['seconds']:.0f} s.</p><ul>",
                  *[f"<li>{html.escape(s)}</li>" for s in findings(st)], "</ul><h3>Why</h3>",
                  *[f"<p>{html.escape(s)}</p>" for s in interpretation(st)], _table_html(st["table"]),
                  *study_figures(st)]
    parts.append("</body></html>")
    path.write_text("\n".join(parts), encoding="utf-8")


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--family", type=Path, default=ROOT / "configs" / "families" / "demo_fb2.toml")
    ap.add_argument("--cases", type=int, default=24, help="domain cases (stratified over 6 kinds)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--jobs", type=int, default=1, help="worker processes for the full-wave runs")
    ap.add_argument("--study-cells", type=int, default=18, help="cells through the 3 mm wall in the study")
    ap.add_argument("--out", type=Path, default=Path("bench_fast_vs_full.html"))
    ap.add_argument("--skip-domain", action="store_true")
    ap.add_argument("--skip-study", action="store_true")
    args = ap.parse_args(argv)
    pd.set_option("display.width", 200)
    pd.set_option("display.max_columns", 30)
    dom = st = None
    if not args.skip_domain:
        dom = run_domain(bench_family(load_mapping(args.family), str(args.family)), args.cases, args.seed, args.jobs)
        print(f"domain of {dom['family'].name}: {len(dom['table'])} cases, "
              f"{np.mean(dom['table']['full_run_s']):.1f} s per full-wave run")
        print(summarise(dom["table"]).to_string(index=False, float_format=lambda v: f"{v:.3g}"))
    if not args.skip_study:
        st = run_study(args.jobs, args.study_cells)
        print(f"study: 3 mm plate at 200 kHz, {st['runs']} runs in {st['seconds']:.0f} s")
        print(st["table"].to_string(index=False, float_format=lambda v: f"{v:.3g}"))
        print("\n".join(findings(st)))
        print("\n\n".join(interpretation(st)))
    write_report(args.out, dom, st)
    print(f"wrote {args.out}")


if __name__ == "__main__":
    main()
