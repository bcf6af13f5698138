"""Root locus on a common gain grid: the grid, branch tracing, the abscissa envelope.

Everything here is pure computation on stacks of polynomials (float64 arrays
shaped ``(V, degree+1)``, highest power of ``s`` first) and the characteristic
polynomial ``P(s, k) = D(s) + sigma * k * N(s)``.

* `gain_grid` builds the common, strictly increasing, log-spaced grid of
  gains with the nominal's boundary gains and the operating gain on it.
* `trace` follows the closed-loop roots along the grid, one continuous
  branch per open-loop pole, for a whole stack of variants at once.  The
  default method is predictor-corrector continuation (a quadratic predictor
  from the previous two gains and the root velocity ``ds/dk``, then
  vectorised Newton), with a per-variant fall back to a batched eigenvalue
  solve plus optimal matching wherever convergence or separation is in
  doubt.  ``method="eig"`` is the plain eigenvalue-per-gain reference.
* `Envelope` accumulates, per grid gain, the min / max / sum / count of the
  spectral abscissa (largest real part of the roots) over all variants and
  merges across chunks.
* `kept_indices` / `select_kept` decide whose loci are stored.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Iterable

import numpy as np
from scipy.optimize import linear_sum_assignment

from .errors import InputError

__all__ = [
    "gain_grid",
    "trace",
    "trace_chunk",
    "ChunkLocus",
    "spectral_abscissa",
    "Envelope",
    "kept_indices",
    "select_kept",
    "parse_keep",
]

_EPS = np.finfo(np.float64).eps

# Lower / upper end of an open gain range, relative to the nominal loop's gain scale.
_OPEN_LOW_FACTOR = 1e-3
_OPEN_HIGH_FACTOR = 1e3


# --------------------------------------------------------------------------- gain grid

def _as_vector(c, name: str) -> np.ndarray:
    a = np.asarray(c, dtype=np.float64)
    if a.ndim == 2 and a.shape[0] == 1:
        a = a[0]
    if a.ndim != 1 or a.size == 0:
        raise ValueError(f"{name}: expected one coefficient list, got shape {a.shape}")
    return a


def _pole_scale_gain(N: np.ndarray, D: np.ndarray) -> float:
    """|D(j r)| / |N(j r)| at r = the geometric mean of the nonzero pole magnitudes.

    The gain at which the feedback term is as large as the open-loop
    denominator at the loop's natural frequency scale: the locus changes
    character around it.  Falls back to r = 1 and to 1.0 where undefined.
    """
    D = np.trim_zeros(D, "f")
    N = np.trim_zeros(N, "f")
    if N.size == 0 or D.size == 0:
        return 1.0
    poles = np.roots(D) if D.size > 1 else np.array([])
    mags = np.abs(poles[np.abs(poles) > 0])
    r = float(np.exp(np.mean(np.log(mags)))) if mags.size else 1.0
    for s in (1j * r, r, 1j, 1.0):
        dn = abs(np.polyval(N, s))
        if dn > 0 and np.isfinite(dn):
            k = abs(np.polyval(D, s)) / dn
            if k > 0 and np.isfinite(k):
                return float(k)
    return 1.0


def gain_grid(
    points: int,
    gain_range: tuple[float, float],
    *,
    nominal_N,
    nominal_D,
    sigma: int,
    boundary_gains: Iterable[float] = (),
    operating_gain: float | None = None,
) -> np.ndarray:
    """The common gain grid of the root locus.

    Parameters
    ----------
    points
        Number of gains; the grid has exactly this many (at least 2).
    gain_range
        ``(lo, hi)``, ``0 <= lo < hi <= inf``.
    nominal_N, nominal_D
        The nominal loop's numerator and denominator coefficients (highest
        power first; a 1-D array or a stack of one).
    sigma
        ``+1`` negative feedback, ``-1`` positive (kept for the interface;
        the grid depends on gain magnitudes only).
    boundary_gains
        The nominal's boundary gains; those strictly inside the grid's span
        are put on the grid.
    operating_gain
        Put on the grid too when it lies inside the grid's span.

    Returns
    -------
    numpy.ndarray
        float64 ``(points,)``, strictly increasing, positive.

    Notes
    -----
    Rule for the span ``[k_first, k_last]``:

    * the *anchor* gains are the finite positive boundary gains, the
      operating gain, and the pole-scale gain ``|D(j r)| / |N(j r)|`` with
      ``r`` the geometric mean of the nominal's nonzero pole magnitudes;
    * ``k_first = lo`` when ``lo > 0`` (log spacing needs a positive start),
      otherwise ``1e-3`` times the smallest anchor (and below ``hi``);
    * ``k_last = hi`` when finite, otherwise ``1e3`` times the largest anchor
      (and above ``lo``).

    Between them the gains are log-spaced (``numpy.geomspace``).  Each
    boundary gain and the operating gain then replaces the log-spaced point
    nearest to it in ``log k``; when two of them want the same point the
    later moves to the next free one, and the free points of any segment
    left out of order are re-spaced logarithmically between their fixed
    neighbours, so the count stays exact and the grid strictly increasing.
    """
    if isinstance(points, bool) or not isinstance(points, (int, np.integer)) or points < 2:
        raise InputError(f"locus points must be an integer of at least 2, got {points!r}",
                         field="locus.points")
    points = int(points)
    lo, hi = (float(gain_range[0]), float(gain_range[1]))
    if not (lo >= 0 and hi > lo) or math.isnan(hi):
        raise InputError(f"gain_range must satisfy 0 <= low < high, got [{lo}, {hi}]",
                         field="loop.gain_range")
    N = _as_vector(nominal_N, "nominal_N")
    D = _as_vector(nominal_D, "nominal_D")

    bks = np.asarray(list(boundary_gains), dtype=np.float64).ravel()
    bks = bks[np.isfinite(bks) & (bks > lo) & (bks < hi) & (bks > 0)]
    targets = list(bks)
    op = None
    if operating_gain is not None and np.isfinite(operating_gain) and operating_gain > 0:
        op = float(operating_gain)
        targets.append(op)
    anchors = np.array(targets + [_pole_scale_gain(N, D)], dtype=np.float64)

    if lo > 0:
        first = lo
    else:
        first = _OPEN_LOW_FACTOR * float(anchors.min())
        if math.isfinite(hi):
            first = min(first, _OPEN_LOW_FACTOR * hi)
    if math.isfinite(hi):
        last = hi
    else:
        last = _OPEN_HIGH_FACTOR * max(float(anchors.max()), first)

    grid = np.geomspace(first, last, points)
    targets_arr = np.unique(np.array([t for t in targets if first <= t <= last], dtype=np.float64))
    q = targets_arr.size
    if q > points:
        raise InputError(f"locus points ({points}) cannot hold the {q} boundary and operating "
                         f"gains; use at least {q + 2}", field="locus.points")
    if q == 0:
        return grid

    # nearest log-spaced point for each target, made strictly increasing and in range
    lg = np.log(grid)
    idx = np.abs(np.log(targets_arr)[:, None] - lg[None, :]).argmin(axis=1)
    for i in range(1, q):
        idx[i] = max(idx[i], idx[i - 1] + 1)
    for i in range(q - 1, -1, -1):
        idx[i] = min(idx[i], points - 1 - (q - 1 - i))
        if i < q - 1:
            idx[i] = min(idx[i], idx[i + 1] - 1)
    grid[idx] = targets_arr
    fixed = np.zeros(points, dtype=bool)
    fixed[idx] = True
    fixed[0] = fixed[-1] = True
    # re-space the free points of any segment that is no longer strictly increasing
    fixed_at = np.flatnonzero(fixed)
    for a, b in zip(fixed_at[:-1], fixed_at[1:]):
        seg = grid[a:b + 1]
        if b - a > 1 and not np.all(np.diff(seg) > 0):
            grid[a:b + 1] = np.geomspace(grid[a], grid[b], b - a + 1)
            grid[a], grid[b] = seg[0], seg[-1]
    if not np.all(np.diff(grid) > 0):  # only when targets crowd the ends; fix by re-spacing
        raise InputError("boundary gains too close to the ends of gain_range for the grid; "
                         "increase locus points", field="locus.points")
    return grid


# --------------------------------------------------------------------------- polynomial helpers

def _stacks(N, D) -> tuple[np.ndarray, np.ndarray]:
    """Float64 stacks with N padded on the left to D's width."""
    N = np.atleast_2d(np.asarray(N, dtype=np.float64))
    D = np.atleast_2d(np.asarray(D, dtype=np.float64))
    if N.shape[0] != D.shape[0]:
        raise ValueError(f"N and D stacks differ in length: {N.shape[0]} vs {D.shape[0]}")
    if N.shape[1] > D.shape[1]:
        extra = N[:, : N.shape[1] - D.shape[1]]
        if np.any(extra != 0):
            raise ValueError("improper loop: deg N > deg D")
        N = N[:, N.shape[1] - D.shape[1]:]
    if N.shape[1] < D.shape[1]:
        N = np.concatenate([np.zeros((N.shape[0], D.shape[1] - N.shape[1])), N], axis=1)
    return N, D


def _char_poly(N: np.ndarray, D: np.ndarray, sigma: float, k) -> np.ndarray:
    """Coefficients of P = D + sigma k N; k a scalar or (V,)."""
    k = np.asarray(k, dtype=np.float64)
    if k.ndim == 1:
        k = k[:, None]
    return D + (sigma * k) * N


def _lead_zeros(P: np.ndarray, N: np.ndarray, D: np.ndarray, sigma: float, k) -> np.ndarray:
    """Number of leading coefficients of P that vanish to rounding (V,).

    A coefficient counts as zero when it is below ``16 eps (|d_i| + |k n_i|)``:
    the cancellation ``d_i + sigma k n_i`` at a gain that is the rounded
    root-through-infinity gain leaves only rounding noise there.
    """
    k = np.asarray(k, dtype=np.float64)
    if k.ndim == 1:
        k = k[:, None]
    tiny = np.abs(P) <= 16 * _EPS * (np.abs(D) + np.abs(k * N))
    # count leading run of zeros
    run = np.cumprod(tiny, axis=1)
    return run.sum(axis=1).astype(np.int64)


def _roots_eig(P: np.ndarray, nz: np.ndarray | None = None) -> np.ndarray:
    """Roots of a stack of polynomials by companion eigenvalues, (B, n), NaN-padded.

    ``nz[b]`` leading coefficients of row ``b`` are taken as zero (degree drop):
    its last ``nz[b]`` root slots are NaN (roots gone to infinity).
    """
    B, w = P.shape
    n = w - 1
    out = np.full((B, n), np.nan + 1j * np.nan, dtype=np.complex128)
    if nz is None:
        nz = np.zeros(B, dtype=np.int64)
    for z in np.unique(nz):
        rows = np.flatnonzero(nz == z)
        deg = n - int(z)
        if deg <= 0:
            continue
        c = P[rows, z:]
        comp = np.zeros((rows.size, deg, deg))
        comp[:, 0, :] = -c[:, 1:] / c[:, :1]
        if deg > 1:
            ar = np.arange(deg - 1)
            comp[:, ar + 1, ar] = 1.0
        out[rows, :deg] = np.linalg.eigvals(comp)
    return out


def _sort_key_order(r: np.ndarray) -> np.ndarray:
    """Deterministic order of roots per row: by real part (rounded), then imaginary part."""
    scale = np.nanmax(np.abs(r), axis=1, keepdims=True)
    scale = np.where(np.isfinite(scale) & (scale > 0), scale, 1.0)
    # rounding the real part makes conjugate pairs tie on it, so the imaginary part decides
    re = np.round(np.where(np.isnan(r.real), np.inf, r.real) / scale, 10)
    im = np.where(np.isnan(r.imag), np.inf, r.imag)
    return _lexsort_rows(re, im)


def _lexsort_rows(re: np.ndarray, im: np.ndarray) -> np.ndarray:
    o1 = np.argsort(im, axis=1, kind="stable")
    re1 = np.take_along_axis(re, o1, axis=1)
    o2 = np.argsort(re1, axis=1, kind="stable")
    return np.take_along_axis(o1, o2, axis=1)


# --------------------------------------------------------------------------- matching

def _cost_matrix(pred: np.ndarray, roots: np.ndarray) -> np.ndarray:
    """Cost[b, i, j] = |pred_i - root_j|, finite everywhere.

    A missing root (NaN) costs 0 against every prediction, so it goes to the
    prediction the finite roots fit worst (the branch leaving through
    infinity).  A missing prediction (the branch was at infinity) costs the
    same large constant against every finite root, so it takes the root the
    other branches leave over (the one coming back from infinity).
    """
    c = np.abs(pred[:, :, None] - roots[:, None, :])
    bad = ~np.isfinite(c)
    if bad.any():
        finite_max = np.where(bad, 0.0, c).max(axis=(1, 2), keepdims=True)
        big = 1e3 * (finite_max + 1.0)
        c = np.where(bad, np.broadcast_to(big, c.shape), c)
        c = np.where(~np.isfinite(roots)[:, None, :], 0.0, c)
    return c


def _assign(cost: np.ndarray) -> np.ndarray:
    """Optimal (minimum total cost) assignment per row: perm[b, i] = column for row i.

    Where each row's smallest entry lies in a different column, that is the
    optimum (the sum of row minima bounds every assignment from below); the
    remaining rows go to `scipy.optimize.linear_sum_assignment` one by one.
    """
    B, n, _ = cost.shape
    perm = cost.argmin(axis=2)
    srt = np.sort(perm, axis=1)
    ok = np.all(srt == np.arange(n)[None, :], axis=1)
    for b in np.flatnonzero(~ok):
        _, cols = linear_sum_assignment(cost[b])
        perm[b] = cols
    return perm


def _match(pred: np.ndarray, roots: np.ndarray) -> np.ndarray:
    """Reorder ``roots`` (B, n) so column i is the root matched to ``pred[:, i]``."""
    if roots.shape[0] == 0:
        return roots
    perm = _assign(_cost_matrix(pred, roots))
    return np.take_along_axis(roots, perm, axis=1)


# --------------------------------------------------------------------------- Horner

def _horner(c: np.ndarray, z: np.ndarray) -> np.ndarray:
    """p(z) for coefficient stack c (B, w) at points z (B, n)."""
    p = np.empty(z.shape, dtype=np.result_type(c, z))
    p[...] = c[:, :1]
    for i in range(1, c.shape[1]):
        p *= z
        p += c[:, i:i + 1]
    return p


def _horner_d(c: np.ndarray, z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """p(z) and p'(z) for coefficient stack c (B, w) at points z (B, n)."""
    p = np.empty(z.shape, dtype=np.complex128)
    p[...] = c[:, :1]
    dp = np.zeros_like(p)
    for i in range(1, c.shape[1]):
        dp *= z
        dp += p
        p *= z
        p += c[:, i:i + 1]
    return p, dp


# --------------------------------------------------------------------------- tracing

def _check_inputs(N, D, sigma, gains):
    N, D = _stacks(N, D)
    if sigma not in (1, -1):
        raise ValueError(f"sigma must be +1 or -1, got {sigma!r}")
    g = np.asarray(gains, dtype=np.float64).ravel()
    if g.size == 0 or not np.all(np.isfinite(g)) or np.any(g <= 0) or np.any(np.diff(g) <= 0):
        raise ValueError("gains must be finite, positive and strictly increasing")
    if np.any(D[:, 0] == 0):
        raise ValueError("leading coefficient of D must be nonzero in every variant")
    return N, D, float(sigma), g


def _open_loop_poles(D: np.ndarray) -> np.ndarray:
    poles = _roots_eig(D)
    order = _sort_key_order(poles)
    return np.take_along_axis(poles, order, axis=1)


def trace(N, D, *, sigma: int, gains, method: str = "continuation",
          stats: dict | None = None) -> np.ndarray:
    """Closed-loop roots along a gain grid, one continuous branch per open-loop pole.

    Parameters
    ----------
    N, D
        Stacks ``(V, m+1)`` and ``(V, n+1)``, highest power first, ``m <= n``,
        ``D[:, 0] != 0``.
    sigma
        ``+1`` negative feedback, ``-1`` positive: ``P = D + sigma k N``.
    gains
        Strictly increasing positive gains ``(G,)`` (e.g. from `gain_grid`).
    method
        ``"continuation"`` (default, fast) or ``"eig"`` (companion
        eigenvalues at every gain, then optimal matching; the reference).
    stats
        Optional dict that receives counters of the fall-back paths taken
        (``"fallback_variant_steps"``, ``"not_converged"``,
        ``"not_separated"``, ``"degree_drop"``, ``"steps"``,
        ``"newton_variant_iterations"``).

    Returns
    -------
    numpy.ndarray
        complex128 ``(V, G, n)``.  Branch ``j`` starts at the ``j``-th
        open-loop pole in sorted order (by real part, then imaginary part)
        and is continuous along the grid: between consecutive gains the
        roots are matched to a prediction of each branch (quadratic
        extrapolation in ``k`` using the root velocity
        ``ds/dk = -sigma N(s) / P'(s)``) by minimum total distance.  Branches
        end at the zeros or along the asymptotes.

    Notes
    -----
    When ``deg N = deg D`` the leading coefficient of ``P`` vanishes at one
    gain and a root passes through infinity.  At a grid gain where a leading
    coefficient of ``P`` is zero to rounding (``|p_0| <= 16 eps (|d_0| +
    k |n_0|)``), the degree of ``P`` drops and the missing root is NaN on
    the branch whose prediction the finite roots fit worst (the one that was
    heading out to infinity); on the next gain the returning root joins that
    branch again.

    Continuation accepts a variant's Newton result at a gain only when every
    root converged (last step below ``1e-12`` of the root scale, or a
    contracting step whose geometric tail is, or a residual at the rounding
    level of the evaluation) and every correction is under a third of the
    distance from its prediction to the nearest other prediction (so each
    root is the nearest one to its own prediction by a factor two, and no
    two predictions converged to one root).  Otherwise - near break-away
    points, where real roots must leave the real axis, on coarse grids, at
    degree drops - that variant's step is redone with companion eigenvalues
    and optimal matching against the prediction (each predicted step capped
    at half the distance to the nearest other root).  Accuracy is then that
    of a backward-stable root finder: the deviation from the eigenvalues is
    at rounding level for well-separated roots and grows with the condition
    of clustered roots, for both methods.
    """
    N, D, sg, g = _check_inputs(N, D, sigma, gains)
    if method not in ("continuation", "eig"):
        raise ValueError(f"unknown method {method!r}")
    V, w = D.shape
    n = w - 1
    G = g.size
    out = np.empty((V, G, n), dtype=np.complex128)
    if n == 0 or V == 0:
        return out
    st = {"steps": 0, "fallback_variant_steps": 0, "not_converged": 0,
          "not_separated": 0, "degree_drop": 0, "newton_variant_iterations": 0}

    poles = _open_loop_poles(D)
    # gain 0 -> first grid gain: match the roots to the open-loop poles
    P0 = _char_poly(N, D, sg, g[0])
    nz0 = _lead_zeros(P0, N, D, sg, g[0])
    out[:, 0] = _match(poles, _roots_eig(P0, nz0))
    st["degree_drop"] += int(np.count_nonzero(nz0))

    Np_ = N  # padded numerator
    lead_n = np.any(N[:, 0] != 0)  # only then can the degree of P drop
    nzcol = np.flatnonzero(np.any(N != 0, axis=0))
    first_nz = int(nzcol[0]) if nzcol.size else N.shape[1] - 1
    # velocities ds/dk at the previous gain, for the predictor
    vel = _velocity(Np_, D, sg, g[0], out[:, 0])
    if method == "continuation":
        _continue(N, D, sg, g, poles, out, vel, lead_n, first_nz, st)
        if stats is not None:
            stats.update(st)
        return out
    prev2, k2 = poles, 0.0
    prev1, k1 = out[:, 0], g[0]
    for gi in range(1, G):
        k = g[gi]
        st["steps"] += 1
        pred = _predict(prev2, k2, prev1, k1, vel, k)
        P = _char_poly(Np_, D, sg, k)
        nz = _lead_zeros(P, Np_, D, sg, k) if lead_n else np.zeros(V, dtype=np.int64)
        new = _match(_safe_pred(pred, prev1), _roots_eig(P, nz))
        st["degree_drop"] += int(np.count_nonzero(nz))
        vel = _velocity(Np_, D, sg, k, new)
        out[:, gi] = new
        prev2, k2, prev1, k1 = prev1, k1, new, k
    if stats is not None:
        stats.update(st)
    return out


def _velocity(N: np.ndarray, D: np.ndarray, sg: float, k: float, z: np.ndarray) -> np.ndarray:
    """ds/dk = -sigma N(s) / P'(s) at the roots z; NaN where undefined."""
    P = _char_poly(N, D, sg, k)
    with np.errstate(all="ignore"):
        _, dp = _horner_d(P, z)
        v = -sg * _horner(N, z) / dp
    return np.where(np.isfinite(v), v, np.nan)


def _predict(z0, k0, z1, k1, v1, k) -> np.ndarray:
    """Quadratic extrapolation through (k0, z0), (k1, z1) with slope v1 at k1.

    Falls back to the linear (tangent) step where the curvature term is not
    finite, and to the previous root where the velocity is not.
    """
    h0 = k1 - k0
    h = k - k1
    with np.errstate(all="ignore"):
        c = (z0 - z1 + v1 * h0) / (h0 * h0)
        p2 = z1 + h * (v1 + c * h)
        p1 = z1 + h * v1
    bad = ~np.isfinite(p2)
    if bad.any():
        p2[bad] = np.where(np.isfinite(p1[bad]), p1[bad], z1[bad])
    return p2


def _safe_pred(pred: np.ndarray, prev: np.ndarray) -> np.ndarray:
    """Limit each predicted step to half the distance from its root to the nearest other root.

    Keeps a wild prediction (a near-multiple root makes ``ds/dk`` huge) from
    carrying a branch across its neighbour before matching.
    """
    n = prev.shape[1]
    if n < 2:
        return pred
    d = np.abs(prev[:, :, None] - prev[:, None, :])
    d[:, np.arange(n), np.arange(n)] = np.inf
    d = np.where(np.isfinite(d), d, np.inf)
    nn = d.min(axis=2)
    step = pred - prev
    a = np.abs(step)
    lim = 0.5 * nn
    with np.errstate(all="ignore"):
        scale = np.where((a > lim) & np.isfinite(lim), lim / a, 1.0)
    out = prev + step * scale
    return np.where(np.isfinite(out), out, pred)


# Newton settings: accept when the estimated error is below _NEWTON_RTOL x the variant's root scale.
_NEWTON_RTOL = 1e-12
_NEWTON_MAXIT = 6
# a Newton correction must stay under this fraction of the distance to the nearest other
# prediction (1/3 makes each root the nearest to its own prediction by a factor 2)
_DOMINANCE = 1.0 / 3.0


def _horner_t(c: np.ndarray, z: np.ndarray) -> np.ndarray:
    """p(z) in the transposed layout: coefficients c (w, B), points z (n, B)."""
    p = np.empty(z.shape, dtype=np.result_type(c, z))
    p[...] = c[0]
    for i in range(1, c.shape[0]):
        p *= z
        p += c[i]
    return p


def _newton_t(c: np.ndarray, z: np.ndarray):
    """One Newton step in place on z (n, B) for coefficients c (w, B).

    Returns ``(|step|, P'(z) before the step)``.
    """
    p = np.empty(z.shape, dtype=np.complex128)
    p[...] = c[0]
    dp = np.zeros_like(p)
    for i in range(1, c.shape[0]):
        dp *= z
        dp += p
        p *= z
        p += c[i]
    p /= dp
    z -= p
    return np.abs(p), dp


def _continue(N, D, sg, g, poles, out, vel, lead_n, first_nz, st) -> None:
    """Predictor-corrector continuation over the grid, filling out[:, 1:].

    Works in the transposed layout (roots ``(n, V)``, coefficients ``(w, V)``)
    so that every elementwise operation and every reduction over the roots
    of a variant runs along long contiguous rows.
    """
    V, w = D.shape
    NT = np.ascontiguousarray(N.T)
    DT = np.ascontiguousarray(D.T)
    NTz = NT[first_nz:]
    prev2, k2 = np.ascontiguousarray(poles.T), 0.0
    prev1, k1 = np.ascontiguousarray(out[:, 0].T), g[0]
    velT = np.ascontiguousarray(vel.T)
    no_drop = np.zeros(V, dtype=np.int64)
    for gi in range(1, g.size):
        k = g[gi]
        st["steps"] += 1
        pred = _predict(prev2, k2, prev1, k1, velT, k)
        PT = DT + (sg * k) * NT
        nz = _lead_zeros(PT.T, N, D, sg, k) if lead_n else no_drop
        new, dp = _continuation_step_t(PT, nz, pred, prev1, st)
        with np.errstate(all="ignore"):
            # the last Newton derivative is P' at the root to first order: enough for a predictor
            velT = _horner_t(NTz, new)
            velT *= -sg
            velT /= dp
        redo = np.flatnonzero(~np.isfinite(velT).all(axis=0))
        if redo.size:
            velT[:, redo] = _velocity(N[redo], D[redo], sg, k, new[:, redo].T).T
        out[:, gi] = new.T
        prev2, k2, prev1, k1 = prev1, k1, new, k


def _continuation_step_t(P, nz, pred, prev, st):
    """Newton from the prediction for all variants; eigenvalue fall back where in doubt.

    Transposed layout: ``P`` (w, V), ``pred``/``prev`` (n, V).  Returns the
    roots (n, V) and P' at (nearly) the roots, NaN where unknown.
    """
    n, V = pred.shape
    z = pred.copy()
    st.setdefault("newton_variant_iterations", 0)
    with np.errstate(all="ignore"):
        ok = np.isfinite(pred).all(axis=0)
        if nz.any():
            st["degree_drop"] += int(np.count_nonzero(nz))
            ok &= nz == 0
        # root scale of each variant (max-norm is enough for a relative tolerance)
        sc = np.maximum(np.abs(pred.real).max(axis=0), np.abs(pred.imag).max(axis=0))
        sc = np.where(sc > 0, sc, 1.0) * _NEWTON_RTOL
        done = np.zeros(V, dtype=bool)
        dp = np.full((n, V), np.nan + 0j)
        active = np.flatnonzero(ok)
        maxit = _NEWTON_MAXIT
        if maxit >= 2 and active.size == V:
            # two steps on everything: a good prediction converges in two
            a1, _ = _newton_t(P, z)
            a2, dp = _newton_t(P, z)
            st["newton_variant_iterations"] += 2 * V
            r = a2 / a1
            conv = ((a2 <= sc) | ((r < 0.5) & (a2 * r <= sc * (1 - r)))).all(axis=0)
            conv &= np.isfinite(z).all(axis=0)
            done = conv
            active = np.flatnonzero(~conv)
            last = a2[:, active]
            it0 = 2
        else:
            last = np.full((n, active.size), np.inf)
            it0 = 0
        # further steps only on the variants that still need them
        for _ in range(it0, maxit):
            if active.size == 0:
                break
            st["newton_variant_iterations"] += int(active.size)
            za = z[:, active]
            a, dpa = _newton_t(P[:, active], za)
            z[:, active] = za
            dp[:, active] = dpa
            r = a / last
            s_a = sc[active]
            conv_root = (a <= s_a) | (np.isfinite(last) & (r < 0.5) & (a * r <= s_a * (1 - r)))
            fin = np.isfinite(za).all(axis=0)
            conv = conv_root.all(axis=0) & fin
            done[active[conv]] = True
            keep = ~conv & fin
            active = active[keep]
            last = a[:, keep]
        # a residual already at the rounding level of the evaluation cannot improve
        left = np.flatnonzero(ok & ~done)
        if left.size:
            zl = z[:, left]
            Pl = P[:, left]
            p = _horner_t(Pl, zl)
            noise = _horner_t(np.abs(Pl), np.abs(zl)).real
            at_noise = (np.abs(p) <= 64 * _EPS * noise).all(axis=0) & np.isfinite(zl).all(axis=0)
            done[left[at_noise]] = True
    good = ok & done
    st["not_converged"] += int(np.count_nonzero(ok & ~done))
    if n > 1:
        # separation: every correction must stay under _DOMINANCE (1/3) of the distance from
        # its prediction to the nearest other prediction, so each corrected root is the
        # nearest to its own prediction by a factor 2 and no two roots coincide
        dz = z - pred
        e2 = dz.real * dz.real
        e2 += dz.imag * dz.imag
        d = pred[:, None, :] - pred[None, :, :]
        d2 = d.real * d.real
        d2 += d.imag * d.imag
        ar = np.arange(n)
        d2[ar, ar] = np.inf
        sep2 = d2.min(axis=1)
        with np.errstate(invalid="ignore"):
            sep_ok = (e2 < (_DOMINANCE * _DOMINANCE) * sep2).all(axis=0)
        st["not_separated"] += int(np.count_nonzero(good & ~sep_ok))
        good &= sep_ok
    fb = np.flatnonzero(~good)
    if fb.size:
        st["fallback_variant_steps"] += int(fb.size)
        z[:, fb] = _match(_safe_pred(pred[:, fb].T, prev[:, fb].T),
                          _roots_eig(np.ascontiguousarray(P[:, fb].T), nz[fb])).T
        dp[:, fb] = np.nan
    return z, dp


# --------------------------------------------------------------------------- one chunk

@dataclass(frozen=True)
class ChunkLocus:
    """What a sweep keeps of the loci of one chunk of variants.

    Attributes
    ----------
    kept_roots
        complex128 ``(Vk, G, n)``: the branches of the kept variants (rows of
        ``keep`` that are True, in order).
    operating_roots
        complex128 ``(V, n)``: the closed-loop roots at ``gains[operating_index]``
        for every variant, or None when no index was asked for.
    open_loop_poles
        complex128 ``(V, n)``: the roots of ``D`` (branch starting points).
    envelope
        The chunk's spectral-abscissa `Envelope` over all ``V`` variants.
    """

    kept_roots: np.ndarray
    operating_roots: np.ndarray | None
    open_loop_poles: np.ndarray
    envelope: "Envelope"


def trace_chunk(N, D, *, sigma: int, gains, keep, operating_index: int | None = None) -> ChunkLocus:
    """Trace a chunk and keep only what a sweep stores.

    Parameters
    ----------
    N, D, sigma, gains
        As in `trace`.
    keep
        Bool ``(V,)``: whose branches to return in full.
    operating_index
        Index into ``gains`` of the operating gain (its roots are returned
        for every variant), or None.

    Returns
    -------
    ChunkLocus
    """
    keep = np.asarray(keep, dtype=bool)
    roots = trace(N, D, sigma=sigma, gains=gains)
    _, Ds = _stacks(N, D)
    return ChunkLocus(
        kept_roots=roots[keep],
        operating_roots=None if operating_index is None else roots[:, int(operating_index)].copy(),
        open_loop_poles=_open_loop_poles(Ds),
        envelope=Envelope(roots.shape[1]).update(roots),
    )


# --------------------------------------------------------------------------- envelope

def spectral_abscissa(roots: np.ndarray) -> np.ndarray:
    """Largest real part over the last axis, NaN roots ignored (NaN if all are NaN)."""
    re = np.asarray(roots).real
    with np.errstate(invalid="ignore"):
        m = np.where(np.isnan(re), -np.inf, re).max(axis=-1)
    return np.where(np.isneginf(m) & np.all(np.isnan(re), axis=-1), np.nan, m)


class Envelope:
    """Streaming per-gain min / max / sum / count of the spectral abscissa.

    Parameters
    ----------
    n_gains
        Length of the gain grid.

    Notes
    -----
    `update` takes roots ``(V, G, n)`` (complex) or abscissae ``(V, G)``
    (real); NaN values are ignored.  `merge` is elementwise (min, max, +, +)
    and therefore associative and commutative up to the rounding of the
    sums.  `to_arrays` / `from_arrays` convert to plain arrays named
    ``envelope_min``, ``envelope_max``, ``envelope_sum``, ``envelope_count``
    for part files.
    """

    def __init__(self, n_gains: int):
        self.n_gains = int(n_gains)
        self._min = np.full(self.n_gains, np.inf)
        self._max = np.full(self.n_gains, -np.inf)
        self._sum = np.zeros(self.n_gains)
        self._count = np.zeros(self.n_gains, dtype=np.int64)

    def update(self, values: np.ndarray) -> "Envelope":
        """Fold in a chunk: roots ``(V, G, n)`` complex, or abscissae ``(V, G)`` real."""
        a = np.asarray(values)
        if np.iscomplexobj(a) or a.ndim == 3:
            a = spectral_abscissa(a)
        a = np.asarray(a, dtype=np.float64)
        if a.ndim == 1:
            a = a[None, :]
        if a.ndim != 2 or a.shape[1] != self.n_gains:
            raise ValueError(f"expected (V, {self.n_gains}) abscissae, got {a.shape}")
        ok = ~np.isnan(a)
        self._min = np.minimum(self._min, np.where(ok, a, np.inf).min(axis=0, initial=np.inf))
        self._max = np.maximum(self._max, np.where(ok, a, -np.inf).max(axis=0, initial=-np.inf))
        self._sum = self._sum + np.where(ok, a, 0.0).sum(axis=0)
        self._count = self._count + ok.sum(axis=0)
        return self

    def merge(self, other: "Envelope") -> "Envelope":
        """A new envelope holding both (self first, then other)."""
        if other.n_gains != self.n_gains:
            raise ValueError("envelopes over different gain grids")
        e = Envelope(self.n_gains)
        e._min = np.minimum(self._min, other._min)
        e._max = np.maximum(self._max, other._max)
        e._sum = self._sum + other._sum
        e._count = self._count + other._count
        return e

    @property
    def count(self) -> np.ndarray:
        return self._count.copy()

    @property
    def min(self) -> np.ndarray:
        """Smallest abscissa per gain (NaN where nothing was counted)."""
        return np.where(self._count > 0, self._min, np.nan)

    @property
    def max(self) -> np.ndarray:
        """Largest abscissa per gain (NaN where nothing was counted)."""
        return np.where(self._count > 0, self._max, np.nan)

    @property
    def mean(self) -> np.ndarray:
        """Mean abscissa per gain (NaN where nothing was counted)."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self._count > 0, self._sum / np.maximum(self._count, 1), np.nan)

    def to_arrays(self) -> dict[str, np.ndarray]:
        """Plain arrays for storage: ``envelope_min/max/sum/count`` (G,)."""
        return {"envelope_min": self._min.copy(), "envelope_max": self._max.copy(),
                "envelope_sum": self._sum.copy(), "envelope_count": self._count.copy()}

    @classmethod
    def from_arrays(cls, envelope_min, envelope_max, envelope_sum, envelope_count) -> "Envelope":
        """Rebuild from `to_arrays` output (NaN in min/max read as 'nothing counted')."""
        mn = np.asarray(envelope_min, dtype=np.float64)
        e = cls(mn.size)
        e._min = np.where(np.isnan(mn), np.inf, mn)
        mx = np.asarray(envelope_max, dtype=np.float64)
        e._max = np.where(np.isnan(mx), -np.inf, mx)
        e._sum = np.asarray(envelope_sum, dtype=np.float64).copy()
        e._count = np.asarray(envelope_count).astype(np.int64)
        return e


# --------------------------------------------------------------------------- kept loci

def parse_keep(keep: str, keep_count: int | None = None) -> tuple[str, int | None]:
    """Split a keep setting into (kind, count): ``"random:N"`` -> ("random", N)."""
    text = str(keep).strip().lower()
    if text.startswith("random"):
        rest = text[len("random"):]
        if rest.startswith(":"):
            try:
                keep_count = int(rest[1:])
            except ValueError:
                raise InputError(f"keep = {keep!r}: N in 'random:N' must be an integer",
                                 field="locus.keep") from None
        elif rest:
            raise InputError(f"keep = {keep!r}: use all, none, corners or random:N",
                             field="locus.keep")
        if keep_count is None or keep_count < 0:
            raise InputError(f"keep = {keep!r}: give the count as random:N with N >= 0",
                             field="locus.keep")
        return "random", int(keep_count)
    if text in ("all", "none", "corners"):
        return text, None
    raise InputError(f"keep = {keep!r}: use all, none, corners or random:N", field="locus.keep")


def kept_indices(total: int, keep: str, keep_count: int | None = None, seed: int = 0,
                 design_labels=None) -> np.ndarray:
    """Indices (sorted, int64) of the variants of the whole sweep whose loci are stored.

    Parameters
    ----------
    total
        Number of variants in the sweep.
    keep, keep_count
        ``"all"``, ``"none"``, ``"corners"`` or ``"random:N"`` (or ``"random"``
        with ``keep_count=N``).
    seed
        The sweep seed; ``random`` picks ``min(N, total)`` indices without
        replacement from a generator seeded by it, so the choice depends on
        ``(seed, total, N)`` only, never on chunking.
    design_labels
        ``(total,)`` design names; ``corners`` keeps the variants labelled
        ``"corners"`` and those labelled ``"nominal"``.
    """
    kind, cnt = parse_keep(keep, keep_count)
    total = int(total)
    if kind == "all":
        return np.arange(total, dtype=np.int64)
    if kind == "none":
        return np.zeros(0, dtype=np.int64)
    if kind == "corners":
        if design_labels is None:
            raise ValueError("keep = corners needs the design labels")
        lab = np.asarray(design_labels).astype(str)
        return np.flatnonzero((lab == "corners") | (lab == "nominal")).astype(np.int64)
    rng = np.random.default_rng([int(seed), 0x6B656570])  # own stream, apart from the sampling
    pick = rng.choice(total, size=min(cnt, total), replace=False)
    return np.sort(pick).astype(np.int64)


def select_kept(design_labels, variant_index, keep: str, keep_count: int | None = None,
                seed: int = 0, *, total: int | None = None,
                kept: np.ndarray | None = None) -> np.ndarray:
    """Boolean mask ``(V,)`` of the chunk's variants whose loci are stored.

    Parameters
    ----------
    design_labels
        ``(V,)`` design names of the chunk.
    variant_index
        ``(V,)`` global variant indices of the chunk.
    keep, keep_count, seed
        As in `kept_indices`.
    total
        Number of variants in the whole sweep (needed for ``random`` unless
        ``kept`` is given).
    kept
        The output of `kept_indices` for the whole sweep, if already computed.
    """
    idx = np.asarray(variant_index, dtype=np.int64)
    kind, cnt = parse_keep(keep, keep_count)
    if kind == "all":
        return np.ones(idx.shape, dtype=bool)
    if kind == "none":
        return np.zeros(idx.shape, dtype=bool)
    if kind == "corners":
        lab = np.asarray(design_labels).astype(str)
        return (lab == "corners") | (lab == "nominal")
    if kept is None:
        if total is None:
            raise ValueError("keep = random:N needs the total variant count (or kept=)")
        kept = kept_indices(total, "random", cnt, seed)
    return np.isin(idx, kept)
