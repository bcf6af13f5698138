"""Compiled core of the root-locus continuation (see `sweep.locus.trace`).

Variants go through in blocks; for each block, one loop over the gain grid:
predict every branch (quadratic in ``k`` from the last two gains and the
root velocity ``ds/dk``), correct with Newton on ``P = D + sigma k N``,
accept the step only when every root converged and stayed well inside its
own neighbourhood, and otherwise redo the step from the companion-matrix
roots matched optimally to the previous roots. The rules are those
documented in `sweep.locus.trace`; this module only makes them run without
a Python loop per variant or per gain.

The common path (prediction, two Newton steps, the separation test, the
velocity) runs for a whole block at once with the variants innermost, which
the compiler turns into vector instructions; whatever only some variants
need (more Newton steps, the residual test, the fall-back, an exact
velocity) runs variant by variant. Each variant's arithmetic is the same
whatever else is in its block, so a chunk gives exactly the results of its
variants traced one at a time. Nothing allocates per step: every buffer is
made once per call.
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


@njit(cache=True, error_model="numpy")
def _fallback_step(P, nz, prev, out, scratch_roots, cost, perm, work, wr, wi,
                   u, v, p, way, minv, used, qr_max_its) -> bool:
    """Companion roots of P (degree n - nz) matched to the previous roots, into ``out``.

    The assignment has the minimum total distance to ``prev`` (the branch
    continuity rule; a prediction can be confidently wrong next to a
    multiple root, where ``ds/dk`` is unbounded). Returns False when the QR
    iteration failed (the caller redoes the variant).
    """
    n = prev.shape[0]
    deg = n - nz
    for i in range(n):
        scratch_roots[i] = _NAN
    if deg > 0:
        if not companion_roots(P[nz:], scratch_roots[:deg], work, wr, wi, qr_max_its):
            return False
    for i in range(n):
        out[i] = prev[i]
    # cost matrix: a missing root costs 0 against every previous root; a missing
    # previous root (one at infinity) costs the same large constant against every
    # finite root
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
def _newton_quotient(pr: float, pi: float, dr: float, di: float):
    """(pr + i pi) / (dr + i di), plain formula unless it would over- or underflow."""
    den = dr * dr + di * di
    if den > 1e-280 and den < 1e280:
        return (pr * dr + pi * di) / den, (pi * dr - pr * di) / den
    if dr == 0.0 and di == 0.0:
        return math.nan, math.nan   # P' = 0 (a multiple root): no Newton step
    q = complex(pr, pi) / complex(dr, di)
    return q.real, q.imag


#: variants traced side by side: every per-root loop runs over a block of this
#: many variants innermost, so the compiler turns it into vector instructions
BLOCK = 128


@njit(cache=True, error_model="numpy", inline="always")
def _is_finite(x: float) -> bool:
    # the arithmetic form vectorises where a call to isfinite would not
    return x - x == 0.0


@njit(cache=True, error_model="numpy", inline="always")
def _apply_steps(zri, zii, dri, dii, ari, hr, hi, L: int) -> None:
    """Move each root by ``P / P'`` (``hr + i hi`` over ``dri + i dii``); ``ari`` gets the step size.

    Where ``|P'|^2`` leaves the normal range the plain quotient is unsafe:
    the root stays and its step size is NaN, for `_fix_quotients`.
    """
    for b in range(L):
        den = dri[b] * dri[b] + dii[b] * dii[b]
        sr = (hr[b] * dri[b] + hi[b] * dii[b]) / den
        si = (hi[b] * dri[b] - hr[b] * dii[b]) / den
        a = math.sqrt(sr * sr + si * si)
        if not (den > 1e-280 and den < 1e280):
            sr = 0.0
            si = 0.0
            a = math.nan
        ari[b] = a
        zri[b] -= sr
        zii[b] -= si


@njit(cache=True, error_model="numpy")
def _block_newton(P, zr, zi, dr, di, ar, hr, hi, L: int) -> None:
    """One Newton step on every root of the first ``L`` variants of a block.

    Layout ``[root, variant]`` (``P`` is ``[coefficient, variant]``); ``dr + i di``
    receives ``P'`` before the step, ``ar`` the step's size; ``hr``, ``hi``
    are scratch. Where ``|P'|^2`` leaves the normal range the root is left
    as it was, its step size NaN, for `_fix_quotients` to redo with a scaled
    division.
    """
    n = zr.shape[0]
    w = P.shape[0]
    for i in range(n):
        zri = zr[i]
        zii = zi[i]
        dri = dr[i]
        dii = di[i]
        ari = ar[i]
        P0 = P[0]
        for b in range(L):
            hr[b] = P0[b]
            hi[b] = 0.0
            dri[b] = 0.0
            dii[b] = 0.0
        for j in range(1, w):
            Pj = P[j]
            for b in range(L):
                xr = zri[b]
                xi = zii[b]
                tr = dri[b] * xr - dii[b] * xi + hr[b]
                ti = dri[b] * xi + dii[b] * xr + hi[b]
                dri[b] = tr
                dii[b] = ti
                tr = hr[b] * xr - hi[b] * xi + Pj[b]
                ti = hr[b] * xi + hi[b] * xr
                hr[b] = tr
                hi[b] = ti
        _apply_steps(zri, zii, dri, dii, ari, hr, hi, L)


@njit(cache=True, error_model="numpy")
def _block_check(P, zr, zi, dr, di, ar, hr, hi, L: int) -> None:
    """A Newton step with the derivative kept from `_block_newton` (only ``P`` is evaluated)."""
    n = zr.shape[0]
    w = P.shape[0]
    for i in range(n):
        zri = zr[i]
        zii = zi[i]
        dri = dr[i]
        dii = di[i]
        ari = ar[i]
        P0 = P[0]
        for b in range(L):
            hr[b] = P0[b]
            hi[b] = 0.0
        for j in range(1, w):
            Pj = P[j]
            for b in range(L):
                xr = zri[b]
                xi = zii[b]
                tr = hr[b] * xr - hi[b] * xi + Pj[b]
                ti = hr[b] * xi + hi[b] * xr
                hr[b] = tr
                hi[b] = ti
        _apply_steps(zri, zii, dri, dii, ari, hr, hi, L)


@njit(cache=True, error_model="numpy")
def _lane_newton(Pl, zr, zi, dr, di, ar, b: int, full: bool) -> None:
    """One Newton step on the roots of variant ``b`` of a block, scalar and exact.

    ``full``: evaluate ``P'`` too (else keep ``dr, di``). Used where the block
    step flagged a quotient out of range, and for further iterations.
    """
    n = zr.shape[0]
    w = Pl.shape[0]
    for i in range(n):
        x = complex(zr[i, b], zi[i, b])
        p = complex(Pl[0])
        dp = 0j
        for j in range(1, w):
            if full:
                dp = dp * x + p
            p = p * x + Pl[j]
        if full:
            dr[i, b] = dp.real
            di[i, b] = dp.imag
        sr, si = _newton_quotient(p.real, p.imag, dr[i, b], di[i, b])
        zr[i, b] = x.real - sr
        zi[i, b] = x.imag - si
        ar[i, b] = math.sqrt(sr * sr + si * si)


@njit(cache=True, error_model="numpy")
def continue_branches(N, D, sg, gains, poles, first, vel0, keep_row, op_index,
                      out_kept, out_op, abscissa, status, stats,
                      newton_maxit, newton_rtol, dominance, eps, qr_max_its):
    """Follow every branch of every variant from ``gains[0]`` to ``gains[-1]``.

    Variants go through in blocks of `BLOCK`; within a block every step is
    computed for all variants at once and then finished variant by variant
    where a variant needs more (further Newton steps, the residual test, the
    eigenvalue fall-back, an exact velocity). Every variant's arithmetic is
    the same whatever else is in its block.

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
    B = BLOCK
    Nt = np.empty((w, B))
    Dt = np.empty((w, B))
    P = np.empty((w, B))
    # branch state, [root, variant]: two gains back, one gain back, the new roots
    p2r = np.empty((n, B))
    p2i = np.empty((n, B))
    p1r = np.empty((n, B))
    p1i = np.empty((n, B))
    zr = np.empty((n, B))
    zi = np.empty((n, B))
    vr = np.empty((n, B))
    vi = np.empty((n, B))
    qr = np.empty((n, B))
    qi = np.empty((n, B))
    dr = np.empty((n, B))
    di = np.empty((n, B))
    ar = np.empty((n, B))
    last = np.empty((n, B))
    near2 = np.empty((n, B))
    nearp = np.empty((n, B))
    hr = np.empty(B)
    hi = np.empty(B)
    sc = np.empty(B)
    flag = np.empty(B, dtype=np.bool_)
    ok = np.empty(B, dtype=np.bool_)
    done = np.empty(B, dtype=np.bool_)
    good = np.empty(B, dtype=np.bool_)
    failed = np.empty(B, dtype=np.bool_)
    # one variant's scratch for the scalar paths
    Pl = np.empty(w)
    prev = np.empty(n, dtype=np.complex128)
    zc = np.empty(n, dtype=np.complex128)
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
    first_steps = min(newton_maxit, 2)

    for start in range(0, V, B):
        L = min(B, V - start)
        for b in range(L):
            v = start + b
            for j in range(w):
                Nt[j, b] = N[v, j]
                Dt[j, b] = D[v, j]
            for i in range(n):
                p2r[i, b] = poles[v, i].real
                p2i[i, b] = poles[v, i].imag
                p1r[i, b] = first[v, i].real
                p1i[i, b] = first[v, i].imag
                vr[i, b] = vel0[v, i].real
                vi[i, b] = vel0[v, i].imag
            failed[b] = False
        _block_record(start, L, 0, p1r, p1i, keep_row, op_index, out_kept, out_op, abscissa)
        k2 = 0.0
        k1 = gains[0]
        for gi in range(1, G):
            k = gains[gi]
            skk = sg * k
            # -- predict: quadratic through (k2, prev2), (k1, prev1) with slope vel at k1
            h0 = k1 - k2
            h = k - k1
            inv = 1.0 / (h0 * h0)
            for b in range(L):
                flag[b] = False
            for i in range(n):
                for b in range(L):
                    cr = (p2r[i, b] - p1r[i, b] + vr[i, b] * h0) * inv
                    ci = (p2i[i, b] - p1i[i, b] + vi[i, b] * h0) * inv
                    xr = p1r[i, b] + h * (vr[i, b] + cr * h)
                    xi = p1i[i, b] + h * (vi[i, b] + ci * h)
                    qr[i, b] = xr
                    qi[i, b] = xi
                    if not (_is_finite(xr) and _is_finite(xi)):
                        flag[b] = True
            for j in range(w):
                for b in range(L):
                    P[j, b] = Dt[j, b] + skk * Nt[j, b]
            for b in range(L):
                ok[b] = not failed[b]
                if flag[b]:
                    # linear step where the curvature is not finite, else the previous root
                    for i in range(n):
                        if not (_is_finite(qr[i, b]) and _is_finite(qi[i, b])):
                            xr = p1r[i, b] + h * vr[i, b]
                            xi = p1i[i, b] + h * vi[i, b]
                            if not (_is_finite(xr) and _is_finite(xi)):
                                xr = p1r[i, b]
                                xi = p1i[i, b]
                                if not (_is_finite(xr) and _is_finite(xi)):
                                    ok[b] = False
                            qr[i, b] = xr
                            qi[i, b] = xi
                # a leading coefficient of P at rounding level: the degree drops
                if abs(P[0, b]) <= 16.0 * eps * (abs(Dt[0, b]) + abs(k * Nt[0, b])):
                    stats[ST_DEGREE_DROP] += 1
                    ok[b] = False
            # -- correct: Newton from the prediction, on every variant of the block
            for b in range(L):
                sc[b] = 0.0
            for i in range(n):
                for b in range(L):
                    zr[i, b] = qr[i, b]
                    zi[i, b] = qi[i, b]
                    sc[b] = max(sc[b], abs(qr[i, b]), abs(qi[i, b]))
                    last[i, b] = np.inf
                    dr[i, b] = math.nan
                    di[i, b] = math.nan
            for b in range(L):
                sc[b] = (sc[b] if sc[b] > 0.0 else 1.0) * newton_rtol
            if first_steps >= 1:
                _block_newton(P, zr, zi, dr, di, ar, hr, hi, L)
                _fix_quotients(P, Pl, zr, zi, dr, di, ar, ok, L, True)
            if first_steps >= 2:
                for i in range(n):
                    for b in range(L):
                        last[i, b] = ar[i, b]
                # the check step: P' barely moves over a converging first step, so the
                # first step's derivative serves; a poor first step shows as a step
                # that does not contract, and full steps follow
                _block_check(P, zr, zi, dr, di, ar, hr, hi, L)
                _fix_quotients(P, Pl, zr, zi, dr, di, ar, ok, L, False)
            for b in range(L):
                done[b] = ok[b] and first_steps > 0
            for i in range(n):
                for b in range(L):
                    a = ar[i, b]
                    r = a / last[i, b]
                    c_ok = a <= sc[b] or (_is_finite(last[i, b]) and r < 0.5
                                          and a * r <= sc[b] * (1.0 - r))
                    if not (c_ok and _is_finite(zr[i, b]) and _is_finite(zi[i, b])):
                        done[b] = False
            for b in range(L):
                if not ok[b]:
                    continue
                stats[ST_NEWTON_ITERATIONS] += first_steps
                if done[b]:
                    continue
                # this variant needs more: full Newton steps, one variant at a time
                for j in range(w):
                    Pl[j] = P[j, b]
                it = first_steps
                fin = True
                for i in range(n):
                    if not (_is_finite(zr[i, b]) and _is_finite(zi[i, b])):
                        fin = False
                while fin and it < newton_maxit:
                    it += 1
                    stats[ST_NEWTON_ITERATIONS] += 1
                    for i in range(n):
                        last[i, b] = ar[i, b]
                    _lane_newton(Pl, zr, zi, dr, di, ar, b, True)
                    allc = True
                    for i in range(n):
                        a = ar[i, b]
                        r = a / last[i, b]
                        if not (a <= sc[b] or (_is_finite(last[i, b]) and r < 0.5
                                               and a * r <= sc[b] * (1.0 - r))):
                            allc = False
                        if not (_is_finite(zr[i, b]) and _is_finite(zi[i, b])):
                            fin = False
                    if fin and allc and (it >= 2 or newton_maxit < 2):
                        done[b] = True
                        break
                if not done[b]:
                    # a residual already at the rounding level of the evaluation cannot improve
                    at_noise = True
                    for i in range(n):
                        x = complex(zr[i, b], zi[i, b])
                        if not (_is_finite(x.real) and _is_finite(x.imag)):
                            at_noise = False
                            break
                        px = _horner(Pl, x)
                        ax = abs(x)
                        noise = 0.0
                        for j in range(w):
                            noise = noise * ax + abs(Pl[j])
                        if abs(px) > 64.0 * eps * noise:
                            at_noise = False
                            break
                    done[b] = at_noise
                if not done[b]:
                    stats[ST_NOT_CONVERGED] += 1
            # -- separation: each correction under `dominance` of the distance from its
            # prediction to the nearest other prediction; and each root moved under half
            # the distance from its previous root to the nearest other previous root,
            # which makes keeping the order the unique minimum-total-distance
            # assignment to the previous roots (the continuity rule): a prediction
            # can be confidently wrong just past a multiple root
            for b in range(L):
                good[b] = done[b]
            if n > 1:
                for i in range(n):
                    for b in range(L):
                        near2[i, b] = np.inf
                        nearp[i, b] = np.inf
                for i in range(n):
                    for j in range(i + 1, n):
                        for b in range(L):
                            xr = qr[i, b] - qr[j, b]
                            xi = qi[i, b] - qi[j, b]
                            d2 = xr * xr + xi * xi
                            near2[i, b] = min(near2[i, b], d2)
                            near2[j, b] = min(near2[j, b], d2)
                            xr = p1r[i, b] - p1r[j, b]
                            xi = p1i[i, b] - p1i[j, b]
                            d2 = xr * xr + xi * xi
                            nearp[i, b] = min(nearp[i, b], d2)
                            nearp[j, b] = min(nearp[j, b], d2)
                for b in range(L):
                    flag[b] = False  # some root of b is not separated
                for i in range(n):
                    for b in range(L):
                        xr = zr[i, b] - qr[i, b]
                        xi = zi[i, b] - qi[i, b]
                        if not (xr * xr + xi * xi < d3 * near2[i, b]):
                            flag[b] = True
                        xr = zr[i, b] - p1r[i, b]
                        xi = zi[i, b] - p1i[i, b]
                        if not (xr * xr + xi * xi < 0.25 * nearp[i, b]):
                            flag[b] = True
                for b in range(L):
                    if done[b] and flag[b]:
                        good[b] = False
                        stats[ST_NOT_SEPARATED] += 1
            # -- the eigenvalue fall-back, variant by variant
            for b in range(L):
                if good[b] or failed[b]:
                    continue
                stats[ST_FALLBACK] += 1
                for j in range(w):
                    Pl[j] = P[j, b]
                nz = 0
                while nz < w and abs(Pl[nz]) <= 16.0 * eps * (abs(Dt[nz, b]) + abs(k * Nt[nz, b])):
                    nz += 1
                for i in range(n):
                    prev[i] = complex(p1r[i, b], p1i[i, b])
                if not _fallback_step(Pl, min(nz, n), prev, zc, roots, cost, perm, work, wr, wi,
                                      u, vv, pp, way, minv, used, qr_max_its):
                    failed[b] = True
                    status[start + b] = 0
                    continue
                for i in range(n):
                    zr[i, b] = zc[i].real
                    zi[i, b] = zc[i].imag
                    dr[i, b] = math.nan
                    di[i, b] = math.nan
            # -- velocity ds/dk = -sigma N(s) / P'(s); the first Newton step's P' is the
            # derivative at the root to first order, enough for a predictor
            for b in range(L):
                flag[b] = False
            for i in range(n):
                for b in range(L):
                    hr[b] = Nt[0, b]
                    hi[b] = 0.0
                for j in range(1, w):
                    for b in range(L):
                        xr = zr[i, b]
                        xi = zi[i, b]
                        tr = hr[b] * xr - hi[b] * xi + Nt[j, b]
                        hi[b] = hr[b] * xi + hi[b] * xr
                        hr[b] = tr
                for b in range(L):
                    den = dr[i, b] * dr[i, b] + di[i, b] * di[i, b]
                    x = -sg * (hr[b] * dr[i, b] + hi[b] * di[i, b]) / den
                    y = -sg * (hi[b] * dr[i, b] - hr[b] * di[i, b]) / den
                    vr[i, b] = x
                    vi[i, b] = y
                    if not (_is_finite(x) and _is_finite(y) and den > 1e-280 and den < 1e280):
                        flag[b] = True
            for b in range(L):
                if flag[b] and not failed[b]:
                    # exact P' at the roots (after a fall-back, or where the quick form failed)
                    for j in range(w):
                        Pl[j] = P[j, b]
                    for i in range(n):
                        x = complex(zr[i, b], zi[i, b])
                        _, dpx = _horner_pd(Pl, x)
                        nx = complex(Nt[0, b])
                        for j in range(1, w):
                            nx = nx * x + Nt[j, b]
                        # P' = 0: a multiple root exactly on a grid gain (a
                        # breakaway point) has no velocity; the next prediction
                        # falls back to the root itself
                        y = -sg * nx / dpx if dpx != 0.0 else _NAN
                        if not (_is_finite(y.real) and _is_finite(y.imag)):
                            y = _NAN
                        vr[i, b] = y.real
                        vi[i, b] = y.imag
            _block_record(start, L, gi, zr, zi, keep_row, op_index, out_kept, out_op, abscissa)
            # -- shift the state: the new roots become the previous ones
            p2r, p1r, zr = p1r, zr, p2r
            p2i, p1i, zi = p1i, zi, p2i
            k2 = k1
            k1 = k
        for b in range(L):
            if not failed[b]:
                status[start + b] = 1


@njit(cache=True, error_model="numpy")
def _fix_quotients(P, Pl, zr, zi, dr, di, ar, ok, L: int, full: bool) -> None:
    """Redo, variant by variant, a block step left undone (NaN step size) by an out-of-range quotient.

    The scalar step divides with scaling, as `_newton_quotient` does.
    """
    n = zr.shape[0]
    w = P.shape[0]
    for b in range(L):
        if not ok[b]:
            continue
        bad = False
        for i in range(n):
            if math.isnan(ar[i, b]):
                bad = True
        if not bad:
            continue
        for j in range(w):
            Pl[j] = P[j, b]
        _lane_newton(Pl, zr, zi, dr, di, ar, b, full)


@njit(cache=True, error_model="numpy")
def _block_record(start, L, gi, zr, zi, keep_row, op_index, out_kept, out_op, abscissa) -> None:
    """Store the roots at grid gain ``gi`` where asked, and every variant's spectral abscissa."""
    n = zr.shape[0]
    for b in range(L):
        v = start + b
        kr = keep_row[v]
        if kr >= 0:
            for i in range(n):
                out_kept[kr, gi, i] = complex(zr[i, b], zi[i, b])
        if gi == op_index:
            for i in range(n):
                out_op[v, i] = complex(zr[i, b], zi[i, b])
        m = -np.inf
        any_finite = False
        for i in range(n):
            x = zr[i, b]
            if not math.isnan(x):
                any_finite = True
                if x > m:
                    m = x
        abscissa[v, gi] = m if any_finite else np.nan
