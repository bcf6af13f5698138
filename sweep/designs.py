"""Designs: a `Config` in, the sweep's variants out, deterministic from the seed.

A *variant* is one point of the tolerance box: a value for every parameter
(fixed ones too) and the name of the design that produced it. Variants are
ordered by design, in the order the config lists the designs, except that
``nominal``, when listed anywhere, always comes first: variant 0 is the
nominal (DESIGN.md section 4).

Choices written down here (DESIGN.md leaves them open):

- **Random streams.** Each design draws from its own stream,
  ``numpy.random.SeedSequence([seed, k, occurrence])`` where ``k`` is the
  design's position in `sweep.config.DESIGNS` (not in the config's list), so
  adding, removing or reordering designs never changes another design's
  variants. Seed 0 is a valid seed like any other.
- **Distributions.** ``uniform`` parameters are uniform on ``[low, high]``.
  ``normal`` parameters are a normal with mean ``nominal`` and
  ``sigma = (high - low) / 6`` (the tolerance is 3 sigma; for symmetric
  bounds this is ``tol / 3``), truncated at ``[low, high]`` (drawn through
  the inverse distribution function by `scipy.special.ndtr` / `ndtri`, the
  same values as `scipy.stats.truncnorm`); with asymmetric bounds the peak
  stays at the nominal and the truncation is asymmetric. ``random``, ``lhs`` and
  ``sobol`` all draw points of the unit cube and map each coordinate through
  the parameter's inverse distribution function, so LHS strata and Sobol
  balance carry over to the normal parameters.
- **Corners and grid** only vary the uncertain parameters (normal ones at
  their bounds too); corners are the ``2^p`` vertices in binary counting
  order (the first uncertain parameter is the most significant digit: all
  ``low`` first), the grid is ``levels^p`` points with ``levels`` evenly
  spaced values from low to high (ends included), last parameter fastest.
  The config asks for ``levels >= 2`` (both ends of every range); called
  with ``levels = 1`` directly, the grid is the nominal point.
- **Sobol sample counts.** A Sobol sequence is balanced only in powers of
  two. For any ``samples`` we draw the next power of two with
  ``random_base2`` (no warning is raised) and keep the first ``samples``
  points; choose a power of two for the best balance.
- **No uncertain parameters.** Every design reduces to the nominal: each
  listed design contributes exactly one variant, the nominal point, labelled
  with that design's name.
- **Size limit.** A design or a total above ``config.sweep.max_variants`` is
  refused with an `InputError` before anything is allocated (for corners
  and grid the message suggests ``lhs`` or ``sobol``).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .config import DESIGNS, Config, Parameter
from .errors import InputError

__all__ = ["Variants", "generate", "design_count", "total_count"]


@dataclass(frozen=True)
class Variants:
    """The variants of a sweep, or a contiguous slice of them.

    Attributes
    ----------
    values
        Every parameter name (fixed ones too) -> float64 array ``(V,)``.
    design
        Design name of each variant, array ``(V,)`` of str.
    start
        Index of the first variant in the whole sweep (0 for the whole sweep).
    """

    values: dict[str, np.ndarray]
    design: np.ndarray
    start: int = 0

    @property
    def count(self) -> int:
        """Number of variants V."""
        return int(self.design.shape[0])

    @property
    def index(self) -> np.ndarray:
        """Global variant indices ``start ... start + V - 1`` (int64)."""
        return np.arange(self.start, self.start + self.count, dtype=np.int64)

    def slice(self, start: int, stop: int) -> "Variants":
        """The variants ``start <= i < stop`` (indices relative to this object).

        Parameters
        ----------
        start, stop
            Half-open range, clipped to ``[0, count]``.

        Returns
        -------
        Variants
            A copy whose ``start`` is the global index of its first variant.
        """
        start = max(0, min(int(start), self.count))
        stop = max(start, min(int(stop), self.count))
        return Variants(
            values={k: v[start:stop].copy() for k, v in self.values.items()},
            design=self.design[start:stop].copy(),
            start=self.start + start,
        )


# ---------------------------------------------------------------- mapping


def _sigma(p: Parameter) -> float:
    return (p.high - p.low) / 6.0


def _from_unit(p: Parameter, u: np.ndarray) -> np.ndarray:
    """Map unit-interval draws to the parameter's distribution (inverse CDF)."""
    if p.dist == "normal":
        from scipy.special import ndtr, ndtri

        sd = _sigma(p)
        a, b = (p.low - p.nominal) / sd, (p.high - p.nominal) / sd
        lo, hi = ndtr(a), ndtr(b)
        q = lo + u * (hi - lo)
        # above the median, the same quantile from the upper tail (no digits lost near 1)
        upper = -ndtri(ndtr(-b) + (1.0 - u) * (ndtr(-a) - ndtr(-b)))
        x = p.nominal + sd * np.where(q > 0.5, upper, ndtri(q))
    else:
        x = p.low + u * (p.high - p.low)
    # ppf/rounding may step a hair outside the box; the box is the contract
    return np.clip(x, p.low, p.high)


def _stream(config: Config, name: str, occurrence: int) -> np.random.Generator:
    k = DESIGNS.index(name) if name in DESIGNS else len(DESIGNS)
    return np.random.default_rng(np.random.SeedSequence([int(config.sweep.seed), k, occurrence]))


# ---------------------------------------------------------------- counts


def design_count(config: Config, name: str) -> int:
    """Number of variants design ``name`` produces (exact Python int, no allocation)."""
    p = len(config.uncertain)
    if p == 0 or name == "nominal":
        return 1
    if name == "corners":
        return 2**p
    if name == "grid":
        return max(1, int(config.sweep.levels)) ** p
    if name in ("random", "lhs", "sobol"):
        return int(config.sweep.samples)
    raise InputError(
        f"unknown design '{name}'; use one of {', '.join(DESIGNS)}",
        file=config.source,
        field="sweep.designs",
    )


def total_count(config: Config) -> int:
    """Number of variants of the whole sweep, checked against the limits, without generating them.

    Raises
    ------
    InputError
        Unknown design, or a design / total above ``sweep.max_variants``.
    """
    return _check_sizes(config)


def _check_sizes(config: Config) -> int:
    limit = int(config.sweep.max_variants)
    total = 0
    for name in config.sweep.designs:
        n = design_count(config, name)
        if n > limit and name in ("corners", "grid"):
            p = len(config.uncertain)
            what = f"2^{p}" if name == "corners" else f"{config.sweep.levels}^{p}"
            raise InputError(
                f"design '{name}' would make {what} = {n} variants, above max_variants = {limit};"
                " use 'lhs' or 'sobol' with a chosen number of samples, or raise sweep.max_variants",
                file=config.source,
                field="sweep.designs",
            )
        total += n
    if total > limit:
        raise InputError(
            f"the designs make {total} variants in total, above max_variants = {limit};"
            " lower sweep.samples / sweep.levels or raise sweep.max_variants",
            file=config.source,
            field="sweep.max_variants",
        )
    return total


# ---------------------------------------------------------------- designs


def _corners(unc: tuple[Parameter, ...]) -> np.ndarray:
    p = len(unc)
    idx = np.arange(2**p, dtype=np.int64)
    bits = (idx[:, None] >> np.arange(p - 1, -1, -1, dtype=np.int64)[None, :]) & 1
    low = np.array([q.low for q in unc])
    high = np.array([q.high for q in unc])
    return np.where(bits == 1, high[None, :], low[None, :])


def _grid(unc: tuple[Parameter, ...], levels: int) -> np.ndarray:
    if levels <= 1:
        return np.array([[q.nominal for q in unc]])
    axes = [np.linspace(q.low, q.high, levels) for q in unc]
    mesh = np.meshgrid(*axes, indexing="ij")  # last parameter fastest
    return np.stack([m.ravel() for m in mesh], axis=1)


def _latin_hypercube(p: int, n: int, rng: np.random.Generator) -> np.ndarray:
    """Latin hypercube (McKay, Beckman and Conover, 1979) of ``n`` points in ``[0, 1)^p``.

    Every coordinate's ``n`` equal strata hold one point each, at a uniform
    position inside its stratum; the strata of the coordinates are paired
    by independent random permutations.
    """
    strata = rng.permuted(np.tile(np.arange(n), (p, 1)), axis=1).T
    return (strata + rng.random((n, p))) / n


def _unit_points(name: str, p: int, n: int, rng: np.random.Generator) -> np.ndarray:
    if n == 0:
        return np.zeros((0, p))
    if name == "random":
        return rng.random((n, p))
    if name == "lhs":
        return _latin_hypercube(p, n, rng)
    from scipy.stats import qmc  # only Sobol needs it (its import alone costs about half a second)

    # sobol: next power of two via random_base2 (no balance warning), keep the first n
    m = max(0, math.ceil(math.log2(n)))
    return qmc.Sobol(d=p, scramble=True, rng=rng).random_base2(m)[:n]


def _design_block(config: Config, name: str, occurrence: int) -> np.ndarray:
    """Points ``(n, p)`` of one design over the uncertain parameters."""
    unc = config.uncertain
    if name == "nominal" or not unc:
        return np.array([[q.nominal for q in unc]]).reshape(1, len(unc))
    if name == "corners":
        return _corners(unc)
    if name == "grid":
        return _grid(unc, int(config.sweep.levels))
    n = int(config.sweep.samples)
    u = _unit_points(name, len(unc), n, _stream(config, name, occurrence))
    return np.stack([_from_unit(q, u[:, j]) for j, q in enumerate(unc)], axis=1).reshape(n, len(unc))


def _order(names) -> list[str]:
    """Config order, except that ``nominal`` comes first (variant 0 is the nominal)."""
    names = list(names)
    return ["nominal"] * names.count("nominal") + [n for n in names if n != "nominal"]


def generate(config: Config) -> Variants:
    """All variants of the sweep, in design order.

    Parameters
    ----------
    config
        A validated config; ``config.sweep.designs`` lists the designs.

    Returns
    -------
    Variants
        ``values`` for every parameter (fixed ones hold their nominal), the
        design label of each variant, ``start = 0``.

    Raises
    ------
    InputError
        Unknown design, or a design / total above ``sweep.max_variants``.
    """
    _check_sizes(config)
    unc = config.uncertain
    blocks, labels = [], []
    seen: dict[str, int] = {}
    for name in _order(config.sweep.designs):
        occ = seen.get(name, 0)
        seen[name] = occ + 1
        block = _design_block(config, name, occ)
        blocks.append(block)
        labels.append(np.full(block.shape[0], name, dtype=object))
    pts = np.concatenate(blocks, axis=0) if blocks else np.zeros((0, len(unc)))
    count = pts.shape[0]
    values: dict[str, np.ndarray] = {}
    col = {q.name: j for j, q in enumerate(unc)}
    for prm in config.parameters:
        if prm.name in col:
            values[prm.name] = np.ascontiguousarray(pts[:, col[prm.name]], dtype=np.float64)
        else:
            values[prm.name] = np.full(count, float(prm.nominal))
    design = np.concatenate(labels).astype(str) if labels else np.zeros(0, dtype=str)
    return Variants(values=values, design=design, start=0)
