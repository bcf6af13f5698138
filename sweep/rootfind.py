"""Roots of stacks of small real polynomials, compiled with numba.

The analysis and the locus solve many small root problems: the open-loop
poles and zeros of every variant, the closed-loop poles at the operating
gain, the breakaway and axis-crossing polynomials, and the eigenvalue
fall-back of the continuation. `numpy.linalg.eigvals` on a stack of
companion matrices does this well, but for degree 2-12 most of its time is
per-matrix overhead around LAPACK. Here the same textbook method - the
eigenvalues of the (balanced) companion matrix by the double-shift
Hessenberg QR iteration - runs as one compiled loop over the stack, about
twice as fast (``benchmarks/bench_roots.py``), with the same backward
stability. Rows where the iteration does not converge are redone with
`numpy.linalg.eigvals`, so the result never depends on the fast path
succeeding.

References for the method (from memory): the balancing of Parlett and
Reinsch (1969) and the double-shift QR iteration for Hessenberg matrices
(Francis 1961/62) in the EISPACK ``balanc``/``hqr`` form, as described in
numerical-methods textbooks.

The ``@njit`` functions (`companion_roots`, `horner`, ...) are meant to be
called from other compiled kernels; `poly_roots` is the plain-array front.
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit

__all__ = ["poly_roots", "companion_roots", "MAX_QR_ITERATIONS"]

#: QR iterations allowed per eigenvalue before a row goes to the LAPACK fall-back
MAX_QR_ITERATIONS = 60


@njit(cache=True, error_model="numpy", inline="always")
def _sign(a: float, b: float) -> float:
    return abs(a) if b >= 0.0 else -abs(a)


@njit(cache=True, error_model="numpy")
def _balance(a) -> None:
    """Scale rows and columns of ``a`` in place by powers of two (exact) to equalise norms."""
    n = a.shape[0]
    radix = 2.0
    sqrdx = radix * radix
    done = False
    while not done:
        done = True
        for i in range(n):
            r = 0.0
            c = 0.0
            for j in range(n):
                if j != i:
                    c += abs(a[j, i])
                    r += abs(a[i, j])
            # an inf norm would never balance (inf / 4 stays inf): leave such rows
            if c != 0.0 and r != 0.0 and c < np.inf and r < np.inf:
                g = r / radix
                f = 1.0
                s = c + r
                while c < g:
                    f *= radix
                    c *= sqrdx
                g = r * radix
                while c > g:
                    f /= radix
                    c /= sqrdx
                if (c + r) / f < 0.95 * s:
                    done = False
                    g = 1.0 / f
                    for j in range(n):
                        a[i, j] *= g
                    for j in range(n):
                        a[j, i] *= f


@njit(cache=True, error_model="numpy")
def _hessenberg_qr(a, wr, wi, max_its: int) -> bool:
    """Eigenvalues of the upper Hessenberg matrix ``a`` (overwritten) into ``wr + i wi``.

    Double-shift QR with deflation on negligible subdiagonal entries and
    exceptional shifts after 10, 20 and 40 iterations. Returns False when an
    eigenvalue needs more than ``max_its`` iterations.
    """
    n = a.shape[0]
    anorm = 0.0
    for i in range(n):
        for j in range(max(i - 1, 0), n):
            anorm += abs(a[i, j])
    nn = n - 1
    t = 0.0
    x = y = z = w = p = q = r = s = 0.0
    while nn >= 0:
        its = 0
        while True:
            # look for a single small subdiagonal element
            l = nn
            while l >= 1:
                s = abs(a[l - 1, l - 1]) + abs(a[l, l])
                if s == 0.0:
                    s = anorm
                if abs(a[l, l - 1]) + s == s:
                    a[l, l - 1] = 0.0
                    break
                l -= 1
            x = a[nn, nn]
            if l == nn:                      # one root found
                wr[nn] = x + t
                wi[nn] = 0.0
                nn -= 1
            else:
                y = a[nn - 1, nn - 1]
                w = a[nn, nn - 1] * a[nn - 1, nn]
                if l == nn - 1:              # two roots found
                    p = 0.5 * (y - x)
                    q = p * p + w
                    z = math.sqrt(abs(q))
                    x += t
                    if q >= 0.0:             # a real pair
                        z = p + _sign(z, p)
                        wr[nn - 1] = x + z
                        wr[nn] = x + z
                        if z != 0.0:
                            wr[nn] = x - w / z
                        wi[nn - 1] = 0.0
                        wi[nn] = 0.0
                    else:                    # a complex pair
                        wr[nn - 1] = x + p
                        wr[nn] = x + p
                        wi[nn - 1] = -z
                        wi[nn] = z
                    nn -= 2
                else:                        # no roots found yet: iterate
                    if its >= max_its:
                        return False
                    if its == 10 or its == 20 or its == 40:   # exceptional shift
                        t += x
                        for i in range(nn + 1):
                            a[i, i] -= x
                        s = abs(a[nn, nn - 1]) + abs(a[nn - 1, nn - 2])
                        x = 0.75 * s
                        y = x
                        w = -0.4375 * s * s
                    its += 1
                    # two consecutive small subdiagonal elements
                    m = nn - 2
                    while m >= l:
                        z = a[m, m]
                        r = x - z
                        s = y - z
                        p = (r * s - w) / a[m + 1, m] + a[m, m + 1]
                        q = a[m + 1, m + 1] - z - r - s
                        r = a[m + 2, m + 1]
                        s = abs(p) + abs(q) + abs(r)
                        p /= s
                        q /= s
                        r /= s
                        if m == l:
                            break
                        u = abs(a[m, m - 1]) * (abs(q) + abs(r))
                        v = abs(p) * (abs(a[m - 1, m - 1]) + abs(z) + abs(a[m + 1, m + 1]))
                        if u + v == v:
                            break
                        m -= 1
                    for i in range(m + 2, nn + 1):
                        a[i, i - 2] = 0.0
                        if i != m + 2:
                            a[i, i - 3] = 0.0
                    # double QR step on rows l..nn, columns m..nn
                    for k in range(m, nn):
                        if k != m:
                            p = a[k, k - 1]
                            q = a[k + 1, k - 1]
                            r = 0.0
                            if k != nn - 1:
                                r = a[k + 2, k - 1]
                            x = abs(p) + abs(q) + abs(r)
                            if x != 0.0:
                                p /= x
                                q /= x
                                r /= x
                        s = _sign(math.sqrt(p * p + q * q + r * r), p)
                        if s != 0.0:
                            if k == m:
                                if l != m:
                                    a[k, k - 1] = -a[k, k - 1]
                            else:
                                a[k, k - 1] = -s * x
                            p += s
                            x = p / s
                            y = q / s
                            z = r / s
                            q /= p
                            r /= p
                            for j in range(k, nn + 1):
                                p = a[k, j] + q * a[k + 1, j]
                                if k != nn - 1:
                                    p += r * a[k + 2, j]
                                    a[k + 2, j] -= p * z
                                a[k + 1, j] -= p * y
                                a[k, j] -= p * x
                            mmin = nn if nn < k + 3 else k + 3
                            for i in range(l, mmin + 1):
                                p = x * a[i, k] + y * a[i, k + 1]
                                if k != nn - 1:
                                    p += z * a[i, k + 2]
                                    a[i, k + 2] -= p * r
                                a[i, k + 1] -= p * q
                                a[i, k] -= p
            if l >= nn - 1:
                break
    return True


@njit(cache=True, error_model="numpy")
def companion_roots(c, out, work, wr, wi, max_its: int) -> bool:
    """Roots of the real polynomial ``c`` (highest power first, ``c[0] != 0``) into ``out``.

    ``out`` (complex, length ``len(c) - 1``), ``work`` (at least
    ``(d, d)``), ``wr``, ``wi`` (at least ``d``) are caller-owned scratch so
    that a kernel calling this in a loop allocates nothing. Trailing zero
    coefficients give exact zero roots (placed last). Returns False when
    the QR iteration did not converge, a coefficient is not finite or a
    coefficient ratio of the companion matrix overflows; ``out`` is then NaN.
    """
    d = c.shape[0] - 1
    for j in range(d + 1):
        if not math.isfinite(c[j]):
            for i in range(d):
                out[i] = complex(math.nan, math.nan)
            return False
    # exact roots at the origin
    nz = 0
    while nz < d and c[d - nz] == 0.0:
        nz += 1
    e = d - nz
    for i in range(e, d):
        out[i] = 0j
    if e == 0:
        return True
    if e == 1:
        out[0] = complex(-c[1] / c[0], 0.0)
        return True
    a = work[:e, :e]
    for i in range(e):
        for j in range(e):
            a[i, j] = 0.0
    inv = 1.0 / c[0]
    for j in range(e):
        a[0, j] = -c[j + 1] * inv
    for j in range(e - 1):
        a[j + 1, j] = 1.0
    for j in range(e):
        if not math.isfinite(a[0, j]):
            # a coefficient ratio overflows: the companion matrix cannot hold
            # this polynomial (the caller must scale s first)
            for i in range(d):
                out[i] = complex(math.nan, math.nan)
            return False
    _balance(a)
    if not _hessenberg_qr(a, wr, wi, max_its):
        for i in range(d):
            out[i] = complex(math.nan, math.nan)
        return False
    for i in range(e):
        out[i] = complex(wr[i], wi[i])
    return True


@njit(cache=True, error_model="numpy")
def _roots_rows(C, degrees, out, max_its: int):
    V, w = C.shape
    d = w - 1
    work = np.empty((max(d, 1), max(d, 1)))
    wr = np.empty(max(d, 1))
    wi = np.empty(max(d, 1))
    ok = np.ones(V, dtype=np.bool_)
    for v in range(V):
        e = degrees[v]
        for i in range(e, d):
            out[v, i] = complex(math.nan, math.nan)
        if e <= 0:
            continue
        if not companion_roots(C[v, d - e:], out[v, :e], work, wr, wi, max_its):
            ok[v] = False
    return ok


def poly_roots(C, degrees=None, *, max_its: int = MAX_QR_ITERATIONS) -> np.ndarray:
    """Roots of every polynomial of a stack.

    Parameters
    ----------
    C
        ``(V, d+1)`` real coefficients, highest power first.
    degrees
        Optional ``(V,)`` actual degrees ``e <= d``: row ``v`` is the
        polynomial of its last ``e + 1`` coefficients (leading entries that
        the caller has judged to be zero are skipped). Default: ``d`` for
        every row, which needs ``C[:, 0] != 0``.
    max_its
        QR iterations allowed per eigenvalue (tests lower it to exercise the
        fall-back).

    Returns
    -------
    numpy.ndarray
        complex128 ``(V, d)``; row ``v`` holds its ``e`` roots first (in no
        particular order) and NaN in the last ``d - e`` slots. Rows where
        the compiled iteration fails are computed by `numpy.linalg.eigvals`
        on the companion matrix instead; rows whose companion matrix
        overflows (a coefficient ratio beyond the float range) stay NaN.

    Examples
    --------
    >>> r = poly_roots([[1.0, -3.0, 2.0]])
    >>> sorted(r[0].real.tolist())
    [1.0, 2.0]
    """
    C = np.ascontiguousarray(np.atleast_2d(np.asarray(C, dtype=np.float64)))
    V, w = C.shape
    d = w - 1
    if degrees is None:
        degrees = np.full(V, d, dtype=np.int64)
    else:
        degrees = np.ascontiguousarray(np.minimum(np.asarray(degrees, dtype=np.int64), d))
    out = np.empty((V, max(d, 0)), dtype=np.complex128)
    if d <= 0 or V == 0:
        return out
    ok = _roots_rows(C, degrees, out, int(max_its))
    bad = np.flatnonzero(~ok)
    if bad.size:
        out[bad] = _lapack_roots(C[bad], degrees[bad], d)
    return out


def _lapack_roots(C: np.ndarray, degrees: np.ndarray, d: int) -> np.ndarray:
    """Fall-back: companion eigenvalues by LAPACK, grouped by degree."""
    out = np.full((C.shape[0], d), np.nan + 1j * np.nan, dtype=np.complex128)
    for e in np.unique(degrees):
        if e <= 0:
            continue
        rows = np.flatnonzero(degrees == e)
        c = C[rows, d - e:]
        if not np.all(np.isfinite(c)):
            fin = np.all(np.isfinite(c), axis=1)
            rows, c = rows[fin], c[fin]
        M = np.zeros((rows.size, e, e))
        with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
            M[:, 0, :] = -c[:, 1:] / c[:, :1]
        M[:, np.arange(1, e), np.arange(e - 1)] = 1.0
        fin = np.all(np.isfinite(M[:, 0, :]), axis=1)  # an overflowing ratio stays NaN
        out[rows[fin], :e] = np.linalg.eigvals(M[fin])
    return out
