"""Per-variant analysis of a stack of loops ``k N(s)/D(s)``.

Everything works on stacks (arrays shaped ``(V, ...)``); no Python loop runs
per variant or per gain. Loops run only over polynomial degree or root index.

Steps (see DESIGN section 3 and METHODS):

1. Scale frequency ``s = w0 t`` per variant (``w0`` a power of two from the
   geometric spread of the coefficients of ``D``) and normalise ``D`` and
   ``N`` by powers of two, so scaling is exact and nothing depends on the
   other variants in the batch.
2. Axis crossings: ``Im[D(jw) N(-jw)] = w F(w^2)``; the real positive roots
   ``u`` of ``F`` (batched companion eigenvalues, one Newton polish) give
   ``w = sqrt(u)`` and ``k = -D(jw)/(sigma N(jw))``. Roots through the origin
   and through infinity are added from the end coefficients.
3. Stable intervals: a vectorised Routh count at a test gain inside every
   interval between consecutive boundary gains.
4. Sketch quantities, and closed-loop quantities at the operating gain.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .errors import InputError
from .routh import routh_rhp_count

__all__ = [
    "analyze_stack",
    "analyze",
    "LoopAnalysis",
    "boundary_width",
    "breakaway_width",
    "VARIABLE_DIMS",
    "VARIABLE_ATTRS",
]

_DUMMY = 1e150            # isolated diagonal entry standing for a missing root
_LEAD_RTOL = 1e-13        # a leading coefficient this small (relative) counts as zero
_REAL_RTOL = 1e-6         # |Im| / |z| below which a computed root counts as real
_SUSPECT = (1e-11, 1e-4)  # relative imaginary parts that hint at a near-double root


# ---------------------------------------------------------------------------
# widths and dataset description

def _u_degree(n: int, m: int) -> int:
    """Degree of F(u) with Im[D(jw) N(-jw)] = w F(w^2)."""
    do = (n - 1) // 2 if n >= 1 else -1
    de = n // 2
    ne = m // 2
    no = (m - 1) // 2 if m >= 1 else -1
    cand = []
    if do >= 0:
        cand.append(do + ne)
    if no >= 0:
        cand.append(de + no)
    return max(cand) if cand else 0


def boundary_width(n: int, m: int) -> int:
    """Number of boundary slots for ``deg D = n``, ``deg N = m`` (fixed per degrees).

    Axis crossings (at most the degree of ``F(u)``), one root through the
    origin, and one through infinity when ``m = n``.
    """
    return _u_degree(n, m) + 1 + (1 if m == n else 0)


def breakaway_width(n: int, m: int) -> int:
    """Number of breakaway slots: the degree of ``N D' - N' D``."""
    if m < n:
        return n + m - 1
    return max(2 * n - 2, 0)


_A = {
    "critical_gain": ("critical gain (upper end of the stable interval holding the reference gain)", "1"),
    "critical_gain_low": ("lower end of the stable interval holding the reference gain", "1"),
    "crossing_frequency": ("frequency of the roots on the imaginary axis at the critical gain", "rad/s"),
    "stable_at_reference": ("closed loop stable at the reference gain (1/0)", "1"),
    "stable_at_start": ("closed loop stable just above the lower end of the gain range (1/0)", "1"),
    "gain_margin": ("upper gain margin critical_gain / operating_gain", "1"),
    "gain_margin_db": ("upper gain margin in decibels", "dB"),
    "lower_gain_margin": ("lower gain margin critical_gain_low / operating_gain", "1"),
    "min_damping": ("smallest damping ratio of the closed-loop poles at the operating gain", "1"),
    "dominance_ratio": ("real part of the next-slowest closed-loop pole (or pair) over the slowest's", "1"),
    "second_order_ok": ("dominance ratio at least 10 (rule of thumb for a second-order approximation)", "1"),
    "asymptote_centroid": ("centroid of the root-locus asymptotes", "rad/s"),
    "routh_agrees": ("Routh count agrees with the eigenvalue count at the reference gain (1/0)", "1"),
    "ill_conditioned": ("results of this variant could not be computed to full precision (1/0)", "1"),
    "fixed_axis_root": ("numerator and denominator share a root on the imaginary axis (1/0)", "1"),
    "boundary_gain": ("gain at which a closed-loop root is on the imaginary axis", "1"),
    "boundary_frequency": ("frequency of the imaginary-axis root at the boundary gain", "rad/s"),
    "stable_above": ("closed loop stable on the gain interval just above the boundary gain (1/0, -1 pad)", "1"),
    "open_loop_pole_real": ("real part of the open-loop poles", "rad/s"),
    "open_loop_pole_imag": ("imaginary part of the open-loop poles", "rad/s"),
    "departure_angle": ("direction in which the locus leaves a complex open-loop pole", "deg"),
    "closed_loop_pole_real": ("real part of the closed-loop poles at the operating gain", "rad/s"),
    "closed_loop_pole_imag": ("imaginary part of the closed-loop poles at the operating gain", "rad/s"),
    "open_loop_zero_real": ("real part of the open-loop zeros", "rad/s"),
    "open_loop_zero_imag": ("imaginary part of the open-loop zeros", "rad/s"),
    "arrival_angle": ("direction, seen from a complex zero, of the locus branch arriving there", "deg"),
    "breakaway_point": ("real breakaway or break-in point of the locus", "rad/s"),
    "breakaway_gain": ("gain at the breakaway or break-in point", "1"),
}

_DIMS_OF = {
    ("variant",): ["critical_gain", "critical_gain_low", "crossing_frequency", "stable_at_reference",
                   "stable_at_start", "gain_margin", "gain_margin_db", "lower_gain_margin",
                   "min_damping", "dominance_ratio", "second_order_ok", "asymptote_centroid",
                   "routh_agrees", "ill_conditioned", "fixed_axis_root"],
    ("variant", "boundary"): ["boundary_gain", "boundary_frequency", "stable_above"],
    ("variant", "pole"): ["open_loop_pole_real", "open_loop_pole_imag", "departure_angle",
                          "closed_loop_pole_real", "closed_loop_pole_imag"],
    ("variant", "zero"): ["open_loop_zero_real", "open_loop_zero_imag", "arrival_angle"],
    ("variant", "breakaway"): ["breakaway_point", "breakaway_gain"],
}

#: dataset dimensions of every key returned by `analyze_stack`
VARIABLE_DIMS: dict[str, tuple[str, ...]] = {
    name: dims for dims, names in _DIMS_OF.items() for name in names
}
#: ``long_name`` and ``units`` of every key returned by `analyze_stack`
VARIABLE_ATTRS: dict[str, dict[str, str]] = {
    name: {"long_name": ln, "units": u} for name, (ln, u) in _A.items()
}

_INT8 = {"stable_at_reference", "stable_at_start", "second_order_ok", "routh_agrees",
         "ill_conditioned", "fixed_axis_root", "stable_above"}


# ---------------------------------------------------------------------------
# batched polynomial helpers

def _polyval(c: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Horner on stacks: ``c`` (V, d+1), ``x`` (V, ...) -> (V, ...)."""
    extra = (slice(None),) + (None,) * (x.ndim - 1)
    out = np.zeros(x.shape, dtype=np.result_type(c, x))
    for i in range(c.shape[1]):
        out = out * x + c[:, i][extra]
    return out


def _polyder(c: np.ndarray) -> np.ndarray:
    d = c.shape[1] - 1
    if d == 0:
        return np.zeros((c.shape[0], 1))
    return c[:, :-1] * np.arange(d, 0, -1)[None, :]


def _polymul(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    out = np.zeros((a.shape[0], a.shape[1] + b.shape[1] - 1))
    for j in range(b.shape[1]):
        out[:, j: j + a.shape[1]] += a * b[:, j: j + 1]
    return out


def _pad_left(c: np.ndarray, width: int) -> np.ndarray:
    out = np.zeros((c.shape[0], width))
    out[:, width - c.shape[1]:] = c
    return out


def _stack_roots(c: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Roots of every polynomial of a stack, allowing a lower actual degree.

    Leading coefficients that are (relatively) zero are dropped per variant;
    the missing roots are returned as NaN. Returns ``(roots (V, d), degree (V,))``.
    """
    V, d1 = c.shape
    d = d1 - 1
    if d == 0:
        return np.zeros((V, 0), complex), np.zeros(V, int)
    scale = np.max(np.abs(c), axis=1)
    nz = np.abs(c) > _LEAD_RTOL * scale[:, None]
    lead = np.where(np.any(nz, axis=1), np.argmax(nz, axis=1), d1)
    deg = d - np.minimum(lead, d)
    idx = lead[:, None] + np.arange(d1)[None, :]
    a = np.take_along_axis(c, np.minimum(idx, d), axis=1)
    a = np.where(idx <= d, a, 0.0)
    a0 = np.where(deg > 0, a[:, 0], 1.0)
    M = np.zeros((V, d, d))
    j = np.arange(d)
    sub = np.arange(1, d)
    M[:, 0, :] = -a[:, 1:] / a0[:, None]
    M[:, sub, sub - 1] = 1.0
    if np.any(deg < d):
        # Only deficient variants are touched, so full-degree rows get exactly the
        # same matrix whatever else is in the batch.
        M[:, 0, :] = np.where(j[None, :] < deg[:, None], M[:, 0, :], 0.0)
        M[:, sub, sub - 1] = np.where(sub[None, :] < deg[:, None], 1.0, 0.0)
        M[:, j, j] = np.where(j[None, :] >= deg[:, None], _DUMMY, M[:, j, j])
    r = np.linalg.eigvals(M).astype(complex)
    r = np.where(np.abs(r) > 1e100, np.nan + 0j, r)
    return r, deg


def _sort_complex(r: np.ndarray) -> np.ndarray:
    """Deterministic order: by real part, then imaginary part (NaN last)."""
    key_nan = np.isnan(r.real)
    rr = np.where(key_nan, np.inf, r.real)
    ri = np.where(key_nan, np.inf, r.imag)
    order = np.lexsort((ri, rr), axis=-1)
    return np.take_along_axis(r, order, axis=-1)


def _companion_eigvals(c: np.ndarray) -> np.ndarray:
    """Roots of a stack with nonzero leading coefficients (plain companion)."""
    V, d1 = c.shape
    d = d1 - 1
    if d == 0:
        return np.zeros((V, 0), complex)
    M = np.zeros((V, d, d))
    M[:, 0, :] = -c[:, 1:] / c[:, :1]
    sub = np.arange(1, d)
    M[:, sub, sub - 1] = 1.0
    return np.linalg.eigvals(M).astype(complex)


def _pow2(x: np.ndarray) -> np.ndarray:
    """Nearest power of two (so scaling by it is exact)."""
    return np.exp2(np.round(np.log2(x)))


def _angle_deg(z: np.ndarray) -> np.ndarray:
    """Angle in degrees in (-180, 180]."""
    a = np.degrees(np.angle(z))
    return np.where(a <= -180.0, a + 360.0, a)


def _test_gains(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """A gain inside (a, b): arithmetic or geometric midpoint, or a step past a."""
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        geo = (a > 0) & (b > 4 * a)
        mid = np.where(geo, np.sqrt(np.abs(a * b)), 0.5 * (a + b))
        up = a + np.maximum(1.0, np.abs(a))       # b = inf
        down = b - np.maximum(1.0, np.abs(b))     # a = -inf
        t = np.where(np.isinf(b) & np.isfinite(a), up, mid)
        t = np.where(np.isinf(a) & np.isfinite(b), down, t)
        t = np.where(np.isinf(a) & np.isinf(b), 0.0, t)
    return t


# ---------------------------------------------------------------------------
# input checks

def _check_inputs(N, D, sigma, gain_range, operating_gain):
    N = np.array(N, dtype=float, ndmin=2)
    D = np.array(D, dtype=float, ndmin=2)
    if N.ndim != 2 or D.ndim != 2 or N.shape[0] != D.shape[0]:
        raise InputError(f"numerator and denominator stacks must be (V, m+1) and (V, n+1) with the same V; "
                         f"got {N.shape} and {D.shape}", field="loop")
    n, m = D.shape[1] - 1, N.shape[1] - 1
    if n < 1:
        raise InputError("the denominator must have degree 1 or more", field="loop")
    if m > n:
        raise InputError(f"improper loop: numerator degree {m} exceeds denominator degree {n}; "
                         "add poles or remove zeros", field="loop")
    if not (np.all(np.isfinite(N)) and np.all(np.isfinite(D))):
        raise InputError("coefficients must be finite numbers (found NaN or inf)", field="loop")
    if np.any(D[:, 0] == 0):
        raise InputError("the leading denominator coefficient is zero for some variant; "
                         "fix the parameter box so the degree is kept", field="loop")
    if np.any(np.all(N == 0, axis=1)):
        raise InputError("the numerator is identically zero for some variant", field="loop")
    if sigma not in (1, -1, 1.0, -1.0):
        raise InputError(f"sigma must be +1 (negative feedback) or -1 (positive); got {sigma!r}",
                         field="loop.feedback")
    try:
        lo, hi = (float(gain_range[0]), float(gain_range[1]))
    except (TypeError, ValueError, IndexError):
        raise InputError(f"gain_range must be two numbers [low, high]; got {gain_range!r}",
                         field="loop.gain_range") from None
    if math.isnan(lo) or math.isnan(hi) or not lo < hi:
        raise InputError(f"gain_range needs low < high; got [{lo}, {hi}]", field="loop.gain_range")
    if operating_gain is not None:
        k0 = float(operating_gain)
        if not (math.isfinite(k0) and lo <= k0 <= hi):
            raise InputError(f"operating_gain {k0} must be a finite gain inside gain_range [{lo}, {hi}]",
                             field="loop.operating_gain")
        operating_gain = k0
    return N, D, float(sigma), lo, hi, operating_gain


# ---------------------------------------------------------------------------
# the analysis

def analyze_stack(N, D, *, sigma: float, gain_range=(0.0, math.inf),
                  operating_gain: float | None = None,
                  full_check: bool = False,
                  open_loop_poles: np.ndarray | None = None,
                  closed_loop_poles: np.ndarray | None = None) -> dict[str, np.ndarray]:
    """Analyse a stack of loops ``k N/D`` closed with ``P = D + sigma k N``.

    Parameters
    ----------
    N, D
        ``(V, m+1)`` and ``(V, n+1)`` float64 coefficients, highest power first,
        ``m <= n``, ``D[:, 0] != 0``.
    sigma
        ``+1`` negative feedback, ``-1`` positive feedback.
    gain_range
        ``(lo, hi)`` with ``hi`` possibly ``inf``; boundary gains and breakaway
        points count only strictly inside.
    operating_gain
        Design gain (inside ``gain_range``) at which margins and closed-loop
        poles are computed; ``None`` uses ``lo`` approached from above as the
        reference gain and leaves the operating-gain quantities NaN.
    full_check
        Also compare the Routh classification with eigenvalue counts at the
        test gain of every interval (slower; validation mode).
    open_loop_poles, closed_loop_poles
        Roots ``(V, n)`` already known to the caller (the roots of ``D``, and
        of ``P`` at the operating gain), e.g. from locus tracing on a grid
        that holds the operating gain. They replace two eigenvalue passes;
        any order is accepted.

    Returns
    -------
    dict
        Keyed by dataset variable names (see `VARIABLE_DIMS`); widths depend
        only on the degrees: boundary `boundary_width(n, m)`, pole ``n``,
        zero ``m``, breakaway `breakaway_width(n, m)`. Padding is NaN
        (int8 flags: -1).

    Raises
    ------
    InputError
        Inconsistent shapes, improper loop, non-finite coefficients, zero
        leading denominator coefficient, bad gain range or operating gain.
    """
    N, D, sigma, lo, hi, k_op = _check_inputs(N, D, sigma, gain_range, operating_gain)
    V = D.shape[0]
    n, m = D.shape[1] - 1, N.shape[1] - 1
    ill = np.zeros(V, dtype=bool)

    # -- 1. exact power-of-two scaling, per variant --------------------------
    pw_d = np.arange(n, -1, -1)
    pw_n = np.arange(m, -1, -1)
    absd = np.abs(D)
    nzd = absd > 0
    # lowest nonzero power p of D: geometric mean of |nonzero roots| = |d_p/d_n|^(1/(n-p))
    low_idx = n - np.argmax(nzd[:, ::-1], axis=1)  # index of the lowest-power nonzero coefficient
    p_low = n - low_idx
    with np.errstate(divide="ignore"):
        gm = np.where(p_low < n,
                      (np.take_along_axis(absd, low_idx[:, None], 1)[:, 0] / absd[:, 0])
                      ** (1.0 / np.maximum(n - p_low, 1)), 1.0)
    w0 = _pow2(np.where(np.isfinite(gm) & (gm > 0), gm, 1.0))
    Ds = D * w0[:, None] ** pw_d[None, :]
    Ns = N * w0[:, None] ** pw_n[None, :]
    cD = _pow2(np.max(np.abs(Ds), axis=1))
    cN = _pow2(np.max(np.abs(Ns), axis=1))
    Ds = Ds / cD[:, None]
    Ns = Ns / cN[:, None]
    g = cD / cN                      # k = g * k_scaled
    Nsp = _pad_left(Ns, n + 1)       # N padded to the length of D

    # -- 2. imaginary-axis crossings -----------------------------------------
    # Even / odd parts in u = w^2: D(jw) = De(u) + j w Do(u).
    def parts(c):
        deg = c.shape[1] - 1
        pw = np.arange(deg, -1, -1)
        sgn_e = np.where(pw % 4 == 0, 1.0, -1.0)
        sgn_o = np.where(pw % 4 == 1, 1.0, -1.0)
        ev = c[:, pw % 2 == 0] * sgn_e[pw % 2 == 0]
        od = c[:, pw % 2 == 1] * sgn_o[pw % 2 == 1]
        if od.shape[1] == 0:
            od = np.zeros((c.shape[0], 1))
        return ev, od

    De, Do = parts(Ds)
    Ne, No = parts(Ns)
    # Im[D(jw) N(-jw)] = w (Do Ne - De No)
    t1 = _polymul(Do, Ne)
    t2 = _polymul(De, No)
    du = _u_degree(n, m)
    F = _pad_left(t1, max(t1.shape[1], t2.shape[1])) - _pad_left(t2, max(t1.shape[1], t2.shape[1]))
    F = F[:, F.shape[1] - (du + 1):] if F.shape[1] > du + 1 else _pad_left(F, du + 1)
    fixed_axis = np.zeros(V, dtype=bool)
    if du > 0:
        ur, _ = _stack_roots(F)
        with np.errstate(invalid="ignore", divide="ignore"):
            rel_im = np.abs(ur.imag) / np.abs(ur)
            cand = np.isfinite(ur.real) & (ur.real > 0) & (rel_im <= _REAL_RTOL)
            ill |= np.any(np.isfinite(ur.real) & (ur.real > 0)
                          & (rel_im > _SUSPECT[0]) & (rel_im < _SUSPECT[1]), axis=1)
            u = np.where(cand, ur.real, 1.0)
            # two (nearly) equal real roots: a tangent touch of the axis, whose
            # position carries only half the digits
            du_ = np.abs(u[:, :, None] - u[:, None, :])
            pair = cand[:, :, None] & cand[:, None, :] & ~np.eye(du, dtype=bool)[None]
            ill |= np.any(pair & (du_ <= 1e-6 * np.abs(u[:, :, None])), axis=(1, 2))
            # one Newton step on F, only where it helps (derivative not tiny)
            Fd = _polyder(F)
            fu = _polyval(F, u)
            fdu = _polyval(Fd, u)
            step = np.where(np.abs(fdu) > 0, fu / fdu, 0.0)
            step = np.where(np.abs(step) < 1e-3 * u, step, 0.0)
            u = u - step
            w = np.sqrt(u)
            s = 1j * w
            Dv = _polyval(Ds.astype(complex), s)
            Nv = _polyval(Ns.astype(complex), s)
            magD = _polyval(np.abs(Ds), w)
            magN = _polyval(np.abs(Ns), w)
            fixed = cand & (np.abs(Dv) <= 1e-8 * magD) & (np.abs(Nv) <= 1e-8 * magN)
            fixed_axis |= np.any(fixed, axis=1)
            ks = -Dv / (sigma * Nv)
            kc = ks.real * g[:, None]
            ok = cand & ~fixed & np.isfinite(kc)
            bad_k = ok & (np.abs(ks.imag) > 1e-6 * np.abs(ks))
            ill |= np.any(bad_k, axis=1)
            # residual of F after the polish
            resid = np.abs(_polyval(F, u)) / np.maximum(_polyval(np.abs(F), u), 1e-300)
            ill |= np.any(ok & (resid > 1e-8), axis=1)
            ok &= (kc > lo) & (kc < hi)
        bg_axis = np.where(ok, kc, np.nan)
        bw_axis = np.where(ok, w * w0[:, None], np.nan)
    else:
        bg_axis = np.zeros((V, 0))
        bw_axis = np.zeros((V, 0))
    # origin
    n0 = N[:, -1]
    d0 = D[:, -1]
    fixed_axis |= (n0 == 0) & (d0 == 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        k_org = np.where(n0 != 0, -d0 / (sigma * np.where(n0 != 0, n0, 1.0)), np.nan)
    k_org = np.where((k_org > lo) & (k_org < hi), k_org, np.nan)
    cols_g = [bg_axis, k_org[:, None]]
    cols_w = [bw_axis, np.where(np.isnan(k_org), np.nan, 0.0)[:, None]]
    if m == n:
        nn = N[:, 0]
        with np.errstate(divide="ignore", invalid="ignore"):
            k_inf = np.where(nn != 0, -D[:, 0] / (sigma * np.where(nn != 0, nn, 1.0)), np.nan)
        k_inf = np.where((k_inf > lo) & (k_inf < hi), k_inf, np.nan)
        cols_g.append(k_inf[:, None])
        cols_w.append(np.where(np.isnan(k_inf), np.nan, np.inf)[:, None])
    bg = np.concatenate(cols_g, axis=1)
    bw = np.concatenate(cols_w, axis=1)
    order = np.argsort(np.where(np.isnan(bg), np.inf, bg), axis=1, kind="stable")
    bg = np.take_along_axis(bg, order, 1)
    bw = np.take_along_axis(bw, order, 1)
    W = bg.shape[1]
    valid = ~np.isnan(bg)
    nvalid = valid.sum(axis=1)

    # -- 3. classify the intervals with a vectorised Routh count -------------
    lower = np.concatenate([np.full((V, 1), lo), bg], axis=1)          # (V, W+1)
    upper = np.concatenate([np.where(valid, bg, hi), np.full((V, 1), hi)], axis=1)
    exists = np.concatenate([np.ones((V, 1), bool), valid], axis=1)
    lower_f = np.where(exists, lower, lo)
    upper_f = np.where(exists, upper, hi)
    tg = _test_gains(lower_f, upper_f)                                  # (V, W+1)
    tgs = tg / g[:, None]
    Pt = Ds[:, None, :] + sigma * tgs[:, :, None] * Nsp[:, None, :]     # (V, W+1, n+1)
    # only intervals that exist are tested (rows are independent, so compacting
    # the stack does not change any result)
    ex = exists.reshape(-1)
    c_ex, z_ex, _ = routh_rhp_count(Pt.reshape(-1, n + 1)[ex], return_flags=True)
    cnt = np.zeros(V * (W + 1), dtype=c_ex.dtype)
    zrow = np.zeros(V * (W + 1), dtype=bool)
    cnt[ex] = c_ex
    zrow[ex] = z_ex
    cnt = cnt.reshape(V, W + 1)
    zrow = zrow.reshape(V, W + 1)
    lead_ok = np.abs(Pt[:, :, 0]) > 1e-12
    stable_iv = (cnt == 0) & ~zrow & lead_ok & ~fixed_axis[:, None]
    stable_at_start = stable_iv[:, 0]
    stable_above = np.where(valid, stable_iv[:, 1:], False)

    # reference gain and the interval holding it
    ref = lo if k_op is None else k_op
    below = valid & (bg < ref)
    j = below.sum(axis=1)
    # an operating gain within rounding of a boundary gain sits on the axis: marginal
    on_boundary = (np.any(valid & (np.abs(bg - ref) <= 1e-10 * abs(ref)), axis=1)
                   if k_op is not None else np.zeros(V, bool))
    stable_ref = np.take_along_axis(stable_iv, j[:, None], 1)[:, 0] & ~on_boundary
    jj = np.minimum(j, W - 1) if W > 0 else j
    has_above = j < nvalid
    crit = np.where(has_above, np.take_along_axis(bg, jj[:, None], 1)[:, 0] if W else np.inf, np.inf)
    cfreq = np.where(has_above, np.take_along_axis(bw, jj[:, None], 1)[:, 0] if W else np.nan, np.nan)
    jl = np.maximum(j - 1, 0)
    crit_low = np.where(j > 0, np.take_along_axis(bg, jl[:, None], 1)[:, 0] if W else lo, lo)
    crit = np.where(stable_ref, crit, np.nan)
    crit_low = np.where(stable_ref, crit_low, np.nan)
    cfreq = np.where(stable_ref, cfreq, np.nan)

    # -- 4. sketch quantities --------------------------------------------------
    if open_loop_poles is not None:
        poles_t = _sort_complex(np.asarray(open_loop_poles, dtype=complex) / w0[:, None])
    else:
        poles_t = _sort_complex(_companion_eigvals(Ds))
    zr, zdeg = _stack_roots(Ns) if m > 0 else (np.zeros((V, 0), complex), np.zeros(V, int))
    zeros_t = _sort_complex(zr)
    poles = poles_t * w0[:, None]
    zeros = zeros_t * w0[:, None]
    with np.errstate(invalid="ignore", divide="ignore"):
        if m < n:
            sum_z = np.where(N[:, 0] != 0, -N[:, 1] / N[:, 0], np.nan) if m > 0 else np.zeros(V)
            centroid = (-D[:, 1] / D[:, 0] - sum_z) / (n - m)
            centroid = np.where(zdeg == m, centroid, np.nan) if m > 0 else centroid
        else:
            centroid = np.full(V, np.nan)

        # departure: s - p ~ -sigma N(p)/D'(p) (first-order motion for k > 0)
        dD = _polyder(Ds)
        Np_ = _polyval(Ns.astype(complex), poles_t)
        dDp = _polyval(dD.astype(complex), poles_t)
        dep = _angle_deg(-sigma * Np_ / dDp)
        is_cplx = np.abs(poles_t.imag) > 1e-9 * np.maximum(np.abs(poles_t), 1e-300)
        repeated = np.abs(dDp) <= 1e-7 * _polyval(np.abs(dD), np.abs(poles_t))
        departure = np.where(is_cplx & ~repeated & np.isfinite(dep), dep, np.nan)
        # arrival: s - z ~ -D(z)/(sigma k N'(z)) for large k
        if m > 0:
            dN = _polyder(Ns)
            Dz = _polyval(Ds.astype(complex), zeros_t)
            dNz = _polyval(dN.astype(complex), zeros_t)
            arr = _angle_deg(-Dz / (sigma * dNz))
            zc = np.abs(zeros_t.imag) > 1e-9 * np.maximum(np.abs(zeros_t), 1e-300)
            zrep = np.abs(dNz) <= 1e-7 * _polyval(np.abs(dN), np.abs(zeros_t))
            arrival = np.where(zc & ~zrep & np.isfinite(arr), arr, np.nan)
        else:
            arrival = np.zeros((V, 0))

        # breakaway / break-in: real roots of N D' - N' D
        bwid = breakaway_width(n, m)
        if bwid > 0:
            dN = _polyder(Ns)
            R = _polymul(Ns, dD)
            R2 = _polymul(dN, Ds) if m > 0 else np.zeros((V, 1))
            L = max(R.shape[1], R2.shape[1])
            Rr = _pad_left(R, L) - _pad_left(R2, L)
            Rr = Rr[:, L - (bwid + 1):] if L > bwid + 1 else _pad_left(Rr, bwid + 1)
            br, _ = _stack_roots(Rr)
            realb = np.isfinite(br.real) & (np.abs(br.imag) <= _REAL_RTOL * np.maximum(np.abs(br), 1e-3))
            x = np.where(realb, br.real, 0.0)
            dR = _polyder(Rr)
            fx = _polyval(Rr, x)
            fdx = _polyval(dR, x)
            step = np.where(np.abs(fdx) > 0, fx / fdx, 0.0)
            step = np.where(np.abs(step) < 1e-3 * np.maximum(np.abs(x), 1e-3), step, 0.0)
            x = x - step
            Nx = _polyval(Ns, x)
            kb = -_polyval(Ds, x) / (sigma * Nx) * g[:, None]
            okb = realb & np.isfinite(kb) & (kb > lo) & (kb < hi)
            bp = np.where(okb, x * w0[:, None], np.nan)
            bk = np.where(okb, kb, np.nan)
            ob = np.argsort(np.where(okb, bp, np.inf), axis=1, kind="stable")
            bp = np.take_along_axis(bp, ob, 1)
            bk = np.take_along_axis(bk, ob, 1)
        else:
            bp = np.zeros((V, 0))
            bk = np.zeros((V, 0))

    # -- 5. at the operating gain --------------------------------------------
    nan_v = np.full(V, np.nan)
    if k_op is not None:
        Pop = Ds + sigma * (k_op / g)[:, None] * Nsp
        if closed_loop_poles is not None:
            cl_t = _sort_complex(np.asarray(closed_loop_poles, dtype=complex) / w0[:, None])
        else:
            cl_t = _sort_complex(_companion_eigvals(Pop))
        cl = cl_t * w0[:, None]
        r_eig = np.sum(cl_t.real > 1e-9, axis=1)
        # the Routh count of the interval holding the operating gain
        r_routh = np.take_along_axis(cnt, j[:, None], 1)[:, 0]
        agrees = (r_eig == r_routh) | on_boundary
        with np.errstate(invalid="ignore", divide="ignore"):
            gm = np.where(stable_ref, crit / k_op, np.nan)
            gm_db = 20.0 * np.log10(gm)
            lgm = np.where(stable_ref & (crit_low > 0), crit_low / k_op, np.nan)
            mag = np.abs(cl)
            zeta = np.where(mag > 0, -cl.real / np.where(mag > 0, mag, 1.0), 0.0)
            min_damp = np.min(zeta, axis=1)
            # dominance: next-slowest distinct real part over the slowest's
            re = cl.real
            slow = np.max(re, axis=1)
            same = np.abs(re - slow[:, None]) <= 1e-9 * np.maximum(np.abs(slow[:, None]), 1e-300)
            nxt = np.max(np.where(same, -np.inf, re), axis=1)
            dom = np.where(np.isfinite(nxt) & stable_ref, nxt / slow, np.nan)
    else:
        cl = np.full((V, n), np.nan + 0j)
        Pref = Ds + sigma * tgs[:, :1] * Nsp
        r_eig = np.sum(_companion_eigvals(Pref).real > 0, axis=1)
        agrees = r_eig == cnt[:, 0]
        gm = gm_db = lgm = min_damp = dom = nan_v
    if full_check:
        eig_all = _companion_eigvals(Pt.reshape(-1, n + 1))
        c_all = np.sum(eig_all.real > 0, axis=1).reshape(V, W + 1)
        agrees &= np.all((c_all == cnt) | ~exists, axis=1)

    out = {
        "critical_gain": crit,
        "critical_gain_low": crit_low,
        "crossing_frequency": cfreq,
        "stable_at_reference": stable_ref,
        "stable_at_start": stable_at_start,
        "gain_margin": gm,
        "gain_margin_db": gm_db,
        "lower_gain_margin": lgm,
        "min_damping": min_damp,
        "dominance_ratio": dom,
        "second_order_ok": np.where(np.isnan(dom), False, dom >= 10.0),
        "asymptote_centroid": centroid,
        "routh_agrees": agrees,
        "ill_conditioned": ill,
        "fixed_axis_root": fixed_axis,
        "boundary_gain": bg,
        "boundary_frequency": bw,
        "stable_above": np.where(valid, stable_above, -1),
        "open_loop_pole_real": poles.real,
        "open_loop_pole_imag": poles.imag,
        "departure_angle": departure,
        "closed_loop_pole_real": cl.real,
        "closed_loop_pole_imag": cl.imag,
        "open_loop_zero_real": zeros.real,
        "open_loop_zero_imag": zeros.imag,
        "arrival_angle": arrival,
        "breakaway_point": bp,
        "breakaway_gain": bk,
    }
    for k, v in out.items():
        out[k] = np.asarray(v, dtype=np.int8 if k in _INT8 else np.float64)
    return out


# ---------------------------------------------------------------------------
# one-loop front

@dataclass(frozen=True)
class LoopAnalysis:
    """Analysis of one loop, with the fields of ``sweep check --json``.

    Gains are plain floats (``inf`` / NaN where DESIGN says so); complex
    numbers are Python ``complex``; `to_dict` gives the JSON-ready form
    (through `sweep.jsonutil`).
    """

    numerator: list[float]
    denominator: list[float]
    feedback: str
    gain_range: tuple[float, float]
    operating_gain: float | None
    open_loop_poles: list[complex]
    open_loop_zeros: list[complex]
    boundary_gains: list[float]
    boundary_frequencies: list[float]
    stable_intervals: list[tuple[float, float]]
    reference_gain: float
    critical_gain: float
    critical_gain_low: float
    crossing_frequency: float
    asymptotes: dict[str, Any]
    breakaway_points: list[tuple[float, float]]
    departure_angles_deg: list[tuple[complex, float]]
    arrival_angles_deg: list[tuple[complex, float]]
    closed_loop_poles: list[complex]
    gain_margin: float
    gain_margin_db: float
    lower_gain_margin: float
    min_damping: float
    dominance_ratio: float
    second_order_ok: bool
    stable_at_reference: bool
    routh_agrees: bool
    ill_conditioned: bool
    fixed_axis_root: bool
    raw: dict[str, np.ndarray] = field(repr=False, compare=False, default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict (inf -> "inf", NaN -> null, complex -> [re, im])."""
        from .jsonutil import to_jsonable

        d = {k: getattr(self, k) for k in self.__dataclass_fields__ if k != "raw"}
        return to_jsonable(d)


def _coeff_list(x, what: str) -> np.ndarray:
    try:
        a = np.asarray([float(v) for v in x], dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"{what} must be a list of numbers (highest power first); got {x!r}",
                         field=what) from None
    a = np.trim_zeros(a, "f")
    if a.size == 0:
        raise InputError(f"{what} is identically zero", field=what)
    return a


def analyze(num, den, *, feedback: str = "negative", gain_range=(0.0, math.inf),
            operating_gain: float | None = None) -> LoopAnalysis:
    """Analyse one loop ``k num(s)/den(s)`` (a stack of one through `analyze_stack`).

    Parameters
    ----------
    num, den
        Coefficient lists, highest power of ``s`` first.
    feedback
        ``"negative"`` (``P = den + k num``) or ``"positive"`` (``den - k num``).
    gain_range
        ``(lo, hi)``, ``hi`` may be ``inf``.
    operating_gain
        Optional design gain for margins and closed-loop poles.

    Returns
    -------
    LoopAnalysis

    Examples
    --------
    >>> a = analyze([1.0], [1.0, 3.0, 2.0, 0.0])
    >>> round(a.critical_gain, 9), round(a.crossing_frequency ** 2, 9)
    (6.0, 2.0)
    """
    if feedback not in ("negative", "positive"):
        raise InputError(f"unknown feedback {feedback!r}; expected negative or positive",
                         field="loop.feedback")
    sigma = 1.0 if feedback == "negative" else -1.0
    N = _coeff_list(num, "numerator")
    Dn = _coeff_list(den, "denominator")
    res = analyze_stack(N[None, :], Dn[None, :], sigma=sigma, gain_range=gain_range,
                        operating_gain=operating_gain)
    r = {k: v[0] for k, v in res.items()}
    lo, hi = float(gain_range[0]), float(gain_range[1])
    valid = ~np.isnan(r["boundary_gain"])
    bg = r["boundary_gain"][valid]
    bw = r["boundary_frequency"][valid]
    sa = r["stable_above"][valid]
    edges = [lo] + bg.tolist() + [hi]
    flags = [bool(r["stable_at_start"])] + [bool(x) for x in sa]
    intervals = [(edges[i], edges[i + 1]) for i in range(len(flags))
                 if flags[i] and edges[i] < edges[i + 1]]
    poles = (r["open_loop_pole_real"] + 1j * r["open_loop_pole_imag"]).tolist()
    zeros = (r["open_loop_zero_real"] + 1j * r["open_loop_zero_imag"]).tolist()
    n, m = Dn.size - 1, N.size - 1
    if m < n:
        positive = sigma * N[0] / Dn[0] > 0
        q = np.arange(n - m)
        ang = (2 * q + 1) * 180.0 / (n - m) if positive else q * 360.0 / (n - m)
        ang = np.where(ang > 180.0, ang - 360.0, ang)
        angles = sorted(float(a) for a in ang)
    else:
        angles = []
    bpts = [(float(s), float(k)) for s, k in zip(r["breakaway_point"], r["breakaway_gain"])
            if not np.isnan(s)]
    dep = [(p, float(a)) for p, a in zip(poles, r["departure_angle"]) if not np.isnan(a)]
    arr = [(z, float(a)) for z, a in zip(zeros, r["arrival_angle"]) if not np.isnan(a)]
    cl = (r["closed_loop_pole_real"] + 1j * r["closed_loop_pole_imag"])
    return LoopAnalysis(
        numerator=N.tolist(), denominator=Dn.tolist(), feedback=feedback,
        gain_range=(lo, hi), operating_gain=None if operating_gain is None else float(operating_gain),
        open_loop_poles=poles, open_loop_zeros=zeros,
        boundary_gains=bg.tolist(), boundary_frequencies=bw.tolist(),
        stable_intervals=intervals,
        reference_gain=lo if operating_gain is None else float(operating_gain),
        critical_gain=float(r["critical_gain"]), critical_gain_low=float(r["critical_gain_low"]),
        crossing_frequency=float(r["crossing_frequency"]),
        asymptotes={"centroid": float(r["asymptote_centroid"]), "angles_deg": angles},
        breakaway_points=bpts, departure_angles_deg=dep, arrival_angles_deg=arr,
        closed_loop_poles=[] if operating_gain is None else cl.tolist(),
        gain_margin=float(r["gain_margin"]), gain_margin_db=float(r["gain_margin_db"]),
        lower_gain_margin=float(r["lower_gain_margin"]), min_damping=float(r["min_damping"]),
        dominance_ratio=float(r["dominance_ratio"]), second_order_ok=bool(r["second_order_ok"]),
        stable_at_reference=bool(r["stable_at_reference"]), routh_agrees=bool(r["routh_agrees"]),
        ill_conditioned=bool(r["ill_conditioned"]), fixed_axis_root=bool(r["fixed_axis_root"]),
        raw=res,
    )
