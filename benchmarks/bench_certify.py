"""Certified bounds on a 6-parameter motor-like loop: time to 1 %, boxes per second.

The loop is a winch drum driven through a gearbox by a DC motor (our own
scenario): ``Kt / (s((J s + B)(L s + R) + Kt^2)) / Ng`` with all six of
``J, B, L, R, Kt, Ng`` toleranced, a lead compensator and a sensor lag.

Printed, side by side in one run (the machine is shared, so compare ratios):

* time to ``rtol = 1 %`` and ``0.1 %`` with the default split rule
  ("sensitivity": the side with the largest first-order effect on the bound)
  and with the plain widest side, and their ratio;
* boxes per second on a fixed budget of boxes (throughput of the bounding
  itself, without the fixed start-up of the search);
* the lean pencil critical-gain routine that the branch-and-bound runs on its
  Kharitonov pencils against `sweep.analysis.analyze_stack` on the same stack
  (why the hot path does not call the full analysis).

Each figure is the median of ``--repeat`` runs (default 3).

Run: ``python benchmarks/bench_certify.py [--repeat N]``
"""
from __future__ import annotations

import argparse
import statistics
import time

import numpy as np

from sweep import analysis, loop
from sweep.certify import certify, pencil_critical_gains
from sweep.config import parse_config

CONFIG = """
title = "Winch drum position loop"

[parameters]
J  = { nominal = 6.0e-4, tol = "15%" }
B  = { nominal = 1.5e-3, tol = "20%" }
L  = { nominal = 2.5e-3, tol = "20%" }
R  = { nominal = 0.9,    tol = "10%" }
Kt = { nominal = 0.06,   tol = "5%" }
Ng = { nominal = 15.0,   tol = "3%" }

[plant]
transfer = "Kt / (s*((J*s + B)*(L*s + R) + Kt^2)) / Ng"

[loop]
controller = "(s + 15) / (s + 150)"
sensor = "1 / (0.002*s + 1)"
gain_range = [0, inf]
operating_gain = 200
"""


def _timed(cfg, **kw):
    t0 = time.perf_counter()
    res = certify(cfg, max_seconds=300, **kw)
    return time.perf_counter() - t0, res


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=3, help="runs per figure (median reported)")
    args = ap.parse_args()
    cfg = parse_config(CONFIG, source="bench_certify")
    certify(cfg, rtol=0.05)  # compile and warm up outside the timings

    print("certify, 6 uncertain parameters (degree-5 loop), median of", args.repeat, "runs:")
    for rtol in (0.01, 0.001):
        times: dict[str, list[float]] = {"sensitivity": [], "widest": []}
        last = {}
        for _ in range(args.repeat):
            for split in times:  # interleaved, so that load changes hit both alike
                dt, res = _timed(cfg, rtol=rtol, split=split)
                times[split].append(dt)
                last[split] = res
        for split, ts in times.items():
            res = last[split]
            print(f"  rtol={rtol:g} split={split:11s}: {res['status']}, lower={res['lower']:.6g}, "
                  f"upper={res['upper']:.6g}, gap={res['relative_gap']:.2e}, boxes={res['boxes']}, "
                  f"time={statistics.median(ts):.2f} s")
        ratio = statistics.median(times["widest"]) / statistics.median(times["sensitivity"])
        print(f"  rtol={rtol:g}: time widest / sensitivity = {ratio:.1f}")

    # throughput on a fixed number of boxes (the tolerance is never reached)
    budget = 20000
    rates = []
    for _ in range(args.repeat):
        dt, res = _timed(cfg, rtol=1e-9, max_boxes=budget)
        rates.append(res["boxes"] / dt)
    print(f"boxes per second on a budget of {budget} boxes: {statistics.median(rates):,.0f}")

    # the hot-path routine against the full analysis on 4 x 128 pencils' worth of loops
    rng = np.random.default_rng(0)
    V = 512
    vals = {p.name: p.low + rng.random(V) * (p.high - p.low) for p in cfg.uncertain}
    N, D = loop.assemble(cfg, vals)
    reps = 20
    t_lean, t_full = [], []
    for _ in range(args.repeat):
        t0 = time.perf_counter()
        for _ in range(reps):
            pencil_critical_gains(N, D, sigma=1, gain_range=cfg.gain_range, reference=200.0)
        t_lean.append((time.perf_counter() - t0) / reps)
        t0 = time.perf_counter()
        for _ in range(reps):
            analysis.analyze_stack(N, D, sigma=1, gain_range=cfg.gain_range, operating_gain=200.0)
        t_full.append((time.perf_counter() - t0) / reps)
    tl, tf = statistics.median(t_lean), statistics.median(t_full)
    print(f"critical gains of {V} loops: lean {tl * 1e3:.2f} ms, analyze_stack {tf * 1e3:.2f} ms, "
          f"ratio full/lean = {tf / tl:.1f}")


if __name__ == "__main__":
    main()
