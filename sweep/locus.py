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
    if ok.all():
        return perm
    from scipy.optimize import linear_sum_assignment

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


def _open_loop_poles(D: np.ndarray, roots_fn=None) -> np.ndarray:
    """Roots of D per row in the deterministic branch order (`_sort_key_order`)."""
    poles = (roots_fn or _roots_eig)(D)
    order = _sort_key_order(poles)
    return np.take_along_axis(poles, order, axis=1)


def _roots_fast(P: np.ndarray, nz: np.ndarray | None = None) -> np.ndarray:
    """As `_roots_eig`, by the compiled QR of `sweep.rootfind` (LAPACK where it fails)."""
    from .rootfind import poly_roots

    n = P.shape[1] - 1
    degrees = None if nz is None else n - np.asarray(nz, dtype=np.int64)
    return poly_roots(P, degrees, max_its=_QR_MAX_ITS)


# Newton settings: accept when the estimated error is below _NEWTON_RTOL x the variant's root scale.
_NEWTON_RTOL = 1e-12
_NEWTON_MAXIT = 6
# a Newton correction must stay under this fraction of the distance to the nearest other
# prediction (1/3 makes each root the nearest to its own prediction by a factor 2)
_DOMINANCE = 1.0 / 3.0
# QR iterations per eigenvalue in the compiled fall-back before a variant is redone with LAPACK
_QR_MAX_ITS = 60

_STAT_KEYS = ("steps", "fallback_variant_steps", "not_converged", "not_separated",
              "degree_drop", "newton_variant_iterations", "variant_redo")


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
        ``"continuation"`` (default, fast) or ``"eig"`` (LAPACK companion
        eigenvalues at every gain, then optimal matching; the reference).
    stats
        Optional dict that receives counters of the paths taken: ``"steps"``
        (gain steps), ``"fallback_variant_steps"``, ``"not_converged"``,
        ``"not_separated"``, ``"degree_drop"``, ``"newton_variant_iterations"``,
        ``"variant_redo"``.

    Returns
    -------
    numpy.ndarray
        complex128 ``(V, G, n)``.  Branch ``j`` starts at the ``j``-th
        open-loop pole in sorted order (by real part, then imaginary part)
        and is continuous along the grid: between consecutive gains the
        roots are assigned to the branches with the minimum total distance
        from each branch's previous root.  Branches end at the zeros or
        along the asymptotes.

    Notes
    -----
    When ``deg N = deg D`` the leading coefficient of ``P`` vanishes at one
    gain and a root passes through infinity.  At a grid gain where a leading
    coefficient of ``P`` is zero to rounding (``|p_0| <= 16 eps (|d_0| +
    k |n_0|)``), the degree of ``P`` drops and the missing root is NaN on
    the branch whose previous root the finite roots fit worst (the one that was
    heading out to infinity); on the next gain the returning root joins that
    branch again.

    Continuation (compiled, `sweep._locus_kernel`) predicts each root
    (quadratic extrapolation in ``k`` with the root velocity
    ``ds/dk = -sigma N(s) / P'(s)``), corrects the prediction with at least
    two Newton steps and accepts a variant's step only when every root
    converged (last step below ``1e-12`` of the root scale, or a contracting
    step whose geometric tail is, or a residual at the rounding level of the
    evaluation), every correction is under a third of the distance from its
    prediction to the nearest other prediction (so no two predictions
    converged to one root), and every root moved less than half the
    distance from its previous root to the nearest other previous root (so
    keeping the order is the unique minimum-total-distance assignment).
    Otherwise - near break-away points, where real roots must leave the
    real axis, just past a multiple root, where the velocity is unbounded
    and a prediction can be confidently wrong, on coarse grids, at degree
    drops - that step is redone with the companion-matrix roots assigned
    optimally to the previous roots.  Should the compiled QR iteration itself fail, the whole variant
    is traced again with ``method="eig"``.  Accuracy is that of a
    backward-stable root finder: the deviation from the eigenvalues is at
    rounding level for well-separated roots and grows with the condition of
    clustered roots, for both methods.  Each variant's result depends on
    that variant alone, so a batch equals its rows traced one at a time.
    """
    N, D, sg, g = _check_inputs(N, D, sigma, gains)
    if method not in ("continuation", "eig"):
        raise ValueError(f"unknown method {method!r}")
    V, w = D.shape
    n = w - 1
    st = dict.fromkeys(_STAT_KEYS, 0)
    if n == 0 or V == 0:
        if stats is not None:
            stats.update(st)
        return np.empty((V, g.size, n), dtype=np.complex128)
    if method == "eig":
        out = _trace_eig(N, D, sg, g, st)
    else:
        res = _trace_compiled(N, D, sg, g, np.arange(V, dtype=np.int64), -1, st)
        out = res[0]
    if stats is not None:
        stats.update(st)
    return out


def _first_step(N, D, sg, g, roots_fn, st):
    """Sorted poles, the roots at ``g[0]`` matched to them, and ``ds/dk`` there."""
    poles = _open_loop_poles(D, roots_fn)
    P0 = _char_poly(N, D, sg, g[0])
    nz0 = _lead_zeros(P0, N, D, sg, g[0])
    first = _match(poles, roots_fn(P0, nz0))
    st["degree_drop"] += int(np.count_nonzero(nz0))
    return poles, first, _velocity(N, D, sg, g[0], first)


def _trace_eig(N, D, sg, g, st) -> np.ndarray:
    """Reference tracing: LAPACK roots at every gain, minimum-total-distance matching to the previous roots."""
    V, w = D.shape
    out = np.empty((V, g.size, w - 1), dtype=np.complex128)
    _, out[:, 0], _ = _first_step(N, D, sg, g, _roots_eig, st)
    for gi in range(1, g.size):
        k = g[gi]
        st["steps"] += 1
        P = _char_poly(N, D, sg, k)
        nz = _lead_zeros(P, N, D, sg, k)
        out[:, gi] = _match(out[:, gi - 1], _roots_eig(P, nz))
        st["degree_drop"] += int(np.count_nonzero(nz))
    return out


def _trace_compiled(N, D, sg, g, keep_row, op_index, st):
    """Run the compiled continuation; variants whose QR failed are redone with `_trace_eig`.

    Returns ``(kept (Vk, G, n), at_operating (V, n), abscissa (V, G), poles (V, n))``.
    """
    from . import _locus_kernel as K

    V, w = D.shape
    n = w - 1
    G = g.size
    keep_row = np.ascontiguousarray(keep_row, dtype=np.int64)
    n_kept = int(keep_row.max()) + 1 if keep_row.size else 0
    poles, first, vel0 = _first_step(N, D, sg, g, _roots_fast, st)
    out_kept = np.empty((n_kept, G, n), dtype=np.complex128)
    out_op = np.full((V, n), np.nan + 0j) if op_index >= 0 else np.empty((0, n), dtype=np.complex128)
    abscissa = np.empty((V, G))
    status = np.zeros(V, dtype=np.int8)
    counters = np.zeros(K.N_STATS, dtype=np.int64)
    K.continue_branches(
        np.ascontiguousarray(N), np.ascontiguousarray(D), float(sg), g,
        np.ascontiguousarray(poles), np.ascontiguousarray(first), np.ascontiguousarray(vel0),
        keep_row, int(op_index), out_kept, out_op, abscissa, status, counters,
        int(_NEWTON_MAXIT), float(_NEWTON_RTOL), float(_DOMINANCE), float(_EPS), int(_QR_MAX_ITS),
    )
    st["steps"] += G - 1
    st["fallback_variant_steps"] += int(counters[K.ST_FALLBACK])
    st["not_converged"] += int(counters[K.ST_NOT_CONVERGED])
    st["not_separated"] += int(counters[K.ST_NOT_SEPARATED])
    st["degree_drop"] += int(counters[K.ST_DEGREE_DROP])
    st["newton_variant_iterations"] += int(counters[K.ST_NEWTON_ITERATIONS])
    redo = np.flatnonzero(status == 0)
    if redo.size:
        st["variant_redo"] += int(redo.size)
        roots = _trace_eig(N[redo], D[redo], sg, g, dict.fromkeys(_STAT_KEYS, 0))
        rows = keep_row[redo]
        out_kept[rows[rows >= 0]] = roots[rows >= 0]
        if op_index >= 0:
            out_op[redo] = roots[:, op_index]
        abscissa[redo] = spectral_abscissa(roots)
        poles[redo] = _open_loop_poles(D[redo])
    return out_kept, out_op, abscissa, poles


def _velocity(N: np.ndarray, D: np.ndarray, sg: float, k: float, z: np.ndarray) -> np.ndarray:
    """ds/dk = -sigma N(s) / P'(s) at the roots z; NaN where undefined."""
    P = _char_poly(N, D, sg, k)
    with np.errstate(all="ignore"):
        _, dp = _horner_d(P, z)
        v = -sg * _horner(N, z) / dp
    return np.where(np.isfinite(v), v, np.nan)


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


def trace_chunk(N, D, *, sigma: int, gains, keep, operating_index: int | None = None,
                stats: dict | None = None) -> ChunkLocus:
    """Trace a chunk and keep only what a sweep stores.

    The same tracing as `trace`, but the full ``(V, G, n)`` roots are never
    held: only the kept variants' branches, the roots at the operating
    gain and the per-gain spectral abscissa (folded into the envelope).

    Parameters
    ----------
    N, D, sigma, gains, stats
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
    N, D, sg, g = _check_inputs(N, D, sigma, gains)
    keep = np.asarray(keep, dtype=bool)
    V, w = D.shape
    n = w - 1
    if keep.shape != (V,):
        raise ValueError(f"keep must be a bool mask of length {V}, got shape {keep.shape}")
    op = -1 if operating_index is None else int(operating_index)
    if not -1 <= op < g.size:
        raise ValueError(f"operating_index {operating_index} outside the grid of {g.size} gains")
    st = dict.fromkeys(_STAT_KEYS, 0)
    if n == 0 or V == 0:
        empty = np.empty((0, n), dtype=np.complex128)
        return ChunkLocus(np.empty((int(keep.sum()), g.size, n), dtype=np.complex128),
                          None if op < 0 else np.empty((V, n), dtype=np.complex128),
                          np.empty((V, n), dtype=np.complex128) if V else empty, Envelope(g.size))
    keep_row = np.where(keep, np.cumsum(keep) - 1, -1).astype(np.int64)
    kept, at_op, abscissa, poles = _trace_compiled(N, D, sg, g, keep_row, op, st)
    if stats is not None:
        stats.update(st)
    return ChunkLocus(
        kept_roots=kept,
        operating_roots=None if op < 0 else at_op,
        open_loop_poles=poles,
        envelope=Envelope(g.size).update(abscissa),
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
        ``"corners"`` and those labelled ``"nominal"``; with ``random`` the
        variants labelled ``"nominal"`` are kept besides the ``N`` drawn.
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
    if design_labels is not None:
        # the nominal's locus is the reference every plot draws in bold: always keep it
        pick = np.union1d(pick, np.flatnonzero(np.asarray(design_labels).astype(str) == "nominal"))
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
    mask = np.isin(idx, kept)
    if design_labels is not None:
        mask |= np.asarray(design_labels).astype(str) == "nominal"
    return mask
