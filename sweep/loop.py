"""Loop assembly: parameter values -> stacks of open-loop numerator and denominator.

The open loop is ``k C(s) G(s) H(s)`` with ``N = Nc Ng Nh`` and
``D = Dc Dg Dh``. Factors are never cancelled: a cancelled factor is still a
closed-loop mode, so the nominal is checked for common factors and a
`CancellationWarning` is issued instead.
"""
from __future__ import annotations

import functools
import warnings
from dataclasses import dataclass
from typing import Any, Callable, Mapping

import numpy as np

from . import expressions
from .config import Config
from .errors import InputError, shorten
from .intervals import Interval
from .polynomials import Rational
from .warnings import CancellationWarning, NothingKeptWarning, UnusedParameterWarning

# How hard `validate` tries to prove that a leading coefficient keeps its sign.
_MAX_BOXES = 4096
_MAX_ROUNDS = 14
# Poles and zeros beyond this size are typing slips (1e-200 for 1e-2): squaring them overflows.
MAX_ROOT = 1e100
# Beyond this many poles, coefficients in powers of s carry no useful digits.
MAX_ORDER = 50


@dataclass(frozen=True)
class _Part:
    """One factor of the open loop (plant, controller or sensor)."""

    label: str  # for messages
    field: str  # config field that defines it
    build: Callable[[Mapping[str, Any]], Rational]
    exprs: tuple[tuple[str, Any], ...] = ()  # (field, tree) of every expression of the factor
    num_fields: tuple[str, ...] | None = None  # per-coefficient fields of num/den lists
    den_fields: tuple[str, ...] | None = None

    def side_field(self, which: str) -> str:
        """The field to name for a fault of the whole numerator or denominator."""
        if self.num_fields is None:
            return self.field
        return "plant.num" if which == "numerator" else "plant.den"


def _parts(config: Config) -> tuple[_Part, ...]:
    """The three factors, each as a function of an environment of parameter values."""
    if config.transfer is not None:
        plant = _Part("plant", "plant.transfer", lambda env: expressions.evaluate_rational(config.transfer, env),
                      (("plant.transfer", config.transfer),))
    else:
        num, den = config.num, config.den
        num_fields = tuple(f"plant.num[{i}]" for i in range(len(num)))
        den_fields = tuple(f"plant.den[{i}]" for i in range(len(den)))
        plant = _Part(
            "plant",
            "plant.den[0]",
            lambda env: Rational([expressions.evaluate(c, env) for c in num], [expressions.evaluate(c, env) for c in den]),
            tuple(zip(num_fields, num)) + tuple(zip(den_fields, den)),
            num_fields,
            den_fields,
        )
    controller = _Part("controller", "loop.controller", lambda env: expressions.evaluate_rational(config.controller, env),
                       (("loop.controller", config.controller),))
    sensor = _Part("sensor", "loop.sensor", lambda env: expressions.evaluate_rational(config.sensor, env),
                   (("loop.sensor", config.sensor),))
    return plant, controller, sensor


def _trim(stack: np.ndarray) -> np.ndarray:
    """Drop leading columns that are exactly zero in every row (structural zeros)."""
    nonzero = np.flatnonzero(np.any(stack != 0, axis=0))
    if nonzero.size == 0:
        return stack[:, -1:]
    return stack[:, nonzero[0]:]


def _as_stack(coefs: list, count: int) -> np.ndarray:
    """Coefficient list (floats or arrays (V,)) -> float64 array (V, len)."""
    cols = [np.broadcast_to(np.asarray(c, dtype=float), (count,)) for c in coefs]
    return np.stack(cols, axis=1) if cols else np.zeros((count, 1))


def _pad(stack: np.ndarray, width: int) -> np.ndarray:
    """Zero columns on the left up to `width` columns (trimmed leading zeros back)."""
    if stack.shape[1] >= width:
        return stack
    return np.concatenate([np.zeros((stack.shape[0], width - stack.shape[1])), stack], axis=1)


def _count(values: Mapping[str, np.ndarray]) -> int:
    sizes = {np.asarray(v).shape[0] for v in values.values() if np.ndim(v) > 0}
    if len(sizes) > 1:
        raise ValueError(f"parameter arrays of different lengths: {sorted(sizes)}")
    return sizes.pop() if sizes else 1


def assemble(config: Config, values: Mapping[str, np.ndarray], *,
             count: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Open-loop numerator and denominator stacks for a batch of variants.

    Parameters
    ----------
    config
        The validated config.
    values
        Every parameter name mapped to an array of shape (V,).
    count
        V, when the caller knows it: a config without parameters has no
        array to tell it, and its V variants are then V copies of the loop.

    Returns
    -------
    N, D
        float64 arrays (V, m+1) and (V, n+1), highest power of s first, of
        ``C G H`` without cancellation. Widths depend only on the config.
    """
    found = _count(values)
    if count is None:
        count = found
    elif any(np.ndim(v) > 0 for v in values.values()) and found != count:
        raise ValueError(f"parameter arrays hold {found} variants, expected {count}")
    env = {name: np.asarray(v, dtype=float) for name, v in values.items()}
    num_stack = np.ones((count, 1))
    den_stack = np.ones((count, 1))
    for part, (m, n) in zip(_parts(config), part_degrees(config)):
        r = part.build(env)
        pn = _as_stack(r.num, count)[:, -(m + 1):]
        pd = _as_stack(r.den, count)[:, -(n + 1):]
        num_stack = _polymul_stack(num_stack, pn)
        den_stack = _polymul_stack(den_stack, pd)
    return num_stack, den_stack


def _polymul_stack(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Row-wise product of two polynomial stacks (V, p) x (V, q) -> (V, p+q-1)."""
    out = np.zeros((a.shape[0], a.shape[1] + b.shape[1] - 1))
    for j in range(b.shape[1]):
        out[:, j:j + a.shape[1]] += a * b[:, j:j + 1]
    return out


def _interval_stack(coefs: list, count: int) -> Interval:
    """Coefficient list (Intervals or floats) -> Interval with lo/hi (B, len)."""
    los, his = [], []
    for c in coefs:
        if isinstance(c, Interval):
            los.append(np.broadcast_to(np.asarray(c.lo, dtype=float), (count,)))
            his.append(np.broadcast_to(np.asarray(c.hi, dtype=float), (count,)))
        else:
            v = np.broadcast_to(np.asarray(c, dtype=float), (count,))
            los.append(v)
            his.append(v)
    return Interval(np.stack(los, axis=1), np.stack(his, axis=1))


def _interval_polymul(a: Interval, b: Interval) -> Interval:
    """Row-wise product of interval polynomial stacks, outward rounded."""
    count, p = a.lo.shape
    q = b.lo.shape[1]
    acc: list[Interval | None] = [None] * (p + q - 1)
    for i in range(p):
        for j in range(q):
            term = a[:, i] * b[:, j]
            acc[i + j] = term if acc[i + j] is None else acc[i + j] + term
    return Interval(np.stack([t.lo for t in acc], axis=1), np.stack([t.hi for t in acc], axis=1))


def _box_env(config: Config, lows: Mapping[str, np.ndarray], highs: Mapping[str, np.ndarray]) -> tuple[dict, int]:
    count = _count(lows)
    env = {}
    for p in config.parameters:
        if p.name in lows:
            env[p.name] = Interval(np.asarray(lows[p.name], dtype=float), np.asarray(highs[p.name], dtype=float))
        else:
            env[p.name] = Interval(np.full(count, p.nominal))
    return env, count


def enclose(config: Config, lows: Mapping[str, np.ndarray], highs: Mapping[str, np.ndarray]) -> tuple[Interval, Interval]:
    """Interval enclosures of the coefficients of N and D over boxes.

    Parameters
    ----------
    config
        The validated config.
    lows, highs
        Parameter name -> array (B,) of box bounds. Parameters missing from
        the mappings are held at their nominal value.

    Returns
    -------
    N, D
        `Interval` stacks with lo/hi of shape (B, m+1) and (B, n+1): every
        coefficient of every point of box b lies inside row b.
    """
    env, count = _box_env(config, lows, highs)
    num = Interval(np.ones((count, 1)))
    den = Interval(np.ones((count, 1)))
    for part, (m, n) in zip(_parts(config), part_degrees(config)):
        r = part.build(env)
        pn = _interval_stack(r.num, count)
        pd = _interval_stack(r.den, count)
        num = _interval_polymul(num, pn[:, -(m + 1):])
        den = _interval_polymul(den, pd[:, -(n + 1):])
    return num, den


@functools.lru_cache(maxsize=64)
def part_degrees(config: Config) -> tuple[tuple[int, int], ...]:
    """(numerator, denominator) degree of plant, controller and sensor, from the nominal.

    Leading coefficients that are exactly zero at the nominal are structural
    (e.g. ``(s + a) - s``) and dropped; `validate` checks they stay zero.
    """
    env = {p.name: np.array([p.nominal]) for p in config.parameters}
    degrees = []
    for part in _parts(config):
        r = part.build(env)
        degrees.append((_trim(_as_stack(r.num, 1)).shape[1] - 1, _trim(_as_stack(r.den, 1)).shape[1] - 1))
    return tuple(degrees)


def open_loop_degrees(config: Config) -> tuple[int, int]:
    """(m, n): degrees of the assembled open-loop numerator and denominator."""
    degrees = part_degrees(config)
    return sum(d[0] for d in degrees), sum(d[1] for d in degrees)


# ---------------------------------------------------------------------------
# Validation
# ---------------------------------------------------------------------------


def validate(config: Config) -> None:
    """Check the loop is well formed over the whole tolerance box.

    In this order: every division, sqrt, log, real power and tan stays inside
    its domain at the nominal and over the box (proven with interval
    arithmetic and box splitting); the nominal evaluates to finite
    coefficients; the loop is proper (no more zeros than poles); every
    factor's leading coefficients keep their sign over the box (degree
    invariance, proven the same way). Finally it warns about factors common
    to the nominal N and D.

    Raises
    ------
    InputError
        Naming the config field whose expression fails, the offending point
        and what to do.
    """
    fail = lambda field, msg: InputError(msg, file=config.source, field=field)  # noqa: E731
    nominal = {p.name: np.array([p.nominal]) for p in config.parameters}
    parts = _parts(config)
    for part in parts:
        for field_name, tree in part.exprs:
            for kind, guard, role in expressions.domain_guards(tree):
                _check_guard(config, field_name, kind, guard, role)
    for part in parts:
        with np.errstate(all="ignore"):
            try:
                r = part.build(nominal)
            except (ValueError, ZeroDivisionError, ArithmeticError) as exc:
                raise fail(part.field, f"cannot evaluate at the nominal values ({exc}); check the expression") from None
        num, den = _as_stack(r.num, 1), _as_stack(r.den, 1)
        if not (np.all(np.isfinite(num)) and np.all(np.isfinite(den))):
            raise fail(part.field, f"the {part.label} evaluates to an infinite or undefined coefficient at the nominal values (a number too large for floating point?); check the expression")
        if not np.any(num != 0):
            raise fail(part.side_field("numerator"), "the numerator is zero at the nominal values, so the loop carries no signal; check the expression")
        if not np.any(den != 0):
            raise fail(part.side_field("denominator"), "the denominator is zero at the nominal values; check the expression")
        for which, coefs in (("numerator", num[0]), ("denominator", den[0])):
            size = _largest_root(coefs)
            if size > MAX_ROOT:
                kind = "zero" if which == "numerator" else "pole"
                shown = f"of size {size:.3g}" if np.isfinite(size) else "too large for floating point"
                raise fail(part.side_field(which), f"the {part.label} has a {kind} {shown} at the nominal values; beyond "
                           f"{MAX_ROOT:.0e} rad/s the arithmetic overflows, so check the exponents and units of the coefficients")

    degrees = part_degrees(config)
    m = sum(d[0] for d in degrees)
    n = sum(d[1] for d in degrees)
    if m > n:
        detail = ", ".join(f"{p.label} {dm} zero(s)/{dn} pole(s)" for p, (dm, dn) in zip(parts, degrees))
        raise fail(
            "plant",
            f"improper loop: {m} zero(s) but only {n} pole(s) ({detail}); a physical loop has no more zeros than poles, add the missing lags",
        )
    if n == 0:
        raise fail("plant", "the loop has no poles (a pure gain); there is no locus to compute, add the plant's dynamics")
    if n > MAX_ORDER:
        raise fail("plant", f"the loop has {n} poles, more than the {MAX_ORDER} supported (polynomial coefficients in powers of s lose their accuracy); reduce the model order")

    for part, (dm, dn) in zip(parts, degrees):
        _check_leading(config, part, dm, dn)

    _warn_cancellation(config)
    _warn_unused(config)
    _warn_nothing_kept(config)


def _largest_root(coefs: np.ndarray) -> float:
    """Size of the largest root of a polynomial (highest power first), for the `MAX_ROOT` test.

    Cauchy's bound ``1 + max |c_i / c_0|`` when that is below `MAX_ROOT`,
    else the largest computed root magnitude; inf when the ratios overflow.
    """
    nz = np.flatnonzero(coefs)
    if nz.size == 0 or nz[0] == coefs.shape[0] - 1:
        return 0.0
    c = coefs[nz[0]:]
    with np.errstate(all="ignore"):
        ratios = c[1:] / c[0]
    if not np.all(np.isfinite(ratios)):
        return np.inf
    bound = 1.0 + float(np.max(np.abs(ratios)))
    if bound <= MAX_ROOT:
        return bound
    return float(np.max(np.abs(np.roots(c))))


# a message lists at most this many parameters (it must stay one readable line)
_LISTED = 4


def _where(names: list[str], x: np.ndarray) -> str:
    text = ", ".join(f"{nm}={v:.6g}" for nm, v in list(zip(names, x))[:_LISTED])
    return text + (f" (and {len(names) - _LISTED} more)" if len(names) > _LISTED else "")


def _names(names: list[str]) -> str:
    text = ", ".join(names[:_LISTED])
    return text + (f" and {len(names) - _LISTED} more" if len(names) > _LISTED else "")


def _prove(
    lo0: np.ndarray,
    hi0: np.ndarray,
    point_ok: Callable[[np.ndarray], np.ndarray],
    box_ok: Callable[[np.ndarray, np.ndarray], np.ndarray],
) -> tuple[str, np.ndarray | None]:
    """Show a property over the box ``[lo0, hi0]`` by interval bounds and bisection.

    Each round tests the midpoint and the lowest and highest corner of every
    open box (a failing point refutes the property), then the interval test
    of every open box; boxes it cannot settle are split along their widest
    relative side.

    Returns
    -------
    ("proven", None), ("refuted", point) or ("inconclusive", midpoint of an open box).
    """
    scale = np.where(hi0 > lo0, hi0 - lo0, 1.0)
    lo, hi = lo0[None, :], hi0[None, :]
    for _round in range(_MAX_ROUNDS):
        pts = np.concatenate([0.5 * (lo + hi), lo, hi])
        ok = point_ok(pts)
        if not np.all(ok):
            return "refuted", pts[int(np.flatnonzero(~ok)[0])]
        try:
            with np.errstate(all="ignore"):
                undecided = ~box_ok(lo, hi)
        except (ValueError, ArithmeticError):
            undecided = np.ones(lo.shape[0], dtype=bool)
        if not np.any(undecided):
            return "proven", None
        lo, hi = lo[undecided], hi[undecided]
        if 2 * lo.shape[0] > _MAX_BOXES:
            break
        axis = np.argmax((hi - lo) / scale, axis=1)
        rows = np.arange(lo.shape[0])
        cut = 0.5 * (lo[rows, axis] + hi[rows, axis])
        lo_a, hi_a = lo.copy(), hi.copy()
        hi_a[rows, axis] = cut
        lo_b, hi_b = lo.copy(), hi.copy()
        lo_b[rows, axis] = cut
        lo, hi = np.concatenate([lo_a, lo_b]), np.concatenate([hi_a, hi_b])
    return "inconclusive", 0.5 * (lo[0] + hi[0])


def _relevant(config: Config, trees: Any) -> list:
    """The uncertain parameters that occur in the given trees, in config order."""
    used: set[str] = set()
    for tree in trees:
        used |= expressions.names(tree)
    return [p for p in config.uncertain if p.name in used]


def _point_env(config: Config, names: list[str], x: np.ndarray) -> dict:
    env = {p.name: np.full(x.shape[0], p.nominal) for p in config.parameters}
    env.update(dict(zip(names, x.T)))
    return env


_GUARD_NEEDS = {
    "nonzero": "stay away from 0",
    "nonnegative": "stay at or above 0",
    "positive": "stay above 0",
    "tan": "keep away from the poles of tan (pi/2 + n pi)",
}


def _check_guard(config: Config, field_name: str, kind: str, guard: Any, role: str) -> None:
    """Prove that an s-free sub-expression stays inside its domain over the box."""
    text = shorten(expressions.to_text(guard), 60)
    with np.errstate(all="ignore"):
        v0 = float(np.asarray(expressions.evaluate(guard, config.nominal_values()), dtype=float).reshape(-1)[0])
    sign0 = np.sign(v0)

    def value_ok(v: np.ndarray) -> np.ndarray:
        v = np.asarray(v, dtype=float)
        if kind == "nonzero":
            return np.isfinite(v) & (np.sign(v) == sign0) & (v != 0)
        if kind == "nonnegative":
            return np.isfinite(v) & (v >= 0)
        if kind == "positive":
            return np.isfinite(v) & (v > 0)
        return np.isfinite(v) & np.isfinite(np.tan(v))

    needs = _GUARD_NEEDS[kind]
    if not np.isfinite(v0):
        raise InputError(f"'{text}' ({role}) is {v0} at the nominal values (too large for floating point); check the expression and the nominal values",
                         file=config.source, field=field_name)
    if not value_ok(np.array([v0]))[0]:
        raise InputError(f"'{text}' ({role}) must {needs}, but it is {v0:.6g} at the nominal values; check the expression and the nominal values",
                         file=config.source, field=field_name)
    params = _relevant(config, [guard])
    if not params:
        return
    names = [p.name for p in params]
    lo0 = np.array([p.low for p in params])
    hi0 = np.array([p.high for p in params])

    def point_ok(x: np.ndarray) -> np.ndarray:
        with np.errstate(all="ignore"):
            v = expressions.evaluate(guard, _point_env(config, names, x))
        return value_ok(np.broadcast_to(np.asarray(v, dtype=float), (x.shape[0],)))

    def box_ok(lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
        env, count = _box_env(config, dict(zip(names, lo.T)), dict(zip(names, hi.T)))
        iv = expressions.evaluate(guard, env)
        if kind == "tan":
            from .intervals import itan

            iv = itan(iv)
        l, h = np.broadcast_to(iv.lo, (count,)), np.broadcast_to(iv.hi, (count,))
        finite = np.isfinite(l) & np.isfinite(h)
        if kind == "nonzero":
            return finite & ((l > 0) if sign0 > 0 else (h < 0))
        if kind == "nonnegative":
            return finite & (l >= 0)
        if kind == "positive":
            return finite & (l > 0)
        return finite

    status, x = _prove(lo0, hi0, point_ok, box_ok)
    if status == "proven":
        return
    if status == "refuted":
        with np.errstate(all="ignore"):
            v = float(np.asarray(expressions.evaluate(guard, _point_env(config, names, x[None, :])), dtype=float).reshape(-1)[0])
        raise InputError(
            f"'{text}' ({role}) must {needs}, but it is {v:.6g} at {_where(names, x)} inside the tolerance box "
            f"({v0:.6g} at the nominal); narrow the tolerances of {_names(names)} or restate the expression",
            file=config.source, field=field_name,
        )
    raise InputError(
        f"cannot show that '{text}' ({role}) stays clear over the tolerance box: it must {needs}, and the interval "
        f"bounds stay inconclusive near {_where(names, x)}; narrow the tolerances of {_names(names)} or restate the expression",
        file=config.source, field=field_name,
    )


def _check_leading(config: Config, part: _Part, dm: int, dn: int) -> None:
    """Prove the leading coefficients of a factor keep their nominal sign over the box."""
    params = _relevant(config, [tree for _, tree in part.exprs])
    if not params:
        return
    names = [p.name for p in params]
    lo0 = np.array([p.low for p in params])
    hi0 = np.array([p.high for p in params])

    def points(x: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        with np.errstate(all="ignore"):
            r = part.build(_point_env(config, names, x))
        # a leading coefficient that is 0 at every point of the batch was trimmed: put it back
        num = _pad(_as_stack(r.num, x.shape[0]), dm + 1)
        den = _pad(_as_stack(r.den, x.shape[0]), dn + 1)
        extra = np.zeros(x.shape[0], dtype=bool)
        if num.shape[1] > dm + 1:
            extra |= np.any(num[:, : num.shape[1] - dm - 1] != 0, axis=1)
        if den.shape[1] > dn + 1:
            extra |= np.any(den[:, : den.shape[1] - dn - 1] != 0, axis=1)
        finite = np.all(np.isfinite(num), axis=1) & np.all(np.isfinite(den), axis=1)
        return num[:, -(dm + 1)], den[:, -(dn + 1)], extra, finite

    nom = np.array([[p.nominal for p in params]])
    nom_num, nom_den, _, _ = points(nom)
    signs = (np.sign(nom_num[0]), np.sign(nom_den[0]))

    def point_ok(x: np.ndarray) -> np.ndarray:
        pn, pd, extra, finite = points(x)
        return finite & ~extra & (np.sign(pn) == signs[0]) & (np.sign(pd) == signs[1])

    def box_ok(lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
        env, count = _box_env(config, dict(zip(names, lo.T)), dict(zip(names, hi.T)))
        r = part.build(env)
        num = _interval_stack(r.num, count)
        den = _interval_stack(r.den, count)
        # structural zeros above the nominal degree must enclose only zero-ish values
        extra = np.zeros(count, dtype=bool)
        for stack, deg in ((num, dm), (den, dn)):
            width = stack.lo.shape[1]
            if width > deg + 1:
                lead = Interval(stack.lo[:, : width - deg - 1], stack.hi[:, : width - deg - 1])
                extra |= np.any(np.maximum(np.abs(lead.lo), np.abs(lead.hi)) > 1e-300, axis=1)
        finite = np.all(np.isfinite(num.lo) & np.isfinite(num.hi), axis=1) & np.all(np.isfinite(den.lo) & np.isfinite(den.hi), axis=1)
        return (finite & ~extra & _sign_kept(num[:, width_index(num, dm)], signs[0])
                & _sign_kept(den[:, width_index(den, dn)], signs[1]))

    status, x = _prove(lo0, hi0, point_ok, box_ok)
    if status == "proven":
        return
    if status == "inconclusive":
        raise InputError(
            f"cannot show that the {part.label}'s leading coefficients keep their sign over the tolerance box "
            f"(interval bounds stay inconclusive near {_where(names, x)}); narrow the tolerances of "
            f"{_names(names)} or restate the expression",
            file=config.source, field=part.field,
        )
    pn, pd, extra, finite = points(x[None, :])
    where = _where(names, x)
    if not finite[0]:
        raise InputError(
            f"the {part.label} is undefined or infinite at {where} inside the tolerance box (a coefficient "
            f"overflows floating point); narrow the tolerances or restate the expression",
            file=config.source, field=part.field,
        )
    if extra[0]:
        with np.errstate(all="ignore"):
            r = part.build(_point_env(config, names, x[None, :]))
        num_extra = np.any(_as_stack(r.num, 1)[0, : -(dm + 1)] != 0)
        which, deg = ("numerator", dm) if num_extra else ("denominator", dn)
        raise InputError(
            f"the {part.label}'s order changes inside the tolerance box: its {which} has a coefficient above "
            f"s^{deg} that is 0 at the nominal but not at {where}; restate the model so the nominal has the full "
            f"order, or narrow the tolerances of {_names(names)}",
            file=config.source, field=part.field,
        )
    is_den = np.sign(pd[0]) != signs[1]
    which, deg, c0, c = ("denominator", dn, nom_den[0], pd[0]) if is_den else ("numerator", dm, nom_num[0], pn[0])
    fields = part.den_fields if is_den else part.num_fields
    field_name = part.field
    if fields is not None:
        field_name = fields[len(fields) - 1 - deg] if len(fields) > deg else fields[0]
    effect = "the number of poles would change" if is_den else "a zero would pass through infinity or the gain would change sign"
    raise InputError(
        f"the {part.label}'s {which} leading coefficient (of s^{deg}) is {c0:.6g} at the nominal but {c:.6g} at "
        f"{where}: it reaches 0 or changes sign inside the tolerance box, so {effect}; narrow the tolerances of "
        f"{_names(names)} or restate the model",
        file=config.source, field=field_name,
    )


def width_index(stack: Interval, degree: int) -> int:
    """Column index of the coefficient of s**degree in a stack (highest power first)."""
    return stack.lo.shape[1] - degree - 1


def _sign_kept(iv: Interval, sign: float) -> np.ndarray:
    lo, hi = np.asarray(iv.lo), np.asarray(iv.hi)
    ok = np.isfinite(lo) & np.isfinite(hi)
    return ok & ((lo > 0) if sign > 0 else (hi < 0))


# A root shared by N and D within this relative backward error counts as a common factor.
_COMMON_RTOL = 1e-10


def _residual(p: np.ndarray, z: np.ndarray) -> np.ndarray:
    """Relative backward error |p(z)| / sum |p_i| |z|^i of candidate roots `z`."""
    n = p.shape[0] - 1
    with np.errstate(all="ignore"):  # huge candidate roots overflow to inf: NaN, never a hit
        powers = np.abs(z)[:, None] ** np.arange(n, -1, -1)[None, :]
        scale = powers @ np.abs(p)
        return np.abs(np.polyval(p, z)) / np.where(scale > 0, scale, 1.0)


def common_roots(num: np.ndarray, den: np.ndarray) -> list[complex]:
    """Roots shared by two polynomials (highest power first), each listed once.

    A candidate (a root of either) is common when both polynomials vanish
    there to within a relative backward error of 1e-10. Testing the roots
    of both sides matters for repeated factors: the computed roots of
    ``(s + 1)^3`` are off by about 1e-5, but the simple root of the other
    side is accurate and the cube vanishes there.
    """
    zeros = np.roots(num) if num.shape[0] > 1 else np.array([], dtype=complex)
    poles = np.roots(den) if den.shape[0] > 1 else np.array([], dtype=complex)
    cands = np.concatenate([poles, zeros]).astype(complex)
    if cands.size == 0:
        return []
    hit = (_residual(num, cands) <= _COMMON_RTOL) & (_residual(den, cands) <= _COMMON_RTOL)
    # the computed roots of a repeated factor scatter around it, but their mean is accurate
    clusters: list[list[complex]] = []
    for z in cands[hit]:
        for members in clusters:
            if abs(z - members[0]) <= 1e-4 * max(1.0, abs(members[0])):
                members.append(complex(z))
                break
        else:
            clusters.append([complex(z)])
    return [complex(np.mean(members)) for members in clusters]


def _warn_cancellation(config: Config) -> None:
    """Warn when the nominal open loop has a factor common to N and D."""
    N, D = assemble(config, config.nominal_values())
    common = common_roots(N[0], D[0])
    if common:
        text = ", ".join(_fmt_root(z) for z in common)
        warnings.warn(
            CancellationWarning(
                f"{config.source}: the nominal open loop has a factor common to numerator and denominator (root {text}); "
                "it is kept as a closed-loop mode, not cancelled"
            ),
            stacklevel=2,
        )


def _warn_unused(config: Config) -> None:
    """Warn about uncertain parameters that no expression uses: they only multiply the designs."""
    used: set[str] = set()
    for part in _parts(config):
        for _, tree in part.exprs:
            used |= expressions.names(tree)
    unused = [p.name for p in config.uncertain if p.name not in used]
    if unused:
        warnings.warn(
            UnusedParameterWarning(
                f"{config.source}: parameter(s) {_names(unused)} appear in no expression of the loop; "
                "their tolerance only multiplies the corners and grid points; use them or remove them"
            ),
            stacklevel=2,
        )


def _warn_nothing_kept(config: Config) -> None:
    """Warn when ``keep = "corners"`` meets designs without corners or the nominal: no locus would be stored."""
    if config.locus.keep == "corners" and not {"corners", "nominal"} & set(config.sweep.designs):
        warnings.warn(
            NothingKeptWarning(
                f"{config.source}: [locus] keep = \"corners\" stores the loci of the corners and the nominal, and "
                "[sweep] designs has neither, so no locus will be stored; add \"nominal\" to designs or "
                "keep \"random:N\""
            ),
            stacklevel=2,
        )


def _fmt_root(z: complex) -> str:
    if abs(z.imag) <= 1e-12 * max(1.0, abs(z)):
        return f"{z.real:.6g}"
    return f"{z.real:.6g}{z.imag:+.6g}j"


def nominal_parts(config: Config) -> list[tuple[str, np.ndarray, np.ndarray]]:
    """(label, numerator, denominator) of each factor at the nominal, for display."""
    env = config.nominal_values()
    out = []
    for part, (m, n) in zip(_parts(config), part_degrees(config)):
        r = part.build(env)
        out.append((part.label, _as_stack(r.num, 1)[0, -(m + 1):], _as_stack(r.den, 1)[0, -(n + 1):]))
    return out


__all__ = ["assemble", "enclose", "validate", "part_degrees", "open_loop_degrees", "nominal_parts", "common_roots"]
