"""Acceptance checks of root-locus tracing on loops that are in no other test.

References: numpy companion eigenvalues at every grid gain (common practice),
mpmath high-precision roots (where numpy's own digits are not enough: wide
coefficient spreads, multiple roots), the minimum-total-distance assignment of
scipy (continuity), textbook facts from memory, each named beside its check.
"""
from __future__ import annotations

import math

import mpmath
import numpy as np
import pytest
from scipy.optimize import linear_sum_assignment

from sweep import locus
from sweep.analysis import analyze
from sweep.locus import Envelope, gain_grid, trace, trace_chunk
from test_locus import assert_continuous, eig_roots, matched_deviation, pair, poly


def _grid(lo, hi, count, *extra):
    return np.unique(np.concatenate([np.geomspace(lo, hi, count), np.asarray(extra, float)]))


_SPREAD_D = np.real(np.poly(-np.logspace(-4, 3, 12)))

# (name, N, D, sigma, gains); well-conditioned unless the name says otherwise
LOOPS = {
    "sander, RHP zero": ([-1, 1], poly([1, 0], [1, 2], [1, 3]), 1, _grid(1e-3, 1e3, 120)),
    "levitator, RHP pole": ([1, 2], poly([1, -1], [1, 3], [1, 5]), 1, _grid(1e-3, 1e3, 120)),
    "telescope, triple integrator": ([1], [1, 0, 0, 0], 1, _grid(1e-3, 1e3, 120)),
    "satellite, double integrator with lead": ([1, 1], [1, 10, 0, 0], 1, _grid(1e-3, 1e4, 120)),
    "antenna, lightly damped pair": ([1], poly([1, 1], pair(-0.01, 10)), 1, _grid(1e-3, 1e3, 120)),
    "printer, notch zeros on the axis": ([1, 0, 4], poly([1, 0], [1, 1], [1, 2], [1, 3]), 1, _grid(1e-3, 1e4, 120)),
    "spring, open-loop pair on the axis": ([1], poly([1, 0, 4], [1, 1]), 1, _grid(1e-3, 1e3, 120)),
    "shaft, common factor on the axis": (poly([1, 0, 9], [1, 1]), poly([1, 0, 9], [1, 2], [1, 3], [1, 4]), 1,
                                         _grid(1e-3, 1e3, 120)),
    # P = (1 - k/2) s^2 + (3 + k) s + 2 + k: a root through infinity at k = 2, on the grid
    "fan, through infinity, negative feedback": ([-0.5, 1, 1], [1, 3, 2], 1, _grid(1e-2, 1e2, 100, 2.0)),
    "fan, through infinity, positive feedback": ([0.5, 1, 1], [1, 3, 2], -1, _grid(1e-2, 1e2, 100, 2.0)),
    "blower, degree 3 through infinity, positive": ([0.25, 1, 1, 1], poly([1, 1], [1, 2], [1, 3]), -1,
                                                    _grid(1e-2, 1e2, 100, 4.0)),
    "heater, positive feedback": ([1, 1], poly([1, 2], [1, 3], [1, 4]), -1, _grid(1e-3, 1e3, 120)),
    "stage, positive feedback double integrator": ([1], [1, 0, 0], -1, _grid(1e-3, 1e3, 120)),
    "roller, fourfold pole": ([1], poly([1, 1], [1, 1], [1, 1], [1, 1]), 1, _grid(1e-6, 1e4, 120)),
    "dosing pump, double pole, positive feedback": ([1, 3], poly([1, 1], [1, 1], [1, 5]), -1, _grid(1e-3, 1e3, 120)),
    "pipe, delay approximation": ([-1, 2], poly([1, 0], [1, 1], [1, 2]), 1, _grid(1e-3, 1e3, 120)),
    "truss, two lightly damped pairs": ([1, 1], poly(pair(-0.05, 1), pair(-0.05, 3)), 1, _grid(1e-3, 1e3, 120)),
    "arm, degree 8 with two resonances": (poly([1, 0.5], [1, 3]),
                                          poly([1, 0], [1, 1], pair(-0.1, 2), pair(-0.2, 5), [1, 8], [1, 20]), 1,
                                          _grid(1e-2, 1e5, 120)),
    "dryer, parasitic pole (tiny leading coefficient)": ([1], [1e-9, 1, 3, 2, 0], 1, _grid(1e-3, 1e6, 120)),
    "kiln, degree 12, coefficient spread 1e25": ([1], _SPREAD_D, 1, _grid(1e-12, 1e3, 120)),
}
# numpy's companion eigenvalues lose the small roots of the spread polynomial
# (measured: 1e-7 of the largest root, the root itself wrong by its own size), so
# that loop is compared with mpmath only
_NUMPY_TOO_WEAK = {"kiln, degree 12, coefficient spread 1e25"}


def _stack(name):
    N, D, sigma, g = LOOPS[name]
    return np.asarray(N, float)[None], np.asarray(D, float)[None], sigma, g


def _mpmath_roots(D, N, sigma, k, dps=50):
    """Roots of D + sigma k N to `dps` digits (NaN padded where the degree drops)."""
    Np = np.concatenate([np.zeros(D.size - N.size), N])
    with mpmath.workdps(dps):
        c = [mpmath.mpf(float(d)) + sigma * mpmath.mpf(float(k)) * mpmath.mpf(float(x)) for d, x in zip(D, Np)]
        while c and c[0] == 0:
            c = c[1:]
        try:
            r = [complex(z) for z in mpmath.polyroots(c, maxsteps=2000, extraprec=300)] if len(c) > 1 else []
        except mpmath.libmp.NoConvergence:     # a multiple root needs more working digits
            r = [complex(z) for z in mpmath.polyroots(c, maxsteps=4000, extraprec=3000)]
    return np.concatenate([np.array(r, complex), np.full(D.size - 1 - len(r), np.nan + 0j)])


# (a gain where every finite root is 0 leaves matched_deviation a 0/0, which it skips)
@pytest.mark.filterwarnings("ignore:invalid value encountered:RuntimeWarning")
@pytest.mark.parametrize("name", sorted(LOOPS))
def test_trace_equals_eigenvalues_and_is_continuous(name):
    N, D, sigma, g = _stack(name)
    r = trace(N, D, sigma=sigma, gains=g)
    assert r.shape == (1, g.size, D.shape[1] - 1)
    # reference: numpy companion eigenvalues at every grid gain, optimally matched
    if name not in _NUMPY_TOO_WEAK:
        assert matched_deviation(r, eig_roots(N, D, sigma, g)) <= 1e-9
    # reference: mpmath 50-digit roots at every 7th gain (15th for degree 12) and at the last
    idx = sorted(set(range(0, g.size, 15 if name in _NUMPY_TOO_WEAK else 7)) | {g.size - 1})
    ref = np.stack([_mpmath_roots(D[0], N[0], sigma, g[i]) for i in idx])[None]
    assert matched_deviation(r[:, idx], ref) <= 1e-9
    # continuity: the order kept between gains is the minimum-total-distance assignment
    assert_continuous(r)


@pytest.mark.parametrize("name", sorted(LOOPS))
def test_branches_start_at_the_open_loop_poles(name):
    N, D, sigma, _ = _stack(name)
    g = np.geomspace(1e-14, 1e-13, 3)
    r = trace(N, D, sigma=sigma, gains=g)
    # reference: numpy roots of D (common practice; their error at the fourfold pole,
    # about eps^(1/4), is far below the tolerance)
    poles = np.roots(D[0])
    # at a gain of 1e-14 every branch is next to its own pole, in sorted order
    # (by real part, then imaginary part); a pole of multiplicity q moves by k^(1/q)
    order = np.lexsort((poles.imag, np.round(poles.real, 6)))
    tol = 2e-3 * max(1.0, np.abs(poles).max())
    assert np.all(np.abs(r[0, 0] - poles[order]) <= tol)


# ---------------------------------------------------------------------------
# pathological grids

@pytest.mark.parametrize("method", ["continuation", "eig"])
def test_double_root_exactly_on_a_grid_gain(method):
    # 1/(s(s+2)): at k = 1, P = (s+1)^2, the breakaway point -1 (from memory); with k = 1
    # on the grid the derivative of P vanishes at the root (this raised a division error)
    g = _grid(1e-3, 1e3, 101, 1.0)
    r = trace(np.array([[1.0]]), np.array([[1.0, 2.0, 0.0]]), sigma=1, gains=g, method=method)
    at = np.flatnonzero(g == 1.0)[0]
    np.testing.assert_allclose(r[0, at], -1.0, atol=1e-7)   # a double root: sqrt(eps) accuracy
    assert matched_deviation(r, eig_roots(np.array([[1.0]]), np.array([[1.0, 2.0, 0.0]]), 1, g)) <= 1e-7
    assert_continuous(r)


def test_triple_root_exactly_on_a_grid_gain():
    # s(s^2 + 3s + 3) + k: at k = 1, P = (s+1)^3, three branches meet at -1 (hand
    # computation, from memory). A triple root is determined to about eps^(1/3) by any
    # floating-point root finder (common practice); mpmath reference elsewhere
    N, D = np.array([[1.0]]), np.array([[1.0, 3.0, 3.0, 0.0]])
    g = _grid(1e-3, 1e3, 101, 1.0)
    r = trace(N, D, sigma=1, gains=g)
    at = np.flatnonzero(g == 1.0)[0]
    np.testing.assert_allclose(r[0, at], -1.0, atol=3e-5)
    away = [i for i in range(g.size) if abs(math.log(g[i])) > 0.3]
    ref = np.stack([_mpmath_roots(D[0], N[0], 1, g[i]) for i in away])[None]
    assert matched_deviation(r[:, away], ref) <= 1e-9
    assert_continuous(r, rtol=1e-5)


def test_branches_leaving_a_double_root_do_not_swap():
    # 1/(s(s+4)(s^2+4s+20)): the two real branches meet at -2 at k = 64 and go up and
    # down the line Re s = -2 (from memory). With k = 64 on the grid the quadratic
    # predictor overshot past the double root and swapped the two branches.
    N, D = np.array([[1.0]]), poly([1, 0], [1, 4], [1, 4, 20])[None]
    g = _grid(1e-2, 1e4, 300, 64.0, 100.0)
    for method in ("continuation", "eig"):
        r = trace(N, D, sigma=1, gains=g, method=method)
        assert_continuous(r, rtol=1e-7)
        past = (g > 64.0) & (g < 100.0)
        # each of the two inner branches stays in its own half plane between 64 and 100
        inner = r[0][past][:, [0, 3]]
        assert np.all(np.abs(inner.real + 2) < 1e-6)
        assert np.all(np.sign(inner[:, 0].imag) == np.sign(inner[-1, 0].imag))
        assert np.all(np.sign(inner[:, 1].imag) == np.sign(inner[-1, 1].imag))
        assert matched_deviation(r, eig_roots(N, D, 1, g)) <= 1e-7   # double roots on the grid


def test_coarse_grid_keeps_the_minimum_distance_order():
    # twelve gains over eight decades: roots move further than their separation, the
    # order between gains is still the minimum-total-distance assignment (scipy)
    N, D = np.array([[1.0, 3.0]]), poly([1, 0], [1, 1], [1, 10], [1, 20])[None]
    g = np.geomspace(1e-3, 1e5, 12)
    for method in ("continuation", "eig"):
        r = trace(N, D, sigma=1, gains=g, method=method)
        assert_continuous(r)
        assert matched_deviation(r, eig_roots(N, D, 1, g)) <= 1e-9


def test_roots_through_infinity_on_and_between_grid_gains():
    # P = (1 - k/2) s^2 + (3 + k) s + 2 + k: one root through infinity at k = 2 (hand
    # computation); on the grid it is NaN there, between grid points it jumps sign
    N, D = np.array([[-0.5, 1.0, 1.0]]), np.array([[1.0, 3.0, 2.0]])
    for g in (_grid(1e-2, 1e2, 100, 2.0), _grid(1e-2, 1e2, 100)):
        r = trace(N, D, sigma=1, gains=g)
        at = np.flatnonzero(g == 2.0)
        if at.size:
            assert np.sum(np.isnan(r[0, at[0]])) == 1
            np.testing.assert_allclose(r[0, at[0]][~np.isnan(r[0, at[0]])], -0.8)  # 5 s + 4 = 0
        assert matched_deviation(r, eig_roots(N, D, 1, g)) <= 1e-9
        # (a jump from -big to +big past the other real root is a tie of the
        # minimum-total-distance rule: either order is continuous by that rule)
        assert_continuous(r)


def test_huge_point_count():
    # 20000 grid gains: the same roots as a coarser grid at shared gains (exactly the
    # same polynomial there; both against numpy eigenvalues)
    N, D, sigma, _ = _stack("arm, degree 8 with two resonances")
    g = np.geomspace(1e-2, 1e5, 20000)
    r = trace(N, D, sigma=sigma, gains=g)
    assert r.shape == (1, 20000, 8) and np.all(np.isfinite(r))
    sub = np.arange(0, 20000, 997)
    assert matched_deviation(r[:, sub], eig_roots(N, D, sigma, g[sub])) <= 1e-9
    # continuity on the fine grid: every step is tiny next to the root separations
    steps = np.abs(np.diff(r[0], axis=0)).max()
    assert steps < 0.05 * np.abs(r[0]).max()


# ---------------------------------------------------------------------------
# batches, chunks, envelope, grid

def test_batch_equals_one_at_a_time_on_the_new_loops():
    # the loops of each degree in one stack (numerators padded with leading zeros):
    # every row equals that loop traced alone, bit for bit
    groups: dict[tuple[int, int], list[str]] = {}
    for name, (N, D, sigma, _) in LOOPS.items():
        groups.setdefault((len(D), sigma), []).append(name)
    g = np.geomspace(1e-3, 1e3, 80)
    checked = 0
    for (w, sigma), names in groups.items():
        if len(names) < 2:
            continue
        Ns = [np.asarray(LOOPS[nm][0], float) for nm in names]
        m = max(x.size for x in Ns)
        N = np.array([np.concatenate([np.zeros(m - x.size), x]) for x in Ns])
        D = np.array([np.asarray(LOOPS[nm][1], float) for nm in names])
        full = trace(N, D, sigma=sigma, gains=g)
        for i in range(len(names)):
            np.testing.assert_array_equal(full[i], trace(N[i:i + 1], D[i:i + 1], sigma=sigma, gains=g)[0])
            checked += 1
    assert checked >= 8


def test_envelope_over_variants_against_eigenvalues():
    # a family of pump loops with +-20 % on every time constant: the chunk's envelope is
    # the min / max / mean over all variants of the largest real part of the roots
    # (numpy eigenvalues at every grid gain, common practice)
    rng = np.random.default_rng(2)
    V = 25
    D = np.stack([poly([1, 0], [1, 2 * a], pair(-0.3 * b, 3 * b)) for a, b in rng.uniform(0.8, 1.2, (V, 2))])
    N = np.stack([poly([1, 4 * c]) for c in rng.uniform(0.8, 1.2, V)])
    g = np.geomspace(1e-3, 1e3, 60)
    ch = trace_chunk(N, D, sigma=1, gains=g, keep=np.zeros(V, bool))
    ref = eig_roots(N, D, 1, g)
    sa = np.nanmax(ref.real, axis=2)
    np.testing.assert_allclose(ch.envelope.min, sa.min(axis=0), rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(ch.envelope.max, sa.max(axis=0), rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(ch.envelope.mean, sa.mean(axis=0), rtol=1e-9, atol=1e-12)
    # folding two halves equals the whole chunk
    a = trace_chunk(N[:11], D[:11], sigma=1, gains=g, keep=np.zeros(11, bool)).envelope
    b = trace_chunk(N[11:], D[11:], sigma=1, gains=g, keep=np.zeros(V - 11, bool)).envelope
    m = Envelope(g.size).merge(a).merge(b)
    np.testing.assert_array_equal(m.min, ch.envelope.min)
    np.testing.assert_array_equal(m.max, ch.envelope.max)


@pytest.mark.parametrize("num,den,op", [
    ([1], poly([1, 0], [1, 4], [1, 4, 20]), 30.0),            # critical gain 260 (from memory)
    ([1, 2, 5], [1, 11, 38, 55, 45, 18], 5.0),                 # conditionally stable: three boundaries
    ([1, 1], [1, -1, 0], 3.0),                                 # stable above k = 1
])
def test_grid_holds_the_nominal_boundaries_and_the_operating_gain(num, den, op):
    a = analyze(num, den, operating_gain=op)
    g = gain_grid(150, (0, math.inf), nominal_N=num, nominal_D=den, sigma=1,
                  boundary_gains=a.boundary_gains, operating_gain=op)
    assert g.size == 150 and np.all(np.diff(g) > 0) and g[0] > 0
    assert op in g
    r = trace(np.array([num], float), np.array([den], float), sigma=1, gains=g)
    for kb, wb in zip(a.boundary_gains, a.boundary_frequencies):
        assert kb in g
        # at each boundary gain a root sits on the axis at the boundary frequency
        at = np.flatnonzero(g == kb)[0]
        assert np.min(np.abs(r[0, at] - 1j * wb)) <= 1e-7 * max(1.0, wb)
    # open range: from 1e-3 of the smallest anchor to 1e3 of the largest (DESIGN, locus.gain_grid)
    anchors = list(a.boundary_gains) + [op, locus._pole_scale_gain(np.asarray(num, float), np.asarray(den, float))]
    assert g[0] == pytest.approx(1e-3 * min(anchors)) and g[-1] == pytest.approx(1e3 * max(anchors))


def test_continuous_branches_match_the_scipy_assignment_exactly_on_random_loops():
    # random loops of degree 3..9 on a 60-point grid: wherever the assignment of scipy
    # (minimum total distance) is unique, it is the order the trace keeps
    rng = np.random.default_rng(17)
    for _ in range(12):
        n = int(rng.integers(3, 10))
        m = int(rng.integers(0, n))
        D = np.concatenate([[1.0], rng.uniform(-1, 4, n)])
        N = rng.uniform(-2, 3, m + 1)
        g = np.geomspace(1e-3, 1e3, 60)
        for sigma in (1, -1):
            r = trace(N[None], D[None], sigma=sigma, gains=g)
            for gi in range(1, g.size):
                a, b = r[0, gi - 1], r[0, gi]
                if not (np.all(np.isfinite(a)) and np.all(np.isfinite(b))):
                    continue
                c = np.abs(a[:, None] - b[None, :])
                i, j = linear_sum_assignment(c)
                best = c[i, j].sum()
                assert np.trace(c) <= best + 1e-9 * (best + np.abs(b).max()), (D, N, sigma, gi)


def test_batch_with_multiple_roots_on_the_grid_equals_one_at_a_time():
    # the crane loop (double roots at k = 64 and k = 100 on the grid, fall-back steps) in
    # a stack with perturbed copies: each row equals that variant traced alone, bit for bit
    rng = np.random.default_rng(4)
    base = poly([1, 0], [1, 4], [1, 4, 20])
    D = np.stack([base] + [base * np.r_[1.0, rng.uniform(0.9, 1.1, 4)] for _ in range(6)])
    N = np.ones((7, 1))
    g = _grid(1e-2, 1e4, 120, 64.0, 100.0)
    st = {}
    full = trace(N, D, sigma=1, gains=g, stats=st)
    assert st["fallback_variant_steps"] > 0
    for i in range(7):
        np.testing.assert_array_equal(full[i], trace(N[i:i + 1], D[i:i + 1], sigma=1, gains=g)[0])
    assert_continuous(full, rtol=1e-7)


def test_operating_gain_chosen_for_critical_damping():
    # a common design choice: the gain of the breakaway point, where the closed loop is
    # critically damped; 1/(s(s+2)) at k = 1 gives (s+1)^2 (from memory). The sweep's
    # grid holds the operating gain, so the tracer meets the double root exactly there.
    from sweep.analysis import analyze_stack

    N, D = np.array([[1.0]]), np.array([[1.0, 2.0, 0.0]])
    a = analyze([1.0], [1.0, 2.0, 0.0], operating_gain=1.0)
    assert a.breakaway_points == [(pytest.approx(-1.0), pytest.approx(1.0))]
    g = gain_grid(50, (0, math.inf), nominal_N=N, nominal_D=D, sigma=1, operating_gain=1.0)
    at = int(np.flatnonzero(g == 1.0)[0])
    ch = trace_chunk(N, D, sigma=1, gains=g, keep=np.ones(1, bool), operating_index=at)
    np.testing.assert_allclose(ch.operating_roots[0], -1.0, atol=1e-7)   # double root: sqrt(eps)
    assert_continuous(ch.kept_roots)
    # the analysis with the traced roots handed over, as a run does it
    out = analyze_stack(N, D, sigma=1, operating_gain=1.0, closed_loop_poles=ch.operating_roots,
                        open_loop_poles=ch.open_loop_poles)
    assert out["stable_at_reference"][0] == 1 and out["critical_gain"][0] == math.inf
    assert out["min_damping"][0] == pytest.approx(1.0, abs=1e-7)
