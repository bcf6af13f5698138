"""End-to-end throughput of `sweep run` against bare eigenvalue baselines.

Measures, on the same variants and gains:

* the whole ``sweep.run`` (designs, gain grid, analysis, locus tracing with
  the envelope, part files, the result file) with ``-j 1`` and ``-j 2``,
  each in a fresh process, timed from the call of ``runner.run`` to its
  return. Process start-up is left out: the imports and the first call of
  the compiled kernels (loading them from numba's cache) happen before the
  clock starts. For ``-j 2`` the worker process is started by the run and
  its start-up is inside the time;
* a bare batched ``numpy.linalg.eigvals`` pass: companion matrices of the
  closed loop built and solved at every grid gain, batched over variants;
* a per-variant Python loop calling ``numpy.roots`` at every gain (timed on a
  subset and scaled up linearly).

Usage::

    python benchmarks/bench_run.py                 # 50 000 variants x 200 gains (a few minutes)
    python benchmarks/bench_run.py --variants 5000 # quicker

Ratios, not absolute times, are the result: the machine may be shared
(the load average is printed).
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from sweep import bench, designs, loop, runner
from sweep.config import parse_config

CHILD = """
import json, multiprocessing, resource, sys, time
t0 = time.perf_counter()
from sweep import runner
from sweep.config import load_config
config = load_config(sys.argv[1])
runner._warm_up(config)  # process start-up: imports and the compiled kernels' first call
startup = time.perf_counter() - t0
cpu0 = resource.getrusage(resource.RUSAGE_SELF)
t0 = time.perf_counter()
runner.run(config, out=sys.argv[2], jobs=int(sys.argv[3]), quiet=True)
seconds = time.perf_counter() - t0
cpu1 = resource.getrusage(resource.RUSAGE_SELF)
t1 = time.perf_counter()
while multiprocessing.active_children() and time.perf_counter() - t1 < 30:
    time.sleep(0.01)  # the workers leave once the run is over; their CPU time counts once they have
kids = resource.getrusage(resource.RUSAGE_CHILDREN)
print(json.dumps({"seconds": seconds, "startup": startup,
                  "cpu_run": cpu1.ru_utime + cpu1.ru_stime - cpu0.ru_utime - cpu0.ru_stime,
                  "cpu_workers": kids.ru_utime + kids.ru_stime}))
"""


def timed_run(cfg_path: Path, out: Path, jobs: int) -> dict:
    res = subprocess.run([sys.executable, "-c", CHILD, str(cfg_path), str(out), str(jobs)],
                         capture_output=True, text=True, check=True)
    return json.loads(res.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--variants", type=int, default=50000)
    ap.add_argument("--gains", type=int, default=200)
    ap.add_argument("--chunk", type=int, default=4096)
    ap.add_argument("--roots-subset", type=int, default=300, help="variants timed in the numpy.roots loop")
    ap.add_argument("--skip-j2", action="store_true")
    args = ap.parse_args()

    text = bench.DEFAULT_CONFIG.replace("samples = 50000", f"samples = {args.variants}").replace(
        "points = 200", f"points = {args.gains}"
    )
    text = text.replace("seed = 0\n", f"seed = 0\nchunk_size = {args.chunk}\n")
    with tempfile.TemporaryDirectory() as tmp:
        cfg_path = Path(tmp) / "bench.toml"
        cfg_path.write_text(text)
        config = parse_config(text, source=str(cfg_path))
        m, n = loop.open_loop_degrees(config)
        print(f"loop: degree {n} (numerator {m}), {len(config.uncertain)} uncertain parameters, "
              f"{args.variants} variants x {args.gains} gains, chunk {args.chunk}, keep = none; "
              f"load average {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores")

        j1 = timed_run(cfg_path, Path(tmp) / "j1.nc", 1)
        t_j1 = j1["seconds"]
        print(f"sweep run -j 1            {t_j1:9.2f} s  (process start-up before it: {j1['startup']:.2f} s)")

        t_j2 = t_j2_cpu = float("nan")
        if not args.skip_j2:
            j2 = timed_run(cfg_path, Path(tmp) / "j2.nc", 2)
            t_j2 = j2["seconds"]
            # On a shared machine the wall time of -j 2 depends on what else runs; the CPU time
            # each of its two processes used is what it would take on two free cores (no process
            # of the run waits for another, so each is busy from the start to the end).
            t_j2_cpu = max(j2["cpu_run"], j2["cpu_workers"])
            print(f"sweep run -j 2            {t_j2:9.2f} s  (CPU: this process {j2['cpu_run']:.2f} s, "
                  f"worker {j2['cpu_workers']:.2f} s; -j 1 used {j1['cpu_run']:.2f} s)")

        variants = designs.generate(config)
        N, D = loop.assemble(config, variants.values)
        gains = runner.nominal_gains(config)
        t0 = time.perf_counter()
        bench.companion_eigvals_pass(N, D, config.sigma, gains)
        t_eig = time.perf_counter() - t0
        print(f"bare eigvals pass         {t_eig:9.2f} s")

        sub = min(args.roots_subset, N.shape[0])
        t0 = time.perf_counter()
        width = D.shape[1]
        Np = np.zeros_like(D)
        Np[:, width - N.shape[1]:] = N
        for v in range(sub):
            for k in gains:
                np.roots(D[v] + config.sigma * k * Np[v])
        t_roots = (time.perf_counter() - t0) * N.shape[0] / sub
        print(f"numpy.roots loop          {t_roots:9.2f} s  (timed on {sub} variants, scaled)")

    print()
    print("| measure | ratio | target |")
    print("|---|---|---|")
    print(f"| `sweep run -j 1` / bare eigvals pass | {t_j1 / t_eig:.3f} | <= 0.5 |")
    print(f"| numpy.roots loop / `sweep run -j 1` | {t_roots / t_j1:.1f} | >= 50 |")
    if not args.skip_j2:
        print(f"| `-j 1` time / `-j 2` time | {t_j1 / t_j2:.2f} | >= 1.6 |")
        print(f"| `-j 1` CPU time / busiest `-j 2` process's CPU time (two free cores) "
              f"| {j1['cpu_run'] / t_j2_cpu:.2f} | >= 1.6 |")
    print(f"(load average at the end {os.getloadavg()[0]:.2f})")


if __name__ == "__main__":
    main()
