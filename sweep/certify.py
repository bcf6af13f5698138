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
  of actual points give *upper* bounds.  Boxes are split until
  ``upper - lower <= rtol * upper`` or the budget runs out.

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
  relative imaginary part of 1e-6; higher-multiplicity tangencies could be
  missed.
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


def _pow2(x: np.ndarray) -> np.ndarray:
    """Nearest power of two (exact scaling factors)."""
    return np.exp2(np.round(np.log2(x)))


def _roots_stacked(c: np.ndarray, return_bad: bool = False):
    """Roots of a stack of polynomials ``(V, d+1)`` via stacked companion matrices.

    Rows whose leading coefficients are exactly zero are handled by grouping
    rows of equal effective degree (a loop over degrees, not over rows).
    Returns complex ``(V, d)``, NaN-padded.
    """
    V, w = c.shape
    d = w - 1
    out = np.full((V, max(d, 0)), np.nan + 0j)
    bad = np.zeros(V, dtype=bool)
    if d <= 0:
        return (out, bad) if return_bad else out
    nz = c != 0
    first = np.where(nz.any(axis=1), nz.argmax(axis=1), w)  # index of leading nonzero
    for f in np.unique(first):
        deg = d - f
        if deg <= 0:
            continue
        rows = np.nonzero(first == f)[0]
        with np.errstate(over="ignore", invalid="ignore"):
            cc = c[rows, f:] / c[rows, f : f + 1]
        finite = np.all(np.isfinite(cc), axis=1)
        if not finite.all():
            # unresolvable rows keep NaN roots and are flagged (callers treat them as unknown)
            bad[rows[~finite]] = True
            rows, cc = rows[finite], cc[finite]
            if rows.size == 0:
                continue
        comp = np.zeros((rows.size, deg, deg))
        comp[:, 0, :] = -cc[:, 1:]
        if deg > 1:
            idx = np.arange(deg - 1)
            comp[:, idx + 1, idx] = 1.0
        out[rows, :deg] = np.linalg.eigvals(comp)
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
) -> np.ndarray:
    """Critical gains of ``D + sigma k N`` for a stack (lean stand-in for `analysis`).

    Boundary gains come from the axis-crossing polynomial
    ``Im[D(jw) N(-jw)] = w Q(w^2)``, the origin (``-D(0)/(sigma N(0))``) and
    infinity (leading coefficient of ``P`` vanishing); stability on the gain
    interval that holds the reference is tested at its midpoint (no boundary
    lies inside it, so one point decides).  Returns ``(V,)``: ``inf`` when no
    boundary gain lies above the reference inside the range, NaN when the
    reference gain is unstable.
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
            real = (np.abs(x.imag) <= _REAL_RTOL * np.abs(x)) & (xr > 0)
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
) -> np.ndarray:
    """Critical gains ``(V,)`` of a stack: ``inf`` = no loss in range, NaN = unstable at the reference.

    Uses the lean boundary-gain computation of this module (the same
    definitions as `sweep.analysis`; DESIGN.md section 3) because the
    branch-and-bound calls it on thousands of pencils per second and needs
    only the critical gain.
    """
    return _critical_gains_direct(N, D, sigma=sigma, gain_range=gain_range, reference=reference)


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

    Returns
    -------
    BoundResult
        ``lower`` is guaranteed (up to the floating-point caveat of the pencil
        root computation); ``upper`` is a critical gain actually attained.
    """
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

    # starting points: centre and, for few parameters, every corner
    centre = 0.5 * (low + high)
    start = [centre[None]]
    if p <= 10:
        corners = np.array(list(itertools.product((0.0, 1.0), repeat=p))) if p else np.zeros((1, 0))
        start.append(low + corners * (high - low))
    else:
        # too many corners: the two ends of each parameter and a fixed pseudo-random set
        ends = np.repeat(centre[None], 2 * p, axis=0)
        ends[np.arange(p), np.arange(p)] = low
        ends[p + np.arange(p), np.arange(p)] = high
        rng = np.random.default_rng(0)
        start += [ends, low + rng.integers(0, 2, size=(256, p)) * (high - low)]
    X0 = np.concatenate(start)
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
            break
        K = min(batch, B_L.size, max(1, (max_boxes - n_boxes) // 2))
        sel = np.argpartition(B_L, K - 1)[:K] if K < B_L.size else np.arange(B_L.size)
        rest = np.ones(B_L.size, bool)
        rest[sel] = False
        s_lo, s_hi, s_L, s_st = B_lo[sel], B_hi[sel], B_L[sel], status[sel]
        # split along the widest side relative to the parameter's tolerance width
        if p == 0:
            state = "stalled"  # a single point: nothing to split
            break
        rel = (s_hi - s_lo) / scale
        axis = np.argmax(rel, axis=1)
        if np.all(rel[np.arange(K), axis] < 1e-12):
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
        bad = points(0.5 * (c_lo + c_hi))
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
    msg = ("boxes shrank to points without closing the gap" if state == "stalled"
           else "budget exhausted before the requested tolerance was reached")
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


_TINY = 1e-300


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
        N, D = loop.assemble(config, values(X))
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
    N, D = loop.assemble(config, values(X))
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
    crit = pencil_critical_gains(KN[:, 0], KD[:, 0], sigma=1, gain_range=gr, reference=ref)
    # the parameter corner realising each pencil: each parameter moves one coefficient
    corners = []
    for i in range(4):
        x = low.copy()
        for j in range(p):
            vlo, vhi = X[2 * j], X[2 * j + 1]
            Nlo_j, Nhi_j = N[2 * j], N[2 * j + 1]
            Dlo_j, Dhi_j = D[2 * j], D[2 * j + 1]
            target_D = KD[i, 0]
            target_N = config.sigma * KN[i, 0][-N.shape[1]:]
            err_lo = np.abs(Dlo_j - target_D).sum() + np.abs(Nlo_j - target_N).sum()
            err_hi = np.abs(Dhi_j - target_D).sum() + np.abs(Nhi_j - target_N).sum()
            x[j] = vhi[j] if err_hi < err_lo else vlo[j]
        corners.append(x)
    corners = np.array(corners)
    g = point_gains(corners)
    # the corner must reproduce its pencil (else the structural reading was wrong)
    same = np.where(np.isnan(crit), np.isnan(g), np.isclose(g, crit, rtol=1e-9) | (np.isinf(g) & np.isinf(crit)))
    if not np.all(same):
        return None
    return bound[0], status[0], crit, corners


def certify(
    config: Any,
    *,
    rtol: float = 0.01,
    max_boxes: int = 200_000,
    max_seconds: float = 60.0,
    progress: Callable[[int, float, float], None] | None = None,
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

    Returns
    -------
    dict
        The ``certify --json`` fields ``method``, ``exact``, ``lower``,
        ``upper``, ``relative_gap``, ``boxes``, ``worst_parameters``
        ({name: value}) plus ``status`` ("exact", "certified", "budget",
        "stalled", "unstable_at_reference", "degree_invariance_fails",
        "reference_unproven" -- the last two: some sub-box could not be
        proven stable at the reference gain, named in ``where``),
        ``message``, ``where`` (a parameter box {name: [low, high]} where
        the proof failed, else None) and ``elapsed`` seconds.  ``inf`` means
        no loss of stability within the gain range; NaN bounds go with an
        unstable-at-reference status.
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

    def named(x):
        return None if x is None else {n: float(v) for n, v in zip(names, x)}

    def result(method, lower, upper, boxes, worst, status, message, where=None):
        # field order: the certify --json fields first, then the extras
        return {
            "method": method,
            "exact": method == "kharitonov",
            "lower": float(lower),
            "upper": float(upper),
            "relative_gap": _relative_gap(float(lower), float(upper)),
            "boxes": int(boxes),
            "worst_parameters": named(worst),
            "status": status,
            "message": message,
            "where": where,
            "elapsed": time.perf_counter() - t0,
        }

    unstable_msg = f"a point of the box is unstable at the reference gain {ref:g}"
    if is_interval_family(config):
        route = _kharitonov_route(config, names, enclose, point_gains, values, low, high, ref)
        if route is not None:
            bound, status, crit, corners = route
            if status == DEGREE_FAILS:
                box = {n: [float(a), float(b)] for n, a, b in zip(names, low, high)}
                return result("kharitonov", math.nan, math.nan, 1, None, "degree_invariance_fails",
                              "the leading coefficient of D + k*sigma*N can vanish inside the box "
                              "at the reference gain", box)
            if status == UNSTABLE_AT_REFERENCE:
                i = int(np.argmax(np.isnan(crit)))
                return result("kharitonov", math.nan, math.nan, 1, corners[i], "unstable_at_reference",
                              unstable_msg + " (a Kharitonov corner)")
            if progress is not None:
                progress(1, float(bound), float(bound))
            i = int(np.argmin(crit))
            return result("kharitonov", bound, bound, 1, corners[i], "exact",
                          "interval family: exact by Kharitonov's theorem")

    res = branch_and_bound(
        enclose, point_gains, low, high, sigma=config.sigma, gain_range=gr, reference=ref,
        rtol=rtol, max_boxes=max_boxes, max_seconds=max_seconds, progress=progress,
    )
    where = None
    msg = unstable_msg if res.status == "unstable_at_reference" else res.message
    if res.where is not None:
        where = {n: [float(a), float(b)] for n, a, b in zip(names, res.where[0], res.where[1])}
        msg = f"{msg} near {where}"
    return result("branch-and-bound", res.lower, res.upper, res.boxes, res.worst, res.status, msg, where)


def format_certificate(result: dict[str, Any]) -> str:
    """Plain-text form of a `certify` result (the CLI prints it).

    Parameters
    ----------
    result
        The dict returned by `certify`.

    Returns
    -------
    str
        A few lines: the bracket on the worst-case critical gain, how it was
        obtained, and the worst parameter combination found.
    """

    def num(x):
        if x is None or (isinstance(x, float) and math.isnan(x)):
            return "undefined"
        if math.isinf(x):
            return "inf (no loss of stability within the gain range)" if x > 0 else "-inf"
        return f"{x:.6g}"

    lines = []
    if result["status"] == "unstable_at_reference":
        lines.append("worst-case critical gain: undefined (unstable at the reference gain)")
    elif result["exact"]:
        lines.append(f"worst-case critical gain: {num(result['lower'])} (exact)")
    else:
        lines.append(f"worst-case critical gain between {num(result['lower'])} and {num(result['upper'])}")
        gap = result["relative_gap"]
        if gap is not None and math.isfinite(gap):
            lines.append(f"relative gap: {gap:.3g}")
    lines.append(f"method: {result['method']}, {result['boxes']} boxes, {result['elapsed']:.2f} s")
    lines.append(f"status: {result['status']}: {result['message']}")
    if result.get("worst_parameters"):
        worst = ", ".join(f"{k} = {v:.6g}" for k, v in result["worst_parameters"].items())
        lines.append(f"worst parameters: {worst}")
    return "\n".join(lines)


class _CallableModule(types.ModuleType):
    """Lets ``sweep.certify(config, ...)`` (DESIGN section 7) work after ``import sweep.certify``.

    Importing the submodule rebinds the package attribute ``sweep.certify`` to this module,
    shadowing the function of the same name; calling the module calls the function.
    """

    def __call__(self, config: Any, **kwargs: Any) -> dict[str, Any]:
        return certify(config, **kwargs)


sys.modules[__name__].__class__ = _CallableModule
