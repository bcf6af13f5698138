"""Tests of the Routh array and the Hurwitz route (sweep.routh)."""
from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from sweep.routh import (
    hurwitz_boundary_gains,
    hurwitz_determinants,
    hurwitz_matrix,
    routh_array,
    routh_rhp_count,
)


def eig_rhp(c):
    return int(np.sum(np.roots(c).real > 1e-9))


def test_routh_plain_cubic():
    # (s+1)^3: first column 1, 3, 8/3, 1 (hand computation, from memory)
    arr, cnt = routh_array([1, 3, 3, 1])
    assert cnt == 0
    np.testing.assert_allclose(arr[:, 0], [1, 3, 8 / 3, 1])


def test_routh_two_rhp_roots():
    # s^3 + s^2 + 2s + 24 = (s+3)(s^2-2s+8): two RHP roots (from memory)
    arr, cnt = routh_array([1, 1, 2, 24])
    assert cnt == 2 == eig_rhp([1, 1, 2, 24])


def test_routh_epsilon_rule():
    # s^5 + 2s^4 + 2s^3 + 4s^2 + 11s + 10: zero first entry in the s^3 row,
    # epsilon rule gives two sign changes (textbook example, from memory)
    c = [1, 2, 2, 4, 11, 10]
    arr, cnt = routh_array(c)
    assert cnt == 2 == eig_rhp(c)
    assert 0 < arr[2, 0] < 1e-6  # the epsilon stands in the s^3 row


def test_routh_epsilon_rule_second_example():
    # s^4 + s^3 + 2s^2 + 2s + 3: zero in the s^2 row, two RHP roots (from memory)
    c = [1, 1, 2, 2, 3]
    arr, cnt = routh_array(c)
    assert cnt == 2 == eig_rhp(c)


def test_routh_row_of_zeros_axis_pair():
    # s^3 + s^2 + 4s + 4 = (s+1)(s^2+4): the s^1 row vanishes, auxiliary s^2+4
    # gives roots +-2j on the axis; no sign change (from memory)
    arr, cnt = routh_array([1, 1, 4, 4])
    assert cnt == 0
    np.testing.assert_allclose(arr[2], [2.0, 0.0])  # derivative of s^2 + 4


def test_routh_row_of_zeros_symmetric_real_pair():
    # s^4 + s^3 - s - 1 = (s+1)(s-1)(s^2+s+1)? no: (s^3-1)(s+1) -> one RHP root.
    c = np.polymul([1, 0, 0, -1], [1, 1])
    arr, cnt = routh_array(c)
    assert cnt == eig_rhp(c) == 1


def test_routh_row_of_zeros_fourth_order():
    # s^5 + 7s^4 + 6s^3 + 42s^2 + 8s + 56 = (s+7)(s^4+6s^2+8): row of zeros at s^3,
    # auxiliary 7s^4 + 42 s^2 + 56, all four roots on the axis (from memory)
    c = np.polymul([1, 7], [1, 0, 6, 0, 8])
    arr, cnt = routh_array(c)
    assert cnt == 0 == eig_rhp(c)
    np.testing.assert_allclose(arr[2], [28.0, 84.0, 0.0])


def test_routh_stack_matches_single_and_flags():
    P = np.array([[1, 3, 3, 1], [1, 1, 2, 24], [1, 1, 4, 4], [1, -3, 3, -1]], float)
    cnt, zrow, eps = routh_rhp_count(P, return_flags=True)
    assert cnt.tolist() == [0, 2, 0, 3]
    assert zrow.tolist() == [False, False, True, False]
    for i in range(4):
        assert routh_array(P[i])[1] == cnt[i]


@settings(max_examples=200, deadline=None)
@given(st.lists(st.floats(-5, 5, allow_nan=False), min_size=1, max_size=9))
def test_routh_count_equals_eigenvalues(roots_re):
    # Build from roots so the count is known and nothing sits near the axis.
    rng = np.random.default_rng(len(roots_re))
    re = np.array([r if abs(r) > 0.05 else 0.05 + abs(r) for r in roots_re])
    roots = []
    for i, r in enumerate(re):
        if i % 3 == 2:
            w = rng.uniform(0.1, 3)
            roots += [r + 1j * w, r - 1j * w]
        else:
            roots.append(r)
    c = np.real(np.poly(roots)) * rng.uniform(0.1, 10)
    assert routh_rhp_count(c[None, :])[0] == int(np.sum(np.array(roots).real > 0))


def test_hurwitz_matrix_and_minors():
    # Hurwitz matrix of a3 s^3 + a2 s^2 + a1 s + a0 (from memory):
    # [[a2, a0, 0], [a3, a1, 0], [0, a2, a0]]
    H = hurwitz_matrix([1.0, 2.0, 3.0, 4.0])
    np.testing.assert_array_equal(H, [[2, 4, 0], [1, 3, 0], [0, 2, 4]])
    d = hurwitz_determinants([1.0, 2.0, 3.0, 4.0])
    np.testing.assert_allclose(d, [2, 2, 8])


def test_hurwitz_boundary_gains_classic():
    # 1/(s(s+1)(s+2)): K = 6 at w = sqrt 2 (from memory)
    g, w = hurwitz_boundary_gains([1.0], [1.0, 3.0, 2.0, 0.0])
    np.testing.assert_allclose(g, [6.0], rtol=1e-10)
    np.testing.assert_allclose(w, [np.sqrt(2)], rtol=1e-8)


def test_routh_array_rejects_zero_polynomial():
    with pytest.raises(ValueError):
        routh_array([0.0, 0.0])


def test_small_entries_of_a_wide_spread_polynomial_are_not_zeros():
    # degree 12, roots from 5e-5 to 6e3 rad/s: Routh entries span 14 decades. An
    # entry is zero only relative to the terms it is made of, so no epsilon rule
    # here. Reference: the exact Routh array (sympy rationals) has no sign change.
    import sympy as sp

    P = np.array([1.0, 13654.388172860454, 62406255.97369612, 107300210516.23595,
                  49102056984930.984, 8044470884945200.0, 4.344621513740299e+17,
                  5050724244686659.0, 29478514800156.25, 72151846874.73296, 62134608.96072394,
                  11445.117793433285, 4.273017608914708 + 0.155 * 15.92932265737683])
    c = [sp.Rational(x) for x in P]
    rows = [c[0::2] + [0] * 7, c[1::2] + [0] * 7]
    first = [rows[0][0], rows[1][0]]
    for _ in range(P.size - 2):
        a, b = rows[-2], rows[-1]
        rows.append([a[j + 1] - a[0] / b[0] * b[j + 1] for j in range(6)] + [0])
        first.append(rows[-1][0])
    assert all(x > 0 for x in first)
    cnt, zrow, eps = routh_rhp_count(P[None, :], return_flags=True)
    assert cnt[0] == 0 and not zrow[0] and not eps[0]
    arr, c2 = routh_array(P)
    assert c2 == 0
    np.testing.assert_allclose(arr[:, 0], [float(x) for x in first], rtol=1e-9)
