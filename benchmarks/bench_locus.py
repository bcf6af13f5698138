"""Root-locus throughput: continuation tracing against a batched-eigenvalue baseline.

For each degree a family of kiln-temperature-like loops (a chain of lags and
lightly damped pairs, every time constant +-20 % at random) is traced on one
log-spaced gain grid, three ways, side by side in one run:

* ``eig only``     one batched ``numpy.linalg.eigvals`` call per gain over all
                   variants (companion matrices), no branch matching;
* ``eig + match``  the same plus optimal matching of every branch to its
                   previous root (``sweep.locus.trace(method="eig")``): the fair
                   baseline, since continuous branches are what is needed;
* ``continuation`` ``sweep.locus.trace`` (predictor, Newton, eigenvalue
                   fall back where in doubt; compiled, one variant at a time);
* ``chunk``        ``sweep.locus.trace_chunk`` with no kept loci: the same
                   tracing as a sweep runs it (envelope only, no (V, G, n) array).

Accuracy: the largest distance between the continuation roots and the
baseline eigenvalues after optimal matching at each gain, relative to the
largest root magnitude of that variant and gain.

Run:  python benchmarks/bench_locus.py [--variants 20000] [--gains 300] [--degrees 4 6 8]
"""
from __future__ import annotations

import argparse
import time

import numpy as np

from sweep import locus


def family(degree: int, variants: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Stacks (N, D) of a perturbed loop with `degree` poles and one or two zeros."""
    rng = np.random.default_rng(seed + degree)

    def jitter(x):
        return x * rng.uniform(0.8, 1.2, variants)

    V = variants
    D = np.ones((V, 1))
    lags = [0.0, 0.5, 2.0, 8.0, 20.0]  # a pole at the origin (integrating actuator) and lags
    pairs = [(1.5, 0.3), (5.0, 0.2), (12.0, 0.4)]  # (natural frequency, damping)
    factors = []
    rest = degree
    for wn, z in pairs:
        if rest - 2 < 1:
            break
        factors.append(np.stack([np.ones(V), 2 * jitter(z) * jitter(wn), jitter(wn) ** 2], axis=1))
        rest -= 2
    for p in lags[:rest]:
        factors.append(np.stack([np.ones(V), jitter(p) if p else np.zeros(V)], axis=1))
    for f in factors:
        D = _conv(D, f)
    zeros = [3.0] if degree < 6 else [3.0, 9.0]
    N = np.ones((V, 1)) * jitter(2.0)[:, None]
    for zr in zeros:
        N = _conv(N, np.stack([np.ones(V), jitter(zr)], axis=1))
    return N, D


def _conv(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Row-wise polynomial product of two stacks."""
    out = np.zeros((a.shape[0], a.shape[1] + b.shape[1] - 1))
    for j in range(b.shape[1]):
        out[:, j:j + a.shape[1]] += a * b[:, j:j + 1]
    return out


def eig_only(N: np.ndarray, D: np.ndarray, sigma: int, gains: np.ndarray) -> np.ndarray:
    """Batched companion eigenvalues at every gain, no matching."""
    V, w = D.shape
    n = w - 1
    Np = np.concatenate([np.zeros((V, w - N.shape[1])), N], axis=1)
    out = np.empty((V, gains.size, n), dtype=np.complex128)
    comp = np.zeros((V, n, n))
    ar = np.arange(n - 1)
    comp[:, ar + 1, ar] = 1.0
    for gi, k in enumerate(gains):
        P = D + sigma * k * Np
        comp[:, 0, :] = -P[:, 1:] / P[:, :1]
        out[:, gi] = np.linalg.eigvals(comp)
    return out


def matched_deviation(a: np.ndarray, b: np.ndarray) -> float:
    """Max over (variant, gain) of the optimally matched |a - b| / max |b|.

    Rows whose branch order already agrees need no matching; the others (the
    baseline may order the two roots of a pair differently after a
    break-away) are matched optimally, in slices to bound memory.
    """
    V, G, n = a.shape
    aa = a.reshape(V * G, n)
    bb = b.reshape(V * G, n)
    scale = np.abs(bb).max(axis=1)
    dev = np.abs(aa - bb).max(axis=1) / scale
    rows = np.flatnonzero(~(dev <= 1e-9))
    worst = float(np.nanmax(np.where(dev <= 1e-9, dev, 0.0)))
    for s in range(0, rows.size, 100000):
        r = rows[s:s + 100000]
        bm = locus._match(aa[r], bb[r])
        worst = max(worst, float(np.nanmax(np.abs(aa[r] - bm).max(axis=1) / scale[r])))
    return worst


def timed(fn, *args, **kw):
    t = time.perf_counter()
    out = fn(*args, **kw)
    return time.perf_counter() - t, out


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--variants", type=int, default=20000)
    ap.add_argument("--gains", type=int, default=300)
    ap.add_argument("--degrees", type=int, nargs="+", default=[4, 6, 8])
    args = ap.parse_args(argv)

    print(f"{args.variants} variants x {args.gains} gains, numpy {np.__version__}")
    head = (f"{'deg':>3} {'eig only s':>11} {'eig+match s':>12} {'contin. s':>10} "
            f"{'x vs eig+match':>15} {'x vs eig only':>14} {'fallback %':>11} "
            f"{'newton it':>9} {'max rel dev':>12} {'chunk s':>8} {'x chunk vs eig only':>20}")
    print(head)
    # compile (or load from numba's cache) before timing anything
    Nw, Dw = family(4, 4)
    locus.trace(Nw, Dw, sigma=1, gains=np.geomspace(1e-2, 1e2, 5))
    for deg in args.degrees:
        N, D = family(deg, args.variants)
        nom_N, nom_D = family(deg, 1, seed=99)
        gains = locus.gain_grid(args.gains, (0, np.inf), nominal_N=nom_N, nominal_D=nom_D, sigma=1)
        t_eig, r_eig = timed(eig_only, N, D, 1, gains)
        del r_eig
        t_base, r_base = timed(locus.trace, N, D, sigma=1, gains=gains, method="eig")
        st: dict = {}
        t_cont, r_cont = timed(locus.trace, N, D, sigma=1, gains=gains, stats=st)
        dev = matched_deviation(r_cont, r_base)
        del r_base, r_cont
        t_chunk, _ = timed(locus.trace_chunk, N, D, sigma=1, gains=gains,
                           keep=np.zeros(args.variants, bool))
        steps = st["steps"] * args.variants
        print(f"{deg:>3} {t_eig:>11.2f} {t_base:>12.2f} {t_cont:>10.2f} "
              f"{t_base / t_cont:>15.2f} {t_eig / t_cont:>14.2f} "
              f"{100 * st['fallback_variant_steps'] / steps:>11.3f} "
              f"{st['newton_variant_iterations'] / steps:>9.2f} {dev:>12.2e} "
              f"{t_chunk:>8.2f} {t_eig / t_chunk:>20.2f}")


if __name__ == "__main__":
    main()
