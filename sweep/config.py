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


# ---------------------------------------------------------------------------
# Loading
# ---------------------------------------------------------------------------

import difflib  # noqa: E402
import hashlib  # noqa: E402
import keyword  # noqa: E402
import re  # noqa: E402
import tomllib  # noqa: E402

from .errors import ExpressionError, InputError  # noqa: E402
from .errors import shorten  # noqa: E402

_TOP_KEYS = ("title", "parameters", "plant", "loop", "sweep", "locus")
_PARAM_KEYS = ("nominal", "tol", "low", "high", "dist", "units")
_PLANT_KEYS = ("transfer", "num", "den")
_LOOP_KEYS = ("controller", "sensor", "feedback", "gain_range", "operating_gain")
_SWEEP_KEYS = ("designs", "samples", "levels", "seed", "chunk_size", "max_variants")
_LOCUS_KEYS = ("points", "keep")
_RESERVED_NAMES = ("s", "sqrt", "exp", "log", "sin", "cos", "tan", "k")
_NAME_RE = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")
MAX_NAME = 64
# nonzero finite gains outside this range underflow or overflow in D + k N
GAIN_LIMITS = (1e-300, 1e300)
# a config is a page of text; this only stops a wrong path (a device, a data file) from filling memory
MAX_FILE_BYTES = 10_000_000
# the locus grid is per variant; beyond this the run only burns memory
MAX_LOCUS_POINTS = 100_000


def _suggest(word: str, choices: Any) -> str:
    """' (did you mean 'x'?)' for a close match, else the list of choices."""
    choices = sorted(choices)
    close = [c for c in choices if c.lower() == word.lower()]
    close = close or difflib.get_close_matches(word, choices, n=1, cutoff=0.5)
    if close:
        return f"did you mean '{close[0]}'?"
    return "expected one of " + ", ".join(choices)


class _Reader:
    """Small helpers that raise `InputError` naming the file and field."""

    def __init__(self, source: str):
        self.source = source

    def fail(self, field_name: str | None, message: str) -> InputError:
        return InputError(message, file=self.source, field=field_name)

    def table(self, data: Any, field_name: str) -> dict:
        if not isinstance(data, dict):
            raise self.fail(field_name, f"expected a table, got {_kind(data)}; write [{field_name}] with key = value lines")
        return data

    def known_keys(self, data: dict, allowed: tuple[str, ...], prefix: str) -> None:
        for key in data:
            if key not in allowed:
                where = f"{prefix}.{shorten(key)}" if prefix else shorten(key)
                raise self.fail(where, f"unknown key '{shorten(key)}'; {_suggest(key, allowed)}")

    def number(self, value: Any, field_name: str, *, allow_inf: bool = False) -> float:
        if isinstance(value, str) and allow_inf and value.strip().lower() in ("inf", "+inf", "infinity"):
            return math.inf
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            fix = ""
            if isinstance(value, str):  # "2.5" or "2 mH": the quotes (and units) must go
                fix = "; write the number without quotes" + ("" if field_name.startswith("loop") else " (units go in units = \"...\")")
            raise self.fail(field_name, f"expected a number, got {_kind(value)} {_show(value)}{fix}")
        try:
            f = float(value)
        except OverflowError:  # a TOML integer beyond floating point
            raise self.fail(field_name, f"{_show(value)} is too large for floating point; give a smaller number") from None
        if math.isnan(f):
            raise self.fail(field_name, "NaN is not allowed; give a number")
        if math.isinf(f) and not (allow_inf and f > 0):
            raise self.fail(field_name, "infinite value is not allowed here; give a finite number")
        return f

    def integer(self, value: Any, field_name: str, *, minimum: int) -> int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise self.fail(field_name, f"expected a whole number, got {_kind(value)} {_show(value)}")
        if value < minimum:
            raise self.fail(field_name, f"must be at least {minimum}, got {value}")
        return int(value)

    def string(self, value: Any, field_name: str) -> str:
        if not isinstance(value, str):
            raise self.fail(field_name, f"expected a string, got {_kind(value)} {_show(value)}")
        return value

    def label(self, value: Any, field_name: str) -> str:
        """A string shown on one line in tables, plots and the terminal: no line breaks or control characters."""
        text = self.string(value, field_name)
        bad = next((c for c in text if not c.isprintable()), None)
        if bad is not None:
            raise self.fail(field_name, f"contains the control character {bad!r}; keep it on one line of plain text")
        return text


def _show(value: Any, limit: int = 40) -> str:
    """repr of a value (dates as written in TOML), cut to `limit` characters for a one-line message."""
    return shorten(value.isoformat() if hasattr(value, "isoformat") else repr(value), limit)


def _kind(value: Any) -> str:
    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, (int, float)):
        return "a number"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, dict):
        return "a table"
    return {"date": "a date", "datetime": "a date-time", "time": "a time"}.get(type(value).__name__, type(value).__name__)


# "-20%/+80%" (or "-20/+80%", "+80%/-20%"): the two sides of an asymmetric tolerance in one string
_SPLIT_TOL = re.compile(r"\s*([+-])\s*([^/%]+?)\s*(%?)\s*/\s*([+-])\s*([^/%]+?)\s*%\s*")
# a symmetric tolerance may be written with a plus-minus prefix
_PLUS_MINUS = ("\u00b1", "+/-", "+-")


def _tolerance(r: _Reader, value: Any, nominal: float, field_name: str) -> tuple[float, float]:
    """(minus, plus) absolute deviations from a `tol` value.

    Accepts "10%" (also "+-10%", "\u00b110 %"), an absolute number, a
    two-element list [minus, plus] of either form (e.g. ["20%", "80%"] or
    ["-20%", "+80%"] for -20/+80 %), or the string "-20%/+80%".
    """
    if isinstance(value, list):
        if len(value) != 2:
            raise r.fail(field_name, f"a tolerance list needs two entries [minus, plus], got {len(value)}")
        minus = _one_tolerance(r, value[0], nominal, f"{field_name}[0]", side="-")
        plus = _one_tolerance(r, value[1], nominal, f"{field_name}[1]", side="+")
        return minus, plus
    if isinstance(value, str):
        m = _SPLIT_TOL.fullmatch(value)
        if m:
            s1, a, _, s2, b = m.groups()
            if s1 == s2:
                raise r.fail(field_name, f"tolerance {_show(value)} gives two {'minus' if s1 == '-' else 'plus'} sides; "
                                         "write it as \"-20%/+80%\" or [\"20%\", \"80%\"] (minus first)")
            sides = {s1: a + "%", s2: b + "%"}
            return (_one_tolerance(r, sides["-"], nominal, field_name, side="-"),
                    _one_tolerance(r, sides["+"], nominal, field_name, side="+"))
        if "/" in value.strip().removeprefix("+/-"):
            raise r.fail(field_name, f"cannot read {_show(value)} as a tolerance; write an asymmetric one as \"-20%/+80%\" "
                                     "or as a list [minus, plus] such as [\"20%\", \"80%\"] or [0.1, 0.3]")
    t = _one_tolerance(r, value, nominal, field_name)
    return t, t


def _one_tolerance(r: _Reader, value: Any, nominal: float, field_name: str, side: str = "") -> float:
    """One absolute deviation from "10%" or a number; `side` is "-" or "+" for one side of a list."""
    if isinstance(value, str):
        text = value.strip()
        signs = _PLUS_MINUS if not side else (side,)
        for sign in signs:
            if text.startswith(sign):
                text = text[len(sign):].strip()
                break
        if text[:1] in ("+", "-", "\u00b1"):
            if side:
                raise r.fail(field_name, f"the {'minus' if side == '-' else 'plus'} side of a tolerance list cannot carry "
                                         f"the sign '{text[0]}'; write [\"20%\", \"80%\"] for -20/+80 %")
            raise r.fail(field_name, f"a single sign in {_show(value)} is ambiguous; write \"10%\" for +-10 %, "
                                     "or [\"10%\", \"0%\"] / [\"0%\", \"10%\"] for a one-sided tolerance")
        if not text.endswith("%"):
            raise r.fail(field_name, f"tolerance string {_show(value)} must end in '%' (e.g. \"10%\"); give an absolute tolerance as a number")
        try:
            pct = float(text[:-1])
        except ValueError:
            raise r.fail(field_name, f"cannot read {_show(value)} as a percentage; write \"10%\", or [\"20%\", \"80%\"] for -20/+80 %") from None
        if not math.isfinite(pct):
            raise r.fail(field_name, f"tolerance {_show(value)} is not a finite percentage")
        if pct < 0:
            raise r.fail(field_name, "tolerance must not be negative")
        if pct >= 100:
            raise r.fail(field_name, f"a tolerance of {pct:g}% lets the value reach or cross zero; give explicit low/high bounds if that is intended")
        if nominal == 0 and pct > 0:
            raise r.fail(field_name, "a percentage of a zero nominal is zero; give an absolute tolerance (tol = 0.1) or low/high bounds")
        return abs(nominal) * (pct / 100.0)
    t = r.number(value, field_name)
    if t < 0:
        raise r.fail(field_name, "tolerance must not be negative; give the +- half-width"
                     + (" (the list [minus, plus] takes two sizes, without signs)" if side else ""))
    return t


def _parameter(r: _Reader, name: str, spec: Any) -> Parameter:
    where = f"parameters.{name}"
    if len(name) > MAX_NAME:  # names become netCDF variables and plot labels
        raise r.fail(f"parameters.{shorten(name, 20)}", f"a parameter name of {len(name)} characters is too long (at most {MAX_NAME}); use a short name and put the description in a comment")
    if not _NAME_RE.match(name):
        raise r.fail(where, f"parameter name {_show(name)} must start with a letter and use only letters, digits and _ (ASCII)")
    if name in _RESERVED_NAMES:
        raise r.fail(where, f"'{name}' is reserved (s is the Laplace variable, k the loop gain, the rest are functions); rename the parameter")
    if name.lower() in ("nan", "inf", "infinity") or keyword.iskeyword(name):
        raise r.fail(where, f"'{name}' is a reserved word of the expression language; rename the parameter")
    if not isinstance(spec, dict):
        # A bare number is a fixed parameter.
        if isinstance(spec, bool) or not isinstance(spec, (int, float)):
            raise r.fail(where, f"expected a number or a table such as {{ nominal = 1.0, tol = \"5%\" }}, got {_kind(spec)} {_show(spec)}")
        value = r.number(spec, where)
        return Parameter(name, value, value, value, "fixed", "")
    r.known_keys(spec, _PARAM_KEYS, where)
    if "nominal" not in spec:
        raise r.fail(where, "missing 'nominal'; write nominal = <value>")
    nominal = r.number(spec["nominal"], f"{where}.nominal")
    units = r.label(spec.get("units", ""), f"{where}.units")
    dist = r.string(spec.get("dist", "uniform"), f"{where}.dist")
    if dist not in DISTRIBUTIONS:
        raise r.fail(f"{where}.dist", f"unknown distribution '{shorten(dist)}'; {_suggest(dist, DISTRIBUTIONS)}")
    has_tol = "tol" in spec
    has_bounds = "low" in spec or "high" in spec
    if has_tol and has_bounds:
        raise r.fail(where, "give either 'tol' or 'low'/'high', not both")
    if dist == "fixed":
        if has_tol or has_bounds:
            raise r.fail(f"{where}.dist", "a fixed parameter takes no tolerance; remove tol/low/high or choose dist = \"uniform\"")
        return Parameter(name, nominal, nominal, nominal, "fixed", units)
    if has_tol:
        minus, plus = _tolerance(r, spec["tol"], nominal, f"{where}.tol")
        low, high = nominal - minus, nominal + plus
    elif has_bounds:
        if "low" not in spec or "high" not in spec:
            missing = "low" if "low" not in spec else "high"
            raise r.fail(where, f"missing '{missing}'; explicit bounds need both low and high")
        low = r.number(spec["low"], f"{where}.low")
        high = r.number(spec["high"], f"{where}.high")
        if low > high:
            raise r.fail(f"{where}.low", f"low ({low:g}) is greater than high ({high:g}); swap them")
        if not (low <= nominal <= high):
            raise r.fail(f"{where}.nominal", f"nominal ({nominal:g}) lies outside [low, high] = [{low:g}, {high:g}]")
    else:
        if dist == "normal":
            raise r.fail(where, "a normal distribution needs a tolerance (tol is 3 sigma); add tol = \"5%\" or similar")
        return Parameter(name, nominal, nominal, nominal, "fixed", units)
    if not (math.isfinite(low) and math.isfinite(high)):
        raise r.fail(f"{where}.tol", f"the bounds [{low:g}, {high:g}] overflow floating point; give a smaller nominal or tolerance")
    if low == high:
        if dist == "normal":  # sigma 0 is no distribution; say which was meant
            raise r.fail(where, "a normal distribution needs a width above zero (tol is 3 sigma); give a tolerance, or write dist = \"fixed\"")
        return Parameter(name, nominal, nominal, nominal, "fixed", units)
    return Parameter(name, nominal, low, high, dist, units)


def _gain_size(r: _Reader, k: float, field_name: str) -> None:
    """Refuse gains at the edge of floating point: k N would underflow or D + k N overflow."""
    if k != 0 and math.isfinite(k) and not GAIN_LIMITS[0] <= abs(k) <= GAIN_LIMITS[1]:
        raise r.fail(field_name, f"a gain of {k:g} is at the edge of floating point; use 0, inf or a gain between "
                                 f"{GAIN_LIMITS[0]:g} and {GAIN_LIMITS[1]:g} (rescale the plant if the loop needs more)")


def _expression(r: _Reader, value: Any, field_name: str, known: set[str], *, allow_s: bool):
    from . import expressions

    if isinstance(value, bool):
        raise r.fail(field_name, "expected an expression or a number, got a boolean")
    if isinstance(value, (int, float)):
        r.number(value, field_name)
        text = repr(float(value))
    elif isinstance(value, str):
        text = value
    else:
        raise r.fail(field_name, f"expected an expression string or a number, got {_kind(value)}")
    try:
        node = expressions.parse(text)
        expressions.check(node, known, allow_s=allow_s)
    except ExpressionError as exc:
        raise r.fail(field_name, str(exc)) from None
    return node


def _coefficients(r: _Reader, value: Any, field_name: str, known: set[str]):
    if not isinstance(value, list) or not value:
        raise r.fail(field_name, "expected a non-empty list of coefficients, highest power of s first")
    return tuple(_expression(r, v, f"{field_name}[{i}]", known, allow_s=False) for i, v in enumerate(value))


def parse_config(text: str, *, source: str = "<memory>", raw: bytes | None = None) -> Config:
    """Build a validated `Config` from TOML text.

    Parameters
    ----------
    text
        The TOML document.
    source
        The file name shown in error messages.
    raw
        The file's bytes (for the sha256); defaults to ``text`` encoded as UTF-8.

    Raises
    ------
    InputError
        For anything malformed, with the field and the fix.
    """
    r = _Reader(source)
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise _toml_error(r, text, exc) from None
    r.known_keys(data, _TOP_KEYS, "")

    title = r.label(data.get("title", ""), "title") if "title" in data else ""

    params_raw = r.table(data.get("parameters", {}), "parameters")
    parameters = tuple(_parameter(r, name, spec) for name, spec in params_raw.items())
    known = {p.name for p in parameters}

    if "plant" not in data:
        raise r.fail("plant", "missing [plant] table; give transfer = \"...\" or num/den lists")
    plant = r.table(data["plant"], "plant")
    r.known_keys(plant, _PLANT_KEYS, "plant")
    transfer = num = den = None
    if "transfer" in plant:
        if "num" in plant or "den" in plant:
            raise r.fail("plant", "give either transfer or num/den, not both")
        transfer = _expression(r, plant["transfer"], "plant.transfer", known, allow_s=True)
    elif "num" in plant and "den" in plant:
        num = _coefficients(r, plant["num"], "plant.num", known)
        den = _coefficients(r, plant["den"], "plant.den", known)
    elif "num" in plant or "den" in plant:
        missing = "den" if "num" in plant else "num"
        raise r.fail(f"plant.{missing}", f"missing '{missing}'; coefficient lists need both num and den")
    else:
        raise r.fail("plant", "missing the plant: give transfer = \"...\" or num/den lists")

    loop = r.table(data.get("loop", {}), "loop")
    r.known_keys(loop, _LOOP_KEYS, "loop")
    controller = _expression(r, loop.get("controller", 1), "loop.controller", known, allow_s=True)
    sensor = _expression(r, loop.get("sensor", 1), "loop.sensor", known, allow_s=True)
    feedback = r.string(loop.get("feedback", "negative"), "loop.feedback")
    if feedback not in ("negative", "positive"):
        raise r.fail("loop.feedback", f"unknown feedback '{shorten(feedback)}'; expected negative or positive")
    gain_range = (0.0, math.inf)
    if "gain_range" in loop:
        g = loop["gain_range"]
        if not isinstance(g, list) or len(g) != 2:
            raise r.fail("loop.gain_range", "expected [low, high], e.g. [0, inf]")
        lo = r.number(g[0], "loop.gain_range[0]")
        hi = r.number(g[1], "loop.gain_range[1]", allow_inf=True)
        if lo < 0:
            raise r.fail("loop.gain_range[0]", "gains must not be negative; for a negative gain use feedback = \"positive\"")
        _gain_size(r, lo, "loop.gain_range[0]")
        _gain_size(r, hi, "loop.gain_range[1]")
        if not lo < hi:
            raise r.fail("loop.gain_range", f"low ({lo:g}) must be below high ({hi:g}); write [low, high]")
        gain_range = (lo, hi)
    operating_gain = None
    if "operating_gain" in loop:
        operating_gain = r.number(loop["operating_gain"], "loop.operating_gain")
        _gain_size(r, operating_gain, "loop.operating_gain")
        if not gain_range[0] < operating_gain < gain_range[1]:
            raise r.fail("loop.operating_gain", f"{operating_gain:g} is not strictly inside gain_range ({gain_range[0]:g}, {gain_range[1]:g}); move it inside or widen the range")

    sweep_raw = r.table(data.get("sweep", {}), "sweep")
    r.known_keys(sweep_raw, _SWEEP_KEYS, "sweep")
    defaults = SweepSettings()
    designs = defaults.designs
    if "designs" in sweep_raw:
        d = sweep_raw["designs"]
        if isinstance(d, str):
            d = [d]
        if not isinstance(d, list) or not d:
            raise r.fail("sweep.designs", "expected a non-empty list, e.g. [\"nominal\", \"corners\"]")
        for i, name in enumerate(d):
            name = r.string(name, f"sweep.designs[{i}]")
            if name not in DESIGNS:
                raise r.fail(f"sweep.designs[{i}]", f"unknown design '{shorten(name)}'; {_suggest(name, DESIGNS)}")
        if len(set(d)) != len(d):
            raise r.fail("sweep.designs", "a design is listed twice; list each once")
        designs = tuple(d)
    settings = SweepSettings(
        designs=designs,
        samples=r.integer(sweep_raw.get("samples", defaults.samples), "sweep.samples", minimum=1),
        levels=r.integer(sweep_raw.get("levels", defaults.levels), "sweep.levels", minimum=2),
        seed=r.integer(sweep_raw.get("seed", defaults.seed), "sweep.seed", minimum=0),
        chunk_size=r.integer(sweep_raw.get("chunk_size", defaults.chunk_size), "sweep.chunk_size", minimum=1),
        max_variants=r.integer(sweep_raw.get("max_variants", defaults.max_variants), "sweep.max_variants", minimum=1),
    )

    locus_raw = r.table(data.get("locus", {}), "locus")
    r.known_keys(locus_raw, _LOCUS_KEYS, "locus")
    ldefaults = LocusSettings()
    points = r.integer(locus_raw.get("points", ldefaults.points), "locus.points", minimum=3)
    if points > MAX_LOCUS_POINTS:
        raise r.fail("locus.points", f"{points} gains is more than the {MAX_LOCUS_POINTS} allowed; a few hundred to a few thousand draw a smooth locus")
    keep_text = r.string(locus_raw.get("keep", ldefaults.keep), "locus.keep")
    keep, keep_count = _keep(r, keep_text)

    config = Config(
        title=title,
        parameters=parameters,
        transfer=transfer,
        num=num,
        den=den,
        controller=controller,
        sensor=sensor,
        feedback=feedback,
        gain_range=gain_range,
        operating_gain=operating_gain,
        sweep=settings,
        locus=LocusSettings(points=points, keep=keep, keep_count=keep_count),
        source=source,
        text=text,
        sha256=hashlib.sha256(raw if raw is not None else text.encode("utf-8")).hexdigest(),
    )
    from . import loop as _loop

    _loop.validate(config)
    return config


_TOML_HINTS = (
    ("Cannot overwrite a value", "a key is given twice (or a table and a key share a name); keep one"),
    ("Duplicate", "a key is given twice; keep one"),
    ("Cannot declare", "a table is declared twice; merge the two [sections]"),
    ("Cannot mutate", "a table is declared twice; merge the two [sections]"),
    ("Invalid value", "strings (expressions, words, percentages) need quotes; numbers are written 1.5 or 2e-3, "
                      "infinity inf, booleans true/false, lists [a, b]"),
    ("Unclosed inline table", "an inline table { ... } stays on one line; strings such as \"10%\" need quotes"),
    ("Unclosed", "close the string, list or table"),
    ("Unterminated string", "close the string with the quote it opens with"),
    ("Invalid initial character for a key part", "an inline table { ... } stays on one line, without a trailing comma"),
    ("Invalid statement", "each line is key = value or [section]"),
    ("Expected '=' after a key", "each line is key = value or [section] (TOML writes '=', not ':')"),
    ("Expected newline or end of document", "one key = value per line; expressions need quotes, e.g. transfer = \"1/(s + 1)\""),
)
# what the offending line itself shows, ahead of the parser's reason (outside quotes is close enough)
_TOML_LINE_HINTS = (
    (re.compile(r"=\s*[-+]?\d+,\d"), "write decimals with a point: 2.5, not 2,5"),
    (re.compile(r"=\s*[-+]?\.\d|=\s*[-+]?\d+\.(?![\d])"), "write a digit on both sides of the point: 0.5 and 2.0"),
    (re.compile(r"=\s*[-+]?\d[\d.]*(?:[eE][-+]?\d+)?\s*[A-DF-Za-df-z\u00b5\u03bc\u03a9]"),
     "numbers take no unit letters: write nominal = 2e-3 and units = \"H\""),
)
_HEADER = re.compile(r"\s*\[+\s*([A-Za-z0-9_.\-\s\"']+?)\s*\]+\s*(#.*)?$")
_KEY = re.compile(r"\s*([A-Za-z0-9_\-]+(?:\s*\.\s*[A-Za-z0-9_\-]+)*)\s*[=:]")


def _field_at(lines: list[str], number: int) -> str:
    """The dotted key written on line `number` (1-based), best effort, or ''."""
    table = ""
    for line in lines[: number - 1]:
        m = _HEADER.match(line)
        if m:
            table = shorten(re.sub(r"\s+", "", m.group(1)).replace('"', "").replace("'", ""))
    line = lines[number - 1] if 0 < number <= len(lines) else ""
    m = _HEADER.match(line)
    if m:
        return ""
    m = _KEY.match(line)
    if not m:
        return ""
    key = re.sub(r"\s+", "", m.group(1))
    return shorten(f"{table}.{key}" if table else key)


def _toml_error(r: _Reader, text: str, exc: Exception) -> InputError:
    """One line for a TOML syntax error: the line number and key, the line itself and a hint."""
    message = str(exc)
    m = re.search(r"\(at line (\d+), column (\d+)\)", message)
    reason = re.sub(r"\s*\((at line \d+, column \d+|at end of document)\)", "", message).strip()
    hint = next((h for key, h in _TOML_HINTS if reason.startswith(key)), "check the syntax of that line")
    if m is not None:
        number = int(m.group(1))
        lines = text.splitlines()
        bad_line = lines[number - 1] if 0 < number <= len(lines) else ""
        hint = next((h for pattern, h in _TOML_LINE_HINTS if pattern.search(bad_line)), hint)
    if m is None:
        if hint.endswith("that line"):
            hint = "check the last lines of the file"
        return r.fail(None, f"not valid TOML ({reason}, at the end of the file); {hint}")
    number = int(m.group(1))
    lines = text.splitlines()
    line = lines[number - 1].strip() if 0 < number <= len(lines) else ""
    shown = f": {_show(line, 60)}" if line else ""
    key = _field_at(lines, number)
    where = f"line {number} ({key})" if key else f"line {number}"
    return r.fail(where, f"not valid TOML ({reason}, column {m.group(2)}{shown}); {hint}")


def _keep(r: _Reader, text: str) -> tuple[str, int]:
    if text in ("all", "none", "corners"):
        return text, 0
    m = re.fullmatch(r"random:(\d+)", text.strip())
    if m and int(m.group(1)) > 0:
        return "random", int(m.group(1))
    raise r.fail("locus.keep", f"unknown keep {_show(text)}; expected all, none, corners or \"random:N\" with N > 0")


def load_config(path: Any) -> Config:
    """Read and validate a config file.

    Parameters
    ----------
    path
        Path of the TOML file.

    Returns
    -------
    Config
        The frozen, validated config; ``source`` is the path as given.

    Raises
    ------
    InputError
        When the file cannot be read, is not TOML, or any field is wrong.
    """
    source = str(path)
    try:
        with open(path, "rb") as fh:
            raw = fh.read(MAX_FILE_BYTES + 1)
        if len(raw) > MAX_FILE_BYTES:
            raise InputError(f"is larger than {MAX_FILE_BYTES // 1_000_000} MB, far beyond any config; give the .toml file", file=source)
    except IsADirectoryError:
        raise InputError("is a folder, not a config file; give the path of a .toml file", file=source) from None
    except OSError as exc:
        raise InputError(f"cannot read the file ({exc.strerror or exc}); check the path", file=source) from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise InputError("not a UTF-8 text file; save the config as UTF-8 TOML", file=source) from None
    if text.startswith("\ufeff"):  # a byte-order mark, as some editors write: not part of the TOML
        text = text[1:]
    return parse_config(text, source=source, raw=raw)
