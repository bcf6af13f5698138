"""Compiled per-variant core of `sweep.analysis.analyze_stack`.

Per variant (see `sweep.analysis` for the method and its tolerances):

* `_scale_and_build`: exact power-of-two scaling, and the polynomials whose
  roots are needed - ``F(u)`` of the axis crossings, the breakaway
  polynomial ``N D' - N' D``, ``P`` at the operating gain - with the actual
  degrees of those whose leading coefficients may vanish;
* their roots, by `sweep.rootfind.companion_roots` (balanced companion QR);
* `_finish_one`: boundary gains, Routh counts at a test gain inside every
  interval, reference/critical gains, sketch quantities and the quantities
  at the operating gain.

`analyze_rows` does all three in one loop over the variants with scratch
allocated once, so nothing large is allocated between the steps. A row
whose QR iteration does not converge is only marked; the caller redoes
those rows with the staged path - `prepare`, `sweep.rootfind.poly_roots`
(which falls back to LAPACK) and `finish` - which runs the same per-variant
functions on the same numbers, so a variant's results depend neither on the
rest of the batch nor on the path except through the fall-back roots.

Results go into grouped output arrays (one row per quantity, see the
``FV_*``, ``IV_*``, ... indices), which `sweep.analysis` hands out as views.
The computation follows step by step the numpy formulation it replaced
(kept as ``tests/analysis_reference.py`` and compared with it in the tests).
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit

from .rootfind import companion_roots
from .routh import _EPSILON, _ZERO_RTOL

# tolerances shared with sweep.analysis (documented there)
LEAD_RTOL = 1e-13
REAL_RTOL = 1e-6
SUSPECT_LO = 1e-11
SUSPECT_HI = 1e-4
# Routh rules: the same constants as the numpy Routh array
ROUTH_ZERO_RTOL = _ZERO_RTOL
ROUTH_EPSILON = _EPSILON

_RAD2DEG = 180.0 / math.pi

# rows of the grouped outputs
FV_NAMES = ("critical_gain", "critical_gain_low", "crossing_frequency", "gain_margin", "gain_margin_db",
            "lower_gain_margin", "min_damping", "dominance_ratio", "asymptote_centroid")
IV_NAMES = ("stable_at_reference", "stable_at_start", "second_order_ok", "routh_agrees",
            "ill_conditioned", "fixed_axis_root")
FB_NAMES = ("boundary_gain", "boundary_frequency")      # (2, V, W); stable_above is iB (V, W)
FP_NAMES = ("open_loop_pole_real", "open_loop_pole_imag", "departure_angle",
            "closed_loop_pole_real", "closed_loop_pole_imag")
FZ_NAMES = ("open_loop_zero_real", "open_loop_zero_imag", "arrival_angle")
FK_NAMES = ("breakaway_point", "breakaway_gain")
(FV_CRIT, FV_CRIT_LOW, FV_CFREQ, FV_GM, FV_GM_DB, FV_LGM, FV_DAMP, FV_DOM, FV_CENTROID) = range(9)
(IV_STABLE_REF, IV_STABLE_START, IV_SECOND_ORDER, IV_AGREES, IV_ILL, IV_FIXED) = range(6)


# ---------------------------------------------------------------------------
# small helpers (compiled, inlined)

@njit(cache=True, inline="always")
def _pow2_exp(x: float) -> int:
    """Exponent of the nearest power of two (in the log sense) of ``x``; 0 unless finite and > 0."""
    if not (x > 0.0 and x < math.inf):
        return 0
    return int(round(math.log2(x)))


@njit(cache=True, error_model="numpy")
def _actual_degree(c) -> int:
    """Degree after dropping leading coefficients below ``LEAD_RTOL`` times the largest."""
    d = c.shape[0] - 1
    scale = 0.0
    for i in range(d + 1):
        a = abs(c[i])
        if a > scale:
            scale = a
    for i in range(d + 1):
        if abs(c[i]) > LEAD_RTOL * scale:
            return d - i
    return 0


@njit(cache=True, error_model="numpy")
def _horner(c, x: float) -> float:
    out = 0.0
    for i in range(c.shape[0]):
        out = out * x + c[i]
    return out


@njit(cache=True, error_model="numpy")
def _horner_abs(c, x: float) -> float:
    out = 0.0
    for i in range(c.shape[0]):
        out = out * x + abs(c[i])
    return out


@njit(cache=True, error_model="numpy")
def _horner_c(c, z: complex) -> complex:
    out = 0j
    for i in range(c.shape[0]):
        out = out * z + c[i]
    return out


@njit(cache=True, error_model="numpy")
def _dhorner(c, x: float) -> float:
    """Derivative of the polynomial ``c`` at real ``x``."""
    d = c.shape[0] - 1
    out = 0.0
    for i in range(d):
        out = out * x + c[i] * (d - i)
    return out


@njit(cache=True, error_model="numpy")
def _dhorner_c(c, z: complex) -> complex:
    d = c.shape[0] - 1
    out = 0j
    for i in range(d):
        out = out * z + c[i] * (d - i)
    return out


@njit(cache=True, error_model="numpy")
def _dhorner_abs(c, x: float) -> float:
    d = c.shape[0] - 1
    out = 0.0
    for i in range(d):
        out = out * x + abs(c[i] * (d - i))
    return out


@njit(cache=True, error_model="numpy", inline="always")
def _cabs(z: complex) -> float:
    """``|z|``; plain square root of the squares (several times faster than ``hypot``)
    unless that could over- or underflow."""
    s = z.real * z.real + z.imag * z.imag
    if 1e-300 < s < 1e300:
        return math.sqrt(s)
    return abs(z)


@njit(cache=True, error_model="numpy")
def _cdiv(a: complex, b: complex) -> complex:
    """``a / b``, NaN (not an exception) when ``b`` is zero; callers test finiteness."""
    if b == 0:
        return complex(math.nan, math.nan)
    return a / b


@njit(cache=True, error_model="numpy")
def _angle_deg(z: complex) -> float:
    a = math.atan2(z.imag, z.real) * _RAD2DEG
    if a <= -180.0:
        a += 360.0
    return a


@njit(cache=True, error_model="numpy")
def _sort_complex(r) -> None:
    """In place: by real part, then imaginary part, NaN last (stable insertion sort)."""
    n = r.shape[0]
    for i in range(1, n):
        z = r[i]
        zr = math.inf if math.isnan(z.real) else z.real
        zi = math.inf if math.isnan(z.real) else z.imag
        j = i - 1
        while j >= 0:
            y = r[j]
            yr = math.inf if math.isnan(y.real) else y.real
            yi = math.inf if math.isnan(y.real) else y.imag
            if yr > zr or (yr == zr and yi > zi):
                r[j + 1] = y
                j -= 1
            else:
                break
        r[j + 1] = z


@njit(cache=True, error_model="numpy")
def _sort_pairs(key, other) -> None:
    """In place: sort ``key`` ascending (NaN last, stable), permuting ``other`` alike."""
    n = key.shape[0]
    for i in range(1, n):
        k = key[i]
        o = other[i]
        kk = math.inf if math.isnan(k) else k
        j = i - 1
        while j >= 0:
            kj = math.inf if math.isnan(key[j]) else key[j]
            if kj > kk:
                key[j + 1] = key[j]
                other[j + 1] = other[j]
                j -= 1
            else:
                break
        key[j + 1] = k
        other[j + 1] = o


@njit(cache=True, error_model="numpy")
def _test_gain(a: float, b: float) -> float:
    """A gain inside ``(a, b)``: arithmetic or geometric midpoint, or a step past an end."""
    ainf = math.isinf(a)
    binf = math.isinf(b)
    if ainf and binf:
        return 0.0
    if binf:
        return a + max(1.0, abs(a))
    if ainf:
        return b - max(1.0, abs(b))
    if a > 0.0 and b > 4.0 * a:
        return math.sqrt(abs(a * b))
    return 0.5 * (a + b)


@njit(cache=True, error_model="numpy")
def routh_count(p, prev, cur, new):
    """Routh count of one polynomial ``p`` (highest power first, length ``n+1``).

    Same rules as `sweep.routh.routh_rhp_count`: an entry counts as zero below
    ``ROUTH_ZERO_RTOL`` times the largest entry of the row above; a zero first
    entry becomes ``ROUTH_EPSILON`` times that scale; a row of zeros is
    replaced by the derivative of the auxiliary polynomial of the row above.
    ``prev``, ``cur``, ``new`` are scratch of length at least ``n//2 + 1``.

    Returns ``(sign changes, a row of zeros appeared, the epsilon rule was used)``.
    """
    n = p.shape[0] - 1
    width = n // 2 + 1
    for i in range(width):
        prev[i] = 0.0
        cur[i] = 0.0
    for i in range(0, n + 1, 2):
        prev[i // 2] = p[i]
    for i in range(1, n + 1, 2):
        cur[i // 2] = p[i]
    scale = 0.0
    for i in range(width):
        a = abs(prev[i])
        if a > scale:
            scale = a
    zero_row = False
    used_eps = False
    changes = 0
    last = prev[0]
    for i in range(n):
        base = scale if scale > 0.0 else 1.0
        tiny = ROUTH_ZERO_RTOL * base
        cscale = 0.0
        for q in range(width):
            a = abs(cur[q])
            if a > cscale:
                cscale = a
        if cscale <= tiny:
            # row of zeros: derivative of the auxiliary polynomial of the row above
            for q in range(width):
                pw = (n - i) - 2 * q
                cur[q] = prev[q] * (pw if pw > 0 else 0)
            zero_row = True
            cscale = 0.0
            for q in range(width):
                a = abs(cur[q])
                if a > cscale:
                    cscale = a
        if abs(cur[0]) <= tiny:
            cur[0] = ROUTH_EPSILON * base
            used_eps = True
            if abs(cur[0]) > cscale:
                cscale = abs(cur[0])
        f = cur[0]
        if (last > 0.0 and f < 0.0) or (last < 0.0 and f > 0.0):
            changes += 1
        last = f
        if i < n - 1:
            r = prev[0] / cur[0]
            for q in range(width - 1):
                new[q] = prev[q + 1] - r * cur[q + 1]
            new[width - 1] = 0.0
            for q in range(width):
                prev[q] = cur[q]
                cur[q] = new[q]
            scale = cscale
    return changes, zero_row, used_eps


# ---------------------------------------------------------------------------
# step 1: scaling and the polynomials to solve

@njit(cache=True, error_model="numpy")
def _scale_and_build(Dv, Nv, sigma, k_op, has_op, Ds, Ns, F, R, Pop, De, Do, Ne, No):
    """Scale one variant and build its polynomials into the 1-D arrays ``Ds ... Pop``.

    ``Ds``, ``Ns``: ``D``, ``N`` with ``s = w0 t`` and divided by powers of two;
    ``F`` (``Im[D(jw) N(-jw)] = w F(w^2)``); ``R = Ns Ds' - Ns' Ds``; ``Pop``
    (``P`` at the operating gain, scaled) when ``has_op``. ``De ... No`` are
    scratch. Returns ``(w0, g, deg F, deg Ns, deg R, deg Pop)``: ``w0`` and the
    gain scale ``g`` (``k = g k_scaled``) are powers of two, so scaling is
    exact; the degrees drop where leading coefficients are (relatively) zero
    (``deg Pop`` drops when the operating gain sends a root through infinity).
    """
    n = Dv.shape[0] - 1
    m = Nv.shape[0] - 1
    du = F.shape[0] - 1
    bwid = R.shape[0] - 1
    # frequency scale: geometric mean of |nonzero roots| of D, as a power of two
    low = n
    while low > 0 and Dv[low] == 0.0:
        low -= 1
    p_low = n - low
    e0 = 0
    if p_low < n:
        e0 = _pow2_exp((abs(Dv[low]) / abs(Dv[0])) ** (1.0 / (n - p_low)))
    mx = 0.0
    for i in range(n + 1):
        Ds[i] = math.ldexp(Dv[i], e0 * (n - i))
        mx = max(mx, abs(Ds[i]))
    eD = _pow2_exp(mx)
    for i in range(n + 1):
        Ds[i] = math.ldexp(Ds[i], -eD)
    mx = 0.0
    for i in range(m + 1):
        Ns[i] = math.ldexp(Nv[i], e0 * (m - i))
        mx = max(mx, abs(Ns[i]))
    eN = _pow2_exp(mx)
    for i in range(m + 1):
        Ns[i] = math.ldexp(Ns[i], -eN)
    w0 = math.ldexp(1.0, e0)
    g = math.ldexp(1.0, eD - eN)

    # F(u): D(jw) = De(u) + j w Do(u), likewise N; F = Do Ne - De No (low powers first here)
    for q in range(De.shape[0]):
        De[q] = Ds[n - 2 * q] * (1.0 if q % 2 == 0 else -1.0)
    for q in range(Do.shape[0]):
        Do[q] = Ds[n - 2 * q - 1] * (1.0 if q % 2 == 0 else -1.0) if 2 * q + 1 <= n else 0.0
    for q in range(Ne.shape[0]):
        Ne[q] = Ns[m - 2 * q] * (1.0 if q % 2 == 0 else -1.0)
    for q in range(No.shape[0]):
        No[q] = Ns[m - 2 * q - 1] * (1.0 if q % 2 == 0 else -1.0) if 2 * q + 1 <= m else 0.0
    for r in range(du + 1):
        t1 = 0.0
        for a in range(Do.shape[0]):
            b = r - a
            if 0 <= b < Ne.shape[0]:
                t1 += Do[a] * Ne[b]
        t2 = 0.0
        for a in range(De.shape[0]):
            b = r - a
            if 0 <= b < No.shape[0]:
                t2 += De[a] * No[b]
        F[du - r] = t1 - t2

    # breakaway polynomial Ns Ds' - Ns' Ds (low powers first here, truncated to bwid:
    # with m = n the top power cancels)
    for r in range(bwid + 1):
        t1 = 0.0
        for a in range(m + 1):          # Ns power a times Ds' power r - a
            b = r - a
            if 0 <= b < n:
                t1 += Ns[m - a] * (Ds[n - b - 1] * (b + 1))
        t2 = 0.0
        for a in range(m):              # Ns' power a times Ds power r - a
            b = r - a
            if 0 <= b <= n:
                t2 += (Ns[m - a - 1] * (a + 1)) * Ds[n - b]
        R[bwid - r] = t1 - t2

    pdeg = 0
    if has_op:
        kk = sigma * (k_op / g)
        for i in range(n + 1):
            Pop[i] = Ds[i]
        for i in range(m + 1):
            Pop[n - m + i] += kk * Ns[i]
        pdeg = _actual_degree(Pop)
    return w0, g, _actual_degree(F), _actual_degree(Ns), _actual_degree(R), pdeg


@njit(cache=True, error_model="numpy")
def _part_sizes(n: int, m: int):
    """Lengths of the even/odd parts (in ``u = w^2``) of ``D`` and ``N``."""
    return n // 2 + 1, (n - 1) // 2 + 1, m // 2 + 1, (m - 1) // 2 + 1 if m >= 1 else 1


@njit(cache=True, error_model="numpy")
def prepare(N, D, sigma, k_op, has_op, Ds, Ns, w0, g, F, Fdeg, Ndeg, R, Rdeg, Pop, Popdeg):
    """`_scale_and_build` for every row of a stack (the staged path).

    ``Pop`` and ``Popdeg`` may have no rows when ``has_op`` is False.
    """
    n = D.shape[1] - 1
    m = N.shape[1] - 1
    sde, sdo, sne, sno = _part_sizes(n, m)
    De, Do, Ne, No = np.zeros(sde), np.zeros(sdo), np.zeros(sne), np.zeros(sno)
    Pop_s = np.empty(n + 1)
    for v in range(D.shape[0]):
        w0[v], g[v], Fdeg[v], Ndeg[v], Rdeg[v], pdeg = _scale_and_build(
            D[v], N[v], sigma, k_op, has_op, Ds[v], Ns[v], F[v], R[v], Pop_s, De, Do, Ne, No)
        if has_op:
            Pop[v, :] = Pop_s
            Popdeg[v] = pdeg


@njit(cache=True, error_model="numpy")
def actual_degrees(C, out) -> None:
    """`_actual_degree` of every row of the stack ``C`` into ``out``."""
    for v in range(C.shape[0]):
        out[v] = _actual_degree(C[v])


@njit(cache=True, error_model="numpy")
def _quadratic(a: float, b: float, c: float, out) -> bool:
    """Roots of ``a x^2 + b x + c`` (``a != 0``) by the cancellation-free formula.

    ``q = -(b/2 + sign(b) sqrt(b^2/4 - a c))``, roots ``q/a`` and ``c/q``
    (real), or ``-b/(2a) +- j sqrt(a c - b^2/4)/|a|`` (complex pair). Each
    root is exact for coefficients within a few rounding errors of the given
    ones, as with the companion QR. False (nothing written) when an
    intermediate is not finite; the caller then uses the QR.
    """
    h = 0.5 * b
    disc = h * h - a * c
    if not (math.isfinite(disc) and math.isfinite(h)):
        return False
    if disc >= 0.0:
        q = -(h + math.copysign(math.sqrt(disc), h))
        if q == 0.0:                    # b = c = 0: a double root at the origin
            out[0] = 0j
            out[1] = 0j
        else:
            out[0] = complex(q / a, 0.0)
            out[1] = complex(c / q, 0.0)
    else:
        re = -h / a
        im = math.sqrt(-disc) / abs(a)
        out[0] = complex(re, im)
        out[1] = complex(re, -im)
    return True


@njit(cache=True, error_model="numpy")
def _roots(c, e: int, out, work, wr, wi, max_its: int) -> bool:
    """Roots of the polynomial of the last ``e + 1`` entries of ``c`` into ``out`` (NaN padded).

    Degree 2 by `_quadratic`, everything else by
    `sweep.rootfind.companion_roots`. False when the QR did not converge.
    """
    d = c.shape[0] - 1
    for i in range(max(e, 0), d):
        out[i] = complex(math.nan, math.nan)
    if e <= 0:
        return True
    if e == 2 and c[d] != 0.0 and _quadratic(c[d - 2], c[d - 1], c[d], out):
        return True
    return companion_roots(c[d - e:], out[:e], work, wr, wi, max_its)


@njit(cache=True, error_model="numpy")
def roots_rows(C, degrees, out, max_its: int, ok) -> None:
    """`_roots` of every row of a stack (the staged path); ``ok[v]`` False where the QR failed."""
    d = C.shape[1] - 1
    dd = max(d, 1)
    work = np.empty((dd, dd))
    wr = np.empty(dd)
    wi = np.empty(dd)
    for v in range(C.shape[0]):
        ok[v] = _roots(C[v], min(degrees[v], d), out[v], work, wr, wi, max_its)


# ---------------------------------------------------------------------------
# step 3: everything else, for one variant

@njit(cache=True, error_model="numpy")
def _finish_block(v0, v1, skip, N, D, Ds, Ns, w0, g, F, uroots, poles_t, zeros_t, Ndeg, R, broots, cl_t,
                  sigma, lo, hi, k_op, has_op, fV, iV, fB, iB, fP, fZ, fK, tgs, cnt, exists):
    """Boundary gains, intervals, sketch and operating-gain quantities of variants ``v0 ... v1-1``.

    ``N``, ``D``, ``skip`` and the grouped outputs ``fV ... fK`` are indexed
    by variant; the per-variant inputs ``Ds ... cl_t`` and ``tgs``, ``cnt``,
    ``exists`` by ``v - v0``. ``uroots``, ``poles_t``, ``zeros_t``,
    ``broots``, ``cl_t`` hold the roots (scaled frequency, any order, NaN
    padded) of ``F``, ``Ds``, ``Ns``, ``R`` and ``Pop``; ``poles_t``,
    ``zeros_t`` and ``cl_t`` are sorted in place (``cl_t`` is not used, and
    may have no rows, without an operating gain). Variants with ``skip`` set
    are left alone. ``tgs``, ``cnt``, ``exists`` receive the scaled test gain,
    Routh count and existence of every interval. Without an operating gain
    ``routh_agrees`` is left to the caller (an eigenvalue count at the first
    test gain). One call per block: per-call costs stay out of the variant loop.
    """
    n = D.shape[1] - 1
    m = N.shape[1] - 1
    du = F.shape[1] - 1
    W = fB.shape[2]
    bwid = R.shape[1] - 1
    width = n // 2 + 1
    prev, cur, new = np.empty(width), np.empty(width), np.empty(width)
    Pt = np.empty(n + 1)
    stable_iv = np.empty(W + 1, np.bool_)
    bg, bw = np.empty(W), np.empty(W)
    ua = np.empty(max(du, 1))
    ucand = np.empty(max(du, 1), np.bool_)
    bpv, bkv = np.empty(max(bwid, 1)), np.empty(max(bwid, 1))
    cv0 = np.empty(n, np.complex128)
    nan = math.nan
    for v in range(v0, v1):
        if skip[v]:
            continue
        i_ = v - v0
        Dv, Nv, Ds_, Ns_, F_, R_ = D[v], N[v], Ds[i_], Ns[i_], F[i_], R[i_]
        w0v, gv, ndeg = w0[i_], g[i_], Ndeg[i_]
        ur, pv, zv, br = uroots[i_], poles_t[i_], zeros_t[i_], broots[i_]
        cv = cl_t[i_] if has_op else cv0
        tg, cn, ex = tgs[i_], cnt[i_], exists[i_]
        ill = False
        fixed_axis = False

        # -- axis crossings from the positive real roots u of F --------------------
        for i in range(du):
            z = ur[i]
            re = z.real
            rel_im = abs(z.imag) / _cabs(z)
            pos = math.isfinite(re) and re > 0.0
            if pos and SUSPECT_LO < rel_im < SUSPECT_HI:
                ill = True          # nearly real: a near-double root pair of F
            ucand[i] = pos and rel_im <= REAL_RTOL
            ua[i] = re
        # two (nearly) equal real roots: a tangent touch of the axis, half the digits
        for i in range(du):
            for j in range(du):
                if i != j and ucand[i] and ucand[j] and abs(ua[i] - ua[j]) <= 1e-6 * abs(ua[i]):
                    ill = True
        for i in range(du):
            bg[i] = nan
            bw[i] = nan
            if not ucand[i]:
                continue
            u = ua[i]
            # one Newton step on F, only where it helps
            fdu = _dhorner(F_, u)
            step = _horner(F_, u) / fdu if abs(fdu) > 0.0 else 0.0
            if not abs(step) < 1e-3 * u:
                step = 0.0
            u = u - step
            w = math.sqrt(u)
            s = complex(0.0, w)
            Dj = _horner_c(Ds_, s)
            Nj = _horner_c(Ns_, s)
            if _cabs(Dj) <= 1e-8 * _horner_abs(Ds_, w) and _cabs(Nj) <= 1e-8 * _horner_abs(Ns_, w):
                fixed_axis = True   # N and D share this axis root: it stays for every k
                continue
            ks = _cdiv(-Dj, sigma * Nj)
            kc = ks.real * gv
            if not math.isfinite(kc):
                continue
            if abs(ks.imag) > 1e-6 * _cabs(ks):
                ill = True          # the gain at the crossing is not real to working precision
            if abs(_horner(F_, u)) > 1e-8 * max(_horner_abs(F_, u), 1e-300):
                ill = True          # the polish left a large residual
            if kc > lo and kc < hi:
                bg[i] = kc
                bw[i] = w * w0v
        # root through the origin
        n0 = Nv[m]
        d0 = Dv[n]
        if n0 == 0.0 and d0 == 0.0:
            fixed_axis = True
        k_org = -d0 / (sigma * n0) if n0 != 0.0 else nan
        if not (k_org > lo and k_org < hi):
            k_org = nan
        bg[du] = k_org
        bw[du] = nan if math.isnan(k_org) else 0.0
        # root through infinity
        if m == n:
            k_inf = -Dv[0] / (sigma * Nv[0]) if Nv[0] != 0.0 else nan
            if not (k_inf > lo and k_inf < hi):
                k_inf = nan
            bg[du + 1] = k_inf
            bw[du + 1] = nan if math.isnan(k_inf) else math.inf
        _sort_pairs(bg, bw)
        nvalid = 0
        for i in range(W):
            if not math.isnan(bg[i]):
                nvalid += 1

        # -- classify the intervals with a Routh count at a test gain ----------------
        for i in range(W + 1):
            ex[i] = i <= nvalid
            if i > nvalid:
                stable_iv[i] = False
                cn[i] = 0
                tg[i] = nan
                continue
            a = lo if i == 0 else bg[i - 1]
            b = bg[i] if i < nvalid else hi
            t = _test_gain(a, b) / gv
            tg[i] = t
            kk = sigma * t
            for q in range(n + 1):
                Pt[q] = Ds_[q]
            for q in range(m + 1):
                Pt[n - m + q] += kk * Ns_[q]
            c, zrow, _ = routh_count(Pt, prev, cur, new)
            cn[i] = c
            stable_iv[i] = c == 0 and not zrow and abs(Pt[0]) > 1e-12 and not fixed_axis
        iV[IV_STABLE_START, v] = stable_iv[0]
        for i in range(W):
            fB[0, v, i] = bg[i]
            fB[1, v, i] = bw[i]
            iB[v, i] = (1 if stable_iv[i + 1] else 0) if i < nvalid else -1

        # reference gain and the interval holding it
        ref = k_op if has_op else lo
        j = 0
        on_boundary = False     # an operating gain within rounding of a boundary sits on the axis
        for i in range(nvalid):
            if bg[i] < ref:
                j += 1
            if has_op and abs(bg[i] - ref) <= 1e-10 * abs(ref):
                on_boundary = True
        sref = stable_iv[j] and not on_boundary
        if sref:
            fV[FV_CRIT, v] = bg[j] if j < nvalid else math.inf
            fV[FV_CFREQ, v] = bw[j] if j < nvalid else nan
            fV[FV_CRIT_LOW, v] = bg[j - 1] if j > 0 else lo
        else:
            fV[FV_CRIT, v] = nan
            fV[FV_CFREQ, v] = nan
            fV[FV_CRIT_LOW, v] = nan
        iV[IV_STABLE_REF, v] = sref
        iV[IV_FIXED, v] = fixed_axis

        # -- sketch quantities ---------------------------------------------------------
        _sort_complex(pv)
        for i in range(n):
            p = pv[i]
            fP[0, v, i] = p.real * w0v
            fP[1, v, i] = p.imag * w0v
            fP[2, v, i] = nan
            ap = _cabs(p)
            if not abs(p.imag) > 1e-9 * max(ap, 1e-300):
                continue            # real pole (or none): no departure angle
            # departure: s - p ~ -sigma N(p)/D'(p); not from a repeated pole
            dDp = _dhorner_c(Ds_, p)
            if _cabs(dDp) <= 1e-7 * _dhorner_abs(Ds_, ap):
                continue
            dep = _angle_deg(_cdiv(-sigma * _horner_c(Ns_, p), dDp))
            if math.isfinite(dep):
                fP[2, v, i] = dep
        _sort_complex(zv)
        for i in range(m):
            z = zv[i]
            fZ[0, v, i] = z.real * w0v
            fZ[1, v, i] = z.imag * w0v
            fZ[2, v, i] = nan
            az = _cabs(z)
            if not abs(z.imag) > 1e-9 * max(az, 1e-300):
                continue            # real zero (or none): no arrival angle
            # arrival: s - z ~ -D(z)/(sigma k N'(z)) for large k; not at a repeated zero
            dNz = _dhorner_c(Ns_, z)
            if _cabs(dNz) <= 1e-7 * _dhorner_abs(Ns_, az):
                continue
            arr = _angle_deg(_cdiv(-_horner_c(Ds_, z), sigma * dNz))
            if math.isfinite(arr):
                fZ[2, v, i] = arr
        cen = nan
        if m < n:
            sum_z = 0.0
            if m > 0:
                sum_z = -Nv[1] / Nv[0] if Nv[0] != 0.0 else nan
            cen = (-Dv[1] / Dv[0] - sum_z) / (n - m)
            if m > 0 and ndeg != m:
                cen = nan
        fV[FV_CENTROID, v] = cen
        # breakaway / break-in: real roots of R with a real gain in range
        for i in range(bwid):
            z = br[i]
            bpv[i] = nan
            bkv[i] = nan
            if not (math.isfinite(z.real) and abs(z.imag) <= REAL_RTOL * max(_cabs(z), 1e-3)):
                continue            # complex root: not a point of the real axis
            x = z.real
            fdx = _dhorner(R_, x)
            step = _horner(R_, x) / fdx if abs(fdx) > 0.0 else 0.0
            if not abs(step) < 1e-3 * max(abs(x), 1e-3):
                step = 0.0
            x = x - step
            kb = -_horner(Ds_, x) / (sigma * _horner(Ns_, x)) * gv
            if math.isfinite(kb) and kb > lo and kb < hi:
                bpv[i] = x * w0v
                bkv[i] = kb
        if bwid > 0:
            _sort_pairs(bpv[:bwid], bkv[:bwid])
        for i in range(bwid):
            fK[0, v, i] = bpv[i]
            fK[1, v, i] = bkv[i]

        # -- at the operating gain -------------------------------------------------------
        if has_op:
            _sort_complex(cv)
            r_eig = 0
            min_damp = math.inf
            slow = -math.inf
            any_nan = False
            for i in range(n):
                z = cv[i]
                if z.real > 1e-9:
                    r_eig += 1
                re = z.real * w0v
                im = z.imag * w0v
                fP[3, v, i] = re
                fP[4, v, i] = im
                mag = _cabs(complex(re, im))
                # a pole at the origin (or one not computed) counts as undamped
                min_damp = min(min_damp, -re / mag if mag > 0.0 else 0.0)
                if math.isnan(re):
                    any_nan = True
                else:
                    slow = max(slow, re)
            iV[IV_AGREES, v] = r_eig == cn[j] or on_boundary
            fV[FV_DAMP, v] = min_damp
            dom = nan
            if not any_nan:
                # dominance: next-slowest distinct real part over the slowest's
                tol = 1e-9 * max(abs(slow), 1e-300)
                nxt = -math.inf
                for i in range(n):
                    re = fP[3, v, i]
                    if not abs(re - slow) <= tol:
                        nxt = max(nxt, re)
                if math.isfinite(nxt) and sref:
                    dom = nxt / slow
            fV[FV_DOM, v] = dom
            iV[IV_SECOND_ORDER, v] = not math.isnan(dom) and dom >= 10.0
            if sref:
                gm = fV[FV_CRIT, v] / k_op
                fV[FV_GM, v] = gm
                fV[FV_GM_DB, v] = 20.0 * math.log10(gm) if gm > 0.0 else (-math.inf if gm == 0.0 else nan)
                fV[FV_LGM, v] = fV[FV_CRIT_LOW, v] / k_op if fV[FV_CRIT_LOW, v] > 0.0 else nan
            else:
                fV[FV_GM, v] = nan
                fV[FV_GM_DB, v] = nan
                fV[FV_LGM, v] = nan
        else:
            for i in range(n):
                fP[3, v, i] = nan
                fP[4, v, i] = nan
            fV[FV_GM, v] = nan
            fV[FV_GM_DB, v] = nan
            fV[FV_LGM, v] = nan
            fV[FV_DAMP, v] = nan
            fV[FV_DOM, v] = nan
            iV[IV_SECOND_ORDER, v] = 0
            iV[IV_AGREES, v] = 1    # decided by the caller
        iV[IV_ILL, v] = ill




@njit(cache=True, error_model="numpy")
def _rhp_roots(P, work, wr, wi, out, max_its: int) -> int:
    """Number of roots of ``P`` with positive real part (eigenvalues); -1 if the QR fails."""
    if not _roots(P, _actual_degree(P), out, work, wr, wi, max_its):
        return -1
    c = 0
    for i in range(P.shape[0] - 1):
        if out[i].real > 0.0:
            c += 1
    return c


# ---------------------------------------------------------------------------
# the fused kernel and the staged path

#: variants per block of the fused kernel (its scratch stays in the cache)
BLOCK = 64


@njit(cache=True, error_model="numpy")
def analyze_rows(N, D, sigma, lo, hi, k_op, has_op, full_check, du, bwid,
                 poles_in, has_poles, cl_in, has_cl, max_its,
                 fV, iV, fB, iB, fP, fZ, fK, failed):
    """Every variant: scale, build, solve, finish (see the module docstring).

    Works through the stack in blocks of `BLOCK` variants with scratch
    allocated once. ``poles_in`` / ``cl_in`` ``(V, n)`` are used when
    ``has_poles`` / ``has_cl``. A row whose QR does not converge is marked in
    ``failed`` and left for the staged path.
    """
    V = D.shape[0]
    n = D.shape[1] - 1
    m = N.shape[1] - 1
    W = fB.shape[2]
    B = BLOCK
    d = max(n, bwid, du, 1)
    work = np.empty((d, d))
    wr = np.empty(d)
    wi = np.empty(d)
    sde, sdo, sne, sno = _part_sizes(n, m)
    De, Do, Ne, No = np.zeros(sde), np.zeros(sdo), np.zeros(sne), np.zeros(sno)
    Ds = np.empty((B, n + 1))
    Ns = np.empty((B, m + 1))
    F = np.empty((B, du + 1))
    R = np.empty((B, bwid + 1))
    Pop = np.empty(n + 1)
    w0 = np.empty(B)
    g = np.empty(B)
    ndeg = np.empty(B, np.int64)
    ur = np.empty((B, du), np.complex128)
    pv = np.empty((B, n), np.complex128)
    zv = np.empty((B, m), np.complex128)
    br = np.empty((B, bwid), np.complex128)
    cv = np.empty((B, n), np.complex128)
    tgs = np.empty((B, W + 1))
    cnt = np.empty((B, W + 1), np.int64)
    exists = np.empty((B, W + 1), np.bool_)
    Pt = np.empty(n + 1)
    rr = np.empty(n, np.complex128)
    for v0 in range(0, V, B):
        v1 = min(V, v0 + B)
        for v in range(v0, v1):
            i = v - v0
            w0v, gv, fdeg, nd, rdeg, pdeg = _scale_and_build(
                D[v], N[v], sigma, k_op, has_op, Ds[i], Ns[i], F[i], R[i], Pop, De, Do, Ne, No)
            w0[i] = w0v
            g[i] = gv
            ndeg[i] = nd
            ok = _roots(F[i], fdeg, ur[i], work, wr, wi, max_its)
            if has_poles:
                for q in range(n):
                    p = poles_in[v, q]
                    pv[i, q] = complex(p.real / w0v, p.imag / w0v)
            else:
                ok = ok and _roots(Ds[i], n, pv[i], work, wr, wi, max_its)
            ok = ok and _roots(Ns[i], nd, zv[i], work, wr, wi, max_its)
            ok = ok and _roots(R[i], rdeg, br[i], work, wr, wi, max_its)
            if has_op:
                if has_cl:
                    for q in range(n):
                        p = cl_in[v, q]
                        cv[i, q] = complex(p.real / w0v, p.imag / w0v)
                else:
                    ok = ok and _roots(Pop, pdeg, cv[i], work, wr, wi, max_its)
            if not ok:
                failed[v] = True
        _finish_block(v0, v1, failed, N, D, Ds, Ns, w0, g, F, ur, pv, zv, ndeg, R, br, cv,
                      sigma, lo, hi, k_op, has_op, fV, iV, fB, iB, fP, fZ, fK, tgs, cnt, exists)
        if has_op and not full_check:
            continue
        # eigenvalue cross-checks of the Routh counts: at the first test gain
        # without an operating gain, at every test gain in full-check mode
        for v in range(v0, v1):
            if failed[v]:
                continue
            i = v - v0
            for q in range(W + 1):
                if not exists[i, q] or not (full_check or q == 0):
                    continue
                kk = sigma * tgs[i, q]
                for t in range(n + 1):
                    Pt[t] = Ds[i, t]
                for t in range(m + 1):
                    Pt[n - m + t] += kk * Ns[i, t]
                c = _rhp_roots(Pt, work, wr, wi, rr, max_its)
                if c < 0:
                    failed[v] = True
                    break
                if q == 0 and not has_op:
                    iV[IV_AGREES, v] = c == cnt[i, 0]
                elif c != cnt[i, q]:
                    iV[IV_AGREES, v] = 0


@njit(cache=True, error_model="numpy")
def finish(N, D, Ds, Ns, w0, g, F, uroots, poles_t, zeros_t, Ndeg, R, broots, cl_t,
           sigma, lo, hi, k_op, has_op, fV, iV, fB, iB, fP, fZ, fK, tgs, cnt, exists):
    """`_finish_block` over a whole stack (the staged path; arrays as `prepare` and
    `sweep.rootfind.poly_roots` give them, every row indexed by variant)."""
    V = D.shape[0]
    skip = np.zeros(V, np.bool_)
    _finish_block(0, V, skip, N, D, Ds, Ns, w0, g, F, uroots, poles_t, zeros_t, Ndeg, R, broots,
                  cl_t, sigma, lo, hi, k_op, has_op, fV, iV, fB, iB, fP, fZ, fK, tgs, cnt, exists)
