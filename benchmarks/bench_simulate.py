"""Speed and memory of the simulator against issue 3's targets (2 cores).

Targets:
- at least 2,000 simulated captures per second on 2 cores (8,192 samples, S0 + A0,
  1 mm segments, every confounder on: temperature, coupling drift, jitter, white and
  coherent noise, attenuation, end and edge echoes); a "capture" is one case's
  waveform; the specimen baselines computed alongside (one per 4 states) are extra
  work, counted separately as waveforms/s;
- a 20,000-case campaign written to disk in under 1 minute;
- memory bounded by chunking: peak resident memory of the workers does not grow
  with the number of cases.

Run: .venv/bin/python benchmarks/bench_simulate.py [--family FAMILY.toml] [--cases 20000]
"""
from __future__ import annotations

import argparse
import os
import resource
import shutil
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

TARGET_CAPTURES_PER_S = 2000.0
TARGET_CAMPAIGN_S = 60.0


def _throughput_task(fm, plan, seed):
    """Simulate one chunk in a worker and drop it (pure compute, no disk, no transfer)."""
    from waneguide.simulation._chunk import simulate_chunk

    arrays = simulate_chunk(fm, plan, seed)
    return len(arrays["case_index"]), len(arrays["specimen_index"])


def _peak_rss_mb() -> float:
    """Peak resident set of this process [MB] (VmHWM: unlike ru_maxrss it is not inherited over exec)."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return float(line.split()[1]) / 1024.0
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--family", default=str(ROOT / "configs" / "families" / "demo_fb2.toml"))
    ap.add_argument("--cases", type=int, default=20000)
    ap.add_argument("--jobs", type=int, default=2, help="worker processes (default 2)")
    args = ap.parse_args(argv)

    from joblib import Parallel, delayed

    from waneguide.features.family import load_family
    from waneguide.simulation.campaign import DEFAULT_CHUNK_SIZE, plan_campaign, run_campaign
    from waneguide.simulation.forward import ForwardModel

    fam = load_family(args.family)
    t0 = time.perf_counter()
    fm = ForwardModel(fam)
    t_build = time.perf_counter() - t0
    print(f"family {fam.name}: {fam.acquisition.record_length} samples, {fm.x_m.size} segments of "
          f"{fm.segment_m * 1e3:.2f} mm, {fm.frequency_hz.size} band bins, FFT length {fm.n_fft}; "
          f"table build {t_build:.2f} s (once per process)")

    # 1. in-memory throughput, one core and the requested workers
    n_tp = 8192
    plan = plan_campaign(fam, n_tp, seed=1)
    cs = DEFAULT_CHUNK_SIZE
    chunks = [plan.iloc[i:i + cs] for i in range(0, n_tp, cs)]
    _throughput_task(fm, chunks[0], 1)  # warm-up
    t0 = time.perf_counter()
    for c in chunks[:4]:
        _throughput_task(fm, c, 1)
    t1 = time.perf_counter() - t0
    print(f"one core: {4 * cs / t1:,.0f} captures/s")
    par = Parallel(n_jobs=args.jobs)
    par(delayed(_throughput_task)(fm, c, 1) for c in chunks[:args.jobs])  # start and warm the workers
    t0 = time.perf_counter()
    res = par(delayed(_throughput_task)(fm, c, 1) for c in chunks)
    t_par = time.perf_counter() - t0
    n_cap = sum(r[0] for r in res)
    n_base = sum(r[1] for r in res)
    rate = n_cap / t_par
    print(f"{args.jobs} jobs: {rate:,.0f} captures/s, {(n_cap + n_base) / t_par:,.0f} waveforms/s with "
          f"baselines (target {TARGET_CAPTURES_PER_S:,.0f} captures/s, ratio {rate / TARGET_CAPTURES_PER_S:.2f})")

    # 2. campaigns written to disk (fresh process pool state each: includes start-up and table build)
    tmp = Path(tempfile.mkdtemp(prefix="waneguide-bench-"))
    try:
        small = max(args.cases // 5, 1)
        for n in (small, args.cases):
            out = tmp / f"camp_{n}"
            t0 = time.perf_counter()
            camp = run_campaign(fam, n, out, seed=0, n_jobs=args.jobs, progress=False)
            dt = time.perf_counter() - t0
            size = sum(p.stat().st_size for p in out.rglob("*") if p.is_file())
            worker_peak = max(Parallel(n_jobs=args.jobs)(delayed(_peak_rss_mb)() for _ in range(4 * args.jobs)))
            line = (f"campaign of {n:,} cases to disk: {dt:.1f} s ({n / dt:,.0f} cases/s), {size / 1e9:.2f} GB, "
                    f"{len(camp.manifest['chunks'])} chunks; peak RSS main {_peak_rss_mb():.0f} MB, "
                    f"worker {worker_peak:.0f} MB")
            if n == args.cases:
                line += f" (target {TARGET_CAMPAIGN_S:.0f} s, ratio {dt / TARGET_CAMPAIGN_S:.2f})"
            print(line)
            shutil.rmtree(out)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
