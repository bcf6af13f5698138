"""Guaranteed bounds on the worst-case critical gain over the tolerance box.

Two routes (DESIGN.md section 8):

* **Interval family** -- every coefficient of ``N`` and ``D`` varies on its
  own (see `is_interval_family`).  For ``k >= 0`` the coefficients of
  ``D + k sigma N`` are then independent intervals whose ends are linear in
  ``k``, so the four Kharitonov polynomials of the family at ``k`` are the
  pencils ``Kh_i(D) + k Kh_i(sigma N)``.  The family is stable at ``k``
  exactly when the four pencils are, and each pencil is itself a member, so
  the worst-case critical gain is the smallest of the four pencils' critical
  gains.  Exact.
* **Anything else** -- branch-and-bound over the parameter box.  On a
  sub-box the coefficients are enclosed by interval arithmetic; Kharitonov on
  the enclosure is a sufficient test, so the smallest pencil critical gain is
  a guaranteed *lower* bound for every point of the sub-box.  Critical gains
  of actual points give *upper* bounds.  The box with the smallest bound is
  split (64 at a time) along the side with the largest first-order effect on
  the bound (`_split_weights`) until ``upper - lower <= rtol * upper`` or the
  budget runs out.

Before either route, the leading coefficient of ``P`` at the reference gain
is evaluated at the centre and corners of the box: a sign change there is a
root through infinity at the reference gain (degree invariance fails), which
is reported with the place where the coefficient vanishes.  After either
route, the worst point is re-analysed by `sweep.analysis` (the routine the
sweep itself uses), so ``upper`` is the critical gain of an actual variant.

Conventions: polynomials are stacks, highest power of ``s`` first; the
Kharitonov patterns run by power from the constant term up, so they are
aligned by power, not by array index.  Gains ``k`` are those of
``P(s, k) = D(s) + sigma k N(s)`` with ``k`` in ``gain_range``; certification
needs a reference gain ``>= 0`` (the pencil construction holds for ``k >= 0``).

Soundness caveats (what "guaranteed" rests on):

* The coefficient enclosures come from `sweep.loop.enclose` (outward-rounded
  interval arithmetic); the Kharitonov pencils themselves are then analysed in
  ordinary floating point (eigenvalues of companion matrices after exact
  power-of-two scaling), so a pencil's critical gain carries the usual
  relative rounding error of a root computation, not a rigorous enclosure.
  Double real roots of the crossing polynomial are accepted as real up to a
  relative imaginary part of 1e-6, and for the pencils (lower bounds) up to
  1e-4, so that a crossing the solver blurs into a complex pair still counts;
  higher-multiplicity tangencies could be missed.
* A coefficient enclosed within +-1e-300 over the whole box is taken as
  exactly zero (a literal 0 such as an integrator's ``D(0)``; outward rounding
  would otherwise make the family look unstable just above ``k = 0``).
* A sub-box whose enclosure is not proven stable at the reference gain (or
  whose leading-coefficient interval holds 0) proves nothing; certification
  never ends while such a box is open, and the box is reported.

Everything here is pure computation; the CLI does the printing.
"""
from __future__ import annotations

import itertools
import math
import sys
import time
import types
from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from sweep.errors import InputError

__all__ = [
    "kharitonov_polynomials",
    "kharitonov_pencils",
    "pencil_critical_gains",
    "kharitonov_lower_bound",
    "branch_and_bound",
    "is_interval_family",
    "certify",
    "format_certificate",
]

# Which end each Kharitonov polynomial takes, by power of s modulo 4
# (True = upper end).  K1: l l u u, K2: u u l l, K3: l u u l, K4: u l l u.
_PATTERN = np.array(
    [
        [False, False, True, True],
        [True, True, False, False],
        [False, True, True, False],
        [True, False, False, True],
    ]
)

# Box status codes of `kharitonov_lower_bound`.
OK, UNSTABLE_AT_REFERENCE, DEGREE_FAILS = 0, 1, 2

_TINY = 1e-300  # a coefficient enclosed within +-_TINY over the whole box is a structural zero
_PROBE = 16  # children proven stable at the reference whose midpoints are evaluated per iteration


# ---------------------------------------------------------------------------
# Kharitonov polynomials and pencils
# ---------------------------------------------------------------------------


def kharitonov_polynomials(lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """The four Kharitonov polynomials of interval polynomials.

    Parameters
    ----------
    lo, hi
        Lower and upper coefficient ends, arrays ``(..., n+1)``, highest power
        of ``s`` first.

    Returns
    -------
    ndarray ``(4, ..., n+1)``
        ``K1 .. K4`` in the order of METHODS.md, highest power first.  The
        pattern is applied by power of ``s`` (column ``j`` holds power
        ``n - j``), so it does not depend on how the arrays are padded.
    """
    lo = np.asarray(lo, dtype=float)
    hi = np.asarray(hi, dtype=float)
    n = lo.shape[-1] - 1
    powers = n - np.arange(n + 1)
    take_hi = _PATTERN[:, powers % 4]  # (4, n+1)
    take_hi = take_hi.reshape((4,) + (1,) * (lo.ndim - 1) + (n + 1,))
    return np.where(take_hi, hi[None], lo[None])


def _pad_front(a: np.ndarray, width: int) -> np.ndarray:
    """Pad a stack with leading zero columns so that it has `width` columns (align by power)."""
    extra = width - a.shape[-1]
    if extra < 0:
        raise ValueError("numerator degree exceeds denominator degree")
    if extra == 0:
        return a
    pad = [(0, 0)] * (a.ndim - 1) + [(extra, 0)]
    return np.pad(a, pad)


def kharitonov_pencils(
    N_lo: np.ndarray,
    N_hi: np.ndarray,
    D_lo: np.ndarray,
    D_hi: np.ndarray,
    sigma: int,
) -> tuple[np.ndarray, np.ndarray]:
    """The four pencils ``Kh_i(D) + k Kh_i(sigma N)`` of an interval loop.

    For ``k >= 0`` the coefficient of power ``p`` of ``D + k sigma N`` ranges
    over ``[lD_p + k l(sigma N)_p, uD_p + k u(sigma N)_p]`` when ``N`` and
    ``D`` vary independently; ``-N`` has the interval ``[-uN, -lN]``.

    Parameters
    ----------
    N_lo, N_hi
        Numerator coefficient ends ``(B, m+1)`` (or ``(m+1,)``).
    D_lo, D_hi
        Denominator coefficient ends ``(B, n+1)``, ``m <= n``.
    sigma
        +1 negative feedback, -1 positive.

    Returns
    -------
    (KD, KN)
        Arrays ``(4, B, n+1)``: pencil ``i`` is ``KD[i] + k KN[i]`` (``sigma``
        already folded in, so analyse it with ``sigma=+1``).  ``N`` is padded
        to the degree of ``D``.
    """
    D_lo = np.asarray(D_lo, dtype=float)
    D_hi = np.asarray(D_hi, dtype=float)
    width = D_lo.shape[-1]
    N_lo = _pad_front(np.asarray(N_lo, dtype=float), width)
    N_hi = _pad_front(np.asarray(N_hi, dtype=float), width)
    if sigma > 0:
        sN_lo, sN_hi = N_lo, N_hi
    else:
        sN_lo, sN_hi = -N_hi, -N_lo
    return kharitonov_polynomials(D_lo, D_hi), kharitonov_polynomials(sN_lo, sN_hi)


# ---------------------------------------------------------------------------
# Critical gains of pencil stacks
# ---------------------------------------------------------------------------


_REAL_RTOL = 1e-6  # |Im| / |z| below which a computed root of the crossing polynomial counts as real
# Pencils (lower bounds) also take roots up to this relative imaginary part: two nearby real roots
# (the locus dips just across the axis and back) can come out of the eigenvalue solver as a complex
# pair, and an extra candidate gain can only lower the bound, never make it wrong.
_SUSPECT_RTOL = 1e-4
_ON_BOUNDARY_RTOL = 1e-10  # an operating gain this close to a boundary gain sits on the axis (as analysis)


def _pow2(x: np.ndarray) -> np.ndarray:
    """Nearest power of two (exact scaling factors)."""
    return np.exp2(np.round(np.log2(x)))


def _roots_stacked(c: np.ndarray, return_bad: bool = False):
    """Roots of a stack of polynomials ``(V, d+1)``: eigenvalues of the balanced companion matrices.

    Leading coefficients that are exactly zero lower a row's degree.  Rows
    whose monic coefficients overflow (or hold NaN) cannot be solved: they
    keep NaN roots and are flagged ``bad`` (callers treat them as unknown).
    Returns complex ``(V, d)``, each row's roots first, NaN-padded.  The
    compiled QR iteration of `sweep.rootfind` does the work (LAPACK where it
    does not converge).
    """
    from sweep.rootfind import poly_roots

    V, w = c.shape
    d = w - 1
    out = np.full((V, max(d, 0)), np.nan + 0j)
    bad = np.zeros(V, dtype=bool)
    if d <= 0 or V == 0:
        return (out, bad) if return_bad else out
    nz = c != 0
    first = np.where(nz.any(axis=1), nz.argmax(axis=1), w)  # index of leading nonzero
    lead = c[np.arange(V), np.minimum(first, d)]
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        finite = np.all(np.isfinite(c / np.where(lead != 0, lead, 1.0)[:, None]), axis=1)
    bad = ~finite & (first < d)
    rows = np.flatnonzero(finite & (first < d))
    if rows.size:
        out[rows] = poly_roots(c[rows], d - first[rows])
    return (out, bad) if return_bad else out


def _stable(P: np.ndarray) -> np.ndarray:
    """True where every root of the rows of ``P`` has a negative real part."""
    r, bad = _roots_stacked(P, return_bad=True)
    nd = P.shape[1] - 1
    degree_ok = (P[:, 0] != 0) & ~bad
    if nd == 0:
        return degree_ok
    re = np.where(np.isnan(r.real), -np.inf, r.real)
    return degree_ok & (re.max(axis=1) < 0)


def _even_odd(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Split ``a(jw)`` into ``ae(x) + j w ao(x)`` with ``x = w^2`` (coefficient stacks, highest first)."""
    n = a.shape[1] - 1
    ne, no = n // 2 + 1, (n - 1) // 2 + 1 if n >= 1 else 0
    ae = np.zeros((a.shape[0], ne))
    ao = np.zeros((a.shape[0], max(no, 1)))
    for j in range(n + 1):
        p = n - j
        if p % 2 == 0:
            q = p // 2
            ae[:, ne - 1 - q] += a[:, j] * (-1.0) ** q
        else:
            q = (p - 1) // 2
            ao[:, ao.shape[1] - 1 - q] += a[:, j] * (-1.0) ** q
    return ae, ao


def _polymul_stacked(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Product of two coefficient stacks (rows pairwise), highest power first."""
    out = np.zeros((a.shape[0], a.shape[1] + b.shape[1] - 1))
    for i in range(b.shape[1]):
        out[:, i : i + a.shape[1]] += a * b[:, i : i + 1]
    return out


def _polysub(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    w = max(a.shape[1], b.shape[1])
    return _pad_front(a, w) - _pad_front(b, w)


def _polyval_stacked(c: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Evaluate each row of ``c`` at every column of ``x`` ``(V, R)`` (Horner)."""
    out = np.zeros(x.shape, dtype=np.result_type(c, x))
    for j in range(c.shape[1]):
        out = out * x + c[:, j : j + 1]
    return out


def _critical_gains_direct(
    N: np.ndarray,
    D: np.ndarray,
    *,
    sigma: int,
    gain_range: tuple[float, float],
    reference: float,
    conservative: bool = False,
) -> np.ndarray:
    """Critical gains of ``D + sigma k N`` for a stack (lean stand-in for `analysis`).

    Boundary gains come from the axis-crossing polynomial
    ``Im[D(jw) N(-jw)] = w Q(w^2)``, the origin (``-D(0)/(sigma N(0))``) and
    infinity (leading coefficient of ``P`` vanishing); stability on the gain
    interval that holds the reference is tested at its midpoint (no boundary
    lies inside it, so one point decides).  Returns ``(V,)``: ``inf`` when no
    boundary gain lies above the reference inside the range, NaN when the
    reference gain is unstable.  A reference above the range's lower end
    (an operating gain) within ``1e-10`` of a boundary gain is on the axis:
    NaN, as in `sweep.analysis`.  ``conservative`` (for lower bounds) also
    takes nearly real roots of ``Q`` as crossings (see `_SUSPECT_RTOL`).
    """
    D = np.asarray(D, dtype=float)
    Bp = sigma * _pad_front(np.asarray(N, dtype=float), D.shape[1])
    V, w_ = D.shape
    # Exact power-of-two scaling of s (geometric mean of the open-loop pole moduli) and of
    # each polynomial: it changes neither the roots' half-plane nor the gains, and keeps
    # badly scaled loops (coefficients from 1e-6 to 1e8) well conditioned.
    n = w_ - 1
    absd = np.abs(D)
    powers = n - np.arange(w_)
    low_idx = n - np.argmax((absd > 0)[:, ::-1], axis=1)
    p_low = n - low_idx
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        gm = np.where(p_low < n, (absd[np.arange(V), low_idx] / absd[:, 0]) ** (1.0 / np.maximum(n - p_low, 1)), 1.0)
        w0 = _pow2(np.where(np.isfinite(gm) & (gm > 0), gm, 1.0))
        A = D * w0[:, None] ** powers
        Bp = Bp * w0[:, None] ** powers
        cA = _pow2(np.max(np.abs(A), axis=1))
        cB = _pow2(np.max(np.abs(Bp), axis=1))
    cA = np.where(np.isfinite(cA) & (cA > 0), cA, 1.0)
    cB = np.where(np.isfinite(cB) & (cB > 0), cB, 1.0)
    A = A / cA[:, None]
    Bp = Bp / cB[:, None]
    g_scale = cA / cB  # k = g_scale * k_scaled
    lo_s = float(gain_range[0]) / g_scale
    hi_s = float(gain_range[1]) / g_scale
    ref_s = float(reference) / g_scale
    cands = []
    with np.errstate(divide="ignore", invalid="ignore"):
        cands.append(np.where(Bp[:, -1] != 0, -A[:, -1] / Bp[:, -1], np.nan)[:, None])
        cands.append(np.where(Bp[:, 0] != 0, -A[:, 0] / Bp[:, 0], np.nan)[:, None])
        ae, ao = _even_odd(A)
        be, bo = _even_odd(Bp)
        Q = _polysub(_polymul_stacked(ao, be), _polymul_stacked(ae, bo))
        # Coefficients below their own rounding-error bound are cancellation noise: zero
        # them, or a noisy leading coefficient puts a spurious root near infinity.
        Qabs = _polysub(_polymul_stacked(np.abs(ao), np.abs(be)), -_polymul_stacked(np.abs(ae), np.abs(bo)))
        Q = np.where(np.abs(Q) <= 8 * (n + 2) * np.finfo(float).eps * Qabs, 0.0, Q)
        unresolved = np.zeros(V, dtype=bool)
        if Q.shape[1] > 1:
            x, unresolved = _roots_stacked(Q, return_bad=True)
            xr = x.real
            real = (np.abs(x.imag) <= (_SUSPECT_RTOL if conservative else _REAL_RTOL) * np.abs(x)) & (xr > 0)
            xr = np.where(real, xr, np.nan)
            w = np.sqrt(xr)
            jw = 1j * w
            Aj = _polyval_stacked(A, jw)
            Bj = _polyval_stacked(Bp, jw)
            den = np.abs(Bj) ** 2
            k = -(Aj * np.conj(Bj)).real / den
            k = np.where(den > 0, k, np.nan)
            cands.append(k)
    C = np.concatenate(cands, axis=1)
    C = np.where((C > lo_s[:, None]) & (C < hi_s[:, None]) & np.isfinite(C), C, np.nan)
    if reference > gain_range[0]:
        on_axis = np.any(np.abs(C - ref_s[:, None]) <= _ON_BOUNDARY_RTOL * ref_s[:, None], axis=1)
        unresolved = unresolved | on_axis  # marginal at the operating gain: not stable there
    above = np.where(C > ref_s[:, None], C, np.inf).min(axis=1)
    below = np.where(C <= ref_s[:, None], C, -np.inf).max(axis=1)
    below = np.maximum(below, lo_s)
    upper_end = np.minimum(above, hi_s)
    # a test gain strictly inside the interval holding the reference (no boundary inside it)
    finite = np.isfinite(upper_end)
    mid = np.where(finite, 0.5 * (below + np.where(finite, upper_end, 0.0)), below + np.maximum(1.0, np.abs(below)))
    P = A + mid[:, None] * Bp
    ok = _stable(P) & ~unresolved  # an unresolved crossing polynomial proves nothing
    crit = np.where(np.isfinite(above), above * g_scale, np.inf)
    return np.where(ok, crit, np.nan) if V else crit


def pencil_critical_gains(
    N: np.ndarray,
    D: np.ndarray,
    *,
    sigma: int,
    gain_range: tuple[float, float],
    reference: float,
    conservative: bool = False,
) -> np.ndarray:
    """Critical gains ``(V,)`` of a stack: ``inf`` = no loss in range, NaN = unstable at the reference.

    Uses the lean boundary-gain computation of this module (the same
    definitions as `sweep.analysis`; DESIGN.md section 3) because the
    branch-and-bound calls it on thousands of pencils per second and needs
    only the critical gain.

    Parameters
    ----------
    N, D
        Coefficient stacks ``(V, m+1)``, ``(V, n+1)``, highest power first.
    sigma, gain_range, reference
        As in the loop.
    conservative
        For lower bounds: also count nearly real roots of the crossing
        polynomial (relative imaginary part up to 1e-4 instead of 1e-6) as
        crossings, so that a crossing the root solver blurred into a complex
        pair is not missed.  May only lower the result.
    """
    return _critical_gains_direct(N, D, sigma=sigma, gain_range=gain_range, reference=reference,
                                  conservative=conservative)


# ---------------------------------------------------------------------------
# Kharitonov bound on enclosures
# ---------------------------------------------------------------------------


def kharitonov_lower_bound(
    N_lo: np.ndarray,
    N_hi: np.ndarray,
    D_lo: np.ndarray,
    D_hi: np.ndarray,
    *,
    sigma: int,
    gain_range: tuple[float, float],
    reference: float,
) -> tuple[np.ndarray, np.ndarray]:
    """Smallest critical gain of the four Kharitonov pencils of each box.

    Parameters
    ----------
    N_lo, N_hi, D_lo, D_hi
        Coefficient enclosures ``(B, m+1)`` and ``(B, n+1)``.
    sigma, gain_range, reference
        As in the loop (``reference >= 0``).

    Returns
    -------
    (bound, status)
        ``bound (B,)``: for an independent interval family the exact
        worst-case critical gain; for a hull enclosure of a dependent family a
        guaranteed lower bound for every point of the box (``inf`` = stable
        for every gain of the range above the reference).  ``status (B,)``:
        `OK`, `UNSTABLE_AT_REFERENCE` (some pencil is unstable at the
        reference: nothing proven) or `DEGREE_FAILS` (the leading coefficient
        interval of ``D + k sigma N`` holds 0 at the reference).  The bound is
        NaN where status is not OK.
    """
    if reference < 0:
        raise ValueError("the Kharitonov pencils need a reference gain >= 0")
    KD, KN = kharitonov_pencils(N_lo, N_hi, D_lo, D_hi, sigma)
    B = KD.shape[1]
    width = KD.shape[2]
    # leading coefficient interval of the family at the reference gain
    lead_lo = np.min(KD[:, :, 0] + reference * KN[:, :, 0], axis=0)
    lead_hi = np.max(KD[:, :, 0] + reference * KN[:, :, 0], axis=0)
    degree_ok = (lead_lo > 0) | (lead_hi < 0)
    crit = pencil_critical_gains(
        KN.reshape(4 * B, width),
        KD.reshape(4 * B, width),
        sigma=1,
        gain_range=gain_range,
        reference=reference,
        conservative=True,
    ).reshape(4, B)
    unstable = np.isnan(crit).any(axis=0)
    bound = np.where(unstable, np.nan, np.min(np.where(np.isnan(crit), np.inf, crit), axis=0))
    status = np.where(~degree_ok, DEGREE_FAILS, np.where(unstable, UNSTABLE_AT_REFERENCE, OK))
    bound = np.where(status == OK, bound, np.nan)
    return bound, status.astype(np.int8)


# ---------------------------------------------------------------------------
# Branch-and-bound core (callables in, so it runs on any enclosure)
# ---------------------------------------------------------------------------

EncloseFn = Callable[[np.ndarray, np.ndarray], tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]]
PointFn = Callable[[np.ndarray], np.ndarray]


@dataclass
class BoundResult:
    """Outcome of `branch_and_bound`.

    ``lower``/``upper`` bound the smallest critical gain over the box (NaN with
    status "unstable_at_reference"); ``worst`` is the point attaining
    ``upper`` (or the unstable point); ``where`` a ``(2, p)`` box where the proof
    failed; ``status`` as in `certify`.
    """

    lower: float
    upper: float
    boxes: int
    worst: np.ndarray | None
    status: str
    message: str
    where: np.ndarray | None = None  # (2, p) box of a failure


def _relative_gap(lower: float, upper: float) -> float:
    if math.isnan(lower) or math.isnan(upper):
        return math.nan
    if lower == upper:
        return 0.0
    if math.isinf(upper):
        return math.inf
    return (upper - lower) / abs(upper) if upper != 0 else math.inf


def branch_and_bound(
    enclose: EncloseFn,
    point_gains: PointFn,
    low: np.ndarray,
    high: np.ndarray,
    *,
    sigma: int,
    gain_range: tuple[float, float],
    reference: float,
    rtol: float = 0.01,
    max_boxes: int = 200_000,
    max_seconds: float = 60.0,
    batch: int = 64,
    progress: Callable[[int, float, float], None] | None = None,
    refine: bool = True,
    coefficients: Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]] | None = None,
    split: str = "sensitivity",
) -> BoundResult:
    """Bounds on ``min over the box`` of the critical gain.

    Parameters
    ----------
    enclose
        ``enclose(lows (B, p), highs (B, p)) -> (N_lo, N_hi, D_lo, D_hi)``,
        coefficient enclosures over each box.
    point_gains
        ``point_gains(X (V, p)) -> (V,)`` critical gains of actual points
        (NaN = unstable at the reference).
    low, high
        The parameter box ``(p,)``.
    sigma, gain_range, reference
        As in the loop.
    rtol, max_boxes, max_seconds, batch
        Stop at ``upper - lower <= rtol * upper``, after ``max_boxes``
        enclosed boxes or ``max_seconds``; ``batch`` boxes are split per
        iteration (their children enclosed in one call).
    progress
        Optional ``progress(boxes, lower, upper)`` after every iteration.
    refine
        Polish the best starting points with a batched, bounded pattern search.
    coefficients
        ``coefficients(X (V, p)) -> (N, D)`` of actual points; needed by the
        "sensitivity" split rule.
    split
        "sensitivity": split the side with the largest ``weight * relative
        width``, weights from `_split_weights` (falls back to "widest"
        without ``coefficients``); "widest": the widest side relative to the
        parameter's tolerance width.  Boxes not yet proven stable at the
        reference gain always split their widest side.

    Returns
    -------
    BoundResult
        ``lower`` is guaranteed (up to the floating-point caveat of the pencil
        root computation); ``upper`` is a critical gain actually attained.
    """
    if split not in ("sensitivity", "widest"):
        raise ValueError(f"unknown split rule {split!r}; expected 'sensitivity' or 'widest'")
    t0 = time.perf_counter()
    low = np.asarray(low, dtype=float)
    high = np.asarray(high, dtype=float)
    p = low.size
    scale = np.where(high > low, high - low, 1.0)

    best_val = math.inf
    best_x: np.ndarray | None = None

    def points(X: np.ndarray) -> np.ndarray | None:
        """Evaluate points; update the upper bound; return the point hitting NaN if any."""
        nonlocal best_val, best_x
        g = point_gains(X)
        bad = np.isnan(g)
        if bad.any():
            return X[np.argmax(bad)]
        i = int(np.argmin(g))
        if best_x is None or g[i] < best_val:
            best_val, best_x = float(g[i]), X[i].copy()
        return None

    X0 = _start_points(low, high)
    g0 = point_gains(X0)
    if np.isnan(g0).any():
        return BoundResult(math.nan, math.nan, 0, X0[np.argmax(np.isnan(g0))], "unstable_at_reference",
                       "a point of the box is unstable at the reference gain")
    i0 = int(np.argmin(g0))
    best_val, best_x = float(g0[i0]), X0[i0].copy()
    if refine and p > 0 and np.isfinite(best_val):
        found_bad: list[np.ndarray] = []

        def record(x, v):
            nonlocal best_val, best_x
            if math.isnan(v):
                found_bad.append(x)
            elif v < best_val:
                best_val, best_x = v, x.copy()

        # polish from the few best starting points at once
        order = np.argsort(g0)[: min(4, g0.size)]
        _refine(point_gains, low, high, X0[order], record)
        if found_bad:
            return BoundResult(math.nan, math.nan, 0, found_bad[0], "unstable_at_reference",
                           "a point of the box is unstable at the reference gain")

    # open boxes as arrays
    B_lo = low[None].copy()
    B_hi = high[None].copy()
    # Structural zeros (a literal 0 coefficient, e.g. an integrator's D(0)) come out of
    # outward rounding as a few ulps around 0; a k-independent tiny negative constant term
    # would make the family look unstable just above k = 0.  A coefficient enclosed within
    # +-_TINY over the whole box is treated as exactly zero (see the module caveats).
    root = enclose(B_lo, B_hi)
    zero_masks = tuple(np.maximum(np.abs(root[2 * i]), np.abs(root[2 * i + 1]))[0] <= _TINY for i in range(2))
    enclose = _snap_zeros(enclose, *zero_masks)
    bound, status = _bounds(enclose, B_lo, B_hi, sigma, gain_range, reference)
    n_boxes = 1
    B_L = bound
    w_crit = np.ones(p)
    if split == "sensitivity" and coefficients is not None and p > 1:
        w_crit = _split_weights(enclose, coefficients, best_x, low, high, sigma, gain_range, reference)

    def open_lower() -> float:
        if B_L.size == 0:
            return best_val
        return float(min(np.min(B_L), best_val))

    state = "budget"
    while True:
        keep = B_L < best_val
        B_lo, B_hi, B_L, status = B_lo[keep], B_hi[keep], B_L[keep], status[keep]
        lower = open_lower()
        if progress is not None:
            progress(n_boxes, lower, best_val)
        # A box where nothing is proven (an enclosure unstable at the reference, or with a
        # leading-coefficient interval holding 0) carries the reference gain only as a
        # priority; it must be resolved before anything counts as certified.
        unresolved = bool(np.any(status != OK))
        close = lower == best_val or (math.isfinite(best_val) and best_val - lower <= rtol * abs(best_val))
        if B_L.size == 0 or (not unresolved and close):
            state = "certified"
            break
        if n_boxes >= max_boxes or time.perf_counter() - t0 > max_seconds:
            state = "budget"
            spent = (f"box budget ({max_boxes} boxes)" if n_boxes >= max_boxes
                     else f"time budget ({max_seconds:g} s)")
            break
        K = min(batch, B_L.size, max(1, (max_boxes - n_boxes) // 2))
        sel = np.argpartition(B_L, K - 1)[:K] if K < B_L.size else np.arange(B_L.size)
        rest = np.ones(B_L.size, bool)
        rest[sel] = False
        s_lo, s_hi, s_L, s_st = B_lo[sel], B_hi[sel], B_L[sel], status[sel]
        # split the side with the largest weighted width relative to the parameter's tolerance width
        if p == 0:
            state = "stalled"  # a single point: nothing to split
            break
        rel = (s_hi - s_lo) / scale
        # proven boxes: the sides that blur the critical gain most
        # boxes not yet proven stable at the reference: the widest side.  What keeps Kharitonov
        # on an enclosure from proving stability is the dependency of coefficients on shared
        # parameters, which a first-order estimate at one point does not see (a stiff converter
        # loop spent its whole budget halving the input voltage, which enters one factor only)
        axis = np.where(s_st == OK, np.argmax(rel * w_crit, axis=1), np.argmax(rel, axis=1))
        if np.all(np.max(rel, axis=1) < 1e-12):
            state = "stalled"  # boxes are points: nothing more can be proven here
            break
        mid = 0.5 * (s_lo[np.arange(K), axis] + s_hi[np.arange(K), axis])
        c_lo = np.concatenate([s_lo, s_lo])
        c_hi = np.concatenate([s_hi, s_hi])
        c_hi[np.arange(K), axis] = mid
        c_lo[K + np.arange(K), axis] = mid
        c_bound, c_status = _bounds(enclose, c_lo, c_hi, sigma, gain_range, reference)
        n_boxes += 2 * K
        # a parent's proven bound holds for its children too
        p_ok = np.concatenate([s_st, s_st]) == OK
        c_bound = np.where(p_ok, np.maximum(c_bound, np.concatenate([s_L, s_L])), c_bound)
        c_status = np.where(p_ok, OK, c_status).astype(np.int8)
        # Midpoints of children improve the upper bound and find points unstable at the
        # reference: probe every child not proven stable there, and the lowest-bounded others.
        # (children proven stable at the reference hold no unstable point)
        probe = c_status != OK
        ok_idx = np.flatnonzero(~probe)
        if ok_idx.size > _PROBE:
            ok_idx = ok_idx[np.argpartition(c_bound[ok_idx], _PROBE - 1)[:_PROBE]]
        probe[ok_idx] = True
        bad = points(0.5 * (c_lo[probe] + c_hi[probe]))
        if bad is not None:
            return BoundResult(math.nan, math.nan, n_boxes, bad, "unstable_at_reference",
                           "a point of the box is unstable at the reference gain")
        B_lo = np.concatenate([B_lo[rest], c_lo])
        B_hi = np.concatenate([B_hi[rest], c_hi])
        B_L = np.concatenate([B_L[rest], c_bound])
        status = np.concatenate([status[rest], c_status])
    lower = open_lower()
    if state == "certified":
        return BoundResult(lower, best_val, n_boxes, best_x, state, "bounds within the requested tolerance")
    if state == "stalled":
        msg = "boxes shrank to points without closing the gap"
    else:
        msg = (f"{spent} spent before the requested tolerance was reached; allow more time or boxes, "
               "or a looser tolerance")
    bad_st = status != OK
    if bad_st.any():
        # report the smallest unresolved box: where the proof fails
        size = np.max((B_hi - B_lo) / scale, axis=1)
        i = int(np.argmin(np.where(bad_st, size, np.inf)))
        where_fail = np.stack([B_lo[i], B_hi[i]])
        if status[i] == DEGREE_FAILS:
            return BoundResult(lower, best_val, n_boxes, best_x, "degree_invariance_fails",
                           f"{msg}; the leading coefficient of D + k*sigma*N at the reference gain "
                           "is not proven to keep its sign", where_fail)
        return BoundResult(lower, best_val, n_boxes, best_x, "reference_unproven",
                       f"{msg}; stability at the reference gain is not proven", where_fail)
    return BoundResult(lower, best_val, n_boxes, best_x, state, msg)




def _split_weights(
    enclose: EncloseFn,
    coefficients: Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]],
    x: np.ndarray,
    low: np.ndarray,
    high: np.ndarray,
    sigma: int,
    gain_range: tuple[float, float],
    reference: float,
    floor: float = 1e-2,
) -> np.ndarray:
    """First-order estimates of how much each side of the box costs the proof.

    For a quantity ``f`` of the loop's coefficients ``c_j`` (those of ``N`` and ``D``), the
    weight of parameter ``i`` is ``sum_j |df/dc_j| * w_ij``: the derivatives by central
    differences at the point ``x`` (the worst point found so far), ``w_ij`` the width of
    coefficient ``j``'s enclosure when parameter ``i`` alone spans its range.  Enclosure widths
    of a sub-box scale roughly with its sides, so ``weight * relative side`` ranks the sides by
    how much they blur ``f``; splitting the largest closes the gap with far fewer boxes than the
    widest side when a few parameters dominate.  Only the effort depends on it, never the bounds.

    Returns
    -------
    numpy.ndarray
        ``(p,)`` weights for ``f`` = the critical gain (used for boxes with a proven bound),
        normalised to a maximum of 1, with a floor so that every side is split eventually;
        all ones where the estimate is unavailable.
    """
    p = low.size
    ones = np.ones(p)
    centre = 0.5 * (low + high)
    lows = np.repeat(centre[None], p, axis=0)
    highs = lows.copy()
    lows[np.arange(p), np.arange(p)] = low
    highs[np.arange(p), np.arange(p)] = high
    N_lo, N_hi, D_lo, D_hi = (np.asarray(a, float) for a in enclose(lows, highs))
    width = np.concatenate([N_hi - N_lo, D_hi - D_lo], axis=1)
    width = np.where(np.isfinite(width), width, 0.0)
    N, D = coefficients(np.asarray(x, float)[None])
    m1 = N.shape[1]
    c = np.concatenate([N[0], D[0]])
    q = c.size
    h = 1e-6 * np.maximum(np.abs(c), 1e-300)
    C = np.repeat(c[None], 2 * q, axis=0)
    C[np.arange(q), np.arange(q)] += h
    C[q + np.arange(q), np.arange(q)] -= h

    def weights(f: np.ndarray) -> np.ndarray:
        with np.errstate(invalid="ignore"):
            grad = np.abs(f[:q] - f[q:]) / (2 * h)
        w = width @ np.where(np.isfinite(grad), grad, 0.0)
        if not (np.all(np.isfinite(w)) and w.max() > 0):
            return ones
        return np.maximum(w / w.max(), floor)

    g = pencil_critical_gains(C[:, :m1], C[:, m1:], sigma=sigma, gain_range=gain_range, reference=reference)
    return weights(g)


def _start_points(low: np.ndarray, high: np.ndarray) -> np.ndarray:
    """Centre and, for few parameters, every corner of the box (else the ends of each side and
    a fixed pseudo-random set of corners)."""
    p = low.size
    centre = 0.5 * (low + high)
    start = [centre[None]]
    if p <= 10:
        corners = np.array(list(itertools.product((0.0, 1.0), repeat=p))) if p else np.zeros((1, 0))
        start.append(low + corners * (high - low))
    else:
        ends = np.repeat(centre[None], 2 * p, axis=0)
        ends[np.arange(p), np.arange(p)] = low
        ends[p + np.arange(p), np.arange(p)] = high
        rng = np.random.default_rng(0)
        start += [ends, low + rng.integers(0, 2, size=(256, p)) * (high - low)]
    return np.concatenate(start)


def _snap_zeros(enclose: EncloseFn, zN: np.ndarray, zD: np.ndarray) -> EncloseFn:
    """Wrap an enclosure so that structurally zero coefficients are exactly zero."""
    if not (zN.any() or zD.any()):
        return enclose

    def wrapped(lows, highs):
        N_lo, N_hi, D_lo, D_hi = (np.array(a, dtype=float) for a in enclose(lows, highs))
        for a in (N_lo, N_hi):
            a[:, zN] = 0.0
        for a in (D_lo, D_hi):
            a[:, zD] = 0.0
        return N_lo, N_hi, D_lo, D_hi

    return wrapped


def _bounds(enclose: EncloseFn, lows, highs, sigma, gain_range, reference):
    """Kharitonov bounds on boxes; boxes where nothing is proven get the reference gain."""
    N_lo, N_hi, D_lo, D_hi = enclose(lows, highs)
    bound, status = kharitonov_lower_bound(
        N_lo, N_hi, D_lo, D_hi, sigma=sigma, gain_range=gain_range, reference=reference
    )
    # Nothing proven: every member stable at the reference has critical gain >= reference.
    bound = np.where(status == OK, bound, float(reference))
    return bound, status


def _refine(point_gains: PointFn, low, high, starts: np.ndarray, record, max_iter: int = 60) -> None:
    """Bounded pattern search of the critical gain from a few starting points.

    All ``2 p`` coordinate moves of every start are evaluated in one batch per
    iteration (no per-point calls); a start moves to its best neighbour when
    that improves it, else its step halves.  Only improves the upper bound.
    """
    span = np.where(high > low, high - low, 1.0)
    U = np.clip((np.atleast_2d(starts) - low) / span, 0.0, 1.0)
    S, p = U.shape
    f = point_gains(low + U * span)
    f = np.where(np.isnan(f), np.inf, f)
    h = np.full(S, 0.25)
    moves = np.concatenate([np.eye(p), -np.eye(p)])  # (2p, p)
    for _ in range(max_iter):
        active = h > 1e-5
        if not active.any():
            break
        cand = np.clip(U[:, None, :] + h[:, None, None] * moves[None], 0.0, 1.0).reshape(S * 2 * p, p)
        X = low + cand * span
        g = point_gains(X)
        if np.isnan(g).any():
            record(X[np.argmax(np.isnan(g))], np.nan)
            return
        record(X[np.argmin(g)], float(g.min()))
        g = g.reshape(S, 2 * p)
        j = np.argmin(g, axis=1)
        gbest = g[np.arange(S), j]
        better = active & (gbest < f)
        U[better] = cand.reshape(S, 2 * p, p)[better, j[better]]
        f = np.where(better, gbest, f)
        h = np.where(better | ~active, h, 0.5 * h)


# ---------------------------------------------------------------------------
# Config front
# ---------------------------------------------------------------------------


def is_interval_family(config: Any) -> bool:
    """True when the loop's coefficients provably form an independent interval family.

    What qualifies (sound and deliberately simple):

    * the plant is given as ``num``/``den`` coefficient lists;
    * the controller and sensor contain no ``s`` and no uncertain parameter
      (constants only scale the coefficients);
    * every coefficient expression uses at most one uncertain parameter, and
      it appears there exactly once (a single-use expression, whose interval
      evaluation is the exact range -- from memory, Moore 1966);
    * no uncertain parameter appears in two coefficients.

    Then the coefficients vary independently, each over an interval, so the
    coefficient set is a box and Kharitonov's theorem applies.  `certify`
    additionally checks numerically that each coefficient's range is spanned
    by the ends of its parameter before it trusts the exact route.
    """
    from sweep import expressions as ex

    if config.num is None or config.den is None:
        return False
    uncertain = {p.name for p in config.uncertain}
    for node in (config.controller, config.sensor):
        if node is None:
            continue
        if ex.has_s(node) or (ex.names(node) & uncertain):
            return False
    seen: set[str] = set()
    for node in tuple(config.num) + tuple(config.den):
        if isinstance(node, (int, float)):
            continue
        used = ex.names(node) & uncertain
        if len(used) > 1 or (used & seen):
            return False
        for name in used:
            if _occurrences(node, name) != 1:
                return False
        seen |= used
    return True


def _occurrences(node: Any, name: str) -> int:
    """How many times the variable `name` occurs in an expression tree."""
    import dataclasses

    from sweep import expressions as ex

    if isinstance(node, ex.Name):
        return int(node.id == name)
    if not dataclasses.is_dataclass(node):
        return 0
    return sum(_occurrences(getattr(node, f.name), name) for f in dataclasses.fields(node))


def _reference_gain(config: Any) -> float:
    lo = float(config.gain_range[0])
    ref = float(config.operating_gain) if config.operating_gain is not None else lo
    if ref < 0:
        raise InputError(
            "certify needs a reference gain >= 0; set operating_gain >= 0 or start gain_range at 0",
            file=config.source, field="loop.operating_gain" if config.operating_gain is not None else "loop.gain_range",
        )
    return ref


def _interval_bounds(iv: Any) -> tuple[np.ndarray, np.ndarray]:
    """``(lo, hi)`` arrays from an Interval-like object or a (lo, hi) pair."""
    if isinstance(iv, tuple) and len(iv) == 2:
        return np.asarray(iv[0], float), np.asarray(iv[1], float)
    return np.asarray(iv.lo, float), np.asarray(iv.hi, float)


def _config_functions(config: Any):
    """Enclosure and point functions of a config over its uncertain parameters."""
    from sweep import loop

    unc = config.uncertain
    names = [p.name for p in unc]
    fixed = {p.name: float(p.nominal) for p in config.parameters if not p.uncertain}

    def values(X: np.ndarray) -> dict[str, np.ndarray]:
        V = X.shape[0]
        env = {n: np.full(V, v) for n, v in fixed.items()}
        env.update({n: X[:, i] for i, n in enumerate(names)})
        return env

    def enclose(lows: np.ndarray, highs: np.ndarray):
        B = lows.shape[0]
        lo_env = {n: np.full(B, v) for n, v in fixed.items()}
        hi_env = dict(lo_env)
        lo_env.update({n: lows[:, i] for i, n in enumerate(names)})
        hi_env.update({n: highs[:, i] for i, n in enumerate(names)})
        N_iv, D_iv = loop.enclose(config, lo_env, hi_env)
        N_lo, N_hi = _interval_bounds(N_iv)
        D_lo, D_hi = _interval_bounds(D_iv)
        return N_lo, N_hi, D_lo, D_hi

    ref = _reference_gain(config)

    def point_gains(X: np.ndarray) -> np.ndarray:
        N, D = loop.assemble(config, values(X), count=X.shape[0])
        gr = tuple(config.gain_range)
        g = pencil_critical_gains(N, D, sigma=config.sigma, gain_range=gr, reference=ref)
        bad = np.isnan(g)
        if bad.any():
            # "unstable at the reference gain" ends the certification: confirm it with the
            # full analysis before claiming it
            from sweep import analysis

            g[bad] = analysis.analyze_stack(N[bad], D[bad], sigma=config.sigma, gain_range=gr,
                                            operating_gain=config.operating_gain)["critical_gain"]
        return g

    return names, enclose, point_gains, values


def _kharitonov_route(config, names, enclose, point_gains, values, low, high, ref):
    """Exact route for a verified interval family; None when the numerical checks fail."""
    from sweep import loop

    gr = tuple(config.gain_range)
    N_lo, N_hi, D_lo, D_hi = enclose(low[None], high[None])
    p = len(names)
    # one-at-a-time ends: each parameter at its low / high end, others at the low end
    X = np.repeat(low[None], 2 * p + 1, axis=0)
    for i in range(p):
        X[2 * i + 1, i] = high[i]
        X[2 * i, i] = low[i]
    N, D = loop.assemble(config, values(X), count=X.shape[0])
    # the ends must span each coefficient's enclosure (range attained at the parameter ends)
    hullN = (N.min(axis=0), N.max(axis=0))
    hullD = (D.min(axis=0), D.max(axis=0))

    def close(a, b):
        return np.allclose(a, b, rtol=1e-9, atol=1e-300)

    if not (close(hullN[0], N_lo[0]) and close(hullN[1], N_hi[0]) and close(hullD[0], D_lo[0]) and close(hullD[1], D_hi[0])):
        return None
    bound, status = kharitonov_lower_bound(
        hullN[0][None], hullN[1][None], hullD[0][None], hullD[1][None], sigma=config.sigma, gain_range=gr, reference=ref
    )
    KD, KN = kharitonov_pencils(hullN[0][None], hullN[1][None], hullD[0][None], hullD[1][None], config.sigma)
    crit = pencil_critical_gains(KN[:, 0], KD[:, 0], sigma=1, gain_range=gr, reference=ref, conservative=True)
    # the parameter corner realising each pencil: each parameter moves one coefficient
    # (compared only on the coefficients the parameter moves, relative to how far it moves
    # them: coefficients of very different sizes must not drown each other)
    C_ends = np.concatenate([N, D], axis=1)
    corners = []
    for i in range(4):
        x = low.copy()
        target = np.concatenate([config.sigma * KN[i, 0][-N.shape[1]:], KD[i, 0]])
        for j in range(p):
            c_lo, c_hi = C_ends[2 * j], C_ends[2 * j + 1]
            moved = c_lo != c_hi
            if not moved.any():
                continue
            span = np.abs(c_hi - c_lo)[moved]
            err_lo = np.sum(np.abs(c_lo[moved] - target[moved]) / span)
            err_hi = np.sum(np.abs(c_hi[moved] - target[moved]) / span)
            x[j] = high[j] if err_hi < err_lo else low[j]
        corners.append(x)
    corners = np.array(corners)
    g = point_gains(corners)
    # the corner must reproduce its pencil (else the structural reading was wrong)
    same = np.where(np.isnan(crit), np.isnan(g), np.isclose(g, crit, rtol=1e-9, atol=0.0) | (np.isinf(g) & np.isinf(crit)))
    if not np.all(same):
        return None
    return bound[0], status[0], crit, corners


def _lead_at_reference(config: Any, values: Callable[[np.ndarray], dict], ref: float):
    """Leading coefficient of ``P = D + sigma ref N`` at points ``(V, p)``; None when ``deg N < deg D``.

    With ``deg N < deg D`` it is the leading coefficient of ``D``, whose sign
    `sweep.loop.validate` has proven constant over the box.
    """
    from sweep import loop

    m, n = loop.open_loop_degrees(config)
    if m < n:
        return None

    def lead(X: np.ndarray) -> np.ndarray:
        N, D = loop.assemble(config, values(X), count=X.shape[0])
        return D[:, 0] + config.sigma * ref * N[:, 0]

    return lead


def _degree_loss(lead, X: np.ndarray) -> tuple[np.ndarray, np.ndarray] | None:
    """A small box ``(a, b)`` holding a point where ``lead`` vanishes, or None.

    Looks for a zero or a sign change among the points ``X``; a sign change is
    narrowed by bisection along the segment between two points of opposite
    sign (the coefficient is continuous over the box), so the box it returns
    is the bracket of the last step.
    """
    v = lead(X)
    if np.any(v == 0):
        x = X[int(np.argmax(v == 0))]
        return x, x
    if not (np.any(v > 0) and np.any(v < 0)):
        return None
    a, b = X[int(np.argmax(v > 0))].copy(), X[int(np.argmax(v < 0))].copy()
    for _ in range(60):
        mid = 0.5 * (a + b)
        vm = lead(mid[None])[0]
        if vm == 0:
            return mid, mid
        if vm > 0:
            a = mid
        else:
            b = mid
    return a, b


def _full_critical_gain(config: Any, values: Callable[[np.ndarray], dict], x: np.ndarray) -> float:
    """Critical gain of one point by `sweep.analysis` (the routine the sweep itself uses)."""
    from sweep import analysis, loop

    N, D = loop.assemble(config, values(np.asarray(x, float)[None]), count=1)
    return float(analysis.analyze_stack(N, D, sigma=config.sigma, gain_range=tuple(config.gain_range),
                                         operating_gain=config.operating_gain)["critical_gain"][0])


def _describe_box(where: dict[str, list[float]]) -> str:
    """``J in [a, b], R = c`` (a side of zero width is a value)."""
    parts = []
    for name, (a, b) in where.items():
        parts.append(f"{name} = {a:.6g}" if f"{a:.6g}" == f"{b:.6g}" else f"{name} in [{a:.6g}, {b:.6g}]")
    return ", ".join(parts) if parts else "the nominal (no uncertain parameters)"


# Statuses whose ``lower`` is a guaranteed bound (the others leave it undefined).
_PROVEN = ("exact", "certified", "budget", "stalled")


def certify(
    config: Any,
    *,
    rtol: float = 0.01,
    max_boxes: int = 200_000,
    max_seconds: float = 60.0,
    progress: Callable[[int, float, float], None] | None = None,
    split: str = "sensitivity",
) -> dict[str, Any]:
    """Guaranteed bounds on the worst-case critical gain over the tolerance box.

    Parameters
    ----------
    config
        A `sweep.config.Config`.
    rtol
        Requested relative gap ``(upper - lower) / upper``.
    max_boxes, max_seconds
        Budget of the branch-and-bound.
    progress
        Optional ``progress(boxes, lower, upper)`` callback (for a progress bar).
    split
        Split rule of the branch-and-bound, "sensitivity" (default) or
        "widest" (see `branch_and_bound`); changes the effort, not the bounds.

    Returns
    -------
    dict
        The ``certify --json`` fields ``method``, ``exact``, ``lower``,
        ``upper``, ``relative_gap``, ``boxes``, ``worst_parameters``
        ({name: value}) plus ``status``, ``message``, ``where`` and
        ``elapsed`` seconds.  ``status`` is one of

        * "exact" -- interval family, ``lower == upper`` by Kharitonov's theorem;
        * "certified" -- ``upper - lower <= rtol * upper``;
        * "budget", "stalled" -- box/time budget spent, or boxes shrank to
          points, before the gap closed: both bounds still hold;
        * "unstable_at_reference" -- ``worst_parameters`` is a point that is
          unstable at the reference gain: the worst case is undefined (NaN);
        * "degree_invariance_fails" -- the leading coefficient of
          ``D + sigma k N`` at the reference gain vanishes inside the box
          (a root through infinity), so the worst case is undefined;
        * "reference_unproven" -- no unstable point was found, but stability
          at the reference gain could not be proven everywhere.

        ``lower`` is NaN unless the status is one of the first three
        (``upper`` stays the best value actually found); ``where`` is the
        parameter box {name: [low, high]} where the proof failed, else None.
        ``exact`` is true for a conclusive Kharitonov result ("exact", or an
        unstable Kharitonov corner).  ``inf`` means no loss of stability
        within the gain range.
    """
    if not (rtol > 0):
        raise InputError("rtol must be a positive number, e.g. 0.01", file=config.source, field="--rtol")
    t0 = time.perf_counter()
    ref = _reference_gain(config)
    names, enclose, point_gains, values = _config_functions(config)
    unc = config.uncertain
    low = np.array([p.low for p in unc], dtype=float)
    high = np.array([p.high for p in unc], dtype=float)
    gr = tuple(config.gain_range)
    interval_family = is_interval_family(config)
    method = "kharitonov" if interval_family else "branch-and-bound"

    def named(x):
        return None if x is None else {n: float(v) for n, v in zip(names, x)}

    def result(method, lower, upper, boxes, worst, status, message, where=None):
        lower = float(lower) if status in _PROVEN else math.nan
        # field order: the certify --json fields first, then the extras
        return {
            "method": method,
            "exact": method == "kharitonov" and status in ("exact", "unstable_at_reference"),
            "lower": lower,
            "upper": float(upper),
            "relative_gap": _relative_gap(lower, float(upper)),
            "boxes": int(boxes),
            "worst_parameters": named(worst),
            "status": status,
            "message": message,
            "where": where,
            "elapsed": time.perf_counter() - t0,
        }

    def box_of(a, b):
        return {n: [float(min(u, v)), float(max(u, v))] for n, u, v in zip(names, a, b)}

    unstable_msg = f"a point of the box is unstable at the reference gain {ref:g}"
    # Degree invariance at the reference gain (DESIGN section 8): a sign change of the leading
    # coefficient of P among the start points proves a root through infinity there.
    lead = _lead_at_reference(config, values, ref)
    if lead is not None:
        found = _degree_loss(lead, _start_points(low, high))
        if found is not None:
            where = box_of(*found)
            return result(method, math.nan, math.nan, 0, 0.5 * (found[0] + found[1]), "degree_invariance_fails",
                          f"the leading coefficient of the closed-loop polynomial at the reference gain {ref:g} "
                          f"vanishes inside the box, near {_describe_box(where)}: a closed-loop root passes "
                          "through infinity there, so the loop's order changes and the worst case is undefined; "
                          "narrow the tolerances or move the operating gain", where)

    if interval_family:
        route = _kharitonov_route(config, names, enclose, point_gains, values, low, high, ref)
        if route is not None:
            bound, status, crit, corners = route
            if status == DEGREE_FAILS:  # reached only when the corners above missed it (rounding)
                where = box_of(low, high)
                return result("kharitonov", math.nan, math.nan, 1, None, "degree_invariance_fails",
                              f"the leading coefficient of the closed-loop polynomial at the reference gain {ref:g} "
                              "is not proven to keep its sign over the box; the worst case may be undefined", where)
            if status == UNSTABLE_AT_REFERENCE:
                i = int(np.argmax(np.isnan(crit)))
                return result("kharitonov", math.nan, math.nan, 1, corners[i], "unstable_at_reference",
                              unstable_msg + " (a corner of the box; see worst_parameters)")
            i = int(np.argmin(crit))
            full = _full_critical_gain(config, values, corners[i])
            if full == bound or abs(full - bound) <= 1e-9 * abs(bound):
                # the two routines may differ in the last digits: report the smaller, so that the
                # sweep's own value at that corner is never below the bound
                value = min(bound, full)
                if progress is not None:
                    progress(1, float(value), float(value))
                return result("kharitonov", value, value, 1, corners[i], "exact",
                              "interval family: exact by Kharitonov's theorem")
            # the full analysis disagrees at the worst corner: do not claim exactness

    from sweep import loop

    res = branch_and_bound(
        enclose, point_gains, low, high, sigma=config.sigma, gain_range=gr, reference=ref,
        rtol=rtol, max_boxes=max_boxes, max_seconds=max_seconds, progress=progress,
        coefficients=lambda X: loop.assemble(config, values(X), count=X.shape[0]), split=split,
    )
    where = None
    status, lower, upper = res.status, res.lower, res.upper
    msg = unstable_msg + " (see worst_parameters)" if status == "unstable_at_reference" else res.message
    if res.where is not None:
        where = box_of(res.where[0], res.where[1])
        msg = f"{msg}; the proof fails near {_describe_box(where)}"
    if status in _PROVEN and res.worst is not None and not math.isnan(upper):
        # the upper bound is a value attained by a point: confirm it with the full analysis
        full = _full_critical_gain(config, values, res.worst)
        if math.isnan(full):
            msg += ("; note: the full analysis does not confirm the worst point as stable at the reference "
                    "gain (a marginal case); its value is that of the fast routine")
        else:
            # an attained value: the bound may not exceed it, whatever the rounding of the pencils
            lower = min(lower, full)
            if not (full == upper or abs(full - upper) <= 1e-9 * abs(upper)):
                msg += (f"; the full analysis gives {full:.10g} at the worst point where the fast routine "
                        f"gave {upper:.10g}: the full analysis is reported")
                upper = full
                if status == "certified" and not _within(lower, upper, rtol):
                    status = "budget"
    return result("branch-and-bound", lower, upper, res.boxes, res.worst, status, msg, where)


def _within(lower: float, upper: float, rtol: float) -> bool:
    """The stopping rule ``upper - lower <= rtol * upper`` (equal infinities count)."""
    return lower == upper or (math.isfinite(upper) and upper - lower <= rtol * abs(upper))


def format_certificate(result: dict[str, Any]) -> str:
    """Plain-text form of a `certify` result (the CLI prints it).

    Parameters
    ----------
    result
        The dict returned by `certify`.

    Returns
    -------
    str
        A few lines: the bracket on the worst-case critical gain (or why
        there is none), how it was obtained, where a proof failed, and the
        worst parameter combination found.
    """

    def num(x):
        if x is None or (isinstance(x, float) and math.isnan(x)):
            return "undefined"
        if math.isinf(x):
            return "inf (no loss of stability within the gain range)" if x > 0 else "-inf"
        return f"{x:.6g}"

    st = result["status"]
    lines = []
    if st == "unstable_at_reference":
        lines.append("worst-case critical gain: undefined (a point of the box is unstable at the reference gain)")
    elif st == "degree_invariance_fails":
        lines.append("worst-case critical gain: undefined (the loop's order changes inside the box "
                     "at the reference gain)")
    elif st == "reference_unproven":
        lines.append("worst-case critical gain: not proven (stability at the reference gain is not proven "
                     f"everywhere); the smallest value found is {num(result['upper'])}")
    elif st == "exact":
        lines.append(f"worst-case critical gain: {num(result['lower'])} (exact)")
    elif st == "certified" and result["lower"] == result["upper"]:  # both inf: nothing to bracket
        lines.append(f"worst-case critical gain: {num(result['lower'])}, proven over the whole box")
    else:
        lines.append(f"worst-case critical gain between {num(result['lower'])} and {num(result['upper'])}"
                     + ("" if st == "certified" else " (requested tolerance not reached)"))
        gap = result["relative_gap"]
        if gap is not None and math.isfinite(gap):
            lines.append(f"relative gap: {gap:.3g}")
    lines.append(f"method: {result['method']}, {result['boxes']} boxes, {result['elapsed']:.2f} s")
    lines.append(f"status: {st}: {result['message']}")
    if result.get("worst_parameters"):
        worst = ", ".join(f"{k} = {v:.6g}" for k, v in result["worst_parameters"].items())
        label = {"unstable_at_reference": "unstable point", "degree_invariance_fails": "order changes near"}
        lines.append(f"{label.get(st, 'worst parameters')}: {worst}")
    return "\n".join(lines)


class _CallableModule(types.ModuleType):
    """Lets ``sweep.certify(config, ...)`` (DESIGN section 7) work after ``import sweep.certify``.

    Importing the submodule rebinds the package attribute ``sweep.certify`` to this module,
    shadowing the function of the same name; calling the module calls the function.
    """

    def __call__(self, config: Any, **kwargs: Any) -> dict[str, Any]:
        return certify(config, **kwargs)


sys.modules[__name__].__class__ = _CallableModule
