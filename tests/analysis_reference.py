"""The numpy formulation of the stacked analysis, kept as a test reference.

This is the vectorised numpy version of `sweep.analysis.analyze_stack` that
the compiled kernel (`sweep._analysis_kernel`) replaced; the kernel follows
it step by step, and `tests/test_analysis.py` checks that both agree on
random and awkward stacks (a helper, not a test file).
"""
from __future__ import annotations

import math

import numpy as np

from sweep.analysis import _INT8, _check_inputs, _u_degree, breakaway_width
from sweep.routh import routh_rhp_count

_DUMMY = 1e150            # isolated diagonal entry standing for a missing root
_LEAD_RTOL = 1e-13        # a leading coefficient this small (relative) counts as zero
_REAL_RTOL = 1e-6         # |Im| / |z| below which a computed root counts as real
_SUSPECT = (1e-11, 1e-4)  # relative imaginary parts that hint at a near-double root


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
# the analysis

def analyze_stack_reference(N, D, *, sigma: float, gain_range=(0.0, math.inf),
                  operating_gain: float | None = None,
                  full_check: bool = False,
                  open_loop_poles: np.ndarray | None = None,
                  closed_loop_poles: np.ndarray | None = None) -> dict[str, np.ndarray]:
    """The former numpy formulation of `sweep.analysis.analyze_stack` (same arguments, same keys)."""
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
    # (the compiled kernel tests this relative to the terms that formed it; the
    # absolute test here called wide-spread loops unstable)
    lead_ok = np.abs(Pt[:, :, 0]) > 1e-12 * (np.abs(Ds[:, None, 0]) + np.abs(sigma * tgs * Nsp[:, None, 0]))
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


