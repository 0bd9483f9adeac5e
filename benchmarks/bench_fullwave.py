"""Speed of the full-wave solver against issue 10's targets (one core).

Targets:
- at least 3e8 cell-updates per second per core in float32 on a 3 mm x 700 mm plate at
  0.1 mm cells; printed with its ratio to a memory-bandwidth triad (numpy ``a = b + s * c``
  on arrays far larger than the caches) measured in the same run;
- one three-frequency case of a 2 mm plate over a 500 mm path (100, 150 and 250 kHz
  five-cycle bursts from one broadband run) in under 30 s.

Cells counted: the 30 x 7000 cells of the 3 mm x 700 mm plate (the kernel also sweeps
three void rows and the 40 absorbing columns per end, which are not counted). A cell update advances the five fields (vx, vz, sxx, szz, sxz) of one cell by one step:
about 30 floating-point operations and, out of cache, 10 streamed float32 arrays (5 fields
read and written, 5 coefficient arrays read) = 60 bytes. The triad moves 12 bytes per
element in one pass (numpy needs two, 20 bytes, which the bandwidth figure counts), so the
"triad-equivalent cell rate" is that bandwidth / 60 bytes.

Run: .venv/bin/python benchmarks/bench_fullwave.py [--steps 2000] [--skip-case]
"""
from __future__ import annotations

import argparse
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent  # the demo family files (waneguide is installed in the venv)

TARGET_CELL_UPDATES = 3e8
TARGET_CASE_S = 30.0
_BYTES_PER_CELL_UPDATE = 60.0


def triad_bytes_per_s(n: int = 20_000_000, repeats: int = 5) -> float:
    """Memory bandwidth [bytes/s] of the best of ``repeats`` numpy triads ``a = b + s * c`` in float32 (80 MB arrays)."""
    b = np.random.default_rng(0).random(n, dtype=np.float32)
    c = np.random.default_rng(1).random(n, dtype=np.float32)
    a = np.empty_like(b)
    s = np.float32(1.5)
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        np.multiply(c, s, out=a)
        np.add(a, b, out=a)
        best = min(best, time.perf_counter() - t0)
    # numpy makes the triad two passes: c read + a written, then a and b read + a written (20 bytes per element)
    return 5 * 4 * n / best


def kernel_rate(steps: int) -> tuple[float, tuple[int, int]]:
    from waneguide.features.materials import get_material
    from waneguide.simulation.fullwave import GridSpec, PlateRun, build_plate, cfl_limit_s

    mat = get_material("al-6061-t6")
    h = 1e-4
    grid = GridSpec(dx_m=h, dt_s=0.9 * cfl_limit_s(h, mat.cl_m_s), npml=40)
    plate = build_plate(mat, grid, 3e-3, x_start_m=0.0, x_end_m=0.7)
    run = PlateRun(plate, dtype=np.float32, pml_f0_hz=100e3)
    run.run(5)  # compile / load the cache outside the timing
    best = np.inf
    for _ in range(3):
        t0 = time.perf_counter()
        run.run(steps)
        best = min(best, time.perf_counter() - t0)
    plate_cells = round(3e-3 / h) * round(0.7 / h)
    return plate_cells * steps / best, plate.shape


def three_frequency_case() -> tuple[float, dict]:
    import tomllib

    from waneguide.features.family import family_from_mapping
    from waneguide.simulation.fullwave import BurstSpec, simulate_fullwave

    data = tomllib.loads((ROOT / "configs" / "families" / "demo_fb2.toml").read_text())
    data["path"].update(transducer_spacing_mm=500.0, transmitter_position_mm=150.0, flange_length_mm=800.0)
    data["domain"]["segment_mm"] = 1.0
    family = family_from_mapping(data, where="bench 2 mm x 500 mm")
    bursts = [BurstSpec(100e3, 5), BurstSpec(150e3, 5), BurstSpec(250e3, 5)]
    t0 = time.perf_counter()
    res = simulate_fullwave(family, bursts=bursts)
    return time.perf_counter() - t0, res.metadata()


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--steps", type=int, default=2000, help="time steps per kernel timing")
    ap.add_argument("--skip-case", action="store_true", help="only the kernel rate and the triad")
    args = ap.parse_args(argv)

    triad = triad_bytes_per_s()
    rate, shape = kernel_rate(args.steps)
    triad_cells = triad / _BYTES_PER_CELL_UPDATE
    print(f"kernel: 3 mm x 700 mm plate at 0.1 mm cells, grid {shape[0]} x {shape[1]}, float32, one core")
    print(f"  plate cell-updates per second: {rate:.3g}  (target >= {TARGET_CELL_UPDATES:.0e}: "
          f"{'met' if rate >= TARGET_CELL_UPDATES else 'NOT met'})")
    print(f"  memory triad (numpy a = b + s*c, float32): {triad / 1e9:.2f} GB/s = {triad_cells:.3g} "
          f"cell-updates/s at {_BYTES_PER_CELL_UPDATE:.0f} B each; kernel / triad-equivalent = {rate / triad_cells:.2f}")
    if args.skip_case:
        return
    elapsed, meta = three_frequency_case()
    print("three-frequency case: 2 mm plate, 500 mm path, 100/150/250 kHz bursts from one broadband run")
    print(f"  grid {meta['nz']} x {meta['nx']} (dx {meta['dx_m'] * 1e3:.4f} mm, {meta['npml']} absorbing columns per end), "
          f"dt {meta['dt_s'] * 1e9:.2f} ns, {meta['n_steps']} steps")
    print(f"  time loop {meta['runtime_s']:.2f} s ({meta['cell_updates_per_s']:.3g} cell-updates/s); whole case "
          f"{elapsed:.2f} s (target < {TARGET_CASE_S:.0f} s: {'met' if elapsed < TARGET_CASE_S else 'NOT met'})")


if __name__ == "__main__":
    main()
