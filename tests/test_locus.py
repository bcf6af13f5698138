"""Tests of sweep.locus: gain grid, branch tracing, envelope, kept loci."""
from __future__ import annotations

import itertools

import mpmath
import numpy as np
import pytest
from scipy.optimize import linear_sum_assignment

from sweep import locus
from sweep.errors import InputError
from sweep.locus import Envelope, gain_grid, kept_indices, select_kept, trace


def poly(*factors):
    """Product of coefficient lists (highest power first)."""
    out = np.array([1.0])
    for f in factors:
        out = np.convolve(out, np.asarray(f, dtype=float))
    return out


def pair(re, im):
    """(s - re - j im)(s - re + j im)."""
    return [1.0, -2 * re, re * re + im * im]


# Loops of different shapes: (name, N, D, sigma, gains)
LOOPS = {
    # (s+3)/(s(s+1)): break-away near -0.55 and break-in near -5.45
    "breakaway_breakin": (poly([1, 3]), poly([1, 0], [1, 1]), 1, np.geomspace(1e-3, 1e3, 400)),
    # two lightly damped pole pairs close together: their branches pass near each other
    "close_pairs": (poly([1, 4]), poly(pair(-1.0, 2.0), pair(-1.1, 2.15)), 1,
                    np.geomspace(1e-3, 1e3, 400)),
    # deg N = deg D with N/D leading ratio -1: P = (1-k) s^2 + 3 s + 2 + k, root through
    # infinity at k = 1 (on the grid)
    "through_infinity": (np.array([-1.0, 0.0, 1.0]), poly([1, 1], [1, 2]), 1,
                         np.unique(np.concatenate([np.geomspace(1e-2, 1e2, 301), [1.0]]))),
    # degree 10 with two zeros
    "degree_10": (poly([1, 1.5], [1, 6]),
                  poly([1, 0.5], pair(-1, 1), [1, 2], pair(-3, 2), [1, 5], pair(-8, 0.5), [1, 12]),
                  1, np.geomspace(1e-2, 1e5, 500)),
    # repeated open-loop poles 1/(s+1)^4
    "repeated_poles": (np.array([1.0]), poly([1, 1], [1, 1], [1, 1], [1, 1]), 1,
                       np.geomspace(1e-4, 1e4, 400)),
    # positive feedback, conveyor-like type-1 plant with a lead term
    "positive_feedback": (poly([1, 2]), poly([1, 0], [1, 4], pair(-1, 3)), -1,
                          np.geomspace(1e-3, 1e3, 300)),
}


def stack(name):
    N, D, sigma, g = LOOPS[name]
    return N[None, :], D[None, :], sigma, g


def matched_deviation(a, b):
    """Max over gains of the optimally matched root distance / max |root| (NaN slots must agree)."""
    worst = 0.0
    for v, gi in itertools.product(range(a.shape[0]), range(a.shape[1])):
        x, y = a[v, gi], b[v, gi]
        fx, fy = np.isfinite(x), np.isfinite(y)
        assert fx.sum() == fy.sum()
        x, y = x[fx], y[fy]
        if x.size == 0:
            continue
        c = np.abs(x[:, None] - y[None, :])
        i, j = linear_sum_assignment(c)
        worst = max(worst, c[i, j].max() / np.abs(y).max())
    return worst


def eig_roots(N, D, sigma, g):
    """Companion eigenvalues at every gain, independent of the module's code path."""
    V, w = D.shape
    Np = np.concatenate([np.zeros((V, w - N.shape[1])), N], axis=1)
    out = np.full((V, g.size, w - 1), np.nan + 0j)
    for v, (gi, k) in itertools.product(range(V), enumerate(g)):
        P = D[v] + sigma * k * Np[v]
        P = np.trim_zeros(np.where(np.abs(P) <= 1e-14 * np.abs(D[v]).max(), 0.0, P), "f")
        r = np.roots(P)
        out[v, gi, : r.size] = r
    return out


def assert_continuous(r, rtol=1e-9):
    """Branch order between consecutive gains is the minimum-total-distance assignment."""
    V, G, n = r.shape
    for v in range(V):
        for gi in range(1, G):
            a, b = r[v, gi - 1], r[v, gi]
            if not (np.all(np.isfinite(a)) and np.all(np.isfinite(b))):
                continue
            c = np.abs(a[:, None] - b[None, :])
            i, j = linear_sum_assignment(c)
            ours, best = np.trace(c), c[i, j].sum()
            scale = np.abs(b).max()
            assert ours <= best + rtol * (best + scale), (v, gi, a, b)


@pytest.mark.parametrize("name", sorted(LOOPS))
def test_trace_equals_eigenvalues_at_every_gain(name):
    N, D, sigma, g = stack(name)
    r = trace(N, D, sigma=sigma, gains=g)
    assert r.shape == (1, g.size, D.shape[1] - 1) and r.dtype == np.complex128
    # reference: numpy companion eigenvalues (common practice)
    assert matched_deviation(r, eig_roots(N, D, sigma, g)) <= 1e-9


@pytest.mark.parametrize("name", sorted(LOOPS))
def test_trace_against_mpmath_roots(name):
    N, D, sigma, g = stack(name)
    r = trace(N, D, sigma=sigma, gains=g)
    Np = np.concatenate([np.zeros(D.shape[1] - N.shape[1]), N[0]])
    mpmath.mp.dps = 40
    for gi in range(0, g.size, 37):
        P = [mpmath.mpf(float(d)) + sigma * mpmath.mpf(float(g[gi])) * mpmath.mpf(float(c))
             for d, c in zip(D[0], Np)]
        while P and P[0] == 0:
            P = P[1:]
        # reference: mpmath high-precision polynomial roots
        ref = np.array([complex(z) for z in mpmath.polyroots(P, maxsteps=200, extraprec=200)])
        ref = np.concatenate([ref, np.full(r.shape[2] - ref.size, np.nan + 0j)])
        assert matched_deviation(r[:, gi:gi + 1], ref[None, None, :]) <= 1e-10


@pytest.mark.parametrize("name", sorted(LOOPS))
def test_branches_continuous(name):
    N, D, sigma, g = stack(name)
    assert_continuous(trace(N, D, sigma=sigma, gains=g))


@pytest.mark.parametrize("name", sorted(LOOPS))
def test_branches_start_at_sorted_poles(name):
    N, D, sigma, g = stack(name)
    r = trace(N, D, sigma=sigma, gains=g)
    poles = np.roots(D[0])
    order = np.lexsort((poles.imag, np.round(poles.real, 8)))
    poles = poles[order]
    start = r[0, 0]
    scale = np.abs(poles).max() + 1
    # the first gain is small: each branch is closest to its own pole
    if name != "repeated_poles":
        assert np.allclose(start, poles, atol=0.05 * scale)
    else:
        assert np.allclose(start, -1.0, atol=0.2)


def test_breakaway_and_breakin_points():
    # (s+3)/(s(s+1)): N D' - N' D = s^2 + 6 s + 3 = 0, s = -3 +- sqrt(6) (from memory)
    N, D, sigma, _ = stack("breakaway_breakin")
    s1, s2 = -3 + np.sqrt(6), -3 - np.sqrt(6)
    k1, k2 = (-np.polyval(D[0], s) / np.polyval(N[0], s) for s in (s1, s2))
    g = np.geomspace(1e-3, 1e3, 600)
    r = trace(N, D, sigma=sigma, gains=g)[0]
    complex_ = np.abs(r.imag).max(axis=1) > 1e-9
    inside = (g > k1 * 1.001) & (g < k2 * 0.999)
    outside = (g < k1 * 0.999) | (g > k2 * 1.001)
    assert complex_[inside].all() and not complex_[outside].any()
    # between them the pair lies on the circle |s + 3| = sqrt(6) (from memory)
    assert np.allclose(np.abs(r[inside] + 3), np.sqrt(6), rtol=1e-9)
    # after break-in one branch ends at the zero -3, the other heads to -inf
    end = np.sort(r[-1].real)
    assert end[0] < -900 and abs(end[1] + 3) < 1e-2


def test_repeated_poles_exact():
    # roots of (s+1)^4 + k: s = -1 + k^(1/4) exp(j pi (2q+1)/4) (from memory)
    N, D, sigma, g = stack("repeated_poles")
    r = trace(N, D, sigma=sigma, gains=g)[0]
    q = np.arange(4)
    exact = -1 + g[:, None] ** 0.25 * np.exp(1j * np.pi * (2 * q + 1) / 4)[None, :]
    for gi in range(g.size):
        c = np.abs(r[gi][:, None] - exact[gi][None, :])
        i, j = linear_sum_assignment(c)
        assert c[i, j].max() <= 1e-9 * np.abs(exact[gi]).max()
    # each branch keeps one asymptote direction
    ang = np.angle(r[-1] + 1)
    assert np.allclose(np.sort(np.round(np.degrees(ang))), [-135, -45, 45, 135])


def test_root_through_infinity_is_nan_where_degree_drops():
    N, D, sigma, g = stack("through_infinity")
    st = {}
    r = trace(N, D, sigma=sigma, gains=g, stats=st)[0]
    at = np.flatnonzero(g == 1.0)[0]
    assert np.isnan(r[at]).sum() == 1
    assert np.isfinite(np.delete(r, at, axis=0)).all()
    assert st["degree_drop"] == 1
    # the branch that goes out through infinity is the one marked missing there
    j = int(np.flatnonzero(np.isnan(r[at]))[0])
    assert abs(r[at - 1, j]) > 50 and abs(r[at + 1, j]) > 50
    # P(1) = 3 s + 3: the other root is -1 (from memory)
    assert abs(r[at, 1 - j] + 1) < 1e-12


def test_root_through_infinity_between_grid_points():
    # k = 1 not on the grid: the root jumps from +big to -big, still a root at each gain
    N, D, sigma, _ = stack("through_infinity")
    g = np.geomspace(1e-2, 1e2, 300)
    r = trace(N, D, sigma=sigma, gains=g)
    assert np.isfinite(r).all()
    assert matched_deviation(r, eig_roots(N, D, sigma, g)) <= 1e-9


def test_batched_equals_one_by_one():
    rng = np.random.default_rng(3)
    V = 6
    D = np.stack([poly(*[[1, p] for p in rng.uniform(0.2, 5, 2)],
                       pair(-rng.uniform(0.2, 2), rng.uniform(0.5, 3))) for _ in range(V)])
    N = np.stack([poly([1, z]) for z in rng.uniform(0.5, 8, V)])
    g = np.geomspace(1e-3, 1e3, 150)
    r = trace(N, D, sigma=1, gains=g)
    for v in range(V):
        one = trace(N[v:v + 1], D[v:v + 1], sigma=1, gains=g)
        assert np.allclose(r[v], one[0], rtol=1e-12, atol=1e-12)
    assert matched_deviation(r, eig_roots(N, D, 1, g)) <= 1e-9
    assert_continuous(r)


def test_batched_equals_one_by_one_exactly_with_fallbacks():
    # every variant is traced on its own inside the compiled loop: a chunk that holds a
    # variant needing fall-backs (tangency on the grid, degree drop) changes nothing else
    N1, D1, _, _ = stack("breakaway_breakin")
    s1 = -3 + np.sqrt(6)
    k1 = -np.polyval(D1[0], s1) / np.polyval(N1[0], s1)
    g = np.unique(np.concatenate([np.geomspace(1e-3, 1e3, 120), [k1, 1.0]]))
    N = np.array([[0.0, 1.0, 3.0], [0.0, 1.0, 5.0], [-1.0, 0.0, 1.0], [0.0, 2.0, 1.0]])
    D = np.array([[1.0, 1.0, 0.0], [1.0, 2.0, 0.0], [1.0, 3.0, 2.0], [1.0, 0.5, 4.0]])
    st = {}
    r = trace(N, D, sigma=1, gains=g, stats=st)
    assert st["fallback_variant_steps"] > 0 and st["degree_drop"] > 0
    for v in range(N.shape[0]):
        assert np.array_equal(trace(N[v:v + 1], D[v:v + 1], sigma=1, gains=g)[0], r[v], equal_nan=True)


def test_trace_chunk_equals_trace():
    rng = np.random.default_rng(8)
    V = 12
    D = np.stack([poly(*[[1, p] for p in rng.uniform(0.2, 5, 3)],
                       pair(-rng.uniform(0.2, 2), rng.uniform(0.5, 3))) for _ in range(V)])
    N = np.stack([poly([1, z]) for z in rng.uniform(0.5, 8, V)])
    g = np.geomspace(1e-3, 1e3, 90)
    keep = rng.uniform(size=V) < 0.4
    full = trace(N, D, sigma=1, gains=g)
    ch = locus.trace_chunk(N, D, sigma=1, gains=g, keep=keep, operating_index=37)
    assert np.array_equal(ch.kept_roots, full[keep])
    assert np.array_equal(ch.operating_roots, full[:, 37])
    ref = Envelope(g.size).update(full)
    np.testing.assert_array_equal(ch.envelope.min, ref.min)
    np.testing.assert_array_equal(ch.envelope.max, ref.max)
    np.testing.assert_allclose(ch.envelope.mean, ref.mean, rtol=1e-14)
    np.testing.assert_array_equal(ch.envelope.count, ref.count)
    # the branches start at the poles handed to the analysis
    assert np.allclose(ch.open_loop_poles, full[:, 0], atol=0.05 * np.abs(full[:, 0]).max())
    none = locus.trace_chunk(N, D, sigma=1, gains=g, keep=np.zeros(V, bool))
    assert none.kept_roots.shape == (0, g.size, 5) and none.operating_roots is None


def test_variant_redone_when_the_compiled_qr_fails(monkeypatch):
    # with no QR iterations allowed, every fall-back step fails in the compiled loop and
    # the variant is traced again by the LAPACK reference: same roots, counted
    N, D, sigma, _ = stack("positive_feedback")  # degree 4: the QR must iterate
    g = np.geomspace(1e-3, 1e3, 9)  # coarse: fall-backs are certain
    monkeypatch.setattr(locus, "_QR_MAX_ITS", 0)
    st = {}
    r = trace(N, D, sigma=sigma, gains=g, stats=st)
    assert st["variant_redo"] == 1
    assert np.array_equal(r, trace(N, D, sigma=sigma, gains=g, method="eig"), equal_nan=True)
    ch = locus.trace_chunk(N, D, sigma=sigma, gains=g, keep=[True], operating_index=4)
    assert np.array_equal(ch.kept_roots, r) and np.array_equal(ch.operating_roots, r[:, 4])


def test_eig_method_agrees_with_continuation():
    rng = np.random.default_rng(5)
    V = 30
    D = np.stack([poly(*[[1, p] for p in rng.uniform(0.1, 10, 4)]) for _ in range(V)])
    N = np.stack([poly([1, z]) for z in rng.uniform(0.1, 10, V)])
    g = np.geomspace(1e-3, 1e4, 300)
    a = trace(N, D, sigma=1, gains=g)
    b = trace(N, D, sigma=1, gains=g, method="eig")
    assert matched_deviation(a, b) <= 1e-9
    assert_continuous(a)
    assert_continuous(b)


def test_fallback_on_coarse_grid():
    # few gains over a wide range: predictions are poor, the eigenvalue path takes over
    names = ["breakaway_breakin", "close_pairs", "positive_feedback"]
    for name in names:
        N, D, sigma, _ = stack(name)
        g = np.geomspace(1e-3, 1e3, 9)
        st = {}
        r = trace(N, D, sigma=sigma, gains=g, stats=st)
        assert st["fallback_variant_steps"] > 0
        assert matched_deviation(r, eig_roots(N, D, sigma, g)) <= 1e-9


def test_fallback_at_tangency():
    # a grid gain exactly at the break-away gain: a double root, Newton cannot certify it
    N, D, sigma, _ = stack("breakaway_breakin")
    s1 = -3 + np.sqrt(6)
    k1 = -np.polyval(D[0], s1) / np.polyval(N[0], s1)
    g = np.unique(np.concatenate([np.geomspace(1e-3, 1e3, 200), [k1]]))
    st = {}
    r = trace(N, D, sigma=sigma, gains=g, stats=st)
    assert st["not_converged"] + st["not_separated"] >= 1
    at = np.flatnonzero(g == k1)[0]
    # a double root is only determined to about sqrt(eps) (common practice)
    assert np.allclose(r[0, at], s1, atol=1e-6)
    assert matched_deviation(r, eig_roots(N, D, sigma, g)) <= 1e-6
    assert_continuous(r, rtol=1e-6)


def test_fallback_not_separated_and_not_converged_paths(monkeypatch):
    # force both checks to fail everywhere: the result must be the eigenvalue trace
    N, D, sigma, g = stack("degree_10")
    monkeypatch.setattr(locus, "_NEWTON_MAXIT", 0)
    monkeypatch.setattr(locus, "_EPS", 0.0)  # no acceptance of a prediction at rounding level
    st = {}
    r = trace(N, D, sigma=sigma, gains=g, stats=st)
    assert st["not_converged"] == g.size - 1
    assert matched_deviation(r, eig_roots(N, D, sigma, g)) <= 1e-9
    assert_continuous(r)
    monkeypatch.undo()
    monkeypatch.setattr(locus, "_DOMINANCE", 0.0)
    st = {}
    r = trace(N, D, sigma=sigma, gains=g, stats=st)
    assert st["not_separated"] + st["not_converged"] == g.size - 1
    assert st["not_separated"] >= g.size - 10
    assert matched_deviation(r, eig_roots(N, D, sigma, g)) <= 1e-9
    assert_continuous(r)


def test_mixed_stack_partial_fallback():
    # one variant needs the fallback (tangency on the grid), the others do not
    N1, D1, _, _ = stack("breakaway_breakin")
    s1 = -3 + np.sqrt(6)
    k1 = -np.polyval(D1[0], s1) / np.polyval(N1[0], s1)
    g = np.unique(np.concatenate([np.geomspace(1e-3, 1e3, 150), [k1]]))
    N = np.array([[1.0, 3.0], [1.0, 5.0], [1.0, 7.0]])
    D = np.array([[1.0, 1.0, 0.0], [1.0, 2.0, 0.0], [1.0, 3.0, 0.5]])
    st = {}
    r = trace(N, D, sigma=1, gains=g, stats=st)
    assert 1 <= st["fallback_variant_steps"] < 3 * (g.size - 1)
    assert matched_deviation(r, eig_roots(N, D, 1, g)) <= 1e-6
    assert_continuous(r, rtol=1e-6)


def test_random_loops_many_shapes():
    rng = np.random.default_rng(11)
    for n, m in [(3, 0), (5, 2), (6, 6), (7, 1)]:
        V = 4
        D = np.concatenate([np.ones((V, 1)), rng.uniform(0.2, 4, (V, n))], axis=1)
        N = rng.uniform(-2, 3, (V, m + 1))
        g = np.geomspace(1e-2, 1e2, 150)
        for sigma in (1, -1):
            r = trace(N, D, sigma=sigma, gains=g)
            ref = eig_roots(N, D, sigma, g)
            # random coefficients can be badly conditioned: compare at 1e-7 here
            assert matched_deviation(r, ref) <= 1e-7


# ----------------------------------------------------------------------------- matching

def test_assign_is_optimal():
    rng = np.random.default_rng(2)
    for n in (1, 2, 3, 5, 8):
        cost = rng.uniform(0, 1, (200, n, n))
        cost[::3] = np.round(cost[::3], 1)  # ties
        perm = locus._assign(cost)
        for b in range(cost.shape[0]):
            i, j = linear_sum_assignment(cost[b])
            assert sorted(perm[b]) == list(range(n))
            assert np.isclose(cost[b, np.arange(n), perm[b]].sum(), cost[b, i, j].sum())


def test_compiled_assign_is_optimal():
    # the compiled assignment (row minima, else Hungarian) against scipy's solver
    from sweep._locus_kernel import assign

    rng = np.random.default_rng(4)
    for n in (1, 2, 3, 5, 8, 12):
        scratch = [np.empty(n + 1), np.empty(n + 1), np.empty(n + 1, np.int64),
                   np.empty(n + 1, np.int64), np.empty(n + 1), np.empty(n + 1, bool)]
        perm = np.empty(n, np.int64)
        for b in range(150):
            cost = rng.uniform(0, 1, (n, n))
            if b % 3 == 0:
                cost = np.round(cost, 1)  # ties
            assign(cost, perm, *scratch)
            i, j = linear_sum_assignment(cost)
            assert sorted(perm) == list(range(n))
            assert np.isclose(cost[np.arange(n), perm].sum(), cost[i, j].sum())


def test_match_with_missing_roots():
    pred = np.array([[-1.0 + 0j, 1e6 + 0j, -3.0 + 0j]])
    roots = np.array([[-3.01 + 0j, np.nan + 0j, -0.99 + 0j]])
    out = locus._match(pred, roots)
    assert out[0, 0] == -0.99 and np.isnan(out[0, 1]) and out[0, 2] == -3.01
    # a branch coming back from infinity takes the root the others leave
    pred = np.array([[-1.0 + 0j, np.nan + 0j, -3.0 + 0j]])
    roots = np.array([[-3.01 + 0j, -1e6 + 0j, -0.99 + 0j]])
    out = locus._match(pred, roots)
    assert out[0, 1] == -1e6


# ----------------------------------------------------------------------------- gain grid

def test_gain_grid_open_range_rule():
    N, D = np.array([1.0, 3.0]), poly([1, 0], [1, 1])
    g = gain_grid(300, (0, np.inf), nominal_N=N, nominal_D=D, sigma=1)
    assert g.shape == (300,) and g.dtype == np.float64
    assert np.all(np.diff(g) > 0) and g[0] > 0
    # pole-scale gain: geometric mean of nonzero |poles| is 1, |D(j)|/|N(j)| = sqrt(2)/sqrt(10)
    ks = np.sqrt(2) / np.sqrt(10)
    assert np.isclose(g[0], 1e-3 * ks) and np.isclose(g[-1], 1e3 * ks)
    assert np.allclose(np.diff(np.log(g)), np.log(g[1] / g[0]))


def test_gain_grid_inserts_boundary_and_operating_gains():
    N, D = np.array([1.0]), poly([1, 1], [1, 2], [1, 3])
    bks = [60.0, 1e-9, np.inf]  # 60: the textbook critical gain of 1/((s+1)(s+2)(s+3)) (from memory)
    g = gain_grid(100, (0, np.inf), nominal_N=N, nominal_D=D, sigma=1,
                  boundary_gains=bks, operating_gain=7.5)
    assert g.size == 100 and np.all(np.diff(g) > 0)
    assert 60.0 in g and 7.5 in g
    assert g[0] == pytest.approx(1e-3 * 1e-9)  # smallest anchor is the boundary gain 1e-9
    assert g[-1] == pytest.approx(1e3 * 60.0)


def test_gain_grid_finite_range_and_crowded_targets():
    N, D = np.array([1.0]), poly([1, 1], [1, 2])
    g = gain_grid(10, (0.5, 20.0), nominal_N=N, nominal_D=D, sigma=1,
                  boundary_gains=[1.0, 1.0001, 1.0002, 1.0003], operating_gain=1.00005)
    assert g.size == 10 and g[0] == 0.5 and g[-1] == 20.0 and np.all(np.diff(g) > 0)
    for t in (1.0, 1.0001, 1.0002, 1.0003, 1.00005):
        assert t in g
    # targets at the very ends of the range
    g = gain_grid(5, (0.5, 20.0), nominal_N=N, nominal_D=D, sigma=1,
                  boundary_gains=[0.50001, 19.999], operating_gain=19.9995)
    assert g.size == 5 and np.all(np.diff(g) > 0)
    assert 0.50001 in g and 19.999 in g and 19.9995 in g
    # lower end 0, finite upper end
    g = gain_grid(50, (0, 4.0), nominal_N=N, nominal_D=D, sigma=1)
    assert g[-1] == 4.0 and g[0] > 0 and g.size == 50


def test_gain_grid_errors():
    N, D = np.array([1.0]), poly([1, 1])
    with pytest.raises(InputError):
        gain_grid(1, (0, np.inf), nominal_N=N, nominal_D=D, sigma=1)
    with pytest.raises(InputError):
        gain_grid(10, (5, 1), nominal_N=N, nominal_D=D, sigma=1)
    with pytest.raises(InputError):
        gain_grid(3, (0, np.inf), nominal_N=N, nominal_D=D, sigma=1,
                  boundary_gains=[1, 2, 3], operating_gain=4)


def test_grid_feeds_trace():
    N, D = np.array([1.0]), poly([1, 1], [1, 2], [1, 3])
    g = gain_grid(120, (0, np.inf), nominal_N=N, nominal_D=D, sigma=1, boundary_gains=[60.0])
    r = trace(N[None], D[None], sigma=1, gains=g)
    at = np.flatnonzero(g == 60.0)[0]
    # at k = 60 a pair sits on the axis at +-j sqrt(11) (from memory)
    assert np.isclose(np.abs(r[0, at].real).min(), 0, atol=1e-9)
    assert np.isclose(np.abs(r[0, at].imag).max(), np.sqrt(11), rtol=1e-9)


# ----------------------------------------------------------------------------- envelope

def test_envelope_merge_equals_concatenation():
    rng = np.random.default_rng(7)
    G = 40
    chunks = [rng.normal(size=(V, G)) for V in (5, 17, 1, 30)]
    chunks[1][2, 3] = np.nan
    chunks[2][0, :] = np.nan
    parts = [Envelope(G).update(c) for c in chunks]
    merged = parts[0]
    for p in parts[1:]:
        merged = merged.merge(p)
    whole = Envelope(G).update(np.concatenate(chunks))
    allv = np.concatenate(chunks)
    for a, b in ((merged.min, whole.min), (merged.max, whole.max), (merged.mean, whole.mean)):
        assert np.allclose(a, b, rtol=1e-14)
    assert np.allclose(merged.mean, np.nanmean(allv, axis=0), rtol=1e-13)
    assert np.array_equal(merged.min, np.nanmin(allv, axis=0))
    assert np.array_equal(merged.max, np.nanmax(allv, axis=0))
    assert np.array_equal(merged.count, np.sum(~np.isnan(allv), axis=0))
    # grouping does not matter
    other = parts[0].merge(parts[1].merge(parts[2].merge(parts[3])))
    assert np.allclose(other.mean, merged.mean, rtol=1e-14)


def test_envelope_from_roots_and_roundtrip():
    roots = np.array([[[-1 + 1j, -3 + 0j], [np.nan + 0j, -0.5 + 0j]],
                      [[-2 + 0j, 0.5 + 2j], [np.nan + 0j, np.nan + 0j]]])
    e = Envelope(2).update(roots)
    assert np.allclose(e.min, [-1.0, -0.5]) and np.allclose(e.max, [0.5, -0.5])
    assert np.allclose(e.mean, [-0.25, -0.5]) and list(e.count) == [2, 1]
    back = Envelope.from_arrays(**e.to_arrays())
    assert np.array_equal(back.mean, e.mean) and np.array_equal(back.min, e.min)
    empty = Envelope(3)
    assert np.isnan(empty.mean).all() and np.isnan(empty.min).all()
    assert np.isnan(Envelope.from_arrays(**empty.to_arrays()).max).all()
    with pytest.raises(ValueError):
        e.update(np.zeros((2, 3)))


# ----------------------------------------------------------------------------- kept loci

def test_kept_indices_random_independent_of_chunking():
    total = 1000
    kept = kept_indices(total, "random:25", seed=4)
    assert kept.size == 25 and np.all(np.diff(kept) > 0)
    assert np.array_equal(kept, kept_indices(total, "random", 25, seed=4))
    masks = [select_kept(None, np.arange(a, min(a + 64, total)), "random:25", seed=4, total=total)
             for a in range(0, total, 64)]
    assert np.array_equal(np.flatnonzero(np.concatenate(masks)), kept)
    assert kept_indices(10, "random:50", seed=1).size == 10
    assert not np.array_equal(kept, kept_indices(total, "random:25", seed=5))
    # the nominal (variant 0 here) is kept besides the 25 drawn
    labels = np.array(["nominal"] + ["lhs"] * (total - 1))
    with_nominal = kept_indices(total, "random:25", seed=4, design_labels=labels)
    assert np.array_equal(with_nominal, np.union1d(kept, [0]))
    masks = [select_kept(labels[a:a + 64], np.arange(a, min(a + 64, total)), "random:25", seed=4,
                         total=total) for a in range(0, total, 64)]
    assert np.array_equal(np.flatnonzero(np.concatenate(masks)), with_nominal)


def test_kept_indices_other_kinds():
    labels = np.array(["nominal", "corners", "corners", "random", "random"])
    assert list(kept_indices(5, "corners", design_labels=labels)) == [0, 1, 2]
    assert list(kept_indices(5, "all")) == [0, 1, 2, 3, 4]
    assert kept_indices(5, "none").size == 0
    m = select_kept(labels[2:], np.arange(2, 5), "corners")
    assert list(m) == [True, False, False]
    assert select_kept(labels, np.arange(5), "all").all()
    assert not select_kept(labels, np.arange(5), "none").any()
    for bad in ("some", "random:x", "random"):
        with pytest.raises(InputError):
            kept_indices(5, bad)
