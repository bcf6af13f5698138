"""Tests of sweep.intervals: every enclosure contains the point values it encloses."""
from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from sweep.intervals import Interval, hull, icos, iexp, ilog, isin, isqrt, itan

finite = st.floats(-50.0, 50.0, allow_nan=False, allow_infinity=False)


@st.composite
def interval_and_point(draw, lo_min=-50.0, hi_max=50.0):
    a = draw(st.floats(lo_min, hi_max))
    b = draw(st.floats(lo_min, hi_max))
    lo, hi = min(a, b), max(a, b)
    t = draw(st.floats(0.0, 1.0))
    x = min(max(lo + t * (hi - lo), lo), hi)
    return Interval(lo, hi), x


@settings(max_examples=200, deadline=None)
@given(interval_and_point(), interval_and_point(), st.sampled_from(["+", "-", "*", "/"]))
def test_arithmetic_contains_point_results(ax, by, op):
    a, x = ax
    b, y = by
    if op == "/":
        assume(y != 0.0)
    # reference: plain float arithmetic on the sampled points (from memory: an
    # enclosure must contain f(x, y) for every x in a, y in b)
    ref = {"+": x + y, "-": x - y, "*": x * y, "/": x / y if y else 0.0}[op]
    res = {"+": a + b, "-": a - b, "*": a * b, "/": a / b}[op]
    assert res.contains(ref)


@settings(max_examples=200, deadline=None)
@given(interval_and_point(-3.0, 3.0), st.integers(-4, 6))
def test_integer_power_contains(ax, n):
    a, x = ax
    assume(not (n < 0 and x == 0.0))
    try:
        ref = x ** n  # reference: Python float power
    except OverflowError:
        ref = math.inf
    assert (a ** n).contains(ref)


def test_even_power_straddling_zero_starts_at_zero():
    r = Interval(-2.0, 1.0) ** 2
    assert r.lo == 0.0 and r.hi >= 4.0
    r = Interval(-2.0, -1.0) ** 2
    assert r.lo <= 1.0 <= r.lo * (1 + 1e-14) and r.hi >= 4.0
    r = Interval(-2.0, 1.0) ** 3
    assert r.lo <= -8.0 and r.hi >= 1.0


@settings(max_examples=200, deadline=None)
@given(interval_and_point(0.01, 20.0), st.floats(-3.0, 3.0))
def test_real_power_contains(ax, p):
    a, x = ax
    assert (a ** p).contains(x ** p)
    # interval exponent route (exp/log)
    assert (a ** Interval(p)).contains(x ** p)
    assert (2.0 ** Interval(min(p, 0.0), max(p, 0.0))).contains(2.0 ** p)


@settings(max_examples=300, deadline=None)
@given(interval_and_point(-50.0, 50.0), st.sampled_from(["exp", "sin", "cos", "tan"]))
def test_functions_contain(ax, name):
    a, x = ax
    if name == "exp":
        assume(x < 700)
    fn = {"exp": iexp, "sin": isin, "cos": icos, "tan": itan}[name]
    ref = getattr(math, name)(x)  # reference: Python's math module (libm)
    assert fn(a).contains(ref)


@settings(max_examples=200, deadline=None)
@given(interval_and_point(1e-6, 1e6))
def test_sqrt_log_contain(ax):
    a, x = ax
    assert isqrt(a).contains(math.sqrt(x))
    assert ilog(a).contains(math.log(x))


def test_trig_extrema_inside():
    # from memory: sin peaks at pi/2, cos dips to -1 at pi
    assert isin(Interval(1.0, 2.0)).hi == 1.0
    assert icos(Interval(3.0, 3.3)).lo == -1.0
    r = isin(Interval(0.1, 0.2))
    assert r.lo <= math.sin(0.1) and r.hi >= math.sin(0.2) and r.hi < 0.3
    assert isin(Interval(0.0, 7.0)).lo == -1.0


def test_tan_pole_is_unbounded():
    r = itan(Interval(1.5, 1.7))  # holds pi/2
    assert r.lo == -np.inf and r.hi == np.inf
    r = itan(Interval(0.0, 1.0))
    assert np.isfinite(r.lo) and np.isfinite(r.hi)


def test_division_by_zero_interval_is_unbounded():
    r = Interval(1.0, 2.0) / Interval(-1.0, 1.0)
    assert r.lo == -np.inf and r.hi == np.inf
    r = 1.0 / Interval(0.0, 1.0)
    assert r.lo == -np.inf and r.hi == np.inf


def test_outward_rounding():
    r = Interval(0.1) + Interval(0.2)
    assert r.lo < 0.1 + 0.2 < r.hi
    r = Interval(1.0) * 3.0
    assert r.lo < 3.0 < r.hi


def test_domain_errors():
    with pytest.raises(ValueError):
        isqrt(Interval(-1.0, 1.0))
    with pytest.raises(ValueError):
        ilog(Interval(0.0, 1.0))
    with pytest.raises(ValueError):
        Interval(-1.0, 1.0) ** 0.5
    with pytest.raises(ValueError):
        Interval(2.0, 1.0)


def test_vectorised_with_arrays_both_sides():
    a = Interval(np.array([1.0, 2.0]), np.array([1.5, 3.0]))
    v = np.array([2.0, -1.0])
    for r in (a * v, v * a, a + v, v + a, v - a, a - v, v / a, a / v):
        assert isinstance(r, Interval) and r.shape == (2,)
    assert (v - a).contains(v - np.array([1.2, 2.5])).all()
    assert (v / a).contains(v / np.array([1.2, 2.5])).all()


def test_shape_getitem_mid_width_stack_hull():
    a = Interval(np.zeros((3, 2)), np.ones((3, 2)))
    assert a.shape == (3, 2)
    assert a[1].shape == (2,)
    assert np.all(a.mid == 0.5) and np.all(a.width >= 1.0)
    s = Interval.stack([Interval(0.0, 1.0), 2.0, Interval(np.array([3.0, 4.0]))], axis=-1)
    assert s.shape == (2, 3)
    assert s.contains(np.array([[0.5, 2.0, 3.0], [1.0, 2.0, 4.0]])).all()
    h = hull(Interval(0.0, 1.0), Interval(3.0, 4.0))
    assert h.lo == 0.0 and h.hi == 4.0
    f = Interval.from_bounds([0.0, 1.0], [2.0, 3.0])
    assert f.contains([1.0, 2.5]).all()
    assert f.contains([-1.0, 3.5]).tolist() == [False, False]


@pytest.mark.parametrize("magnitude", [1.0, 1e3, 1e6, 9e7, 1e12])
def test_trig_against_mpmath_at_large_arguments(magnitude):
    # reference: mpmath at 40 digits (the float reduction by 2*pi loses digits as |x| grows;
    # the enclosure must still hold the true values of the points it encloses)
    import mpmath

    mpmath.mp.dps = 40
    rng = np.random.default_rng(int(magnitude) % 1000)
    c = (rng.random(300) - 0.5) * 2 * magnitude
    w = 10 ** rng.uniform(-15, 0.5, 300) * max(1.0, magnitude) * 1e-3
    iv = Interval(c, c + w)
    for fn, ref in ((isin, mpmath.sin), (icos, mpmath.cos), (itan, mpmath.tan)):
        r = fn(iv)
        for j in range(c.size):
            for x in (iv.lo[j], 0.5 * (iv.lo[j] + iv.hi[j]), iv.hi[j]):
                v = ref(mpmath.mpf(float(x)))
                assert mpmath.mpf(float(r.lo[j])) <= v <= mpmath.mpf(float(r.hi[j])), (fn.__name__, x)
