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
# an eigenvalue whose real part is within this fraction of its modulus of the
# axis may be counted on either side when checking a Routh count
EIG_RTOL = 1e-9
# a boundary gain or frequency whose estimated relative error exceeds this is flagged
CROSSING_RTOL = 1e-10
# |D(jw)| (or |N(jw)|) below this fraction of its terms: D (N) has a root on the
# axis at w to working precision, the crossing is at k = 0 (k = inf)
AXIS_RTOL = 1e-13
# both below this fraction: a root on the axis common to N and D (fixed for every k)
FIXED_RTOL = 1e-8
# N and D both below this fraction at a real root of N D' - N' D: a factor common to
# both (a double root of N D' - N' D, known to about sqrt(eps)), not a breakaway point
COMMON_RTOL = 1e-6
# an operating gain this close (relative) to a boundary gain, or within ten times
# the boundary gain's estimated error (at most ON_BOUNDARY_MAX: a tangent touch
# has an unbounded first-order estimate but about half the digits), is on the boundary
ON_BOUNDARY_RTOL = 1e-14
ON_BOUNDARY_MAX = 1e-6
EPS = 2.220446049250313e-16
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
def _horner_cd(c, z: complex):
    """Value and derivative of the polynomial ``c`` at complex ``z``."""
    p = 0j
    dp = 0j
    for i in range(c.shape[0]):
        dp = dp * z + p
        p = p * z + c[i]
    return p, dp


@njit(cache=True, error_model="numpy")
def _polish_crossing(Ds, Ns, sigma: float, k: float, w: float, size: float):
    """Newton's method on ``Ds(jw) + sigma k Ns(jw) = 0`` for real ``(k, w)``.

    The crossing polynomial ``F`` carries the cancellation of the products
    it is built from, so its roots can lose digits the crossing itself does
    not lose; polishing on the loop's own polynomials restores them.
    ``size`` is ``|Ds|(w) + |k| |Ns|(w)`` (the terms of ``P(jw, k)``).
    Returns ``(k, w, relative error estimate, converged)``: the estimate is
    the first-order effect on ``k`` and ``w`` of rounding errors of the size
    of ``eps * size`` in ``P(jw, k)`` (condition number times unit roundoff).
    """
    est = math.inf
    for _ in range(4):
        s = complex(0.0, w)
        Dj, dDj = _horner_cd(Ds, s)
        Nj, dNj = _horner_cd(Ns, s)
        a = sigma * Nj                              # d/dk of P(jw, k)
        b = complex(0.0, 1.0) * (dDj + sigma * k * dNj)   # d/dw
        r = -(Dj + sigma * k * Nj)
        det = (a * b.conjugate()).imag
        if not abs(det) > 0.0:
            return k, w, math.inf, False            # singular: a tangent touch
        dk = (r * b.conjugate()).imag / det
        dw = -(r * a.conjugate()).imag / det
        est = EPS * size / abs(det) * max(_cabs(b) / max(abs(k), 1e-300), _cabs(a) / w)
        if not (abs(dk) <= 1e-3 * abs(k) and abs(dw) <= 1e-3 * w):
            return k, w, est, False                 # not a small correction: keep the estimate
        k += dk
        w += dw
        # quadratic convergence: after a step this small the error is below rounding
        if abs(dk) <= 1e-8 * abs(k) and abs(dw) <= 1e-8 * w:
            return k, w, est, True
    return k, w, est, False


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
def _sort_pairs(key, other, extra) -> None:
    """In place: sort by ``key`` ascending, ties by ``other`` (NaN last, stable).

    ``other`` and ``extra`` are permuted alike.
    """
    n = key.shape[0]
    for i in range(1, n):
        k = key[i]
        o = other[i]
        x = extra[i]
        kk = math.inf if math.isnan(k) else k
        oo = math.inf if math.isnan(o) else o
        j = i - 1
        while j >= 0:
            kj = math.inf if math.isnan(key[j]) else key[j]
            oj = math.inf if math.isnan(other[j]) else other[j]
            if kj > kk or (kj == kk and oj > oo):
                key[j + 1] = key[j]
                other[j + 1] = other[j]
                extra[j + 1] = extra[j]
                j -= 1
            else:
                break
        key[j + 1] = k
        other[j + 1] = o
        extra[j + 1] = x


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
def _near(kb: float, err: float, k: float) -> bool:
    """Is gain ``k`` the boundary gain ``kb`` (relative error estimate ``err``) to its accuracy?"""
    tol = min(max(ON_BOUNDARY_RTOL, 10.0 * err), ON_BOUNDARY_MAX)
    return abs(kb - k) <= tol * abs(kb)


@njit(cache=True, error_model="numpy")
def routh_count(p, prev, cur, new, mprev, mcur, mnew):
    """Routh count of one polynomial ``p`` (highest power first, length ``n+1``).

    Same rules, on the same numbers, as `sweep.routh.routh_rhp_count`: an
    entry counts as zero below ``ROUTH_ZERO_RTOL`` times the size of the terms
    it is made of (the same recursion on absolute values, in ``mprev``,
    ``mcur``, ``mnew``); a zero first entry becomes ``ROUTH_EPSILON`` times
    the largest entry of the row above; a row of zeros is replaced by the
    derivative of the auxiliary polynomial of the row above. The six work
    arrays need length ``n//2 + 1``.

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
        mprev[i] = abs(prev[i])
        mcur[i] = abs(cur[i])
        scale = max(scale, mprev[i])
    zero_row = False
    used_eps = False
    changes = 0
    last = prev[0]
    for i in range(n):
        all_zero = True
        for q in range(width):
            if not abs(cur[q]) <= ROUTH_ZERO_RTOL * mcur[q]:
                all_zero = False
                break
        if all_zero:
            # row of zeros: derivative of the auxiliary polynomial of the row above
            for q in range(width):
                pw = (n - i) - 2 * q
                pw = pw if pw > 0 else 0
                cur[q] = prev[q] * pw
                mcur[q] = mprev[q] * pw
            zero_row = True
        if abs(cur[0]) <= ROUTH_ZERO_RTOL * mcur[0]:
            cur[0] = ROUTH_EPSILON * (scale if scale > 0.0 else 1.0)
            mcur[0] = abs(cur[0])
            used_eps = True
        f = cur[0]
        if (last > 0.0 and f < 0.0) or (last < 0.0 and f > 0.0):
            changes += 1
        last = f
        if i < n - 1:
            r = prev[0] / cur[0]
            for q in range(width - 1):
                new[q] = prev[q + 1] - r * cur[q + 1]
                mnew[q] = mprev[q + 1] + abs(r) * mcur[q + 1]
            new[width - 1] = 0.0
            mnew[width - 1] = 0.0
            scale = 0.0
            for q in range(width):
                scale = max(scale, abs(cur[q]))
                prev[q] = cur[q]
                cur[q] = new[q]
                mprev[q] = mcur[q]
                mcur[q] = mnew[q]
    return changes, zero_row, used_eps


# ---------------------------------------------------------------------------
# step 1: scaling and the polynomials to solve

@njit(cache=True, error_model="numpy")
def _pencil(Ds, Ns, kk: float, P) -> int:
    """``P = Ds + kk Ns`` (``Ns`` aligned at the low powers); returns its degree.

    The degree drops only where the top coefficients cancel: zero to
    rounding relative to the two terms (a root through infinity when
    ``deg N = deg D``); a small uncancelled leading coefficient is kept.
    """
    n = Ds.shape[0] - 1
    m = Ns.shape[0] - 1
    for i in range(n + 1):
        P[i] = Ds[i]
    for i in range(m + 1):
        P[n - m + i] += kk * Ns[i]
    e = n
    while e > 0 and not abs(P[n - e]) > LEAD_RTOL * (
            abs(Ds[n - e]) + (abs(kk * Ns[m - e]) if e <= m else 0.0)):
        e -= 1
    return e


@njit(cache=True, error_model="numpy")
def pencil_stack(Ds, Ns, kk, rows, P, deg) -> None:
    """`_pencil` of ``Ds[rows[i]] + kk[i] Ns[rows[i]]`` into ``P[i]``, ``deg[i]``."""
    for i in range(rows.shape[0]):
        deg[i] = _pencil(Ds[rows[i]], Ns[rows[i]], kk[i], P[i])


@njit(cache=True, error_model="numpy")
def _scale_and_build(Dv, Nv, sigma, k_op, has_op, Ds, Ns, F, R, Pop, De, Do, Ne, No):
    """Scale one variant and build its polynomials into the 1-D arrays ``Ds ... Pop``.

    ``Ds``, ``Ns``: ``D``, ``N`` with ``s = w0 t`` and divided by powers of two;
    ``F`` (``Im[D(jw) N(-jw)] = w F(w^2)``); ``R = Ns Ds' - Ns' Ds``; ``Pop``
    (``P`` at the operating gain, scaled) when ``has_op``. ``De ... No`` are
    scratch. Returns ``(w0, g, deg F, deg Ns, deg R, deg Pop)``: ``w0`` and the
    gain scale ``g`` (``k = g k_scaled``) are powers of two, so scaling is
    exact. The degrees of ``F``, ``R`` and ``Pop`` drop where their top
    coefficients cancel (zero to rounding relative to the terms they are made
    of; ``deg Pop`` drops when the operating gain sends a root through
    infinity); that of ``Ns`` where its leading coefficients are below
    ``LEAD_RTOL`` of its largest (the user's numerator lost its top terms).
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
    # The degree of F (and of R, Pop) drops where the top coefficients cancel:
    # zero to rounding relative to the terms they are made of. Small but
    # uncancelled ones are kept: a wide coefficient spread has them.
    fdeg = 0
    for r in range(du + 1):
        t1 = 0.0
        a1 = 0.0
        for a in range(Do.shape[0]):
            b = r - a
            if 0 <= b < Ne.shape[0]:
                t1 += Do[a] * Ne[b]
                a1 += abs(Do[a] * Ne[b])
        t2 = 0.0
        for a in range(De.shape[0]):
            b = r - a
            if 0 <= b < No.shape[0]:
                t2 += De[a] * No[b]
                a1 += abs(De[a] * No[b])
        F[du - r] = t1 - t2
        if abs(t1 - t2) > LEAD_RTOL * a1:
            fdeg = r

    # breakaway polynomial Ns Ds' - Ns' Ds (low powers first here, truncated to bwid:
    # with m = n the top power cancels)
    rdeg = 0
    for r in range(bwid + 1):
        t1 = 0.0
        a1 = 0.0
        for a in range(m + 1):          # Ns power a times Ds' power r - a
            b = r - a
            if 0 <= b < n:
                x = Ns[m - a] * (Ds[n - b - 1] * (b + 1))
                t1 += x
                a1 += abs(x)
        t2 = 0.0
        for a in range(m):              # Ns' power a times Ds power r - a
            b = r - a
            if 0 <= b <= n:
                x = (Ns[m - a - 1] * (a + 1)) * Ds[n - b]
                t2 += x
                a1 += abs(x)
        R[bwid - r] = t1 - t2
        if abs(t1 - t2) > LEAD_RTOL * a1:
            rdeg = r

    pdeg = _pencil(Ds, Ns, sigma * (k_op / g), Pop) if has_op else 0
    return w0, g, fdeg, _actual_degree(Ns), rdeg, pdeg


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
def _one_positive_root(c, e: int) -> float:
    """The positive root of ``c`` (last ``e + 1`` entries) when its coefficients
    change sign exactly once; NaN when they change sign more than once; 0.0
    when they never do (no positive root).

    Descartes' rule of signs: no sign change, no positive root; exactly one,
    exactly one positive root, and it is simple. It is found by Newton's
    method safeguarded by bisection (in ``log u``) on a bracket from the
    Fujiwara bound, so it always converges. By Obreschkoff's sector theorem
    (at most as many roots as sign changes in ``|arg z| < pi/(e + 1)``, from
    memory) the other roots are then complex and at least ``pi/(e + 1)`` off
    the positive axis: nothing the companion eigenvalues would show there
    (no near-double pair, no nearly real pair) is lost.
    """
    d = c.shape[0] - 1
    a0 = d - e                       # index of the leading coefficient
    changes = 0
    last = 0.0
    low = -1                         # index of the lowest-power nonzero coefficient
    for i in range(a0, d + 1):
        x = c[i]
        if x != 0.0:
            if last != 0.0 and (x > 0.0) != (last > 0.0):
                changes += 1
            last = x
            low = i
    if changes == 0:
        return 0.0
    if changes > 1:
        return math.nan
    # With one sign change p = P+ - P-, P+ the terms of the leading
    # coefficient's sign, P- the others (lower powers), both positive for
    # u > 0. In t = log u, phi = log P+ - log P- increases with slope at least
    # 1 (each term of P+ has a higher power than each of P-): Newton's method
    # on phi, kept inside a bracket that shrinks on every step.
    lead = c[a0]
    split = a0
    while c[split + 1] == 0.0 or (c[split + 1] > 0.0) == (lead > 0.0):
        split += 1                   # last index of P+
    # start where the two nonzero terms next to the sign change balance
    jp = split
    while c[jp] == 0.0:
        jp -= 1
    k = split + 1
    while c[k] == 0.0:
        k += 1
    t = math.log(abs(c[k] / c[jp])) / (k - jp)
    t_lo = -math.inf
    t_hi = math.inf
    bounded = False
    for _ in range(100):
        u = math.exp(t)
        pp = 0.0
        dpp = 0.0
        for i in range(a0, split + 1):
            dpp = dpp * u + pp
            pp = pp * u + abs(c[i])
        pm = 0.0
        dpm = 0.0
        for i in range(split + 1, low + 1):
            dpm = dpm * u + pm
            pm = pm * u + abs(c[i])
        # P+ = u^(d - split) pp, P- = u^(d - low) pm
        if not (pp > 0.0 and pm > 0.0 and pp < math.inf and pm < math.inf):
            return math.nan                 # over- or underflow: leave it to the eigenvalues
        phi = math.log(pp) - math.log(pm) + (low - split) * t
        slope = u * (dpp / pp - dpm / pm) + (low - split)
        if phi > 0.0:
            t_hi = t
        elif phi < 0.0:
            t_lo = t
        else:
            return u
        tn = t - phi / slope if slope > 0.0 else math.nan
        if abs(tn - t) <= 1e-9:
            # converged: after a Newton step this small the error is below rounding
            return math.exp(tn)
        if not (t_lo < tn < t_hi):
            if not bounded:
                # close the bracket with the Fujiwara bounds on the moduli of the
                # roots (of the polynomial and of its reverse, without the
                # roots at the origin)
                bounded = True
                hi = 0.0
                for i in range(a0 + 1, low + 1):
                    q = i - a0
                    hi = max(hi, abs(c[i] / lead) ** (1.0 / q) * (0.5 ** (1.0 / q) if i == low else 1.0))
                inv = 0.0
                for i in range(low - 1, a0 - 1, -1):
                    q = low - i
                    inv = max(inv, abs(c[i] / c[low]) ** (1.0 / q) * (0.5 ** (1.0 / q) if i == a0 else 1.0))
                if not (inv > 0.0 and hi < math.inf):
                    return math.nan
                t_lo = max(t_lo, -math.log(2.0 * inv))
                t_hi = min(t_hi, math.log(2.0 * hi))
                if not t_lo <= t_hi:
                    return math.nan
            tn = 0.5 * (t_lo + t_hi)
        width = t_hi - t_lo     # inf until both sides are known
        if width < math.inf and width <= 4.0 * EPS * max(abs(t_lo), abs(t_hi), 1.0):
            return math.exp(tn)
        t = tn
    return math.exp(t)


@njit(cache=True, error_model="numpy")
def _crossing_roots(F, e: int, out, work, wr, wi, max_its: int) -> bool:
    """Roots of ``F`` in ``u = w^2`` as far as the axis crossings need them.

    With at most one sign change only the positive root matters and
    `_one_positive_root` finds it (NaN elsewhere); otherwise all roots by
    `_roots`.
    """
    d = F.shape[0] - 1
    if e >= 1:
        u = _one_positive_root(F, e)
        if not math.isnan(u):
            for i in range(d):
                out[i] = complex(math.nan, math.nan)
            if u > 0.0:
                out[0] = complex(u, 0.0)
            return True
    return _roots(F, e, out, work, wr, wi, max_its)


@njit(cache=True, error_model="numpy")
def roots_rows(C, degrees, out, max_its: int, ok, crossing) -> None:
    """`_roots` (`_crossing_roots` if ``crossing``) of every row of a stack
    (the staged path); ``ok[v]`` False where the QR failed."""
    d = C.shape[1] - 1
    dd = max(d, 1)
    work = np.empty((dd, dd))
    wr = np.empty(dd)
    wi = np.empty(dd)
    for v in range(C.shape[0]):
        e = min(degrees[v], d)
        if crossing:
            ok[v] = _crossing_roots(C[v], e, out[v], work, wr, wi, max_its)
        else:
            ok[v] = _roots(C[v], e, out[v], work, wr, wi, max_its)


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
    mprev, mcur, mnew = np.empty(width), np.empty(width), np.empty(width)
    Pt = np.empty(n + 1)
    stable_iv = np.empty(W + 1, np.bool_)
    bg, bw, be = np.empty(W), np.empty(W), np.empty(W)
    ua = np.empty(max(du, 1))
    ucand = np.empty(max(du, 1), np.bool_)
    bpv, bkv, bxv = np.empty(max(bwid, 1)), np.empty(max(bwid, 1)), np.empty(max(bwid, 1))
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
        # a root on the axis at the operating gain from a crossing left out at an
        # end of the range (an operating gain may sit at an end; a boundary may not)
        op_axis = False

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
            be[i] = 0.0
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
            aD = _horner_abs(Ds_, w)
            aN = _horner_abs(Ns_, w)
            rD = _cabs(Dj) / aD     # 0 at a root of D on the axis
            rN = _cabs(Nj) / aN
            if rD <= FIXED_RTOL and rN <= FIXED_RTOL:
                fixed_axis = True   # N and D share this axis root: it stays for every k
                continue
            if rN <= AXIS_RTOL:
                continue            # a zero of N on the axis: reached only as k -> inf
            if rD <= AXIS_RTOL:
                # a pole of D on the axis: the crossing is at k = 0 exactly
                if lo < 0.0 < hi:
                    bg[i] = 0.0
                    bw[i] = w * w0v
                elif has_op and k_op == 0.0:
                    op_axis = True
                continue
            ks = _cdiv(-Dj, sigma * Nj)
            if not math.isfinite(ks.real):
                continue
            if abs(ks.imag) > 1e-6 * _cabs(ks):
                ill = True          # the gain at the crossing is not real to working precision
            kp, wp, est, conv = _polish_crossing(Ds_, Ns_, sigma, ks.real, w, aD + abs(ks.real) * aN)
            if conv:
                w = wp
            else:
                kp = ks.real
            if not conv or est > CROSSING_RTOL:
                ill = True          # fewer correct digits than the results show
            kc = kp * gv
            # strictly inside the range: a crossing within its own error of an end is at the end
            band = 8.0 * max(est if conv else CROSSING_RTOL, EPS) * abs(kc)
            if kc - band > lo and kc + band < hi:
                bg[i] = kc
                bw[i] = w * w0v
                be[i] = est if conv else max(est, CROSSING_RTOL)
            elif has_op and _near(kc, est if conv else max(est, CROSSING_RTOL), k_op):
                op_axis = True
        # root through the origin
        n0 = Nv[m]
        d0 = Dv[n]
        if n0 == 0.0 and d0 == 0.0:
            fixed_axis = True
        k_org = -d0 / (sigma * n0) + 0.0 if n0 != 0.0 else nan    # + 0.0: no -0.0
        if has_op and _near(k_org, EPS, k_op):
            op_axis = True
        if not (k_org - 2.0 * EPS * abs(k_org) > lo and k_org + 2.0 * EPS * abs(k_org) < hi):
            k_org = nan     # outside the range, or at one of its ends to rounding
        bg[du] = k_org
        bw[du] = nan if math.isnan(k_org) else 0.0
        be[du] = EPS
        # root through infinity
        if m == n:
            k_inf = -Dv[0] / (sigma * Nv[0]) + 0.0 if Nv[0] != 0.0 else nan
            if has_op and _near(k_inf, EPS, k_op):
                op_axis = True
            if not (k_inf - 2.0 * EPS * abs(k_inf) > lo and k_inf + 2.0 * EPS * abs(k_inf) < hi):
                k_inf = nan
            bg[du + 1] = k_inf
            bw[du + 1] = nan if math.isnan(k_inf) else math.inf
            be[du + 1] = EPS
        _sort_pairs(bg, bw, be)
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
            c, zrow, _ = routh_count(Pt, prev, cur, new, mprev, mcur, mnew)
            cn[i] = c
            # the leading coefficient must not have cancelled (m = n, a test gain
            # within rounding of the gain sending a root through infinity); a
            # small one on its own is fine: wide coefficient spreads have them
            lead = abs(Pt[0]) > 1e-12 * (abs(Ds_[0]) + (abs(kk * Ns_[0]) if m == n else 0.0))
            stable_iv[i] = c == 0 and not zrow and lead and not fixed_axis
        iV[IV_STABLE_START, v] = stable_iv[0]
        for i in range(W):
            fB[0, v, i] = bg[i]
            fB[1, v, i] = bw[i]
            iB[v, i] = (1 if stable_iv[i + 1] else 0) if i < nvalid else -1

        # reference gain and the interval holding it
        ref = k_op if has_op else lo
        j = 0
        # an operating gain that equals a boundary gain to within the latter's
        # accuracy has roots on the axis: marginal, not stable
        on_boundary = op_axis
        for i in range(nvalid):
            if bg[i] < ref:
                j += 1
            if has_op and _near(bg[i], be[i], ref):
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
            Dx = _horner(Ds_, x)
            Nx = _horner(Ns_, x)
            aNx = _horner_abs(Ns_, abs(x))
            aDx = _horner_abs(Ds_, abs(x))
            if abs(Nx) <= COMMON_RTOL * aNx and abs(Dx) <= COMMON_RTOL * aDx:
                continue            # a factor common to N and D: k = -D/N is 0/0 there, the
                                    # fixed closed-loop root is no breakaway point
            if abs(Nx) <= AXIS_RTOL * aNx:
                continue            # a zero of N: reached only as k -> inf
            if abs(Dx) <= AXIS_RTOL * aDx:
                kb = 0.0            # a multiple pole of D: branches leave it at k = 0
            else:
                kb = -Dx / (sigma * Nx) * gv
            if math.isfinite(kb) and kb > lo and kb < hi:
                bpv[i] = x * w0v
                bkv[i] = kb
        if bwid > 0:
            _sort_pairs(bpv[:bwid], bkv[:bwid], bxv[:bwid])
        # a multiple root of R (three or more branches meeting) comes out as a
        # cluster of nearly equal roots: one point, at their mean (the mean of
        # a cluster is well conditioned where its members are not)
        nb = 0
        i = 0
        while i < bwid and not math.isnan(bpv[i]):
            j2 = i + 1
            while (j2 < bwid and not math.isnan(bpv[j2])
                   and abs(bpv[j2] - bpv[i]) <= 1e-6 * max(abs(bpv[i]), 1e-3 * w0v)):
                j2 += 1
            sx = 0.0
            sk = 0.0
            for q in range(i, j2):
                sx += bpv[q]
                sk += bkv[q]
            fK[0, v, nb] = sx / (j2 - i)
            fK[1, v, nb] = sk / (j2 - i)
            nb += 1
            i = j2
        for i in range(nb, bwid):
            fK[0, v, i] = nan
            fK[1, v, i] = nan

        # -- at the operating gain -------------------------------------------------------
        if has_op:
            _sort_complex(cv)
            r_lo, r_hi = _rhp_band(cv)
            min_damp = math.inf
            slow = -math.inf
            any_nan = False
            for i in range(n):
                z = cv[i]
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
            iV[IV_AGREES, v] = (r_lo <= cn[j] <= r_hi) or on_boundary
            fV[FV_DAMP, v] = min_damp
            dom = nan
            if not any_nan:
                # dominance: the slowest mode is the slowest pole with its conjugate
                # partner; the next-slowest is any other pole (another mode as slow
                # as the dominant one gives 1)
                islow = 0
                for i in range(n):
                    if fP[3, v, i] > fP[3, v, islow]:
                        islow = i
                ys = fP[4, v, islow]
                tol = 1e-9 * _cabs(complex(slow, ys))
                ipart = -1
                if abs(ys) > tol:
                    for i in range(n):
                        if (i != islow and ipart < 0 and abs(fP[3, v, i] - slow) <= tol
                                and abs(fP[4, v, i] + ys) <= tol):
                            ipart = i
                nxt = -math.inf
                for i in range(n):
                    if i != islow and i != ipart:
                        nxt = max(nxt, fP[3, v, i])
                if math.isfinite(nxt) and sref:
                    dom = nxt / slow
            fV[FV_DOM, v] = dom
            iV[IV_SECOND_ORDER, v] = not math.isnan(dom) and dom >= 10.0
            if sref:
                gm = fV[FV_CRIT, v] / k_op
                fV[FV_GM, v] = gm
                fV[FV_GM_DB, v] = 20.0 * math.log10(gm) if gm > 0.0 else (-math.inf if gm == 0.0 else nan)
                # only where stability is lost below (a boundary gain, not the range's end)
                fV[FV_LGM, v] = fV[FV_CRIT_LOW, v] / k_op if j > 0 and fV[FV_CRIT_LOW, v] > 0.0 else nan
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
def _rhp_band(r):
    """Right-half-plane count of the roots ``r`` (NaN ignored) as a range ``(lo, hi)``.

    A root within ``EIG_RTOL`` of its modulus of the axis is undecided: it
    counts in ``hi`` only. A Routh count agrees with the eigenvalues when it
    lies in the range.
    """
    lo = 0
    hi = 0
    for i in range(r.shape[0]):
        z = r[i]
        tol = EIG_RTOL * _cabs(z)
        if z.real > tol:
            lo += 1
        if z.real >= -tol:
            hi += 1
    return lo, hi


@njit(cache=True, error_model="numpy")
def rhp_band_rows(R, lo, hi) -> None:
    """`_rhp_band` of every row of a stack of roots."""
    for v in range(R.shape[0]):
        lo[v], hi[v] = _rhp_band(R[v])


@njit(cache=True, error_model="numpy")
def _rhp_roots(P, e: int, work, wr, wi, out, max_its: int):
    """`_rhp_band` of the roots of ``P`` (degree ``e``); ``(-1, -1)`` if the QR fails."""
    if not _roots(P, e, out, work, wr, wi, max_its):
        return -1, -1
    return _rhp_band(out[: P.shape[0] - 1])


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
            ok = _crossing_roots(F[i], fdeg, ur[i], work, wr, wi, max_its)
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
                e = _pencil(Ds[i], Ns[i], sigma * tgs[i, q], Pt)
                c_lo, c_hi = _rhp_roots(Pt, e, work, wr, wi, rr, max_its)
                if c_lo < 0:
                    failed[v] = True
                    break
                ok = c_lo <= cnt[i, q] <= c_hi
                if q == 0 and not has_op:
                    iV[IV_AGREES, v] = ok
                elif not ok:
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
