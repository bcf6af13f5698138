"""Per-variant analysis of a stack of loops ``k N(s)/D(s)``.

Everything works on stacks (arrays shaped ``(V, ...)``); no Python loop runs
per variant or per gain. The per-variant work runs in one compiled loop over
the variants (`sweep._analysis_kernel`, numba); polynomial roots come from
the compiled companion-matrix QR of `sweep.rootfind` (closed form for
quadratics), with LAPACK for any row where the QR does not converge.

Steps (see DESIGN section 3 and METHODS):

1. Scale frequency ``s = w0 t`` per variant (``w0`` a power of two from the
   geometric spread of the coefficients of ``D``) and normalise ``D`` and
   ``N`` by powers of two, so scaling is exact and nothing depends on the
   other variants in the batch.
2. Axis crossings: ``Im[D(jw) N(-jw)] = w F(w^2)``; the positive real roots
   ``u`` of ``F`` (companion eigenvalues; with at most one sign change in
   ``F`` - Descartes' rule - the one positive root by safeguarded Newton)
   give ``w = sqrt(u)`` and ``k = -D(jw)/(sigma N(jw))``, then Newton's
   method on ``D(jw) + sigma k N(jw) = 0`` itself polishes ``(k, w)``
   (``F`` is built from products and can lose digits the crossing does not).
   Roots through the origin and through infinity come from the end
   coefficients.
3. Stable intervals: a Routh count at a test gain inside every interval
   between consecutive boundary gains, cross-checked by the eigenvalues at
   the reference gain (``full_check``: at every test gain).
4. Sketch quantities, and closed-loop quantities at the operating gain.

Numerical rules (constants in `sweep._analysis_kernel`):

* the degree of ``F``, of the breakaway polynomial and of ``P`` drops only
  where their top coefficients cancel (below ``1e-13`` of the terms they are
  made of); small uncancelled ones are kept (wide coefficient spreads have
  them); ``N`` loses leading coefficients below ``1e-13`` of its largest;
* a computed root counts as real when ``|Im| <= 1e-6 |z|``; a cluster of
  nearly equal real breakaway roots (a multiple root) is one point; a real
  root where both ``N`` and ``D`` are below ``1e-6`` of their terms (a
  factor common to both: the gain is 0/0) is no breakaway point;
* at a positive root of ``F`` where ``|D(jw)|`` is below ``1e-13`` of its
  terms, ``D`` has an axis root: the crossing is at ``k = 0`` exactly;
  where ``|N(jw)|`` is, ``N`` has an axis zero: no crossing (``k = inf``);
  both below ``1e-8``: a root common to ``N`` and ``D`` on the axis
  (``fixed_axis_root``, never stable);
* an operating gain equal to a boundary gain within that gain's estimated
  error (at least ``1e-14``, at most ``1e-6`` relative: a tangent touch has
  an unbounded first-order estimate but half the digits) is on the
  boundary: not stable; so is an operating gain at an end of the range
  where a root is on the axis (a crossing there is no boundary gain);
* the dominance ratio compares the slowest mode (a pole with its conjugate)
  with the slowest other pole, so two equally slow modes give 1;
* the Routh count agrees with the eigenvalues when it lies between the
  counts of roots with real part above ``1e-9 |z|`` and above ``-1e-9 |z|``;
* ``ill_conditioned`` is set by: a crossing whose first-order error
  estimate exceeds ``1e-10`` (or whose polish does not converge), a
  nearly real pair (relative imaginary part in ``(1e-11, 1e-4)``) or a
  nearly double positive root of ``F`` (a tangent touch of the axis), a
  complex gain at a crossing, or a Routh count the eigenvalues contradict.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from . import _analysis_kernel as _kernel
from .errors import InputError
from .rootfind import MAX_QR_ITERATIONS, poly_roots

__all__ = [
    "analyze_stack",
    "analyze",
    "LoopAnalysis",
    "boundary_width",
    "breakaway_width",
    "VARIABLE_DIMS",
    "VARIABLE_ATTRS",
]

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


# s-plane units: real parts are decay rates (1/s), imaginary parts and
# frequencies angular frequencies (rad/s), as for the locus variables.
_A = {
    "critical_gain": ("critical gain (upper end of the stable interval holding the reference gain)", "1"),
    "critical_gain_low": ("lower end of the stable interval holding the reference gain", "1"),
    "crossing_frequency": ("frequency of the roots on the imaginary axis at the critical gain", "rad/s"),
    "stable_at_reference": ("closed loop stable at the reference gain (1/0)", "1"),
    "stable_at_start": ("closed loop stable just above the lower end of the gain range (1/0)", "1"),
    "gain_margin": ("upper gain margin critical_gain / operating_gain", "1"),
    "gain_margin_db": ("upper gain margin in decibels", "dB"),
    "lower_gain_margin": ("lower gain margin critical_gain_low / operating_gain, where stability is lost "
                          "below (NaN when the stable interval reaches down to the range's lower end)", "1"),
    "min_damping": ("smallest damping ratio of the closed-loop poles at the operating gain", "1"),
    "dominance_ratio": ("real part of the next-slowest closed-loop pole (or pair) over the slowest's", "1"),
    "second_order_ok": ("dominance ratio at least 10 (rule of thumb for a second-order approximation)", "1"),
    "asymptote_centroid": ("centroid of the root-locus asymptotes", "1/s"),
    "routh_agrees": ("Routh count agrees with the eigenvalue count at the reference gain (1/0)", "1"),
    "ill_conditioned": ("results of this variant could not be computed to full precision (1/0)", "1"),
    "fixed_axis_root": ("numerator and denominator share a root on the imaginary axis (1/0)", "1"),
    "boundary_gain": ("gain at which a closed-loop root is on the imaginary axis", "1"),
    "boundary_frequency": ("frequency of the imaginary-axis root at the boundary gain", "rad/s"),
    "stable_above": ("closed loop stable on the gain interval just above the boundary gain (1/0, -1 pad)", "1"),
    "open_loop_pole_real": ("real part of the open-loop poles", "1/s"),
    "open_loop_pole_imag": ("imaginary part of the open-loop poles", "rad/s"),
    "departure_angle": ("direction in which the locus leaves a complex open-loop pole", "deg"),
    "closed_loop_pole_real": ("real part of the closed-loop poles at the operating gain", "1/s"),
    "closed_loop_pole_imag": ("imaginary part of the closed-loop poles at the operating gain", "rad/s"),
    "open_loop_zero_real": ("real part of the open-loop zeros", "1/s"),
    "open_loop_zero_imag": ("imaginary part of the open-loop zeros", "rad/s"),
    "arrival_angle": ("direction, seen from a complex zero, of the locus branch arriving there", "deg"),
    "breakaway_point": ("real breakaway or break-in point of the locus", "1/s"),
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
    if math.isnan(lo) or math.isnan(hi) or not lo < hi or math.isinf(lo):
        raise InputError(f"gain_range needs a finite low < high; got [{lo}, {hi}]", field="loop.gain_range")
    if operating_gain is not None:
        try:
            k0 = float(operating_gain)
        except (TypeError, ValueError):
            raise InputError(f"operating_gain must be a number; got {operating_gain!r}",
                             field="loop.operating_gain") from None
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
    N = np.ascontiguousarray(N)
    D = np.ascontiguousarray(D)
    V = D.shape[0]
    n, m = D.shape[1] - 1, N.shape[1] - 1
    has_op = k_op is not None
    kop = float(k_op) if has_op else math.nan
    poles = _given_roots(open_loop_poles, V, n, "open_loop_poles")
    cl = _given_roots(closed_loop_poles, V, n, "closed_loop_poles") if has_op else None
    out = _Outputs(V, n, m)
    failed = np.zeros(V, np.bool_)
    empty = np.empty((0, n), complex)
    _kernel.analyze_rows(
        N, D, sigma, lo, hi, kop, has_op, bool(full_check), _u_degree(n, m), breakaway_width(n, m),
        empty if poles is None else poles, poles is not None, empty if cl is None else cl, cl is not None,
        _QR_ITERATIONS, *out.groups, failed)
    bad = np.flatnonzero(failed)
    if bad.size:
        # the QR did not converge somewhere in these rows: redo them on the staged
        # path, whose roots fall back to LAPACK
        sub = _analyze_staged(N[bad], D[bad], sigma, lo, hi, kop, has_op, bool(full_check),
                              None if poles is None else poles[bad], None if cl is None else cl[bad])
        for full, part in zip(out.groups, sub.groups):
            if full is out.iB:          # the only group with variants first
                full[bad] = part
            else:
                full[:, bad] = part
    # a Routh count the eigenvalues contradict leaves the classification in doubt
    out.iV[_kernel.IV_ILL] |= out.iV[_kernel.IV_AGREES] == 0
    return out.as_dict()


#: QR iterations per eigenvalue before a row goes to the staged (LAPACK) path;
#: tests lower it to exercise that path
_QR_ITERATIONS = MAX_QR_ITERATIONS


def _given_roots(r, V: int, n: int, what: str) -> np.ndarray | None:
    if r is None:
        return None
    r = np.asarray(r, dtype=complex)
    if r.shape != (V, n):
        raise ValueError(f"{what} must have shape {(V, n)}; got {r.shape}")
    return np.ascontiguousarray(r)


class _Outputs:
    """The grouped output arrays the kernels fill (see `sweep._analysis_kernel`)."""

    def __init__(self, V: int, n: int, m: int) -> None:
        W, B = boundary_width(n, m), breakaway_width(n, m)
        self.fV = np.empty((len(_kernel.FV_NAMES), V))
        self.iV = np.empty((len(_kernel.IV_NAMES), V), np.int8)
        self.fB = np.empty((len(_kernel.FB_NAMES), V, W))
        self.iB = np.empty((V, W), np.int8)
        self.fP = np.empty((len(_kernel.FP_NAMES), V, n))
        self.fZ = np.empty((len(_kernel.FZ_NAMES), V, m))
        self.fK = np.empty((len(_kernel.FK_NAMES), V, B))
        self.groups = (self.fV, self.iV, self.fB, self.iB, self.fP, self.fZ, self.fK)

    def as_dict(self) -> dict[str, np.ndarray]:
        out: dict[str, np.ndarray] = {}
        for names, arr in ((_kernel.FV_NAMES, self.fV), (_kernel.IV_NAMES, self.iV),
                           (_kernel.FB_NAMES, self.fB), (_kernel.FP_NAMES, self.fP),
                           (_kernel.FZ_NAMES, self.fZ), (_kernel.FK_NAMES, self.fK)):
            out.update(zip(names, arr))
        out["stable_above"] = self.iB
        return {name: out[name] for name in VARIABLE_DIMS}


def _analyze_staged(N, D, sigma, lo, hi, kop, has_op, full_check, poles, cl) -> _Outputs:
    """The same analysis in stages with stacked intermediates; roots by `_stack_roots`.

    Used for the rows where the fused kernel's QR did not converge (the
    roots fall back to LAPACK there); on other rows it gives exactly the
    fused kernel's results (tested).
    """
    V = D.shape[0]
    n, m = D.shape[1] - 1, N.shape[1] - 1
    du, bwid, W = _u_degree(n, m), breakaway_width(n, m), boundary_width(n, m)
    i8 = np.int64
    Ds, Ns = np.empty((V, n + 1)), np.empty((V, m + 1))
    w0, g = np.empty(V), np.empty(V)
    F, R = np.empty((V, du + 1)), np.empty((V, bwid + 1))
    Pop = np.empty((V if has_op else 0, n + 1))
    Fdeg, Ndeg, Rdeg = np.empty(V, i8), np.empty(V, i8), np.empty(V, i8)
    Popdeg = np.empty(V if has_op else 0, i8)
    _kernel.prepare(N, D, sigma, kop, has_op, Ds, Ns, w0, g, F, Fdeg, Ndeg, R, Rdeg, Pop, Popdeg)
    uroots = _stack_roots(F, Fdeg, crossing=True)
    poles_t = (poles / w0[:, None]) if poles is not None else _stack_roots(Ds, np.full(V, n, i8))
    zeros_t = _stack_roots(Ns, Ndeg)
    broots = _stack_roots(R, Rdeg)
    if not has_op:
        cl_t = np.empty((0, n), complex)
    else:
        cl_t = (cl / w0[:, None]) if cl is not None else _stack_roots(Pop, Popdeg)
    out = _Outputs(V, n, m)
    tgs, cnt, exists = np.empty((V, W + 1)), np.empty((V, W + 1), i8), np.empty((V, W + 1), np.bool_)
    _kernel.finish(N, D, Ds, Ns, w0, g, F, uroots, np.ascontiguousarray(poles_t), zeros_t, Ndeg, R,
                   broots, np.ascontiguousarray(cl_t), sigma, lo, hi, kop, has_op, *out.groups,
                   tgs, cnt, exists)
    # eigenvalue cross-checks of the Routh counts, as in the fused kernel
    if not has_op or full_check:
        agrees = out.iV[_kernel.IV_AGREES]
        check = exists.copy()
        if not full_check:
            check[:, 1:] = False        # only the first interval, at the reference side
        idx = np.flatnonzero(check.reshape(-1))
        rows = idx // (W + 1)
        Pt = np.empty((idx.size, n + 1))
        deg = np.empty(idx.size, i8)
        _kernel.pencil_stack(Ds, Ns, sigma * tgs.reshape(-1)[idx], rows, Pt, deg)
        lo_c = np.empty(idx.size, i8)
        hi_c = np.empty(idx.size, i8)
        _kernel.rhp_band_rows(_stack_roots(Pt, deg), lo_c, hi_c)
        c = cnt.reshape(-1)[idx]
        ok = np.ones(V * (W + 1), bool)
        ok[idx] = (lo_c <= c) & (c <= hi_c)
        ok = ok.reshape(V, W + 1)
        if not has_op:
            agrees[:] = ok[:, 0]
        if full_check:
            agrees[:] &= np.all(ok, axis=1)
    return out


def _stack_roots(C: np.ndarray, degrees: np.ndarray, crossing: bool = False) -> np.ndarray:
    """Roots of every row (the polynomial of its last ``degrees[v] + 1`` entries), NaN padded.

    The fused kernel's own root step (`sweep._analysis_kernel.roots_rows`;
    with ``crossing`` only the roots the axis crossings need), so both paths
    give the same roots; rows whose QR does not converge go to
    `sweep.rootfind.poly_roots`, which falls back to LAPACK.
    """
    C = np.ascontiguousarray(C, dtype=np.float64)
    degrees = np.ascontiguousarray(degrees, dtype=np.int64)
    out = np.empty((C.shape[0], C.shape[1] - 1), complex)
    ok = np.empty(C.shape[0], np.bool_)
    _kernel.roots_rows(C, degrees, out, _QR_ITERATIONS, ok, crossing)
    bad = np.flatnonzero(~ok)
    if bad.size:
        out[bad] = poly_roots(C[bad], degrees[bad], max_its=_QR_ITERATIONS)
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
        if isinstance(x, (str, bytes)):
            raise TypeError     # a string would be read digit by digit
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
        positive = sigma * np.sign(N[0]) * np.sign(Dn[0]) > 0     # signs only: no overflow
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
