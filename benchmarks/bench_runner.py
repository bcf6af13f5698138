"""Benchmarks of the runner: memory against sweep size, speed-up from parallel jobs.

Run: ``python benchmarks/bench_runner.py [--base 2000] [--mem-chunk 1000] [--speed 260000] [--chunk 4096] [--points 300]``.

1. Peak resident memory of a whole ``run`` (sample, compute, write parts,
   merge) for ``base`` and ``10 * base`` variants (same chunk size, so the
   per-chunk working set is the same and only growth with size shows), each run in its own fresh
   subprocess (``resource.getrusage(RUSAGE_CHILDREN).ru_maxrss`` of the
   child). Target: the 10x run needs at most 1.5x the memory.
2. Run time (inside the child, from the call of ``runner.run``) of a
   ``speed``-sized run with ``jobs=1`` and ``jobs=2``, side by side.
   Target: ``-j 2`` at least 1.6x faster than ``-j 1`` (needs two free
   cores; ``-j 2`` is this process plus one joblib worker). The time
   includes the run's cold set-up (importing numba and scipy.stats, loading
   the compiled kernels, the variants, the gain grid: about 1.3 s, the same
   for both and not parallel), so the run must be long enough to stand for
   an overnight job: the default 260000 samples make 64 chunks of 4096,
   about 15 s with ``-j 1``. The set-up is printed on its own.

Also printed: the sum of the per-chunk compute times (from ``OUT.log``)
over the run time, i.e. how many chunks were being computed at once on
average (on a loaded machine it shows whether a miss is the runner's or the
machine's), and the serial overheads read from ``OUT.log``: the set-up
before the first chunk, the mean time to write a part and to merge it into
the result, and the final merge step (envelope fold, rename).

Prints the figures and PASS/FAIL per target; exit status 0 either way (the
numbers are for the report, not an assertion).
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

CONFIG = """\
title = "Conveyor drive speed loop (benchmark)"

[parameters]
R  = {{ nominal = 1.2,    tol = "10%", units = "ohm" }}
L  = {{ nominal = 3.0e-3, low = 2.5e-3, high = 3.6e-3, units = "H" }}
J  = {{ nominal = 4.0e-4, tol = "15%", dist = "normal" }}
B  = {{ nominal = 1.0e-3, tol = 2.0e-4 }}
Kt = {{ nominal = 0.05,   tol = "5%" }}

[plant]
transfer = "Kt / (s*((J*s + B)*(L*s + R) + Kt^2))"

[loop]
controller = "(s + 20) / (s + 200)"
gain_range = [0, inf]
operating_gain = 10

[sweep]
designs = ["nominal", "corners", "lhs"]
samples = {samples}
seed = 1
chunk_size = {chunk}

[locus]
points = {points}
keep = "corners"
"""

CHILD = """
import json, multiprocessing, re, resource, sys, time
from sweep import runner
from sweep.config import load_config
cpu0 = resource.getrusage(resource.RUSAGE_SELF)
t0 = time.perf_counter()
runner.run(load_config(sys.argv[1]), out=sys.argv[2], jobs=int(sys.argv[3]), quiet=True)
dt = time.perf_counter() - t0
cpu1 = resource.getrusage(resource.RUSAGE_SELF)
t1 = time.perf_counter()
while multiprocessing.active_children() and time.perf_counter() - t1 < 30:
    time.sleep(0.01)  # the workers leave once the run is over; their CPU time counts once they have
kids = resource.getrusage(resource.RUSAGE_CHILDREN)
log = open(sys.argv[2] + ".log").read()
num = lambda pat: [float(x) for x in re.findall(pat, log)]
print(json.dumps({"seconds": dt,
                  "chunk_seconds": sum(num(r"computed in ([0-9.]+) s")),
                  "write": num(r"written in ([0-9.]+) s"), "merge": num(r"merged in ([0-9.]+) s"),
                  "setup": num(r"set-up ([0-9.]+) s")[-1], "final": num(r"final merge step ([0-9.]+) s")[-1],
                  "cpu_run": cpu1.ru_utime + cpu1.ru_stime - cpu0.ru_utime - cpu0.ru_stime,
                  "cpu_workers": kids.ru_utime + kids.ru_stime,
                  "maxrss_kb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss}))
"""


def one_run(folder: Path, samples: int, chunk: int, points: int, jobs: int, tag: str) -> dict:
    cfg = folder / f"{tag}.toml"
    cfg.write_text(CONFIG.format(samples=samples, chunk=chunk, points=points))
    out = folder / f"{tag}.nc"
    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    t0 = time.perf_counter()
    res = subprocess.run([sys.executable, "-c", CHILD, str(cfg), str(out), str(jobs)],
                         capture_output=True, text=True, check=True)
    wall = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    info = json.loads(res.stdout.strip().splitlines()[-1])
    info["wall"] = wall
    info["children_maxrss_kb"] = after if after > before else None  # max over children so far
    info["size_mb"] = out.stat().st_size / 1e6
    return info


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--base", type=int, default=2000, help="samples of the small memory run")
    ap.add_argument("--chunk", type=int, default=4096, help="chunk size of the speed runs")
    ap.add_argument("--mem-chunk", type=int, default=1000,
                    help="chunk size of the memory runs (<= base, so both runs hold full chunks)")
    ap.add_argument("--points", type=int, default=300)
    ap.add_argument("--speed", type=int, default=260000, help="samples of the speed runs")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        small = one_run(folder, args.base, args.mem_chunk, args.points, 1, "small")
        big = one_run(folder, 10 * args.base, args.mem_chunk, args.points, 1, "big")
        ratio = big["maxrss_kb"] / small["maxrss_kb"]
        print(f"memory: {args.base + 9} variants -> peak RSS {small['maxrss_kb'] / 1024:.1f} MiB "
              f"({small['seconds']:.1f} s, file {small['size_mb']:.2f} MB)")
        print(f"memory: {10 * args.base + 9} variants -> peak RSS {big['maxrss_kb'] / 1024:.1f} MiB "
              f"({big['seconds']:.1f} s, file {big['size_mb']:.2f} MB)")
        print(f"memory ratio (10x variants): {ratio:.3f}  target <= 1.5  {'PASS' if ratio <= 1.5 else 'FAIL'}")

        j1 = one_run(folder, args.speed, args.chunk, args.points, 1, "j1")
        j2 = one_run(folder, args.speed, args.chunk, args.points, 2, "j2")
        sp = j1["seconds"] / j2["seconds"]
        print(f"speed: {args.speed + 9} variants, chunk {args.chunk}: -j 1 {j1['seconds']:.2f} s, "
              f"-j 2 {j2['seconds']:.2f} s ({(args.speed + 9) / j2['seconds']:.0f} variants/s)")
        print(f"chunk compute seconds / run seconds (workers kept busy): -j 1 "
              f"{j1['chunk_seconds'] / j1['seconds']:.2f}, -j 2 {j2['chunk_seconds'] / j2['seconds']:.2f}")
        for tag, r in (("-j 1", j1), ("-j 2", j2)):
            print(f"serial overheads {tag}: set-up (designs, gain grid, pool start) {r['setup']:.3f} s, "
                  f"per part written here: write {sum(r['write']) / max(1, len(r['write'])):.3f} s, "
                  f"merge into the result {sum(r['merge']) / len(r['merge']):.3f} s; "
                  f"final merge step {r['final']:.3f} s")
        print(f"speed-up -j 2 over -j 1: {sp:.2f}x  target >= 1.6  {'PASS' if sp >= 1.6 else 'FAIL'}"
              f"  (cores: {os.cpu_count()}, load average {os.getloadavg()[0]:.2f})")
        # On a shared machine the wall time of -j 2 depends on what else runs; the CPU time each of
        # its processes used is what it would take on two free cores (no process of the run waits
        # for another to hand out work, so each is busy from its start to the end).
        est = j1["cpu_run"] / max(j2["cpu_run"], j2["cpu_workers"])
        print(f"CPU time: -j 1 {j1['cpu_run']:.2f} s; -j 2 this process {j2['cpu_run']:.2f} s, worker "
              f"{j2['cpu_workers']:.2f} s -> speed-up on two free cores about {est:.2f}x")


if __name__ == "__main__":
    main()
