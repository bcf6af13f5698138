"""Coefficient-list polynomials and rational functions of s, generic over the coefficient type.

A polynomial is a Python list of coefficients, highest power of ``s`` first
(numpy order). A coefficient may be anything that supports ``+``, ``-`` and
``*``: a float, an ndarray ``(V,)`` (one value per variant) or an
`sweep.intervals.Interval`. Loops run over the degree only, so a whole chunk of
variants is handled by each arithmetic step.

Exact ``0`` and ``1`` coefficients (Python or numpy scalars) are short-cut: they
are skipped or passed through instead of multiplied, which keeps structural
zeros exact and avoids needless outward rounding of intervals.
"""
from __future__ import annotations

from typing import Any

import numpy as np

from .intervals import Interval, as_interval

__all__ = [
    "poly_add",
    "poly_sub",
    "poly_mul",
    "poly_scale",
    "poly_trim",
    "poly_neg",
    "Rational",
]

Coeff = Any
Poly = list


def _is_scalar(c: Any) -> bool:
    return isinstance(c, (int, float, np.integer, np.floating)) and not isinstance(c, bool)


def _is_zero(c: Any) -> bool:
    """True when `c` is exactly zero everywhere (structural zero)."""
    if _is_scalar(c):
        return c == 0
    if isinstance(c, Interval):
        return c.is_zero()
    if isinstance(c, np.ndarray):
        return bool(c.size > 0 and np.all(c == 0))
    return False


def _is_one(c: Any) -> bool:
    return _is_scalar(c) and c == 1


def _add(a: Coeff, b: Coeff) -> Coeff:
    if _is_scalar(a) and a == 0:
        return b
    if _is_scalar(b) and b == 0:
        return a
    return a + b


def _mul(a: Coeff, b: Coeff) -> Coeff:
    if _is_one(a):
        return b
    if _is_one(b):
        return a
    return a * b


def _same(a: Coeff, b: Coeff) -> bool:
    if a is b:
        return True
    if _is_scalar(a) and _is_scalar(b):
        return a == b
    if isinstance(a, Interval) and isinstance(b, Interval):
        return a.shape == b.shape and np.array_equal(a.lo, b.lo) and np.array_equal(a.hi, b.hi)
    if isinstance(a, np.ndarray) and isinstance(b, np.ndarray):
        return a.shape == b.shape and np.array_equal(a, b)
    return False


def poly_trim(p: Poly) -> Poly:
    """Drop leading coefficients that are exactly zero everywhere (keeps at least one)."""
    i = 0
    while i < len(p) - 1 and _is_zero(p[i]):
        i += 1
    return list(p[i:])


def poly_add(a: Poly, b: Poly) -> Poly:
    """Sum of two coefficient lists (aligned at the constant term), trimmed."""
    n = max(len(a), len(b))
    a = [0] * (n - len(a)) + list(a)
    b = [0] * (n - len(b)) + list(b)
    return poly_trim([_add(x, y) for x, y in zip(a, b)])


def poly_neg(a: Poly) -> Poly:
    """Negated coefficient list."""
    return [0 if (_is_scalar(x) and x == 0) else -x for x in a]


def poly_sub(a: Poly, b: Poly) -> Poly:
    """Difference ``a - b`` of two coefficient lists, trimmed."""
    return poly_add(a, poly_neg(b))


def poly_scale(a: Poly, c: Coeff) -> Poly:
    """Every coefficient of `a` times `c` (degree kept unless `c` is exactly 0)."""
    if _is_zero(c):
        return [0]
    return [0 if (_is_scalar(x) and x == 0) else _mul(x, c) for x in a]


def poly_mul(a: Poly, b: Poly) -> Poly:
    """Product of two coefficient lists (convolution, loops over the degrees), trimmed."""
    if len(a) == 1:
        return poly_trim(poly_scale(b, a[0]))
    if len(b) == 1:
        return poly_trim(poly_scale(a, b[0]))
    out: list = [0] * (len(a) + len(b) - 1)
    for i, x in enumerate(a):
        if _is_scalar(x) and x == 0:
            continue
        for j, y in enumerate(b):
            if _is_scalar(y) and y == 0:
                continue
            out[i + j] = _add(out[i + j], _mul(x, y))
    return poly_trim(out)


def _poly_same(a: Poly, b: Poly) -> bool:
    """Structurally identical denominators when no construction key is known.

    Only the same objects (or equal plain numbers) count: two Intervals that
    happen to have equal ends may stand for different parameter expressions,
    and merging them would not enclose the true sum.
    """
    if a is b:
        return True
    if len(a) != len(b):
        return False
    return all(x is y or (_is_scalar(x) and _is_scalar(y) and x == y) for x, y in zip(a, b))


def _as_rational(x: Any) -> "Rational":
    if isinstance(x, Rational):
        return x
    return Rational([x], [1])


# Construction keys: hashable descriptions of how a numerator / denominator
# was built from the expression tree. Equal keys mean equal polynomials, so
# the decision "same denominator, do not multiply" depends on the tree only
# and is the same for float, array and interval coefficients.
ONE = ("1",)


def _kmul(a: Any, b: Any) -> Any:
    if a is None or b is None:
        return None
    if a == ONE:
        return b
    if b == ONE:
        return a
    return ("*", a, b)


def _kop(op: str, *keys: Any) -> Any:
    return None if any(k is None for k in keys) else (op,) + keys


class Rational:
    """A rational function ``num(s) / den(s)`` with generic coefficients.

    Parameters
    ----------
    num, den
        Coefficient lists, highest power of s first. Coefficients may be
        floats, ndarrays ``(V,)`` or `Interval`s.
    num_key, den_key
        Optional hashable construction keys (set by
        `sweep.expressions.evaluate_rational`): equal den keys mean
        identical denominators. Without keys, only identical objects count.

    Notes
    -----
    No cancellation is ever done: a common factor stays (it is a closed-loop
    mode). Sums with identical denominators do not multiply them (no
    spurious poles); a constant denominator adds no poles either way.
    """

    __slots__ = ("num", "den", "num_key", "den_key")

    def __init__(self, num: Poly, den: Poly | None = None, *, num_key: Any = None, den_key: Any = None):
        self.num = poly_trim(list(num)) if len(num) else [0]
        self.den = poly_trim(list(den)) if den is not None and len(den) else [1]
        self.num_key = num_key
        self.den_key = den_key

    @classmethod
    def constant(cls, c: Coeff, key: Any = None) -> "Rational":
        """The constant rational function `c` (`key`: construction key of the value)."""
        return cls([c], [1], num_key=None if key is None else ("const", key), den_key=ONE)

    @classmethod
    def s(cls) -> "Rational":
        """The Laplace variable ``s``."""
        return cls([1, 0], [1], num_key=("s",), den_key=ONE)

    # --------------------------------------------------------------- degree
    @property
    def num_degree(self) -> int:
        """Structural degree of the numerator (after trimming exact zeros)."""
        return len(self.num) - 1

    @property
    def den_degree(self) -> int:
        """Structural degree of the denominator (after trimming exact zeros)."""
        return len(self.den) - 1

    @property
    def degree(self) -> tuple[int, int]:
        """``(num_degree, den_degree)``."""
        return (self.num_degree, self.den_degree)

    def __repr__(self) -> str:
        return f"Rational(num={self.num!r}, den={self.den!r})"

    # ------------------------------------------------------------ arithmetic
    def __neg__(self) -> "Rational":
        return Rational(poly_neg(self.num), self.den, num_key=_kop("-", self.num_key), den_key=self.den_key)

    def __pos__(self) -> "Rational":
        return self

    def __add__(self, other: Any) -> "Rational":
        o = _as_rational(other)
        if self.den_key is not None and o.den_key is not None:
            same = self.den_key == o.den_key
        else:
            same = _poly_same(self.den, o.den)
        if same:
            return Rational(poly_add(self.num, o.num), self.den,
                            num_key=_kop("+", self.num_key, o.num_key), den_key=self.den_key)
        nk = _kop("+", _kmul(self.num_key, o.den_key), _kmul(o.num_key, self.den_key))
        dk = _kmul(self.den_key, o.den_key)
        if len(o.den) == 1 and _is_one(o.den[0]):
            return Rational(poly_add(self.num, poly_mul(o.num, self.den)), self.den, num_key=nk, den_key=dk)
        if len(self.den) == 1 and _is_one(self.den[0]):
            return Rational(poly_add(poly_mul(self.num, o.den), o.num), o.den, num_key=nk, den_key=dk)
        # general a/b + c/d = (ad + cb)/(bd); a constant b or d adds no poles
        return Rational(
            poly_add(poly_mul(self.num, o.den), poly_mul(o.num, self.den)),
            poly_mul(self.den, o.den),
            num_key=nk,
            den_key=dk,
        )

    def __radd__(self, other: Any) -> "Rational":
        return _as_rational(other) + self

    def __sub__(self, other: Any) -> "Rational":
        return self + (-_as_rational(other))

    def __rsub__(self, other: Any) -> "Rational":
        return _as_rational(other) + (-self)

    def __mul__(self, other: Any) -> "Rational":
        o = _as_rational(other)
        return Rational(poly_mul(self.num, o.num), poly_mul(self.den, o.den),
                        num_key=_kmul(self.num_key, o.num_key), den_key=_kmul(self.den_key, o.den_key))

    def __rmul__(self, other: Any) -> "Rational":
        return _as_rational(other) * self

    def reciprocal(self) -> "Rational":
        """``den / num``."""
        return Rational(self.den, self.num, num_key=self.den_key, den_key=self.num_key)

    def __truediv__(self, other: Any) -> "Rational":
        o = _as_rational(other)
        return Rational(poly_mul(self.num, o.den), poly_mul(self.den, o.num),
                        num_key=_kmul(self.num_key, o.den_key), den_key=_kmul(self.den_key, o.num_key))

    def __rtruediv__(self, other: Any) -> "Rational":
        return _as_rational(other) / self

    def __pow__(self, n: int) -> "Rational":
        if not isinstance(n, (int, np.integer)) or isinstance(n, bool):
            raise TypeError("a rational function of s takes integer powers only")
        n = int(n)
        base = self if n >= 0 else self.reciprocal()
        n = abs(n)
        result = Rational([1], [1], num_key=ONE, den_key=ONE)
        # square-and-multiply: O(log n) polynomial products
        while n:
            if n & 1:
                result = result * base
            n >>= 1
            if n:
                base = base * base
        return result

    # ---------------------------------------------------------------- stacks
    @staticmethod
    def _stack_float(p: Poly, V: int) -> np.ndarray:
        cols = []
        for c in p:
            if isinstance(c, Interval):
                raise TypeError("interval coefficients: use stacked_interval")
            a = np.asarray(c, dtype=np.float64)
            if a.ndim > 1 or (a.ndim == 1 and a.shape[0] not in (1, V)):
                raise ValueError(f"coefficient of shape {a.shape} does not fit {V} variants")
            cols.append(np.broadcast_to(a.reshape(-1) if a.ndim else a, (V,)))
        out = np.stack(cols, axis=-1).astype(np.float64, copy=True)
        # structural cancellations, e.g. (s + 1) - s: zero for every variant
        i = 0
        while i < out.shape[1] - 1 and np.all(out[:, i] == 0.0):
            i += 1
        return np.ascontiguousarray(out[:, i:])

    def stacked(self, V: int) -> tuple[np.ndarray, np.ndarray]:
        """Float64 stacks ``(N, D)`` shaped ``(V, deg+1)``, highest power first.

        Scalar coefficients are broadcast to `V` rows; leading columns that
        are exactly zero for every variant are dropped. The caller checks
        degree invariance (a leading coefficient zero for some variants only).
        """
        return self._stack_float(self.num, V), self._stack_float(self.den, V)

    @staticmethod
    def _stack_interval(p: Poly, B: int) -> Interval:
        cols = []
        for c in p:
            iv = as_interval(c)
            if iv.ndim > 1 or (iv.ndim == 1 and iv.shape[0] not in (1, B)):
                raise ValueError(f"coefficient of shape {iv.shape} does not fit {B} boxes")
            if iv.ndim == 1 and iv.shape[0] == 1:
                iv = iv[0]
            cols.append(iv.broadcast_to((B,)))
        out = Interval.stack(cols, axis=-1)
        i = 0
        while i < out.shape[1] - 1 and np.all(out.lo[:, i] == 0.0) and np.all(out.hi[:, i] == 0.0):
            i += 1
        return Interval._raw(np.ascontiguousarray(out.lo[:, i:]), np.ascontiguousarray(out.hi[:, i:]))

    def stacked_interval(self, B: int) -> tuple[Interval, Interval]:
        """Interval stacks ``(N, D)`` with `lo`/`hi` arrays shaped ``(B, deg+1)``.

        Float or array coefficients become point intervals; leading columns
        that are exactly ``[0, 0]`` for every box are dropped.
        """
        return self._stack_interval(self.num, B), self._stack_interval(self.den, B)
