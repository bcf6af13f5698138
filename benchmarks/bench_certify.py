"""Certified bounds on a 6-parameter motor-like loop: boxes per second and time to 1 %.

The loop is a winch drum driven through a gearbox by a DC motor (our own
scenario): ``Kt / (s((J s + B)(L s + R) + Kt^2)) / Ng`` with all six of
``J, B, L, R, Kt, Ng`` toleranced, a lead compensator and a sensor lag.  We
time `sweep.certify.certify` to ``rtol = 1 %`` (and a tighter 0.1 %), and,
side by side, the lean pencil critical-gain routine that the branch-and-bound
runs on its Kharitonov pencils against `sweep.analysis.analyze_stack` on the
same stack (the ratio is why the hot path does not call the full analysis).

Run: ``/work/venv/bin/python benchmarks/bench_certify.py``
"""
from __future__ import annotations

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


def main() -> None:
    cfg = parse_config(CONFIG, source="bench_certify")
    print("certify, 6 uncertain parameters (degree-5 loop):")
    for rtol in (0.01, 0.001):
        t0 = time.perf_counter()
        res = certify(cfg, rtol=rtol, max_seconds=120)
        dt = time.perf_counter() - t0
        print(
            f"  rtol={rtol:g}: status={res['status']}, lower={res['lower']:.6g}, upper={res['upper']:.6g}, "
            f"gap={res['relative_gap']:.2e}, boxes={res['boxes']}, time={dt:.2f} s, "
            f"boxes/s={res['boxes'] / dt:,.0f}"
        )

    # the hot-path routine against the full analysis on 4 x 128 pencils' worth of loops
    rng = np.random.default_rng(0)
    V = 512
    vals = {p.name: p.low + rng.random(V) * (p.high - p.low) for p in cfg.uncertain}
    N, D = loop.assemble(cfg, vals)
    reps = 20
    t0 = time.perf_counter()
    for _ in range(reps):
        pencil_critical_gains(N, D, sigma=1, gain_range=cfg.gain_range, reference=200.0)
    t_lean = (time.perf_counter() - t0) / reps
    t0 = time.perf_counter()
    for _ in range(reps):
        analysis.analyze_stack(N, D, sigma=1, gain_range=cfg.gain_range, operating_gain=200.0)
    t_full = (time.perf_counter() - t0) / reps
    print(f"critical gains of {V} loops: lean {t_lean * 1e3:.2f} ms, analyze_stack {t_full * 1e3:.2f} ms, "
          f"ratio full/lean = {t_full / t_lean:.1f}")


if __name__ == "__main__":
    main()
