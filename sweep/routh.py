"""Routh array and Hurwitz determinants of characteristic polynomials.

Two independent stability tests of ``P(s) = a_n s^n + ... + a_0`` (coefficients
highest power first, numpy order):

* the Routh array, whose first column changes sign once per right-half-plane
  root (with the epsilon rule for a zero first entry and the
  auxiliary-polynomial rule for a whole row of zeros), vectorised over a stack
  of polynomials in `routh_rhp_count`;
* the Hurwitz matrix and its leading principal minors, and from them the
  boundary gains of a pencil ``D + sigma k N`` as the real roots in ``k`` of
  ``Delta_(n-1)`` (eigenvalues of the linear matrix pencil
  ``H_(n-1)(D) + k H_(n-1)(sigma N)``), of ``a_0(k)`` and of ``a_n(k)``
  (`hurwitz_boundary_gains`).

The analysis module classifies stable intervals with the Routh count; the
Hurwitz route is an independent cross-check used by the tests.
"""
from __future__ import annotations

import math

import numpy as np

__all__ = [
    "routh_array",
    "routh_rhp_count",
    "hurwitz_matrix",
    "hurwitz_determinants",
    "hurwitz_boundary_gains",
]

# An entry is "zero" when it is this small relative to the magnitude of the
# terms it was computed from (the same recursion on absolute values), so a
# genuinely small entry of a polynomial with widely spread coefficients is
# not mistaken for a zero; an input coefficient is zero only when it is 0.
_ZERO_RTOL = 1e-11
# Value of epsilon (relative to the row above) for the epsilon rule.
_EPSILON = 1e-9


def _routh_core(P: np.ndarray, keep_rows: bool):
    """Routh array of a stack ``(V, n+1)``; returns first column, rows, flags.

    Rows are held transposed, ``(width, V)``, so every entry of a row is a
    contiguous vector over the stack. Beside every row runs the same
    recursion on absolute values (``mprev``, ``mcur``): the size of the terms
    an entry is made of, against which it is judged to be zero.
    """
    P = np.asarray(P, dtype=float)
    V, n1 = P.shape
    n = n1 - 1
    width = n // 2 + 1
    Pt = np.ascontiguousarray(P.T)
    r0 = np.zeros((width, V))
    r1 = np.zeros((width, V))
    r0[: len(range(0, n1, 2))] = Pt[0::2]
    r1[: len(range(1, n1, 2))] = Pt[1::2]
    first = np.empty((n1, V))
    first[0] = r0[0]
    zero_row = np.zeros(V, dtype=bool)  # an auxiliary polynomial appeared
    used_eps = np.zeros(V, dtype=bool)
    rows = [r0.T.copy()] if keep_rows else None
    prev, cur = r0, r1
    mprev, mcur = np.abs(r0), np.abs(r1)
    scale = np.abs(prev).max(axis=0)
    for i in range(n):
        # `cur` is the row of power n-1-i, `prev` the row of power n-i.
        is_zero = np.abs(cur) <= _ZERO_RTOL * mcur
        all_zero = is_zero.all(axis=0)
        if all_zero.any():
            # Row of zeros: replace by the derivative of the auxiliary polynomial
            # built from the row above (powers n-i, n-i-2, ...).
            powers = np.clip((n - i) - 2 * np.arange(width), 0, None).astype(float)
            cur = np.where(all_zero[None, :], prev * powers[:, None], cur)
            mcur = np.where(all_zero[None, :], mprev * powers[:, None], mcur)
            zero_row |= all_zero
            is_zero[0] = np.abs(cur[0]) <= _ZERO_RTOL * mcur[0]
        small_first = is_zero[0]
        if small_first.any():
            # Epsilon rule: a small positive number stands for the zero entry.
            cur = cur.copy()
            mcur = mcur.copy()
            cur[0] = np.where(small_first, _EPSILON * np.where(scale > 0, scale, 1.0), cur[0])
            mcur[0] = np.where(small_first, np.abs(cur[0]), mcur[0])
            used_eps |= small_first
        first[i + 1] = cur[0]
        if keep_rows:
            rows.append(cur.T.copy())
        if i < n - 1:
            ratio = prev[0] / cur[0]
            new = np.zeros((width, V))
            new[:-1] = prev[1:] - ratio * cur[1:]
            mnew = np.zeros((width, V))
            mnew[:-1] = mprev[1:] + np.abs(ratio) * mcur[1:]
            scale = np.abs(cur).max(axis=0)
            prev, cur, mprev, mcur = cur, new, mcur, mnew
    return first.T, rows, zero_row, used_eps


def _sign_changes(first: np.ndarray) -> np.ndarray:
    s = np.sign(first)
    return np.sum(s[:, 1:] * s[:, :-1] < 0, axis=1)


def routh_array(coeffs) -> tuple[np.ndarray, int]:
    """Routh array of one polynomial and its number of right-half-plane roots.

    Parameters
    ----------
    coeffs
        Coefficients ``a_n ... a_0``, highest power first, ``a_n != 0``.

    Returns
    -------
    array
        ``(n+1, n//2+1)`` array, row ``i`` belongs to ``s^(n-i)``. A zero first
        entry is shown replaced by a small epsilon; a row of zeros is shown
        replaced by the derivative of the auxiliary polynomial above it.
    rhp_count
        Sign changes in the first column (roots with positive real part; roots
        on the imaginary axis show up through the auxiliary polynomial, not
        here).

    Examples
    --------
    >>> routh_array([1.0, 3.0, 3.0, 1.0])[1]
    0
    """
    c = np.atleast_1d(np.asarray(coeffs, dtype=float))
    if c.ndim != 1 or not np.all(np.isfinite(c)):
        raise ValueError("routh_array needs one list of finite coefficients")
    c = np.trim_zeros(c, "f")
    if c.size == 0:
        raise ValueError("routh_array needs a nonzero polynomial")
    first, rows, _, _ = _routh_core(c[None, :], keep_rows=True)
    arr = np.stack([r[0] for r in rows])
    return arr, int(_sign_changes(first)[0])


def routh_rhp_count(P: np.ndarray, *, return_flags: bool = False):
    """Right-half-plane root counts of a stack of polynomials by the Routh array.

    Parameters
    ----------
    P
        ``(V, n+1)`` coefficients, highest power first, leading entries nonzero.
    return_flags
        Also return ``(axis_suspect, used_epsilon)`` boolean arrays: a row of
        zeros appeared (roots symmetric about the origin, possibly on the
        imaginary axis), or the epsilon rule was used.

    Returns
    -------
    ndarray of int
        ``(V,)`` counts (with flags if asked).
    """
    P = np.asarray(P, dtype=float)
    if P.ndim == 1:
        P = P[None, :]
    first, _, zero_row, used_eps = _routh_core(P, keep_rows=False)
    count = _sign_changes(first)
    if return_flags:
        return count, zero_row, used_eps
    return count


def hurwitz_matrix(coeffs) -> np.ndarray:
    """Hurwitz matrix of a polynomial or a stack of polynomials.

    Parameters
    ----------
    coeffs
        ``(..., n+1)`` coefficients ``a_n ... a_0`` highest power first.

    Returns
    -------
    ndarray
        ``(..., n, n)``; entry ``(i, j)`` is the coefficient at index
        ``2(j+1) - (i+1)`` of the list ``a_n, a_(n-1), ...`` (0 outside).
    """
    c = np.asarray(coeffs, dtype=float)
    n = c.shape[-1] - 1
    H = np.zeros(c.shape[:-1] + (n, n))
    for i in range(n):
        for j in range(n):
            idx = 2 * j + 1 - i
            if 0 <= idx <= n:
                H[..., i, j] = c[..., idx]
    return H


def hurwitz_determinants(coeffs) -> np.ndarray:
    """Leading principal minors ``Delta_1 ... Delta_n`` of the Hurwitz matrix.

    Parameters
    ----------
    coeffs
        ``(..., n+1)`` coefficients highest power first.

    Returns
    -------
    ndarray
        ``(..., n)``; with ``a_n > 0`` the polynomial is stable exactly when
        all are positive.
    """
    H = hurwitz_matrix(coeffs)
    n = H.shape[-1]
    return np.stack([np.linalg.det(H[..., : i + 1, : i + 1]) for i in range(n)], axis=-1)


def hurwitz_boundary_gains(num, den, *, sigma: float = 1.0, gain_range=(0.0, math.inf)):
    """Boundary gains of one loop from Hurwitz determinants (validation route).

    The Hurwitz matrix of ``P(s, k) = D + sigma k N`` is linear in ``k``,
    ``H(P) = H(D) + k H(sigma N)``, so the roots in ``k`` of
    ``Delta_(n-1)(k) = det(H_(n-1)(D) + k H_(n-1)(sigma N))`` are the
    eigenvalues of a matrix pencil, found by the QZ algorithm
    (`scipy.linalg.eigvals`) without forming the polynomial. Its real roots
    where ``P`` really has a pair ``+-jw`` (not a real pair ``+-a``) are
    boundary gains, together with the roots of ``a_0(k)`` and ``a_n(k)``.

    Parameters
    ----------
    num, den
        Coefficient lists of ``N`` and ``D`` (highest power first).
    sigma
        ``+1`` negative feedback, ``-1`` positive.
    gain_range
        ``(lo, hi)``; only gains strictly inside count.

    Returns
    -------
    gains, frequencies
        Sorted 1-D arrays (frequency 0 for the origin, inf for infinity); two
        pairs crossing at one gain give the gain twice.
    """
    from scipy.linalg import eigvals

    N = np.trim_zeros(np.asarray(num, dtype=float), "f")
    D = np.trim_zeros(np.asarray(den, dtype=float), "f")
    n = D.size - 1
    Np = np.zeros(n + 1)
    Np[n + 1 - N.size:] = N
    lo, hi = gain_range
    found: list[tuple[float, float]] = []

    def inside(k):
        return np.isfinite(k) and lo < k < hi

    if Np[-1] != 0:
        k = -D[-1] / (sigma * Np[-1])
        if inside(k):
            found.append((k, 0.0))
    if Np[0] != 0:
        k = -D[0] / (sigma * Np[0])
        if inside(k):
            found.append((k, math.inf))
    if n >= 2:
        # scale s = w0 t (w0 the geometric mean of the moduli of the nonzero roots
        # of D) and both polynomials to unit size, then equilibrate the rows and
        # columns of the pencil (powers of two): none of it moves the roots in k
        # (gains scale by cD / cN), all of it helps the QZ algorithm
        nz = np.flatnonzero(D)
        low = nz[-1]
        w0 = (abs(D[low]) / abs(D[0])) ** (1.0 / (low)) if low > 0 else 1.0
        pw = np.arange(n, -1, -1)
        Dt, Nt = D * w0 ** pw, Np * w0 ** pw
        cD, cN = np.max(np.abs(Dt)), np.max(np.abs(Nt))
        A = hurwitz_matrix(Dt / cD)[: n - 1, : n - 1]
        B = hurwitz_matrix(sigma * Nt / cN)[: n - 1, : n - 1]
        for _ in range(8):
            M = np.abs(A) + np.abs(B)
            r = np.exp2(-np.round(np.log2(np.maximum(M.max(axis=1), 1e-300))))
            A, B = A * r[:, None], B * r[:, None]
            M = np.abs(A) + np.abs(B)
            c = np.exp2(-np.round(np.log2(np.maximum(M.max(axis=0), 1e-300))))
            A, B = A * c[None, :], B * c[None, :]
        with np.errstate(all="ignore"):
            ks = eigvals(A, -B) * (cD / cN)
        ks = ks[np.isfinite(ks) & (np.abs(ks.imag) <= 1e-7 * np.abs(ks))].real
        seen: list[float] = []
        for k in np.sort(ks):
            if not inside(k) or any(abs(k - q) <= 1e-9 * abs(q) for q in seen):
                continue
            seen.append(k)
            r = np.roots(D + sigma * k * Np)
            # an axis pair has a (relatively) zero real part; a real pair +-a does not
            axis = np.sort(r[(np.abs(r.real) <= 1e-6 * np.abs(r)) & (r.imag > 0)].imag)
            for i, w in enumerate(axis):
                if i == 0 or w > axis[i - 1] * (1 + 1e-6):
                    found.append((float(k), float(w)))
    found.sort()
    g = np.array([f[0] for f in found], dtype=float)
    w = np.array([f[1] for f in found], dtype=float)
    return g, w
