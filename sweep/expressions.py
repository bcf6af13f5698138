"""Our own small expression language: tokenizer, recursive-descent parser, evaluators.

Nothing here ever calls `eval`, `exec` or Python's `ast` on user text; the
text is only ever split into tokens by the rules below.

Grammar (``^`` and ``**`` are the same operator)::

    expr   := term (('+' | '-') term)*
    term   := unary (('*' | '/') unary)*
    unary  := ('+' | '-') unary | power
    power  := atom (('^' | '**') unary)?        # right-associative
    atom   := NUMBER | NAME | FUNC '(' expr ')' | '(' expr ')'

So ``-x^2`` is ``-(x^2)``, ``2^3^2`` is ``2^(3^2)`` and ``x^-1`` is allowed.
Numbers: ``12``, ``1.5``, ``.5``, ``3.0e-3``; NaN or infinite values (``nan``,
``inf``, ``1e999``) are refused. Names: ``[A-Za-z][A-Za-z0-9_]*``; a name that
starts with ``_`` is refused (documented choice: no dunder or private names at
all), as are Python's hard keywords (``lambda``, ``import``, ...), ``nan``,
``inf`` and ``infinity`` in any letter case, and the function names. ``s`` is
the Laplace variable. Functions: ``sqrt exp log sin cos tan``, one argument.
Error positions count characters from 1.

Size limits (so that no input can exhaust the stack or hang): at most
`MAX_TEXT` characters, at most `MAX_NESTING` nested parentheses, signs and
exponents, and a tree at most `MAX_DEPTH` levels deep (a sum of n terms is n
levels deep). Every evaluator recurses over the tree, so these limits
keep them far from Python's recursion limit whatever the caller's stack.
"""
from __future__ import annotations

import difflib
import keyword
import re
from dataclasses import dataclass
from typing import Any, Mapping, Union

import numpy as np

from . import intervals as _iv
from .errors import ExpressionError
from .errors import shorten
from .intervals import Interval
from .polynomials import Rational

__all__ = [
    "Node",
    "Number",
    "Name",
    "S",
    "Neg",
    "Binary",
    "Power",
    "Call",
    "FUNCTIONS",
    "parse",
    "names",
    "has_s",
    "check",
    "depth",
    "domain_guards",
    "to_text",
    "evaluate",
    "evaluate_rational",
]

FUNCTIONS = ("sqrt", "exp", "log", "sin", "cos", "tan")
_ALLOWED = "numbers, parameter names, s, + - * / ^ **, parentheses and the functions " + ", ".join(FUNCTIONS)
# integer powers of expressions in s beyond this would blow up the degree
MAX_S_POWER = 64
# bound on the degree in s an expression can reach (the loop itself takes at most 50 poles);
# without it ((s + 1)^64)^64 would spend minutes multiplying polynomials before any check
MAX_S_DEGREE = 200
# a config expression is a line or two; these bound the parser's and the evaluators' recursion
MAX_TEXT = 10_000
MAX_NESTING = 100
MAX_DEPTH = 250


# ----------------------------------------------------------------- tree nodes
@dataclass(frozen=True)
class Number:
    """A numeric literal (finite float; the parser only makes non-negative ones)."""

    value: float


@dataclass(frozen=True)
class Name:
    """A parameter name."""

    id: str


@dataclass(frozen=True)
class S:
    """The Laplace variable ``s``."""


@dataclass(frozen=True)
class Neg:
    """Unary minus."""

    operand: "Node"


@dataclass(frozen=True)
class Binary:
    """``left op right`` with op one of ``+ - * /``."""

    op: str
    left: "Node"
    right: "Node"


@dataclass(frozen=True)
class Power:
    """``base ^ exponent``."""

    base: "Node"
    exponent: "Node"


@dataclass(frozen=True)
class Call:
    """``func(arg)`` with func one of `FUNCTIONS`."""

    func: str
    arg: "Node"


Node = Union[Number, Name, S, Neg, Binary, Power, Call]


# ------------------------------------------------------------------ tokenizer
_NUMBER = re.compile(r"([0-9]+\.?[0-9]*|\.[0-9]+)([eE][+-]?[0-9]+)?")  # ASCII digits only
_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_OPS = ("**", "+", "-", "*", "/", "^", "(", ")", ",")


# characters that word processors and web pages put in place of plain ASCII
_LOOKALIKES = {
    "\u2212": "a typographic minus sign; type '-'",
    "\u2013": "a dash; type '-'",
    "\u00d7": "a multiplication sign; type '*'",
    "\u00b7": "a middle dot; type '*'",
    "\u22c5": "a dot operator; type '*'",
    "\u00f7": "a division sign; type '/'",
    "\u00b2": "a superscript; write ^2",
    "\u00b3": "a superscript; write ^3",
    "\u00a0": "a non-breaking space; type a plain space",
    "\u200b": "an invisible zero-width space; delete it",
}


@dataclass(frozen=True)
class _Tok:
    kind: str  # "num", "name", "op", "end"
    text: str
    pos: int  # 0-based offset
    value: float = 0.0


def _err(msg: str) -> ExpressionError:
    return ExpressionError(" ".join(msg.split()))


def _tokenize(text: str) -> list[_Tok]:
    toks: list[_Tok] = []
    i = 0
    n = len(text)
    while i < n:
        c = text[i]
        if c in " \t\r\n":
            i += 1
            continue
        m = _NUMBER.match(text, i)
        if m:
            j = m.end()
            if j < n and (text[j].isalnum() or text[j] in "_."):
                raise _err(
                    f"malformed number '{shorten(text[i:j + 1])}' at position {i + 1}; "
                    f"write numbers like 12, 0.5 or 3.0e-3 and use '*' between a number and a name"
                )
            lit = m.group(0)
            value = float(lit)
            if not np.isfinite(value):
                raise _err(f"number '{shorten(lit)}' at position {i + 1} is too large (not finite); numbers must be finite")
            toks.append(_Tok("num", lit, i, value))
            i = j
            continue
        m = _NAME.match(text, i)
        if m:
            word = m.group(0)
            if word.startswith("_"):
                raise _err(
                    f"name '{shorten(word)}' at position {i + 1} is not allowed: names must start with a letter"
                )
            if word.lower() in ("nan", "inf", "infinity"):
                raise _err(
                    f"'{word}' at position {i + 1} is not allowed: NaN and infinite values cannot appear in an expression"
                )
            if keyword.iskeyword(word):
                raise _err(
                    f"'{word}' at position {i + 1} is a reserved word and not allowed; allowed: {_ALLOWED}"
                )
            toks.append(_Tok("name", word, i))
            i = m.end()
            continue
        for op in _OPS:
            if text.startswith(op, i):
                toks.append(_Tok("op", op, i))
                i += len(op)
                break
        else:
            what = {"'": "string quote \"'\"", '"': "string quote '\"'", ".": "attribute access '.'", "[": "indexing '['",
                    "]": "']'", ";": "';'", ":": "':'", "=": "'='"}.get(c, repr(c))
            if c in _LOOKALIKES:
                raise _err(f"unexpected {what} at position {i + 1}: {_LOOKALIKES[c]}")
            raise _err(f"unexpected {what} at position {i + 1}; allowed: {_ALLOWED}")
    toks.append(_Tok("end", "", n))
    return toks


# --------------------------------------------------------------------- parser
class _Parser:
    def __init__(self, text: str):
        self.text = text
        self.toks = _tokenize(text)
        self.i = 0
        self.nesting = 0  # active unary() calls: every recursion of the grammar passes there

    @property
    def tok(self) -> _Tok:
        return self.toks[self.i]

    def _found(self, t: _Tok) -> str:
        return "the end of the text" if t.kind == "end" else f"'{shorten(t.text)}' at position {t.pos + 1}"

    def _is(self, *ops: str) -> bool:
        return self.tok.kind == "op" and self.tok.text in ops

    def parse(self) -> Node:
        if self.tok.kind == "end":
            raise _err(f"empty expression; allowed: {_ALLOWED}")
        node = self.expr()
        t = self.tok
        if t.kind != "end":
            if self._is(")"):
                raise _err(f"unbalanced parentheses: ')' at position {t.pos + 1} has no matching '('")
            raise _err(
                f"unexpected {self._found(t)} after a complete expression; "
                f"join terms with an operator (+ - * / ^)"
            )
        return node

    def expr(self) -> Node:
        node = self.term()
        while self._is("+", "-"):
            op = self.tok.text
            self.i += 1
            node = Binary(op, node, self.term())
        return node

    def term(self) -> Node:
        node = self.unary()
        while self._is("*", "/"):
            op = self.tok.text
            self.i += 1
            node = Binary(op, node, self.unary())
        return node

    def unary(self) -> Node:
        self.nesting += 1
        try:
            if self.nesting > MAX_NESTING:
                raise _err(
                    f"expression is nested too deeply at position {self.tok.pos + 1} (more than {MAX_NESTING} "
                    f"levels of parentheses, signs or exponents); simplify it"
                )
            if self._is("-"):
                self.i += 1
                return Neg(self.unary())
            if self._is("+"):
                self.i += 1
                return self.unary()
            return self.power()
        finally:
            self.nesting -= 1

    def power(self) -> Node:
        base = self.atom()
        if self._is("^", "**"):
            self.i += 1
            return Power(base, self.unary())
        return base

    def atom(self) -> Node:
        t = self.tok
        if t.kind == "num":
            self.i += 1
            return Number(t.value)
        if t.kind == "name":
            self.i += 1
            if t.text in FUNCTIONS:
                return self.call(t)
            if self._is("("):
                # 's(s + 1)' or 'K(s + 1)' is a product written without '*'
                times = f"to multiply, write '{shorten(t.text)}*(...)'"
                if t.text == "s":
                    raise _err(f"'s(' at position {t.pos + 1}: s is not a function; {times}")
                raise _err(
                    f"unknown function '{shorten(t.text)}' at position {t.pos + 1}; allowed functions: "
                    f"{', '.join(FUNCTIONS)}; {times}"
                )
            if t.text == "s":
                return S()
            return Name(t.text)
        if self._is("("):
            self.i += 1
            node = self.expr()
            if not self._is(")"):
                raise _err(
                    f"unbalanced parentheses: '(' at position {t.pos + 1} is not closed "
                    f"(found {self._found(self.tok)})"
                )
            self.i += 1
            return node
        raise _err(f"expected a number, a name or '(' but found {self._found(t)}; allowed: {_ALLOWED}")

    def call(self, name: _Tok) -> Node:
        if not self._is("("):
            raise _err(f"function '{name.text}' at position {name.pos + 1} needs one argument in parentheses")
        self.i += 1
        if self._is(")"):
            raise _err(f"{name.text}() at position {name.pos + 1} needs exactly one argument")
        arg = self.expr()
        if self._is(","):
            raise _err(f"{name.text} at position {name.pos + 1} takes exactly one argument (found ',')")
        if not self._is(")"):
            raise _err(
                f"unbalanced parentheses: {name.text}( at position {name.pos + 1} is not closed "
                f"(found {self._found(self.tok)})"
            )
        self.i += 1
        return Call(name.text, arg)


def parse(text: str) -> Node:
    """Parse expression text into a tree of frozen dataclass nodes.

    Parameters
    ----------
    text
        The expression, e.g. ``"Kt / (s*((J*s + B)*(L*s + R) + Kt^2)) / N"``.

    Returns
    -------
    Node

    Raises
    ------
    ExpressionError
        One line: what was found, where (position from 1) and what is allowed.
    """
    if not isinstance(text, str):
        raise _err(f"expected expression text, found {type(text).__name__}")
    if len(text) > MAX_TEXT:
        raise _err(f"expression is {len(text)} characters long; at most {MAX_TEXT} are allowed")
    try:
        node = _Parser(text).parse()
    except RecursionError:  # only when the caller's own stack is already deep
        raise _err("expression is nested too deeply; simplify the parentheses") from None
    d = depth(node)
    if d > MAX_DEPTH:
        raise _err(
            f"expression is too long: its tree is {d} levels deep, at most {MAX_DEPTH} are allowed; "
            f"split long sums or products into parameters"
        )
    return node


def depth(node: Node) -> int:
    """Number of levels of the tree (a leaf is 1); iterative, so any tree is safe."""
    best = 0
    stack = [(node, 1)]
    while stack:
        n, d = stack.pop()
        best = max(best, d)
        stack.extend((c, d + 1) for c in _children(n))
    return best


# ------------------------------------------------------------------ inspection
def _children(node: Node) -> tuple:
    if isinstance(node, Neg):
        return (node.operand,)
    if isinstance(node, Binary):
        return (node.left, node.right)
    if isinstance(node, Power):
        return (node.base, node.exponent)
    if isinstance(node, Call):
        return (node.arg,)
    return ()


def _walk(node: Node):
    """Every node of the tree, without recursion."""
    stack = [node]
    while stack:
        n = stack.pop()
        yield n
        stack.extend(_children(n))


def names(node: Node) -> set[str]:
    """Parameter names used in the tree (``s`` excluded)."""
    return {n.id for n in _walk(node) if isinstance(n, Name)}


def has_s(node: Node) -> bool:
    """Whether the Laplace variable ``s`` occurs in the tree."""
    return any(isinstance(n, S) for n in _walk(node))


def _literal_int(node: Node) -> int | None:
    """The integer value of a literal like ``3`` or ``-2``, else None."""
    if isinstance(node, Number) and float(node.value).is_integer():
        return int(node.value)
    if isinstance(node, Neg):
        v = _literal_int(node.operand)
        return None if v is None else -v
    return None


def check(node: Node, known: Any, *, allow_s: bool) -> None:
    """Check names and the use of ``s``.

    Parameters
    ----------
    node
        A parsed tree.
    known
        The known parameter names (any container of str).
    allow_s
        Whether the Laplace variable may appear.

    Raises
    ------
    ExpressionError
        Unknown name (with a close-match suggestion), ``s`` where it is not
        allowed, ``s`` inside a function or an exponent, or a power of an
        expression in ``s`` whose exponent is not a literal integer.
    """
    known = set(known)
    for nm in sorted(names(node)):
        if nm not in known:
            if nm in ("k", "K"):  # the swept gain is never written; 'k' cannot even be a parameter
                raise _err(f"unknown name '{nm}': the loop gain k is what the sweep varies and stays out of the "
                           f"expressions (the open loop is k C(s) G(s) H(s)); remove it"
                           + (" or define K as a parameter" if nm == "K" else ""))
            if nm == "S":
                raise _err("unknown name 'S': the Laplace variable is written in lower case, s")
            close = [k for k in sorted(known) if k.lower() == nm.lower()]
            close = close or difflib.get_close_matches(nm, sorted(known), n=1, cutoff=0.5)  # short names: 'Kn' ~ 'Km'
            if close:
                hint = f"did you mean '{close[0]}'? (or define '{shorten(nm)}' as a parameter)"
            elif known:
                shown = sorted(known)[:8]  # the message stays one readable line
                more = f" and {len(known) - 8} more" if len(known) > 8 else ""
                hint = f"define it as a parameter or correct the spelling (known names: {', '.join(shown)}{more})"
            else:
                hint = "no parameters are defined; define it as a parameter"
            raise _err(f"unknown name '{shorten(nm)}'; {hint}")
    if not has_s(node):
        return
    if not allow_s:
        raise _err("the Laplace variable 's' is not allowed in this expression; use parameter names and numbers only")
    _check_s(node)
    degree = max(_degree_bound(node))
    if degree > MAX_S_DEGREE:
        raise _err(
            f"the expression can reach degree {degree} in s, beyond the {MAX_S_DEGREE} allowed "
            f"(a loop has at most a few dozen poles); write the model with fewer or smaller powers of s"
        )


def _degree_bound(node: Node) -> tuple[int, int]:
    """Upper bounds on the degrees (numerator, denominator) in s of a tree that passed `_check_s`."""
    if not has_s(node):
        return 0, 0
    if isinstance(node, S):
        return 1, 0
    if isinstance(node, Neg):
        return _degree_bound(node.operand)
    if isinstance(node, Binary):
        (n1, d1), (n2, d2) = _degree_bound(node.left), _degree_bound(node.right)
        if node.op == "*":
            return n1 + n2, d1 + d2
        if node.op == "/":
            return n1 + d2, d1 + n2
        return max(n1 + d2, n2 + d1), d1 + d2
    if isinstance(node, Power):
        n = _literal_int(node.exponent)
        nb, db = _degree_bound(node.base)
        return (n * nb, n * db) if n >= 0 else (-n * db, -n * nb)
    raise TypeError(f"not an expression node: {node!r}")


def _check_s(node: Node) -> None:
    if isinstance(node, Call):
        if has_s(node.arg):
            # a dead time exp(-T*s) is not rational: point to the usual rational stand-in
            delay = "; for a dead time use a Pade approximation such as (1 - T*s/2)/(1 + T*s/2)" if node.func == "exp" else ""
            raise _err(
                f"'s' inside {node.func}(...) is not allowed: functions apply to parameter expressions only{delay}"
            )
        return
    if isinstance(node, Power):
        if has_s(node.exponent):
            raise _err(f"'s' in an exponent is not allowed (in '{shorten(to_text(node))}')")
        if has_s(node.base):
            n = _literal_int(node.exponent)
            if n is None:
                raise _err(
                    f"a power of an expression in s needs a literal integer exponent, found '{shorten(to_text(node.exponent))}'"
                )
            if abs(n) > MAX_S_POWER:
                raise _err(f"exponent {n} on an expression in s is too large (at most {MAX_S_POWER})")
            _check_s(node.base)
        return
    for c in _children(node):
        _check_s(c)


def domain_guards(node: Node) -> list[tuple[str, Node, str]]:
    """The ``s``-free sub-expressions whose values must stay inside a domain.

    Parameters
    ----------
    node
        A parsed tree (it may contain ``s``).

    Returns
    -------
    list of (kind, sub-tree, role)
        Innermost first, without repeats. ``kind`` is ``"nonzero"`` (a
        divisor, or the base of a negative integer power), ``"nonnegative"``
        (argument of sqrt, base of a positive real power), ``"positive"``
        (argument of log, base of a negative real power or of a power whose
        exponent is an expression) or ``"tan"`` (argument of tan, which must
        keep away from its poles). ``role`` says in words where the
        sub-tree stands, for messages ("divisor", "sqrt argument", ...).
    """
    out: list[tuple[str, Node, str]] = []

    def visit(n: Node) -> None:
        for c in _children(n):
            visit(c)
        guard = None
        if isinstance(n, Binary) and n.op == "/" and not has_s(n.right):
            guard = ("nonzero", n.right, "divisor")
        elif isinstance(n, Power) and not has_s(n.base):
            k = _literal_int(n.exponent)
            if k is not None:
                guard = ("nonzero", n.base, "base of a negative power") if k < 0 else None
            else:
                e = _literal_value(n.exponent)
                if e is not None and e > 0:
                    guard = ("nonnegative", n.base, "base of a real power")
                else:
                    guard = ("positive", n.base, "base of a negative or variable real power")
        elif isinstance(n, Call) and n.func in ("sqrt", "log", "tan") and not has_s(n.arg):
            kind = {"sqrt": "nonnegative", "log": "positive", "tan": "tan"}[n.func]
            guard = (kind, n.arg, f"{n.func} argument")
        if guard is not None and guard not in out:
            out.append(guard)

    visit(node)
    return out


def _literal_value(node: Node) -> float | None:
    """The value of a literal like ``1.5`` or ``-0.5``, else None."""
    if isinstance(node, Number):
        return float(node.value)
    if isinstance(node, Neg):
        v = _literal_value(node.operand)
        return None if v is None else -v
    return None


# ------------------------------------------------------------------- printing
_PREC_ADD, _PREC_MUL, _PREC_NEG, _PREC_POW, _PREC_ATOM = 1, 2, 3, 4, 5


def _prec(node: Node) -> int:
    if isinstance(node, Binary):
        return _PREC_ADD if node.op in "+-" else _PREC_MUL
    if isinstance(node, Neg):
        return _PREC_NEG
    if isinstance(node, Power):
        return _PREC_POW
    if isinstance(node, Number) and node.value < 0:
        return _PREC_ADD  # printed with a sign: always parenthesise
    return _PREC_ATOM


def _num_text(v: float) -> str:
    v = float(v)
    if v.is_integer() and abs(v) < 1e15:
        return str(int(v))
    return repr(v)


def to_text(node: Node) -> str:
    """Canonical text of a tree; ``parse(to_text(t)) == t`` for parser-made trees.

    Uses ``^`` for powers and the fewest parentheses that keep the tree.
    """
    if isinstance(node, Number):
        return _num_text(node.value)
    if isinstance(node, Name):
        return node.id
    if isinstance(node, S):
        return "s"
    if isinstance(node, Call):
        return f"{node.func}({to_text(node.arg)})"
    if isinstance(node, Neg):
        inner = to_text(node.operand)
        return "-" + (f"({inner})" if _prec(node.operand) < _PREC_NEG else inner)
    if isinstance(node, Power):
        b = to_text(node.base)
        if _prec(node.base) <= _PREC_POW:
            b = f"({b})"
        e = to_text(node.exponent)
        if _prec(node.exponent) < _PREC_NEG:
            e = f"({e})"
        return f"{b}^{e}"
    if isinstance(node, Binary):
        p = _prec(node)
        left = to_text(node.left)
        if _prec(node.left) < p:
            left = f"({left})"
        right = to_text(node.right)
        if _prec(node.right) <= p:
            right = f"({right})"
        if node.op in "+-":
            return f"{left} {node.op} {right}"
        return f"{left}{node.op}{right}"
    raise TypeError(f"not an expression node: {node!r}")


# ------------------------------------------------------------------ evaluation
_NUMPY_FUNCS = {"sqrt": np.sqrt, "exp": np.exp, "log": np.log, "sin": np.sin, "cos": np.cos, "tan": np.tan}
_INTERVAL_FUNCS = {"sqrt": _iv.isqrt, "exp": _iv.iexp, "log": _iv.ilog, "sin": _iv.isin, "cos": _iv.icos, "tan": _iv.itan}


def _power(base: Any, node: Power, env: Mapping[str, Any], imode: bool) -> Any:
    n = _literal_int(node.exponent)
    if isinstance(base, Interval):
        if n is not None:
            return base ** n
        return base ** _eval(node.exponent, env, imode)
    if n is not None:
        # integer power: exact sign rules, negative bases fine
        return np.power(np.asarray(base, dtype=np.float64), float(n))[()]
    e = _eval(node.exponent, env, imode)
    if isinstance(e, Interval):
        return Interval(base) ** e
    return np.power(np.asarray(base, dtype=np.float64), e)[()]


def _eval(node: Node, env: Mapping[str, Any], imode: bool) -> Any:
    if isinstance(node, Number):
        # in interval mode constants are point intervals, so that every
        # operation on them (exp(21), 0.1 + 0.2, ...) is rounded outward too
        return Interval(node.value) if imode else float(node.value)
    if isinstance(node, Name):
        try:
            return env[node.id]
        except KeyError:
            raise _err(f"no value for name '{node.id}'") from None
    if isinstance(node, S):
        raise _err("'s' cannot be evaluated as a number; use evaluate_rational")
    if isinstance(node, Neg):
        return -_eval(node.operand, env, imode)
    if isinstance(node, Binary):
        a = _eval(node.left, env, imode)
        if imode and node.op == "*" and node.left == node.right:
            # x*x of one sub-expression is x^2: the interval square is tighter
            # (never below 0) and still encloses every value
            return a ** 2
        b = _eval(node.right, env, imode)
        if node.op == "+":
            return a + b
        if node.op == "-":
            return a - b
        if node.op == "*":
            return a * b
        return a / b
    if isinstance(node, Power):
        return _power(_eval(node.base, env, imode), node, env, imode)
    if isinstance(node, Call):
        x = _eval(node.arg, env, imode)
        if isinstance(x, Interval):
            return _INTERVAL_FUNCS[node.func](x)
        return _NUMPY_FUNCS[node.func](x)
    raise TypeError(f"not an expression node: {node!r}")


def _interval_mode(env: Mapping[str, Any]) -> bool:
    return any(isinstance(v, Interval) for v in env.values())


def evaluate(node: Node, env: Mapping[str, Any]) -> Any:
    """Evaluate an ``s``-free tree.

    Parameters
    ----------
    node
        A parsed tree without ``s``.
    env
        Maps every name to a float, an ndarray ``(V,)`` or an `Interval`.

    Returns
    -------
    float, ndarray or Interval
        The same kind as the inputs. As soon as one value in `env` is an
        `Interval`, every number in the tree is treated as a point interval
        and the result is an `Interval` (sound enclosure).
    """
    return _eval(node, env, _interval_mode(env))


def evaluate_rational(node: Node, env: Mapping[str, Any]) -> Rational:
    """Evaluate a tree as a rational function of ``s``.

    ``s``-free sub-trees are evaluated directly with `evaluate` and become
    constant coefficients (floats, ndarrays or Intervals); they are not
    expanded as polynomials.

    Raises
    ------
    ExpressionError
        ``s`` inside a function, in an exponent, or a non-integer power of an
        expression in ``s``.
    """
    if not has_s(node):
        # the node itself is the construction key: equal sub-trees, equal values
        return Rational.constant(evaluate(node, env), key=node)
    if isinstance(node, S):
        return Rational.s()
    if isinstance(node, Neg):
        return -evaluate_rational(node.operand, env)
    if isinstance(node, Binary):
        a = evaluate_rational(node.left, env)
        b = evaluate_rational(node.right, env)
        if node.op == "+":
            return a + b
        if node.op == "-":
            return a - b
        if node.op == "*":
            return a * b
        return a / b
    if isinstance(node, (Power, Call)):
        _check_s(node)  # refuses s in a function or exponent, non-integer powers
        n = _literal_int(node.exponent)
        return evaluate_rational(node.base, env) ** n
    raise TypeError(f"not an expression node: {node!r}")
