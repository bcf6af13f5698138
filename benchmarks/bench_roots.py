"""Compiled companion-matrix QR (`sweep.rootfind.poly_roots`) against `numpy.linalg.eigvals`.

Both solve the same stacks of companion matrices (random real coefficients)
in one run, side by side; the ratio is what counts.

Run: ``python benchmarks/bench_roots.py [V]``
"""
from __future__ import annotations

import sys
import time

import numpy as np

from sweep.rootfind import poly_roots


def main() -> None:
    V = int(sys.argv[1]) if len(sys.argv) > 1 else 100_000
    rng = np.random.default_rng(0)
    poly_roots(rng.normal(size=(10, 4)))  # compile / load the cache
    print(f"{V} polynomials per degree")
    print("degree  eigvals s  poly_roots s  speed-up")
    for d in (2, 3, 4, 6, 7, 8, 12):
        C = rng.normal(size=(V, d + 1))
        C[:, 0] = np.where(np.abs(C[:, 0]) < 0.1, 1.0, C[:, 0])
        M = np.zeros((V, d, d))
        M[:, 0, :] = -C[:, 1:] / C[:, :1]
        M[:, np.arange(1, d), np.arange(d - 1)] = 1.0
        t_e = t_r = np.inf
        for _ in range(3):  # interleaved, best of three: the machine may be shared
            t = time.perf_counter()
            np.linalg.eigvals(M)
            t_e = min(t_e, time.perf_counter() - t)
            t = time.perf_counter()
            poly_roots(C)
            t_r = min(t_r, time.perf_counter() - t)
        print(f"{d:6d}  {t_e:9.3f}  {t_r:12.3f}  {t_e / t_r:8.2f}")


if __name__ == "__main__":
    main()
