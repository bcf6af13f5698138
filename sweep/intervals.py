"""Vectorised interval arithmetic with outward rounding.

An `Interval` holds two float64 arrays `lo` and `hi` of one shape (0-d for a
scalar interval). Every operation rounds the lower end down and the upper end
up with `numpy.nextafter`, so the result encloses every true value of the
operation applied to points of the operands. Elementary functions (exp, log,
sin, ...) come from libm, which is not correctly rounded, so their results
are widened by a few ulps more.

Domain rules (documented choice): `isqrt` needs `lo >= 0`, `ilog` needs
`lo > 0`, and a real (non-integer) power needs a non-negative base (positive
for a negative or interval exponent); otherwise `ValueError` is raised. The
config layer checks the domain over the whole box first, so this error means
a bug or a box that reaches outside the domain.
"""
from __future__ import annotations

from typing import Any, Sequence

import numpy as np

__all__ = [
    "Interval",
    "hull",
    "isqrt",
    "iexp",
    "ilog",
    "isin",
    "icos",
    "itan",
]

_INF = np.inf
# libm functions are accurate to a few ulps (numpy's SIMD versions promise <= 4).
_LIBM_ULPS = 4


def _down(x: np.ndarray, n: int = 1) -> np.ndarray:
    for _ in range(n):
        x = np.nextafter(x, -_INF)
    return x


def _up(x: np.ndarray, n: int = 1) -> np.ndarray:
    for _ in range(n):
        x = np.nextafter(x, _INF)
    return x


def _as_float(x: Any) -> np.ndarray:
    return np.asarray(x, dtype=np.float64)


class Interval:
    """A (stack of) closed interval(s) ``[lo, hi]``.

    Parameters
    ----------
    lo
        Lower ends (scalar or array).
    hi
        Upper ends, broadcast against `lo`; `None` makes a point interval.

    Notes
    -----
    ``lo > hi`` anywhere raises `ValueError`; NaN ends are not allowed.
    Operations with ndarrays dispatch to `Interval` (``__array_ufunc__ = None``)
    so ``ndarray * Interval`` is an `Interval`.
    """

    __array_ufunc__ = None  # make numpy defer to our reflected operators
    __slots__ = ("lo", "hi")

    def __init__(self, lo: Any, hi: Any = None):
        lo = _as_float(lo)
        hi = lo if hi is None else _as_float(hi)
        if lo.shape != hi.shape:
            lo, hi = np.broadcast_arrays(lo, hi)
        if np.isnan(lo).any() or np.isnan(hi).any():
            raise ValueError("interval ends must not be NaN")
        if (lo > hi).any():
            raise ValueError("interval with lo > hi")
        self.lo = np.array(lo, dtype=np.float64)
        self.hi = np.array(hi, dtype=np.float64)

    @classmethod
    def _raw(cls, lo: np.ndarray, hi: np.ndarray) -> "Interval":
        """Build without checks (ends already valid)."""
        out = cls.__new__(cls)
        out.lo = lo
        out.hi = hi
        return out

    @classmethod
    def from_bounds(cls, lo: Any, hi: Any) -> "Interval":
        """Interval with the given lower and upper ends (checked, broadcast)."""
        return cls(lo, hi)

    @staticmethod
    def stack(items: Sequence["Interval | float | np.ndarray"], axis: int = -1) -> "Interval":
        """Stack intervals (or numbers) along a new axis, like `numpy.stack`.

        Parameters
        ----------
        items
            Intervals, floats or arrays of broadcast-compatible shapes.
        axis
            Position of the new axis in the result.
        """
        ivs = [as_interval(x) for x in items]
        shape = np.broadcast_shapes(*(iv.shape for iv in ivs))
        lo = np.stack([np.broadcast_to(iv.lo, shape) for iv in ivs], axis=axis)
        hi = np.stack([np.broadcast_to(iv.hi, shape) for iv in ivs], axis=axis)
        return Interval._raw(lo, hi)

    def broadcast_to(self, shape: tuple[int, ...]) -> "Interval":
        """This interval broadcast to `shape` (copies)."""
        return Interval._raw(np.array(np.broadcast_to(self.lo, shape)), np.array(np.broadcast_to(self.hi, shape)))

    # ------------------------------------------------------------------ info
    @property
    def shape(self) -> tuple[int, ...]:
        """Shape of the `lo`/`hi` arrays."""
        return self.lo.shape

    @property
    def ndim(self) -> int:
        """Number of array dimensions."""
        return self.lo.ndim

    @property
    def mid(self) -> np.ndarray:
        """Midpoints (float64; finite when both ends are finite)."""
        with np.errstate(invalid="ignore", over="ignore"):
            m = 0.5 * self.lo + 0.5 * self.hi
        return m

    @property
    def width(self) -> np.ndarray:
        """Widths ``hi - lo`` (rounded up)."""
        with np.errstate(invalid="ignore", over="ignore"):
            return _up(self.hi - self.lo)

    def contains(self, x: Any) -> np.ndarray:
        """Elementwise ``lo <= x <= hi`` (bool array)."""
        x = _as_float(x)
        return (self.lo <= x) & (x <= self.hi)

    def __getitem__(self, key: Any) -> "Interval":
        return Interval._raw(self.lo[key], self.hi[key])

    def __len__(self) -> int:
        return len(self.lo)

    def __repr__(self) -> str:
        if self.lo.ndim == 0:
            return f"Interval({float(self.lo)!r}, {float(self.hi)!r})"
        return f"Interval(lo={self.lo!r}, hi={self.hi!r})"

    def is_zero(self) -> bool:
        """True when every element is exactly ``[0, 0]``."""
        return bool(np.all(self.lo == 0.0) and np.all(self.hi == 0.0))

    # ------------------------------------------------------------ arithmetic
    def __neg__(self) -> "Interval":
        return Interval._raw(-self.hi, -self.lo)  # exact

    def __pos__(self) -> "Interval":
        return self

    def __add__(self, other: Any) -> "Interval":
        o = as_interval(other)
        with np.errstate(invalid="ignore", over="ignore"):
            lo = _down(self.lo + o.lo)
            hi = _up(self.hi + o.hi)
        # inf + -inf only arises from unbounded operands: the sum is unbounded
        lo = np.where(np.isnan(lo), -_INF, lo)
        hi = np.where(np.isnan(hi), _INF, hi)
        return Interval._raw(lo, hi)

    __radd__ = __add__

    def __sub__(self, other: Any) -> "Interval":
        return self + (-as_interval(other))

    def __rsub__(self, other: Any) -> "Interval":
        return as_interval(other) + (-self)

    def __mul__(self, other: Any) -> "Interval":
        o = as_interval(other)
        with np.errstate(invalid="ignore", over="ignore"):
            p = [self.lo * o.lo, self.lo * o.hi, self.hi * o.lo, self.hi * o.hi]
        # 0 * inf: in interval arithmetic a zero end times anything is 0
        p = [np.where(np.isnan(q), 0.0, q) for q in p]
        lo = _down(np.minimum(np.minimum(p[0], p[1]), np.minimum(p[2], p[3])))
        hi = _up(np.maximum(np.maximum(p[0], p[1]), np.maximum(p[2], p[3])))
        return Interval._raw(lo, hi)

    __rmul__ = __mul__

    def reciprocal(self) -> "Interval":
        """``1 / self``; unbounded ``[-inf, inf]`` where the interval holds 0."""
        has_zero = (self.lo <= 0.0) & (self.hi >= 0.0)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            lo = _down(1.0 / self.hi)
            hi = _up(1.0 / self.lo)
        lo = np.where(has_zero, -_INF, lo)
        hi = np.where(has_zero, _INF, hi)
        return Interval._raw(lo, hi)

    def __truediv__(self, other: Any) -> "Interval":
        return self * as_interval(other).reciprocal()

    def __rtruediv__(self, other: Any) -> "Interval":
        return as_interval(other) * self.reciprocal()

    def _int_pow(self, n: int) -> "Interval":
        if n == 0:
            return Interval._raw(np.ones(self.shape), np.ones(self.shape))
        if n < 0:
            return self._int_pow(-n).reciprocal()
        if n == 1:
            return self
        with np.errstate(over="ignore"):
            a = np.power(self.lo, n)
            b = np.power(self.hi, n)
        # pow() is not correctly rounded for every n: widen like a libm call
        if n % 2 == 1:  # odd: monotone increasing
            return Interval._raw(_down(a, _LIBM_ULPS), _up(b, _LIBM_ULPS))
        lo = np.where(self.lo >= 0.0, a, np.where(self.hi <= 0.0, b, 0.0))
        hi = np.where(self.lo >= 0.0, b, np.where(self.hi <= 0.0, a, np.maximum(a, b)))
        straddle = (self.lo < 0.0) & (self.hi > 0.0)
        lo = np.where(straddle, 0.0, np.maximum(_down(lo, _LIBM_ULPS), 0.0))
        return Interval._raw(lo, _up(hi, _LIBM_ULPS))

    def __pow__(self, exponent: Any) -> "Interval":
        if isinstance(exponent, Interval):
            return iexp(exponent * ilog(self))
        if isinstance(exponent, (int, np.integer)):
            return self._int_pow(int(exponent))
        e = _as_float(exponent)
        if e.ndim == 0:
            ef = float(e)
            if ef.is_integer() and abs(ef) < 2**31:
                return self._int_pow(int(ef))
            if not np.isfinite(ef):
                raise ValueError("interval power with a non-finite exponent")
            if ef > 0:
                if (self.lo < 0.0).any():
                    raise ValueError("real power of an interval that reaches below 0")
            elif (self.lo <= 0.0).any():
                raise ValueError("negative real power of an interval that reaches 0 or below")
            with np.errstate(over="ignore", divide="ignore"):
                a = np.power(self.lo, ef)
                b = np.power(self.hi, ef)
            lo, hi = (a, b) if ef > 0 else (b, a)
            return Interval._raw(np.maximum(_down(lo, _LIBM_ULPS), 0.0), _up(hi, _LIBM_ULPS))
        # array exponent: general route through exp/log
        return iexp(Interval(e) * ilog(self))

    def __rpow__(self, base: Any) -> "Interval":
        return as_interval(base) ** self


def as_interval(x: Any) -> Interval:
    """`x` itself if it is an `Interval`, else the point interval ``[x, x]``."""
    if isinstance(x, Interval):
        return x
    return Interval(x)


def hull(a: Any, b: Any) -> Interval:
    """Elementwise interval hull (smallest interval holding both)."""
    a = as_interval(a)
    b = as_interval(b)
    return Interval._raw(np.minimum(a.lo, b.lo), np.maximum(a.hi, b.hi))


# ------------------------------------------------------------ elementary functions
def isqrt(x: Any) -> Interval:
    """Square root enclosure; `ValueError` if any lower end is below 0."""
    x = as_interval(x)
    if (x.lo < 0.0).any():
        raise ValueError("sqrt of an interval that reaches below 0")
    # sqrt is correctly rounded (IEEE), one ulp is enough
    return Interval._raw(np.maximum(_down(np.sqrt(x.lo)), 0.0), _up(np.sqrt(x.hi)))


def iexp(x: Any) -> Interval:
    """Exponential enclosure."""
    x = as_interval(x)
    with np.errstate(over="ignore"):
        lo = np.maximum(_down(np.exp(x.lo), _LIBM_ULPS), 0.0)
        hi = _up(np.exp(x.hi), _LIBM_ULPS)
    return Interval._raw(lo, hi)


def ilog(x: Any) -> Interval:
    """Natural logarithm enclosure; `ValueError` if any lower end is <= 0."""
    x = as_interval(x)
    if (x.lo <= 0.0).any():
        raise ValueError("log of an interval that reaches 0 or below")
    return Interval._raw(_down(np.log(x.lo), _LIBM_ULPS), _up(np.log(x.hi), _LIBM_ULPS))


# Beyond this magnitude the argument reduction with a float pi is too coarse
# to locate extrema reliably; fall back to the trivial enclosure.
_TRIG_LIMIT = 1.0e8


def _has_point(lo: np.ndarray, hi: np.ndarray, offset: float, period: float) -> np.ndarray:
    """Whether [lo, hi] (slightly widened) holds ``offset + k*period`` for an integer k.

    The widening makes the test err on the side of "yes", which only widens
    the enclosure (never unsound).
    """
    margin = 1e-13 * np.maximum(1.0, np.maximum(np.abs(lo), np.abs(hi)))
    k = np.ceil((lo - margin - offset) / period)
    return offset + k * period <= hi + margin


def _trig(x: Interval, fn, max_offset: float, min_offset: float) -> Interval:
    lo, hi = x.lo, x.hi
    with np.errstate(invalid="ignore"):
        a = fn(lo)
        b = fn(hi)
    low = _down(np.minimum(a, b), _LIBM_ULPS)
    high = _up(np.maximum(a, b), _LIBM_ULPS)
    wide = ~np.isfinite(lo) | ~np.isfinite(hi) | (hi - lo >= 2 * np.pi) | (np.maximum(np.abs(lo), np.abs(hi)) > _TRIG_LIMIT)
    with np.errstate(invalid="ignore"):
        has_max = wide | _has_point(lo, hi, max_offset, 2 * np.pi)
        has_min = wide | _has_point(lo, hi, min_offset, 2 * np.pi)
    high = np.where(has_max, 1.0, np.minimum(high, 1.0))
    low = np.where(has_min, -1.0, np.maximum(low, -1.0))
    return Interval._raw(low, high)


def isin(x: Any) -> Interval:
    """Sine enclosure, including extrema that lie inside the interval."""
    return _trig(as_interval(x), np.sin, 0.5 * np.pi, -0.5 * np.pi)


def icos(x: Any) -> Interval:
    """Cosine enclosure, including extrema that lie inside the interval."""
    return _trig(as_interval(x), np.cos, 0.0, np.pi)


def itan(x: Any) -> Interval:
    """Tangent enclosure; ``[-inf, inf]`` where a pole may lie inside."""
    x = as_interval(x)
    lo, hi = x.lo, x.hi
    with np.errstate(invalid="ignore"):
        pole = (
            ~np.isfinite(lo) | ~np.isfinite(hi) | (hi - lo >= np.pi)
            | (np.maximum(np.abs(lo), np.abs(hi)) > _TRIG_LIMIT)
            | _has_point(lo, hi, 0.5 * np.pi, np.pi)
        )
        a = _down(np.tan(lo), _LIBM_ULPS)
        b = _up(np.tan(hi), _LIBM_ULPS)
    return Interval._raw(np.where(pole, -_INF, a), np.where(pole, _INF, b))
