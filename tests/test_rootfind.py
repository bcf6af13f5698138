"""Tests of the compiled polynomial root finder (sweep.rootfind)."""
from __future__ import annotations

import mpmath
import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from scipy.optimize import linear_sum_assignment

from sweep.rootfind import poly_roots


def matched_error(a: np.ndarray, b: np.ndarray) -> float:
    """Largest distance between two root sets after optimal matching."""
    cost = np.abs(a[:, None] - b[None, :])
    r, c = linear_sum_assignment(cost)
    return float(cost[r, c].max()) if len(r) else 0.0


def mp_roots(coeffs) -> np.ndarray:
    """Reference roots: mpmath.polyroots at 50 digits (mpmath, high precision)."""
    with mpmath.workdps(50):
        r = mpmath.polyroots([mpmath.mpf(float(c)) for c in coeffs], maxsteps=500, extraprec=400)
    return np.array([complex(x) for x in r])


def test_simple_quadratic_and_cubic():
    # (s-1)(s-2) and (s+1)(s^2+1): roots known exactly (from memory)
    r = poly_roots([[1.0, -3.0, 2.0, 0.0], [1.0, 1.0, 1.0, 1.0]])
    assert matched_error(r[0], np.array([1, 2, 0])) == 0.0
    assert matched_error(r[1], np.array([-1, 1j, -1j])) < 1e-15


def test_exact_zero_roots_from_trailing_zeros():
    r = poly_roots([[2.0, 3.0, 0.0, 0.0]])
    assert np.count_nonzero(r[0] == 0) == 2
    assert r[0][0] == -1.5


@pytest.mark.parametrize("degree", [1, 2, 3, 5, 6, 7, 9, 12])
def test_against_lapack_on_random_stacks(degree):
    # reference: numpy.linalg.eigvals of the same companion matrices (LAPACK)
    rng = np.random.default_rng(degree)
    C = rng.normal(size=(3000, degree + 1))
    C[:, 0] = np.where(np.abs(C[:, 0]) < 0.1, 1.0, C[:, 0])
    r = poly_roots(C)
    M = np.zeros((C.shape[0], degree, degree))
    M[:, 0, :] = -C[:, 1:] / C[:, :1]
    M[:, np.arange(1, degree), np.arange(degree - 1)] = 1.0
    e = np.linalg.eigvals(M)
    scale = np.abs(e).max(axis=1)
    err = np.array([matched_error(r[i], e[i]) for i in range(C.shape[0])]) / np.maximum(scale, 1)
    # well-separated random roots: both are backward stable, so they agree to rounding
    assert np.quantile(err, 0.99) < 1e-12
    assert np.all(np.isfinite(r))


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.floats(-50, 50).map(lambda x: round(x, 3)),
                          st.floats(0, 50).map(lambda x: round(x, 3))), min_size=1, max_size=6),
       st.floats(-6, 6))
def test_against_mpmath(pairs, log_scale):
    # roots placed on purpose (real or complex pairs), scaled over 12 decades
    scale = 10.0 ** log_scale
    roots = []
    for re, im in pairs:
        if im < 1:
            roots.append(re * scale)
        else:
            roots += [complex(re, im) * scale, complex(re, -im) * scale]
    c = np.real(np.poly(roots))
    ref = mp_roots(c)
    got = poly_roots(c[None, :])[0]
    # a backward-stable root finder: error bounded by the root's condition number
    # times eps (Wilkinson); clusters lose digits, so compare against that bound
    for z in got:
        i = np.argmin(np.abs(ref - z))
        dp = np.polyval(np.polyder(c), ref[i])
        bound = 1e3 * np.finfo(float).eps * np.polyval(np.abs(c), abs(ref[i])) / max(abs(dp), 1e-300)
        assert abs(z - ref[i]) <= max(bound, 1e-9 * np.abs(ref).max()) or abs(dp) < 1e-8


def test_wide_coefficient_spread_degree_12():
    # poles from 1e-3 to 1e3 rad/s: coefficients spread over many decades
    roots = -np.logspace(-3, 3, 12)
    c = np.poly(roots)
    got = np.sort(poly_roots(c[None, :])[0].real)
    np.testing.assert_allclose(got, np.sort(roots), rtol=1e-8)


def test_degrees_argument_skips_leading_entries():
    C = np.array([[0.0, 1.0, -3.0, 2.0], [1.0, -6.0, 11.0, -6.0]])
    r = poly_roots(C, degrees=[2, 3])
    assert np.isnan(r[0, 2])
    assert matched_error(r[0, :2], np.array([1, 2])) < 1e-14
    assert matched_error(r[1], np.array([1, 2, 3])) < 1e-13


def test_fallback_when_the_iteration_is_cut_short():
    # max_its=0 makes every QR iteration give up, so every row uses LAPACK
    rng = np.random.default_rng(0)
    C = rng.normal(size=(50, 7))
    fast = poly_roots(C)
    slow = poly_roots(C, max_its=0)
    assert np.all(np.isfinite(slow))
    for a, b in zip(fast, slow):
        assert matched_error(a, b) < 1e-10 * max(1.0, np.abs(b).max())


def test_nonfinite_row_is_nan_and_others_unaffected():
    C = np.array([[1.0, np.nan, 1.0], [1.0, 0.0, -4.0]])
    r = poly_roots(C)
    assert np.all(np.isnan(r[0]))
    assert matched_error(r[1], np.array([2, -2])) < 1e-15


def test_batched_equals_one_at_a_time():
    rng = np.random.default_rng(3)
    C = rng.normal(size=(40, 6))
    r = poly_roots(C)
    for i in range(C.shape[0]):
        assert np.array_equal(poly_roots(C[i:i + 1])[0], r[i])


def test_overflowing_companion_gives_nan_without_hanging():
    # 1e-160 s^2 + s + 1.4e157: the ratio 1.4e157 / 1e-160 overflows, so the
    # companion matrix holds inf; balancing it used to loop forever
    r = poly_roots(np.array([[1e-160, 1.0, 1.41421356e157], [1.0, -3.0, 2.0]]))
    assert np.all(np.isnan(r[0]))
    np.testing.assert_allclose(np.sort(r[1].real), [1.0, 2.0])  # (s - 1)(s - 2), by hand
    # the LAPACK fall-back (forced by allowing no QR iteration) leaves it NaN too
    r = poly_roots(np.array([[1e-160, 1.0, 1.41421356e157]]), max_its=0)
    assert np.all(np.isnan(r[0]))
