"""The config file: TOML in, a frozen, validated `Config` out.

Nothing downstream reads raw TOML; every stage takes the `Config`.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

DISTRIBUTIONS = ("uniform", "normal", "fixed")
DESIGNS = ("nominal", "corners", "grid", "random", "lhs", "sobol")


@dataclass(frozen=True)
class Parameter:
    """One named plant parameter with its tolerance box.

    ``low == high == nominal`` for a fixed parameter.
    """

    name: str
    nominal: float
    low: float
    high: float
    dist: str = "uniform"  # one of DISTRIBUTIONS
    units: str = ""

    @property
    def uncertain(self) -> bool:
        """True when the parameter varies over the sweep."""
        return self.dist != "fixed" and self.low < self.high


@dataclass(frozen=True)
class SweepSettings:
    """The ``[sweep]`` table."""

    designs: tuple[str, ...] = ("nominal", "corners")
    samples: int = 1000
    levels: int = 3
    seed: int = 0
    chunk_size: int = 4096
    max_variants: int = 1_000_000


@dataclass(frozen=True)
class LocusSettings:
    """The ``[locus]`` table. ``keep`` is "all", "none", "corners" or "random"."""

    points: int = 300
    keep: str = "corners"
    keep_count: int = 0  # N of "random:N"


@dataclass(frozen=True)
class Config:
    """A validated sweep definition (see DESIGN.md section 2).

    Expression fields hold parsed trees from `sweep.expressions`; the plant is
    either ``transfer`` or the pair ``num``/``den`` (coefficient trees,
    highest power of s first).
    """

    title: str
    parameters: tuple[Parameter, ...]
    transfer: Any | None  # expressions.Node
    num: tuple[Any, ...] | None
    den: tuple[Any, ...] | None
    controller: Any  # expressions.Node (rational in s)
    sensor: Any  # expressions.Node (rational in s)
    feedback: str = "negative"
    gain_range: tuple[float, float] = (0.0, math.inf)
    operating_gain: float | None = None
    sweep: SweepSettings = field(default_factory=SweepSettings)
    locus: LocusSettings = field(default_factory=LocusSettings)
    source: str = "<memory>"  # file name as given, for messages
    text: str = ""  # the TOML text
    sha256: str = ""  # of the file's bytes

    @property
    def sigma(self) -> int:
        """+1 for negative feedback, -1 for positive (P = D + sigma k N)."""
        return 1 if self.feedback == "negative" else -1

    @property
    def uncertain(self) -> tuple[Parameter, ...]:
        """The parameters that vary, in config order."""
        return tuple(p for p in self.parameters if p.uncertain)

    @property
    def stem(self) -> str:
        """File name without folder and extension (default output name)."""
        import os

        return os.path.splitext(os.path.basename(self.source))[0] or "sweep"

    def nominal_values(self) -> dict[str, np.ndarray]:
        """Parameter values of the nominal variant, each an array of shape (1,)."""
        return {p.name: np.array([p.nominal], dtype=float) for p in self.parameters}
