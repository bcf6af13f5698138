"""Compiled core of the root-locus continuation (see `sweep.locus.trace`).

One loop over the variants of a chunk, and for each variant one loop over
the gain grid: predict every branch (quadratic in ``k`` from the last two
gains and the root velocity ``ds/dk``), correct with Newton on
``P = D + sigma k N``, accept the step only when every root converged and
stayed well inside its own neighbourhood, and otherwise redo the step from
the companion-matrix roots matched optimally to the (capped) prediction.
The rules are those documented in `sweep.locus.trace`; this module only
makes them run without a Python loop per variant or per gain.

Nothing here allocates per step: every buffer is made once per call.
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit

from .rootfind import companion_roots

# indices into the stats array
ST_FALLBACK = 0
ST_NOT_CONVERGED = 1
ST_NOT_SEPARATED = 2
ST_DEGREE_DROP = 3
ST_NEWTON_ITERATIONS = 4
N_STATS = 5

_NAN = complex(math.nan, math.nan)


@njit(cache=True, error_model="numpy", inline="always")
def _abs2(z: complex) -> float:
    return z.real * z.real + z.imag * z.imag


@njit(cache=True, error_model="numpy", inline="always")
def _finite(z: complex) -> bool:
    return math.isfinite(z.real) and math.isfinite(z.imag)


@njit(cache=True, error_model="numpy")
def assign(cost, perm, u, v, p, way, minv, used) -> None:
    """Minimum-total-cost assignment of rows to columns of the square ``cost``.

    ``perm[i]`` receives the column of row ``i``. When the row minima already
    lie in distinct columns that is the optimum (their sum bounds every
    assignment from below); otherwise the shortest-augmenting-path Hungarian
    method with potentials (Kuhn 1955, Munkres 1957; from memory) solves it.
    ``u, v, p, way, minv, used`` are scratch of length ``n + 1``.
    """
    n = cost.shape[0]
    distinct = True
    for j in range(n + 1):
        used[j] = False
    for i in range(n):
        best = 0
        for j in range(1, n):
            if cost[i, j] < cost[i, best]:
                best = j
        perm[i] = best
        if used[best]:
            distinct = False
        used[best] = True
    if distinct:
        return
    inf = np.inf
    for j in range(n + 1):
        u[j] = 0.0
        v[j] = 0.0
        p[j] = 0
        way[j] = 0
    for i in range(1, n + 1):
        p[0] = i
        j0 = 0
        for j in range(n + 1):
            minv[j] = inf
            used[j] = False
        while True:
            used[j0] = True
            i0 = p[j0]
            delta = inf
            j1 = 0
            for j in range(1, n + 1):
                if not used[j]:
                    cur = cost[i0 - 1, j - 1] - u[i0] - v[j]
                    if cur < minv[j]:
                        minv[j] = cur
                        way[j] = j0
                    if minv[j] < delta:
                        delta = minv[j]
                        j1 = j
            for j in range(n + 1):
                if used[j]:
                    u[p[j]] += delta
                    v[j] -= delta
                else:
                    minv[j] -= delta
            j0 = j1
            if p[j0] == 0:
                break
        while True:
            j1 = way[j0]
            p[j0] = p[j1]
            j0 = j1
            if j0 == 0:
                break
    for j in range(1, n + 1):
        perm[p[j] - 1] = j - 1


@njit(cache=True, error_model="numpy", inline="always")
def _horner_pd(c, z: complex):
    """p(z) and p'(z) of the real coefficients ``c`` (highest power first)."""
    p = complex(c[0])
    dp = 0j
    for i in range(1, c.shape[0]):
        dp = dp * z + p
        p = p * z + c[i]
    return p, dp


@njit(cache=True, error_model="numpy", inline="always")
def _horner(c, z: complex) -> complex:
    p = complex(c[0])
    for i in range(1, c.shape[0]):
        p = p * z + c[i]
    return p


@njit(cache=True, error_model="numpy", inline="always")
def _lead_zeros(P, Nv, Dv, k: float, eps: float) -> int:
    """Leading coefficients of P that vanish to rounding (see `sweep.locus._lead_zeros`)."""
    cnt = 0
    for i in range(P.shape[0]):
        if abs(P[i]) <= 16.0 * eps * (abs(Dv[i]) + abs(k * Nv[i])):
            cnt += 1
        else:
            break
    return cnt


@njit(cache=True, error_model="numpy")
def _fallback_step(P, nz, pred, prev, out, scratch_roots, cost, perm, work, wr, wi,
                   u, v, p, way, minv, used, qr_max_its) -> bool:
    """Companion roots of P (degree n - nz) matched to the capped prediction, into ``out``.

    Returns False when the QR iteration failed (the caller redoes the variant).
    """
    n = pred.shape[0]
    deg = n - nz
    for i in range(n):
        scratch_roots[i] = _NAN
    if deg > 0:
        if not companion_roots(P[nz:], scratch_roots[:deg], work, wr, wi, qr_max_its):
            return False
    # cap each predicted step at half the distance from its root to the nearest other root
    for i in range(n):
        nn = np.inf
        for j in range(n):
            if j != i:
                d = abs(prev[i] - prev[j])
                if math.isfinite(d) and d < nn:
                    nn = d
        step = pred[i] - prev[i]
        a = abs(step)
        lim = 0.5 * nn
        sc = 1.0
        if a > lim and math.isfinite(lim):
            sc = lim / a
        q = prev[i] + step * sc
        out[i] = q if _finite(q) else pred[i]
    # cost matrix: a missing root costs 0 against every prediction; a missing
    # prediction costs the same large constant against every finite root
    any_bad = False
    fmax = 0.0
    for i in range(n):
        for j in range(n):
            c = abs(out[i] - scratch_roots[j])
            if math.isfinite(c):
                cost[i, j] = c
                if c > fmax:
                    fmax = c
            else:
                cost[i, j] = np.nan
                any_bad = True
    if any_bad:
        big = 1e3 * (fmax + 1.0)
        for j in range(n):
            missing = not _finite(scratch_roots[j])
            for i in range(n):
                if missing:
                    cost[i, j] = 0.0
                elif math.isnan(cost[i, j]):
                    cost[i, j] = big
    assign(cost, perm, u, v, p, way, minv, used)
    for i in range(n):
        out[i] = scratch_roots[perm[i]]
    return True


@njit(cache=True, error_model="numpy", inline="always")
def _newton_step(P, zr, zi, dr, di, ar, pr, pi) -> None:
    """One Newton step on every root at once, in place; ``ar`` gets each step's size.

    Real and imaginary parts are kept in separate arrays and the Horner loop
    runs over the roots innermost, so the independent evaluations interleave
    (and vectorise) instead of waiting on one dependency chain at a time.
    ``dr + i di`` receives ``P'`` at the roots before the step; ``pr``, ``pi``
    are scratch.
    """
    n = zr.shape[0]
    w = P.shape[0]
    for i in range(n):
        pr[i] = P[0]
        pi[i] = 0.0
        dr[i] = 0.0
        di[i] = 0.0
    for j in range(1, w):
        c = P[j]
        for i in range(n):
            xr = zr[i]
            xi = zi[i]
            tr = dr[i] * xr - di[i] * xi + pr[i]
            ti = dr[i] * xi + di[i] * xr + pi[i]
            dr[i] = tr
            di[i] = ti
            tr = pr[i] * xr - pi[i] * xi + c
            ti = pr[i] * xi + pi[i] * xr
            pr[i] = tr
            pi[i] = ti
    for i in range(n):
        den = dr[i] * dr[i] + di[i] * di[i]
        if den > 1e-280 and den < 1e280:
            sr = (pr[i] * dr[i] + pi[i] * di[i]) / den
            si = (pi[i] * dr[i] - pr[i] * di[i]) / den
        else:  # scaled complex division where the plain formula would over- or underflow
            q = complex(pr[i], pi[i]) / complex(dr[i], di[i])
            sr = q.real
            si = q.imag
        zr[i] -= sr
        zi[i] -= si
        ar[i] = math.sqrt(sr * sr + si * si)


@njit(cache=True, error_model="numpy")
def continue_branches(N, D, sg, gains, poles, first, vel0, keep_row, op_index,
                      out_kept, out_op, abscissa, status, stats,
                      newton_maxit, newton_rtol, dominance, eps, qr_max_its):
    """Follow every branch of every variant from ``gains[0]`` to ``gains[-1]``.

    Parameters
    ----------
    N, D
        float64 ``(V, n+1)`` (N padded to D's width).
    sg
        +1.0 or -1.0.
    gains
        ``(G,)`` strictly increasing.
    poles, first, vel0
        complex128 ``(V, n)``: the branches at ``k = 0`` (sorted poles), at
        ``gains[0]`` (matched to them), and ``ds/dk`` at ``gains[0]``.
    keep_row
        int64 ``(V,)``: row of ``out_kept`` for a kept variant, -1 otherwise.
    op_index
        Gain index whose roots go to ``out_op`` (-1: none).
    out_kept, out_op, abscissa
        Outputs ``(Vk, G, n)``, ``(V, n)``, ``(V, G)`` (largest real part
        over the finite roots, NaN when none is finite).
    status
        int8 ``(V,)`` output: 1 done, 0 a QR iteration failed (redo elsewhere).
    stats
        int64 ``(N_STATS,)`` counters, incremented.
    newton_maxit, newton_rtol, dominance, eps, qr_max_its
        The acceptance settings of `sweep.locus` (read at call time).
    """
    V, w = D.shape
    n = w - 1
    G = gains.shape[0]
    P = np.empty(w)
    # per-branch state, real and imaginary parts apart (see _newton_step)
    p2r = np.empty(n)
    p2i = np.empty(n)
    p1r = np.empty(n)
    p1i = np.empty(n)
    vr = np.empty(n)
    vi = np.empty(n)
    qr = np.empty(n)
    qi = np.empty(n)
    zr = np.empty(n)
    zi = np.empty(n)
    dr = np.empty(n)
    di = np.empty(n)
    ar = np.empty(n)
    hr = np.empty(n)
    hi = np.empty(n)
    last = np.empty(n)
    # complex views for the fall-back and the bookkeeping
    pred = np.empty(n, dtype=np.complex128)
    prev = np.empty(n, dtype=np.complex128)
    z = np.empty(n, dtype=np.complex128)
    roots = np.empty(n, dtype=np.complex128)
    cost = np.empty((n, n))
    perm = np.empty(n, dtype=np.int64)
    work = np.empty((max(n, 1), max(n, 1)))
    wr = np.empty(max(n, 1))
    wi = np.empty(max(n, 1))
    u = np.empty(n + 1)
    vv = np.empty(n + 1)
    pp = np.empty(n + 1, dtype=np.int64)
    way = np.empty(n + 1, dtype=np.int64)
    minv = np.empty(n + 1)
    used = np.empty(n + 1, dtype=np.bool_)
    d3 = dominance * dominance
    for v in range(V):
        Nv = N[v]
        Dv = D[v]
        kr = keep_row[v]
        for i in range(n):
            p2r[i] = poles[v, i].real
            p2i[i] = poles[v, i].imag
            p1r[i] = first[v, i].real
            p1i[i] = first[v, i].imag
            vr[i] = vel0[v, i].real
            vi[i] = vel0[v, i].imag
            z[i] = first[v, i]
        k2 = 0.0
        k1 = gains[0]
        _record(v, 0, z, kr, op_index, out_kept, out_op, abscissa)
        failed = False
        for gi in range(1, G):
            k = gains[gi]
            # -- predict: quadratic through (k2, prev2), (k1, prev1) with slope vel at k1
            h0 = k1 - k2
            h = k - k1
            inv = 1.0 / (h0 * h0)
            all_finite = True
            for i in range(n):
                cr = (p2r[i] - p1r[i] + vr[i] * h0) * inv
                ci = (p2i[i] - p1i[i] + vi[i] * h0) * inv
                xr = p1r[i] + h * (vr[i] + cr * h)
                xi = p1i[i] + h * (vi[i] + ci * h)
                if not (math.isfinite(xr) and math.isfinite(xi)):
                    xr = p1r[i] + h * vr[i]
                    xi = p1i[i] + h * vi[i]
                    if not (math.isfinite(xr) and math.isfinite(xi)):
                        xr = p1r[i]
                        xi = p1i[i]
                        if not (math.isfinite(xr) and math.isfinite(xi)):
                            all_finite = False
                qr[i] = xr
                qi[i] = xi
            for j in range(w):
                P[j] = Dv[j] + sg * k * Nv[j]
            nz = _lead_zeros(P, Nv, Dv, k, eps)
            ok = all_finite
            if nz > 0:
                stats[ST_DEGREE_DROP] += 1
                ok = False
            good = False
            if ok:
                # -- correct: Newton from the prediction
                sc = 0.0
                for i in range(n):
                    zr[i] = qr[i]
                    zi[i] = qi[i]
                    sc = max(sc, abs(qr[i]), abs(qi[i]))
                    last[i] = np.inf
                    dr[i] = math.nan
                    di[i] = math.nan
                if sc == 0.0:
                    sc = 1.0
                sc *= newton_rtol
                done = False
                it = 0
                while it < newton_maxit:
                    it += 1
                    stats[ST_NEWTON_ITERATIONS] += 1
                    _newton_step(P, zr, zi, dr, di, ar, hr, hi)
                    fin = True
                    allc = True
                    for i in range(n):
                        a = ar[i]
                        r = a / last[i]
                        if not (a <= sc or (math.isfinite(last[i]) and r < 0.5 and a * r <= sc * (1.0 - r))):
                            allc = False
                        last[i] = a
                        if not (math.isfinite(zr[i]) and math.isfinite(zi[i])):
                            fin = False
                    # at least two steps: the second one measures the first one's error
                    if it >= 2 or newton_maxit < 2:
                        if not fin:
                            break
                        if allc:
                            done = True
                            break
                if not done:
                    # a residual already at the rounding level of the evaluation cannot improve
                    at_noise = True
                    for i in range(n):
                        zz = complex(zr[i], zi[i])
                        if not _finite(zz):
                            at_noise = False
                            break
                        pz = _horner(P, zz)
                        az = abs(zz)
                        noise = 0.0
                        for j in range(w):
                            noise = noise * az + abs(P[j])
                        if abs(pz) > 64.0 * eps * noise:
                            at_noise = False
                            break
                    done = at_noise
                if not done:
                    stats[ST_NOT_CONVERGED] += 1
                else:
                    good = True
                    if n > 1:
                        # every correction under `dominance` of the distance from its
                        # prediction to the nearest other prediction
                        for i in range(n):
                            sep2 = np.inf
                            for j in range(n):
                                if j != i:
                                    xr = qr[i] - qr[j]
                                    xi = qi[i] - qi[j]
                                    sep2 = min(sep2, xr * xr + xi * xi)
                            xr = zr[i] - qr[i]
                            xi = zi[i] - qi[i]
                            if not (xr * xr + xi * xi < d3 * sep2):
                                good = False
                                break
                        if not good:
                            stats[ST_NOT_SEPARATED] += 1
            if good:
                for i in range(n):
                    z[i] = complex(zr[i], zi[i])
            else:
                stats[ST_FALLBACK] += 1
                for i in range(n):
                    pred[i] = complex(qr[i], qi[i])
                    prev[i] = complex(p1r[i], p1i[i])
                if not _fallback_step(P, nz, pred, prev, z, roots, cost, perm, work, wr, wi,
                                      u, vv, pp, way, minv, used, qr_max_its):
                    failed = True
                    break
                for i in range(n):
                    dr[i] = math.nan
                    di[i] = math.nan
            # -- velocity ds/dk = -sigma N(s) / P'(s); the last Newton derivative is P'
            # at the root to first order, enough for a predictor
            vel_ok = True
            for i in range(n):
                # N(z) by Horner in real arithmetic, then -sigma N / P' (plain formula;
                # any overflow shows as a non-finite result and takes the exact path below)
                xr = zr[i] if good else z[i].real
                xi = zi[i] if good else z[i].imag
                nr = Nv[0]
                ni = 0.0
                for j in range(1, w):
                    tr = nr * xr - ni * xi + Nv[j]
                    ni = nr * xi + ni * xr
                    nr = tr
                den = dr[i] * dr[i] + di[i] * di[i]
                a = -sg * (nr * dr[i] + ni * di[i]) / den
                b = -sg * (ni * dr[i] - nr * di[i]) / den
                vr[i] = a
                vi[i] = b
                if not (math.isfinite(a) and math.isfinite(b) and den > 1e-280 and den < 1e280):
                    vel_ok = False
            if not vel_ok:
                for i in range(n):
                    _, dpz = _horner_pd(P, z[i])
                    x = -sg * _horner(Nv, z[i]) / dpz
                    if not _finite(x):
                        x = _NAN
                    vr[i] = x.real
                    vi[i] = x.imag
            _record(v, gi, z, kr, op_index, out_kept, out_op, abscissa)
            for i in range(n):
                p2r[i] = p1r[i]
                p2i[i] = p1i[i]
                p1r[i] = z[i].real
                p1i[i] = z[i].imag
            k2 = k1
            k1 = k
        status[v] = 0 if failed else 1


@njit(cache=True, error_model="numpy", inline="always")
def _record(v, gi, z, kr, op_index, out_kept, out_op, abscissa) -> None:
    n = z.shape[0]
    if kr >= 0:
        for i in range(n):
            out_kept[kr, gi, i] = z[i]
    if gi == op_index:
        for i in range(n):
            out_op[v, i] = z[i]
    m = -np.inf
    any_finite = False
    for i in range(n):
        re = z[i].real
        if not math.isnan(re):
            any_finite = True
            if re > m:
                m = re
    abscissa[v, gi] = m if any_finite else np.nan
