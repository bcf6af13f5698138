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
from .errors import InputError
from .intervals import Interval
from .polynomials import Rational
from .warnings import CancellationWarning

# How hard `validate` tries to prove that a leading coefficient keeps its sign.
_MAX_BOXES = 4096
_MAX_ROUNDS = 14


@dataclass(frozen=True)
class _Part:
    """One factor of the open loop (plant, controller or sensor)."""

    label: str  # for messages
    field: str  # config field that defines it
    build: Callable[[Mapping[str, Any]], Rational]


def _parts(config: Config) -> tuple[_Part, ...]:
    """The three factors, each as a function of an environment of parameter values."""
    if config.transfer is not None:
        plant = _Part("plant", "plant.transfer", lambda env: expressions.evaluate_rational(config.transfer, env))
    else:
        num, den = config.num, config.den
        plant = _Part(
            "plant",
            "plant.den[0]",
            lambda env: Rational([expressions.evaluate(c, env) for c in num], [expressions.evaluate(c, env) for c in den]),
        )
    controller = _Part("controller", "loop.controller", lambda env: expressions.evaluate_rational(config.controller, env))
    sensor = _Part("sensor", "loop.sensor", lambda env: expressions.evaluate_rational(config.sensor, env))
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


def _count(values: Mapping[str, np.ndarray]) -> int:
    sizes = {np.asarray(v).shape[0] for v in values.values() if np.ndim(v) > 0}
    if len(sizes) > 1:
        raise ValueError(f"parameter arrays of different lengths: {sorted(sizes)}")
    return sizes.pop() if sizes else 1


def assemble(config: Config, values: Mapping[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """Open-loop numerator and denominator stacks for a batch of variants.

    Parameters
    ----------
    config
        The validated config.
    values
        Every parameter name mapped to an array of shape (V,).

    Returns
    -------
    N, D
        float64 arrays (V, m+1) and (V, n+1), highest power of s first, of
        ``C G H`` without cancellation. Widths depend only on the config.
    """
    count = _count(values)
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

    Checks that the nominal evaluates to finite coefficients, that the loop
    is proper (no more zeros than poles), that every factor's leading
    coefficients keep their sign over the box (degree invariance, proven with
    interval arithmetic and box splitting), and warns about common factors of
    the nominal N and D.

    Raises
    ------
    InputError
        Naming the config field whose expression fails.
    """
    fail = lambda field, msg: InputError(msg, file=config.source, field=field)  # noqa: E731
    nominal = {p.name: np.array([p.nominal]) for p in config.parameters}
    parts = _parts(config)
    for part in parts:
        with np.errstate(all="ignore"):
            try:
                r = part.build(nominal)
            except (ValueError, ZeroDivisionError, ArithmeticError) as exc:
                raise fail(part.field, f"cannot evaluate at the nominal values ({exc}); check the expression") from None
        num, den = _as_stack(r.num, 1), _as_stack(r.den, 1)
        if not (np.all(np.isfinite(num)) and np.all(np.isfinite(den))):
            raise fail(part.field, "evaluates to an infinite or undefined coefficient at the nominal values (division by zero, or log/sqrt of a non-positive value); check the expression")
        if not np.any(num != 0):
            raise fail(part.field, "the numerator is zero at the nominal values, so the loop carries no signal; check the expression")
        if not np.any(den != 0):
            raise fail(part.field, "the denominator is zero at the nominal values; check the expression")

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

    for part, (dm, dn) in zip(parts, degrees):
        _check_leading(config, part, dm, dn)

    _warn_cancellation(config)


def _check_leading(config: Config, part: _Part, dm: int, dn: int) -> None:
    """Prove the leading coefficients of a factor keep their nominal sign over the box."""
    uncertain = config.uncertain
    if not uncertain:
        return
    names = [p.name for p in uncertain]
    lo0 = np.array([p.low for p in uncertain])
    hi0 = np.array([p.high for p in uncertain])
    scale = np.where(hi0 > lo0, hi0 - lo0, 1.0)

    def enclosure(lo: np.ndarray, hi: np.ndarray) -> tuple[Interval, Interval, np.ndarray]:
        env, count = _box_env(config, dict(zip(names, lo.T)), dict(zip(names, hi.T)))
        with np.errstate(all="ignore"):
            r = part.build(env)
            num = _interval_stack(r.num, count)
            den = _interval_stack(r.den, count)
        # Structural zeros above the nominal degree must enclose only zero-ish values.
        extra = np.zeros(count, dtype=bool)
        for stack, deg in ((num, dm), (den, dn)):
            width = stack.lo.shape[1]
            if width > deg + 1:
                lead = Interval(stack.lo[:, : width - deg - 1], stack.hi[:, : width - deg - 1])
                extra |= np.any(np.maximum(np.abs(lead.lo), np.abs(lead.hi)) > 1e-300, axis=1)
        finite = np.all(np.isfinite(num.lo) & np.isfinite(num.hi), axis=1) & np.all(np.isfinite(den.lo) & np.isfinite(den.hi), axis=1)
        return num[:, width_index(num, dm)], den[:, width_index(den, dn)], extra | ~finite

    def points(x: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        env = {p.name: np.full(x.shape[0], p.nominal) for p in config.parameters}
        env.update(dict(zip(names, x.T)))
        with np.errstate(all="ignore"):
            r = part.build(env)
        num = _as_stack(r.num, x.shape[0])
        den = _as_stack(r.den, x.shape[0])
        extra = np.zeros(x.shape[0], dtype=bool)
        if num.shape[1] > dm + 1:
            extra |= np.any(num[:, : num.shape[1] - dm - 1] != 0, axis=1)
        if den.shape[1] > dn + 1:
            extra |= np.any(den[:, : den.shape[1] - dn - 1] != 0, axis=1)
        finite = np.all(np.isfinite(num), axis=1) & np.all(np.isfinite(den), axis=1)
        return num[:, -(dm + 1)], den[:, -(dn + 1)], extra, finite

    nom_num, nom_den, _, _ = points(np.array([[p.nominal for p in uncertain]]))
    signs = (np.sign(nom_num[0]), np.sign(nom_den[0]))
    lo, hi = lo0[None, :], hi0[None, :]
    for _round in range(_MAX_ROUNDS):
        mid = 0.5 * (lo + hi)
        pn, pd, pextra, pfinite = points(mid)
        if not np.all(pfinite):
            i = int(np.flatnonzero(~pfinite)[0])
            where = ", ".join(f"{nm}={v:.6g}" for nm, v in zip(names, mid[i]))
            raise InputError(
                f"the {part.label} is undefined or infinite inside the tolerance box (at {where}): a division by zero, or sqrt/log of a non-positive value; narrow the tolerances or restate the expression",
                file=config.source,
                field=part.field,
            )
        bad_point = (np.sign(pn) != signs[0]) | (np.sign(pd) != signs[1]) | pextra
        if np.any(bad_point):
            i = int(np.flatnonzero(bad_point)[0])
            where = ", ".join(f"{nm}={v:.6g}" for nm, v in zip(names, mid[i]))
            raise InputError(
                f"the {part.label}'s leading coefficient changes sign or vanishes inside the tolerance box (at {where}), so the loop's order changes; narrow the tolerances or restate the model",
                file=config.source,
                field=part.field,
            )
        try:
            en, ed, extra = enclosure(lo, hi)
            undecided = (
                extra
                | ~_sign_kept(en, signs[0])
                | ~_sign_kept(ed, signs[1])
            )
        except (ValueError, ArithmeticError):
            undecided = np.ones(lo.shape[0], dtype=bool)
        if not np.any(undecided):
            return
        lo, hi = lo[undecided], hi[undecided]
        if 2 * lo.shape[0] > _MAX_BOXES:
            break
        # Split every undecided box along its widest relative side.
        axis = np.argmax((hi - lo) / scale, axis=1)
        rows = np.arange(lo.shape[0])
        cut = 0.5 * (lo[rows, axis] + hi[rows, axis])
        lo_a, hi_a = lo.copy(), hi.copy()
        hi_a[rows, axis] = cut
        lo_b, hi_b = lo.copy(), hi.copy()
        lo_b[rows, axis] = cut
        lo, hi = np.concatenate([lo_a, lo_b]), np.concatenate([hi_a, hi_b])
    raise InputError(
        f"cannot show that the {part.label}'s leading coefficient keeps its sign over the tolerance box (interval bounds stay inconclusive); narrow the tolerances or restate the expression",
        file=config.source,
        field=part.field,
    )


def width_index(stack: Interval, degree: int) -> int:
    """Column index of the coefficient of s**degree in a stack (highest power first)."""
    return stack.lo.shape[1] - degree - 1


def _sign_kept(iv: Interval, sign: float) -> np.ndarray:
    lo, hi = np.asarray(iv.lo), np.asarray(iv.hi)
    ok = np.isfinite(lo) & np.isfinite(hi)
    return ok & ((lo > 0) if sign > 0 else (hi < 0))


def _warn_cancellation(config: Config) -> None:
    """Warn when the nominal open loop has a factor common to N and D."""
    N, D = assemble(config, config.nominal_values())
    zeros = np.roots(N[0]) if N.shape[1] > 1 else np.array([])
    poles = np.roots(D[0]) if D.shape[1] > 1 else np.array([])
    common = []
    for z in zeros:
        if poles.size and np.min(np.abs(poles - z)) <= 1e-7 * max(1.0, abs(z)):
            common.append(z)
    if common:
        text = ", ".join(_fmt_root(z) for z in common)
        warnings.warn(
            CancellationWarning(
                f"{config.source}: the nominal open loop has a factor common to numerator and denominator (root {text}); "
                "it is kept as a closed-loop mode, not cancelled"
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


__all__ = ["assemble", "enclose", "validate", "part_degrees", "open_loop_degrees", "nominal_parts"]
