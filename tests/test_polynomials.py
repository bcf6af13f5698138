"""Tests of sweep.polynomials: generic coefficient lists and rational functions of s."""
from __future__ import annotations

import numpy as np
import pytest
import sympy
from hypothesis import given, settings
from hypothesis import strategies as st

from sweep.intervals import Interval
from sweep.polynomials import Rational, poly_add, poly_mul, poly_scale, poly_sub, poly_trim

coeffs = st.lists(st.floats(-10, 10, allow_nan=False), min_size=1, max_size=6)


@settings(max_examples=100, deadline=None)
@given(coeffs, coeffs)
def test_poly_ops_match_numpy(a, b):
    # reference: numpy.polymul / polyadd (common practice)
    np.testing.assert_allclose(np.polymul(a, b)[-len(poly_mul(a, b)):], poly_mul(a, b), rtol=1e-12, atol=1e-12)
    got = poly_add(a, b)
    ref = np.polyadd(a, b)
    np.testing.assert_allclose(ref[len(ref) - len(got):], got, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(np.polysub(a, b)[-len(poly_sub(a, b)):], poly_sub(a, b), atol=1e-12)


def test_poly_mul_against_sympy():
    # reference: sympy expansion (exact)
    s = sympy.Symbol("s")
    a, b = [2, -3, 5], [1, 0, 4, -1]
    ref = sympy.Poly(sympy.expand((2 * s**2 - 3 * s + 5) * (s**3 + 4 * s - 1)), s).all_coeffs()
    assert poly_mul(a, b) == [int(c) for c in ref]


def test_trim_and_scale():
    assert poly_trim([0, 0.0, 1, 2]) == [1, 2]
    assert poly_trim([0, 0]) == [0]
    assert poly_trim([np.zeros(3), np.ones(3)])[0] is not None and len(poly_trim([np.zeros(3), np.ones(3)])) == 1
    assert len(poly_trim([np.array([0.0, 1.0]), np.ones(2)])) == 2  # not zero for every variant: kept
    assert poly_scale([1, 2, 3], 2.0) == [2.0, 4.0, 6.0]


def test_generic_coefficients_arrays_and_intervals():
    a = [np.array([1.0, 2.0]), 3.0]
    b = [Interval(1.0, 1.1), np.array([0.5, -0.5])]
    p = poly_mul(a, b)
    # only coefficients that touch the interval become intervals
    assert len(p) == 3 and isinstance(p[0], Interval) and isinstance(p[1], Interval)
    np.testing.assert_array_equal(p[2], [1.5, -1.5])
    # point values lie inside the interval coefficients
    q = poly_mul([np.array([1.0, 2.0]), 3.0], [1.05, np.array([0.5, -0.5])])
    for ci, cp in zip(p[:2], q[:2]):
        assert ci.contains(cp).all()


def test_sums_do_not_add_spurious_poles():
    d = [1.0, 3.0, 2.0]
    r = Rational([1.0], d) + Rational([2.0, 1.0], d)
    assert r.den_degree == 2 and r.num == [2.0, 2.0]
    d2 = [1.0, 3.0, 2.0]  # structurally identical, another object
    r = Rational([1.0], d) + Rational([1.0], d2)
    assert r.den_degree == 2
    r = Rational([1.0, 0.0], [2.0]) + Rational([1.0], d)  # constant denominator
    assert r.den_degree == 2
    r = Rational([1.0], [1.0, 1.0]) + Rational([1.0], [1.0, 2.0])
    assert r.den_degree == 2  # general a/b + c/d


def test_division_and_powers():
    r = Rational([1.0, 2.0], [1.0, 0.0, 5.0]) / 4.0
    assert r.num_degree == 1 and r.den_degree == 2
    r = Rational([1.0, 1.0], [1.0]) ** -2
    assert r.num_degree == 0 and r.den_degree == 2
    np.testing.assert_allclose(r.den, [1.0, 2.0, 1.0])
    r = Rational.s() ** 3
    assert r.num == [1, 0, 0, 0]
    with pytest.raises(TypeError):
        Rational.s() ** 0.5


def test_rational_value_against_sympy():
    # reference: sympy (exact) value of a combination of rational functions
    s = sympy.Symbol("s")
    a = Rational([1.0, 2.0], [1.0, 3.0, 2.0])
    b = Rational([3.0], [1.0, 5.0])
    r = (a * b - a / b + 2.0) ** 2 - 1.0 / a
    sa = (s + 2) / (s**2 + 3 * s + 2)
    sb = 3 / (s + 5)
    sr = (sa * sb - sa / sb + 2) ** 2 - 1 / sa
    for s0 in (0.3 + 0.7j, -1.7 + 2.0j):
        got = np.polyval(r.num, s0) / np.polyval(r.den, s0)
        ref = complex(sr.subs(s, s0).evalf(30))
        assert got == pytest.approx(ref, rel=1e-11)


def test_stacked_broadcast_and_trim():
    V = 4
    k = np.linspace(1.0, 2.0, V)
    r = Rational([k, 1.0], [1, 0]) - Rational([k, 0.0], [1, 0])  # same den: (k s + 1 - k s)/s
    N, D = r.stacked(V)
    assert N.shape == (V, 1) and D.shape == (V, 2)
    np.testing.assert_array_equal(N[:, 0], 1.0)
    assert N.dtype == np.float64 and D.dtype == np.float64


def test_stacked_interval():
    B = 3
    lo = np.array([1.0, 2.0, 3.0])
    r = Rational([Interval(lo, lo + 0.5), 2.0], [1, np.array([4.0, 5.0, 6.0]), 0])
    N, D = r.stacked_interval(B)
    assert N.shape == (B, 2) and D.shape == (B, 3)
    assert np.all(N.lo[:, 1] == 2.0) and np.all(D.hi[:, 2] == 0.0)
    with pytest.raises(TypeError):
        r.stacked(B)
