"""Speed of the Rayleigh-Lamb engine against the foundation's targets (one core).

Targets (issue: foundation):
- full curve set for one thickness, all modes up to 6 MHz*mm, 1,000 frequencies: < 0.5 s
- S0 and A0 on 50 thicknesses x 500 frequencies: < 2 s
Run: .venv/bin/python benchmarks/bench_dispersion.py
"""
from __future__ import annotations

import os
import time

os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy as np  # noqa: E402

from waneguide.features import fundamental_dispersion, get_material, lamb_dispersion  # noqa: E402


def best_of(fn, repeats=5):
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return min(times), out


def main() -> None:
    al = get_material("al-6061-t6")
    f = np.linspace(6e3, 6e6, 1000)  # 1 mm plate: fd up to 6 MHz*mm
    t_full, curves = best_of(lambda: lamb_dispersion(al, 1e-3, f))
    print(f"full curve set, 1 thickness x 1000 freqs, {len(curves.modes)} modes: {t_full:.3f} s "
          f"(target 0.5 s, ratio {t_full / 0.5:.2f})")
    d = np.linspace(1e-3, 3e-3, 50)
    f2 = np.linspace(2e3, 1e6, 500)
    t_fund, _ = best_of(lambda: fundamental_dispersion(al, d, f2), repeats=3)
    print(f"S0+A0, 50 thicknesses x 500 freqs (fast path): {t_fund:.3f} s (target 2 s, ratio {t_fund / 2:.2f})")
    t_gen, _ = best_of(lambda: lamb_dispersion(al, d, f2, modes=("S0", "A0")), repeats=1)
    print(f"S0+A0, 50 x 500 through the all-mode solver: {t_gen:.3f} s (for comparison)")


if __name__ == "__main__":
    main()
