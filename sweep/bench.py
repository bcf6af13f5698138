"""Throughput on this machine, and what fits in a night.

`measure` times, side by side in one process and on the same variants and
gains, the per-variant analysis, the locus tracing, the whole per-chunk work
of `sweep run`, a bare batched-eigenvalue pass (companion matrices built and
solved at every grid gain) and the naive per-variant `numpy.roots` loop.
Ratios between them are what to compare; absolute figures move with the
machine's load. `estimate_seconds` gives `sweep check` its run-time
estimate from the same per-chunk work.
"""
from __future__ import annotations

import os
import time
from typing import Any

import numpy as np

from .config import Config, parse_config

# A degree-6 loop with five toleranced parameters: a belt drive with a
# flexible coupling, a current loop lag and a sensor lag (invented for the
# benchmark).
DEFAULT_CONFIG = """
title = "Benchmark loop: belt drive with flexible coupling (degree 6)"

[parameters]
Kt = { nominal = 0.08, tol = "5%" }
J1 = { nominal = 2.0e-3, tol = "15%" }
J2 = { nominal = 5.0e-3, tol = "20%" }
Ks = { nominal = 40.0, tol = "10%" }
Ta = { nominal = 2.0e-3, tol = "20%" }
Cs = { nominal = 0.02, dist = "fixed" }
Tf = { nominal = 1.0e-3, dist = "fixed" }

[plant]
transfer = "Kt*(Cs*s + Ks) / (s*(J1*J2*s^2 + Cs*(J1 + J2)*s + Ks*(J1 + J2)) * (Ta*s + 1))"

[loop]
controller = "(s + 5) / (s + 50)"
sensor = "1 / (Tf*s + 1)"

[sweep]
designs = ["random"]
samples = 50000
seed = 0

[locus]
points = 200
keep = "none"
"""

# Fraction of a perfect speed-up that whole runs reach with -j N on N free
# cores, for projections: benchmarks/bench_run.py measured -j 2 at 1.6-1.75x
# -j 1 on two free cores (see the README's results table); 0.8 is the low end.
PARALLEL_EFFICIENCY = 0.8


def default_config() -> Config:
    """The built-in degree-6 benchmark loop."""
    return parse_config(DEFAULT_CONFIG, source="<bench>")


def _random_variants(config: Config, count: int, seed: int = 0):
    """`count` variants drawn uniformly from the tolerance box (a `designs.Variants`)."""
    from .designs import Variants

    rng = np.random.default_rng(seed)
    values = {
        p.name: (rng.uniform(p.low, p.high, count) if p.uncertain else np.full(count, p.nominal))
        for p in config.parameters
    }
    return Variants(values=values, design=np.array(["random"] * count), start=0)


def companion_eigvals_pass(N: np.ndarray, D: np.ndarray, sigma: int, gains: np.ndarray) -> np.ndarray:
    """The baseline: at every gain build the closed-loop companion matrices and solve them.

    Returns the spectral abscissa (V, G) so that the work cannot be skipped.
    """
    V, width = D.shape
    n = width - 1
    Np = np.zeros_like(D)
    Np[:, width - N.shape[1]:] = N
    out = np.empty((V, gains.size))
    comp = np.zeros((V, n, n))
    idx = np.arange(n - 1)
    for j, k in enumerate(gains):
        P = D + sigma * k * Np
        comp[:] = 0.0
        comp[:, 0, :] = -P[:, 1:] / P[:, :1]
        comp[:, idx + 1, idx] = 1.0
        out[:, j] = np.linalg.eigvals(comp).real.max(axis=1)
    return out


def _timed(fn, *args, **kwargs) -> float:
    t0 = time.perf_counter()
    fn(*args, **kwargs)
    return time.perf_counter() - t0


def roots_loop(N: np.ndarray, D: np.ndarray, sigma: int, gains: np.ndarray) -> np.ndarray:
    """The naive route: a Python loop over variants and gains calling `numpy.roots`.

    Returns the spectral abscissa (V, G).
    """
    V, width = D.shape
    Np = np.zeros_like(D)
    Np[:, width - N.shape[1]:] = N
    out = np.empty((V, gains.size))
    for v in range(V):
        for j, k in enumerate(gains):
            out[v, j] = np.roots(D[v] + sigma * k * Np[v]).real.max()
    return out


#: stages of `measure`, in report order, with their labels
STAGES = {
    "analysis": "analysis (boundaries, Routh, sketch, margins)",
    "locus": "locus, every branch returned",
    "chunk": "one chunk of 'sweep run' (keep none)",
    "eigvals": "bare eigenvalue pass at every gain",
    "roots_loop": "numpy.roots loop per variant and gain",
}


def measure(config: Config | None = None, *, variants: int | None = None, budget_seconds: float = 30.0) -> dict[str, Any]:
    """Measure throughput and project a night's run.

    Parameters
    ----------
    config
        The loop to measure; default the built-in degree-6 loop.
    variants
        How many variants to time (default: chosen from a short calibration so
        the whole measurement takes about ``budget_seconds``).
    budget_seconds
        Rough wall-time budget of the measurement.

    Returns
    -------
    dict
        Seconds and variants per second (one core) of each stage of `STAGES`
        on the same variants and grid gains: the analysis alone, the locus
        with every branch returned, one chunk as `sweep run` computes it
        (assembly, locus and envelope, analysis; no loci kept), the bare
        batched eigenvalue pass (companion matrices built and solved at every
        grid gain), and a Python loop calling `numpy.roots` at every gain
        (timed on a few variants and scaled). Also the ratio of each stage to
        the eigenvalue pass, the analysis against an eigenvalue pass at a
        single gain, and projections for 1 h and 8 h with ``-j`` all cores.

    Notes
    -----
    The projection multiplies the one-core chunk rate by the number of cores
    and by `PARALLEL_EFFICIENCY`, the fraction of a perfect speed-up that
    whole runs reach here (measured by ``benchmarks/bench_run.py``; writing
    and merging the result are inside it).
    """
    from . import analysis, locus, loop, runner

    config = config or default_config()
    gains = runner.nominal_gains(config)
    cores = os.cpu_count() or 1

    def stages(V: int) -> dict[str, float]:
        vs = _random_variants(config, V)
        N, D = loop.assemble(config, vs.values, count=vs.count)
        none = np.zeros(V, dtype=bool)
        sub = min(V, 20)
        return {
            "analysis": _timed(analysis.analyze_stack, N, D, sigma=config.sigma, gain_range=config.gain_range,
                               operating_gain=config.operating_gain),
            "locus": _timed(locus.trace, N, D, sigma=config.sigma, gains=gains),
            "chunk": _timed(runner.compute_chunk, config, vs, gains, none),
            "eigvals": _timed(companion_eigvals_pass, N, D, config.sigma, gains),
            "eigvals_one_gain": _timed(companion_eigvals_pass, N, D, config.sigma, gains[-1:]),
            "roots_loop": _timed(roots_loop, N[:sub], D[:sub], config.sigma, gains) * V / sub,
        }

    calib = stages(200)  # also compiles (or loads) the kernels and warms the imports
    if variants is None:
        per_variant = sum(calib.values()) / 200 - calib["roots_loop"] / 200 * (1 - 20 / 200)
        variants = int(np.clip(budget_seconds / max(per_variant, 1e-9), 500, 50000))
    times = stages(variants)
    rate = {k: variants / t for k, t in times.items()}
    per_hour = rate["chunk"] * cores * PARALLEL_EFFICIENCY * 3600.0
    m, n = loop.open_loop_degrees(config)
    return {
        "config": config.title or config.stem,
        "degree": int(n),
        "numerator_degree": int(m),
        "variants_timed": int(variants),
        "gains": int(gains.size),
        "cores": int(cores),
        "variants_per_second": rate,
        "seconds": times,
        "ratio_to_eigvals_pass": {k: times[k] / times["eigvals"] for k in STAGES},
        "analysis_in_eigvals_passes_at_one_gain": times["analysis"] / times["eigvals_one_gain"],
        "parallel_efficiency_assumed": PARALLEL_EFFICIENCY,
        "variants_in_1h": int(per_hour),
        "variants_in_8h": int(8 * per_hour),
    }


_CALIBRATION: dict[str, float] = {}


def estimate_seconds(config: Config, count: int) -> float:
    """Projected wall time of ``sweep run`` for ``count`` variants on all cores.

    A quick calibration on a few hundred variants of this config (cached per
    process) gives the per-variant cost of the chunk work.
    """
    from . import runner

    key = config.sha256
    if key not in _CALIBRATION:
        gains = runner.nominal_gains(config)
        V = 256
        vs = _random_variants(config, V)
        kept = np.zeros(V, dtype=bool)
        runner.compute_chunk(config, vs.slice(0, 16), gains, kept[:16])  # warm-up
        _CALIBRATION[key] = _timed(runner.compute_chunk, config, vs, gains, kept) / V
    cores = os.cpu_count() or 1
    return count * _CALIBRATION[key] / (cores * PARALLEL_EFFICIENCY) + 1.0


def format_result(result: dict[str, Any]) -> str:
    """Readable text of `measure`'s result."""
    lines = [
        f"{result['config']}: degree {result['degree']}, {result['variants_timed']} variants x "
        f"{result['gains']} gains, {result['cores']} core(s)",
        "",
        f"  {'stage (same variants and gains, one core)':<46}{'variants/s':>12}{'time / eigenvalue pass':>24}",
    ]
    for key, label in STAGES.items():
        lines.append(f"  {label:<46}{result['variants_per_second'][key]:>12.0f}"
                     f"{result['ratio_to_eigvals_pass'][key]:>24.3f}")
    lines += [
        "",
        f"  the analysis costs {result['analysis_in_eigvals_passes_at_one_gain']:.2f} eigenvalue passes "
        "at a single gain",
        f"  a run chunk is {1 / result['ratio_to_eigvals_pass']['chunk']:.0f}x faster than the eigenvalue pass "
        f"and {result['ratio_to_eigvals_pass']['roots_loop'] / result['ratio_to_eigvals_pass']['chunk']:.0f}x "
        "faster than the numpy.roots loop",
        "",
        f"  projected with -j {result['cores']} ({result['parallel_efficiency_assumed']:.0%} of a perfect "
        "speed-up, as measured for whole runs):",
        f"    1 hour   {result['variants_in_1h']:>16,d} variants",
        f"    8 hours  {result['variants_in_8h']:>16,d} variants",
        "",
        "  Absolute figures move with the machine's load; the ratios are what to compare.",
    ]
    return "\n".join(lines)
