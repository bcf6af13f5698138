"""Tests of sweep.expressions: parser, printer, evaluators (float, array, interval, rational)."""
from __future__ import annotations

import builtins
import math

import numpy as np
import pytest
import sympy
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from sweep.errors import ExpressionError
from sweep.expressions import (
    Binary, Call, Name, Neg, Number, Power, S,
    check, evaluate, evaluate_rational, has_s, names, parse, to_text,
)
from sweep.intervals import Interval, as_interval

NAMES = ["a", "b", "c"]
FUNCS = ["sqrt", "exp", "log", "sin", "cos", "tan"]

numbers = st.one_of(
    st.integers(0, 20).map(float),
    st.floats(0.01, 100.0, allow_nan=False, allow_infinity=False),
    st.sampled_from([0.5, 1e-3, 2.5e4, 3.0e-3]),
).map(Number)
leaves = st.one_of(numbers, st.sampled_from(NAMES).map(Name))


def _extend(children):
    return st.one_of(
        children.map(Neg),
        st.tuples(st.sampled_from("+-*/"), children, children).map(lambda t: Binary(*t)),
        st.tuples(children, st.integers(-3, 4).map(float)).map(
            lambda t: Power(t[0], Neg(Number(-t[1])) if t[1] < 0 else Number(t[1]))
        ),
        # real exponent on a positive base (exp(...) or a parameter, all > 0 in the envs)
        st.tuples(children, st.sampled_from([0.5, 1.5, 2.25])).map(lambda t: Power(Call("exp", t[0]), Number(t[1]))),
        st.tuples(st.sampled_from(NAMES), st.sampled_from([0.5, 1.5])).map(lambda t: Power(Name(t[0]), Number(t[1]))),
        st.tuples(st.sampled_from(FUNCS), children).map(lambda t: Call(*t)),
    )


trees = st.recursive(leaves, _extend, max_leaves=8)


def py_eval(node, env):
    """Reference evaluator: plain Python float arithmetic and the math module (from memory)."""
    if isinstance(node, Number):
        return node.value
    if isinstance(node, Name):
        return env[node.id]
    if isinstance(node, Neg):
        return -py_eval(node.operand, env)
    if isinstance(node, Binary):
        a, b = py_eval(node.left, env), py_eval(node.right, env)
        if node.op == "/" and abs(b) < 1e-9:
            raise ZeroDivisionError
        return {"+": a + b, "-": a - b, "*": a * b, "/": a / b if b else 0.0}[node.op]
    if isinstance(node, Power):
        return py_eval(node.base, env) ** py_eval(node.exponent, env)
    if isinstance(node, Call):
        return getattr(math, node.func)(py_eval(node.arg, env))
    raise TypeError(node)


def safe_py_eval(node, env):
    try:
        with np.errstate(all="ignore"):
            v = py_eval(node, env)
    except (ZeroDivisionError, OverflowError, ValueError):
        return None
    if isinstance(v, complex) or not math.isfinite(v) or abs(v) > 1e100:
        return None
    return v


env_values = st.fixed_dictionaries({n: st.floats(0.3, 3.0) for n in NAMES})


@settings(max_examples=300, deadline=None)
@given(trees)
def test_round_trip(tree):
    text = to_text(tree)
    assert parse(text) == tree
    assert to_text(parse(text)) == text


def _close(x, y):
    return math.isclose(x, y, rel_tol=1e-9, abs_tol=1e-9)


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.filter_too_much])
@given(trees, env_values)
def test_evaluate_matches_python(tree, env):
    ref = safe_py_eval(tree, env)
    assume(ref is not None)
    parsed = parse(to_text(tree))
    with np.errstate(all="ignore"):
        got = evaluate(parsed, env)
        arr = evaluate(parsed, {k: np.array([v, v]) for k, v in env.items()})
    assert _close(float(got), ref)
    assert np.shape(arr) in ((2,), ())
    assert all(_close(float(v), ref) for v in np.broadcast_to(arr, (2,)))


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.filter_too_much])
@given(trees, env_values, st.floats(0.0, 0.2), st.lists(st.floats(0.0, 1.0), min_size=3, max_size=3))
def test_interval_encloses_points(tree, centre, rel, t):
    boxes = {n: Interval(v * (1 - rel), v * (1 + rel)) for n, v in centre.items()}
    point = {n: v * (1 - rel) + ti * 2 * rel * v for (n, v), ti in zip(centre.items(), t)}
    ref = safe_py_eval(tree, point)
    assume(ref is not None)
    try:
        with np.errstate(all="ignore"):
            enc = as_interval(evaluate(tree, boxes))
    except ValueError:  # the box reaches outside sqrt/log's domain: documented refusal
        assume(False)
    lo, hi = float(enc.lo), float(enc.hi)
    # a tiny slack for the float reference's own rounding (it is not an enclosure)
    slack = 1e-12 * max(1.0, abs(ref))
    assert lo - slack <= ref <= hi + slack


def test_precedence():
    assert parse("-x^2") == Neg(Power(Name("x"), Number(2.0)))
    assert parse("2^3^2") == Power(Number(2.0), Power(Number(3.0), Number(2.0)))
    assert parse("a**-1") == Power(Name("a"), Neg(Number(1.0)))
    assert parse("a - b - c") == Binary("-", Binary("-", Name("a"), Name("b")), Name("c"))
    assert parse("a/b*c") == Binary("*", Binary("/", Name("a"), Name("b")), Name("c"))
    assert parse("s") == S()
    assert evaluate(parse("-2^2"), {}) == -4.0  # from memory: usual math convention
    assert evaluate(parse("2^3^2"), {}) == 512.0
    assert evaluate(parse("3.0e-3*1e3"), {}) == pytest.approx(3.0)


def test_names_has_s_check():
    t = parse("Kt/(s*((J*s + B)*(L*s + R) + Kt^2))/N")
    assert names(t) == {"Kt", "J", "B", "L", "R", "N"}
    assert has_s(t) and not has_s(parse("R*L"))
    check(t, {"Kt", "J", "B", "L", "R", "N"}, allow_s=True)
    with pytest.raises(ExpressionError, match="did you mean 'R'"):
        check(parse("Rr + L"), {"R", "L"}, allow_s=True)
    with pytest.raises(ExpressionError, match="not allowed"):
        check(parse("R*s"), {"R"}, allow_s=False)
    with pytest.raises(ExpressionError, match="inside exp"):
        check(parse("exp(s)"), set(), allow_s=True)
    with pytest.raises(ExpressionError, match="exponent"):
        check(parse("2^s"), set(), allow_s=True)
    with pytest.raises(ExpressionError, match="literal integer"):
        check(parse("(s + 1)^R"), {"R"}, allow_s=True)
    with pytest.raises(ExpressionError, match="literal integer"):
        check(parse("s^0.5"), set(), allow_s=True)
    check(parse("(s + 1)^-2 * R^0.5"), {"R"}, allow_s=True)


INJECTIONS = [
    "__import__('os').system('x')", "().__class__", "(lambda: 1)()", "[x for x in y]", "a.b", "a[0]",
    "R if 1 else 2", "open('f')", "__builtins__", "s; import os", "'str'", "nan", "inf", "1e999",
    "2**", "((R)", "R R", "sqrt()", "sqrt(R, L)", "", "   ", "R)", "foo(R)", "_x", "a,b", "x = 1",
    "NaN", "Infinity", "R @ L", "1..2", "2R", "1e", "\u0661", "(" * 5000 + "R" + ")" * 5000, "R^" * 3000 + "R",
]


@pytest.fixture
def nothing_runs(monkeypatch):
    """Make any dynamic execution blow up, to show that parsing runs nothing (common practice)."""
    def boom(*a, **k):
        raise AssertionError("user text reached the Python interpreter")
    real_import = builtins.__import__

    def guarded_import(name, *a, **k):
        if name in ("os", "subprocess"):
            boom()
        return real_import(name, *a, **k)
    monkeypatch.setattr(builtins, "eval", boom)
    monkeypatch.setattr(builtins, "exec", boom)
    monkeypatch.setattr(builtins, "compile", boom)
    monkeypatch.setattr(builtins, "open", boom)
    monkeypatch.setattr(builtins, "__import__", guarded_import)


@pytest.mark.parametrize("text", INJECTIONS)
def test_injection_rejected(text, nothing_runs):
    with pytest.raises(ExpressionError) as info:
        parse(text)
    msg = str(info.value)
    assert "\n" not in msg and msg


def test_exp_s_rejected_everywhere(nothing_runs):
    t = parse("exp(s)")
    with pytest.raises(ExpressionError):
        check(t, set(), allow_s=True)
    with pytest.raises(ExpressionError):
        evaluate_rational(t, {})


def test_error_messages_say_where_and_what():
    with pytest.raises(ExpressionError, match=r"'\.' at position 2"):
        parse("a.b")
    with pytest.raises(ExpressionError, match="sqrt, exp, log, sin, cos, tan"):
        parse("foo(R)")
    with pytest.raises(ExpressionError, match="position 3"):
        parse("R R")


# ------------------------------------------------------------ rational assembly
LOOPS = [
    ("Kt/(s*((J*s + B)*(L*s + R) + Kt^2))/N",
     dict(Kt=0.05, J=4.0e-4, B=1.0e-3, L=3.0e-3, R=1.2, N=20.0)),
    ("(T1*s + 1)/(a*T1*s + 1) * K/((s + p1)*(s + p2))",
     dict(T1=0.2, a=0.1, K=3.0, p1=1.5, p2=7.0)),
    ("Kp*(1 + 1/(Ti*s)) / ((t1*s+1)*(t2*s+1)*(t3*s+1))",
     dict(Kp=2.0, Ti=0.7, t1=0.3, t2=0.05, t3=1.3)),
    ("w^2/(s^2 + 2*z*w*s + w^2)^2 - s/(s^2 + 2*z*w*s + w^2)^2 + 1/(s^2 + 2*z*w*s + w^2)^2", dict(w=3.0, z=0.4)),
]


def _sympy_num_den(text, values):
    # reference: sympy expansion (exact rational arithmetic)
    syms = {k: sympy.Symbol(k) for k in values}
    s = sympy.Symbol("s")
    expr = sympy.sympify(text.replace("^", "**"), locals={**syms, "s": s})
    expr = expr.subs({syms[k]: sympy.Rational(v) for k, v in values.items()})
    num, den = sympy.fraction(sympy.together(expr))
    return [float(c) for c in sympy.Poly(num, s).all_coeffs()], [float(c) for c in sympy.Poly(den, s).all_coeffs()]


def _normalise(c):
    c = np.trim_zeros(np.asarray(c, float), "f")
    return c / c[0]


@pytest.mark.parametrize("text,values", LOOPS[:3])
def test_rational_matches_sympy(text, values):
    r = evaluate_rational(parse(text), values)
    N, D = r.stacked(1)
    sn, sd = _sympy_num_den(text, values)
    # up to a common scalar factor: compare N/D after dividing each by its leading coefficient
    assert N.shape[1] == len(sn) and D.shape[1] == len(sd)
    np.testing.assert_allclose(_normalise(N[0]), _normalise(sn), rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(_normalise(D[0]), _normalise(sd), rtol=1e-12, atol=1e-14)
    # the scale factor is common: N/D agree at a test point
    s0 = 0.37 + 1.1j
    assert np.polyval(N[0], s0) / np.polyval(D[0], s0) == pytest.approx(np.polyval(sn, s0) / np.polyval(sd, s0), rel=1e-12)


def test_rational_same_value_as_sympy_without_cancellation():
    text, values = LOOPS[3]
    r = evaluate_rational(parse(text), values)
    N, D = r.stacked(1)
    sn, sd = _sympy_num_den(text, values)
    s0 = -0.3 + 2.0j
    # reference: sympy (exact); the unexpanded form keeps the (s+1) factor, values agree
    assert np.polyval(N[0], s0) / np.polyval(D[0], s0) == pytest.approx(np.polyval(sn, s0) / np.polyval(sd, s0), rel=1e-12)
    assert D.shape[1] == 5  # identical denominators were not multiplied up (would be degree 12)


def test_rational_vectorised_and_structural_cancellation():
    text, values = LOOPS[0]
    V = 5
    env = {k: np.full(V, v) * np.linspace(0.9, 1.1, V) for k, v in values.items()}
    N, D = evaluate_rational(parse(text), env).stacked(V)
    assert N.shape == (V, 1) and D.shape == (V, 4)
    for i in range(V):
        one = {k: float(v[i]) for k, v in env.items()}
        n1, d1 = evaluate_rational(parse(text), one).stacked(1)
        np.testing.assert_array_equal(N[i], n1[0])
        np.testing.assert_array_equal(D[i], d1[0])
    N, D = evaluate_rational(parse("(s + 1) - s"), {}).stacked(3)
    assert N.shape == (3, 1) and D.shape == (3, 1)


@settings(max_examples=60, deadline=None)
@given(st.floats(0.0, 0.1), st.lists(st.floats(0.0, 1.0), min_size=6, max_size=6))
def test_interval_coefficients_enclose_points(rel, t):
    text, values = LOOPS[0]
    tree = parse(text)
    boxes = {k: Interval(v * (1 - rel), v * (1 + rel)) for k, v in values.items()}
    # points clamped into the float box ends (the sum could round past hi)
    point = {k: min(max(v * (1 - rel) + ti * 2 * rel * v, float(boxes[k].lo)), float(boxes[k].hi))
             for (k, v), ti in zip(values.items(), t)}
    Ni, Di = evaluate_rational(tree, boxes).stacked_interval(1)
    N, D = evaluate_rational(tree, point).stacked(1)
    assert Ni.contains(N).all() and Di.contains(D).all()


def test_s_not_evaluable_as_number():
    with pytest.raises(ExpressionError):
        evaluate(parse("s + 1"), {})


@pytest.mark.parametrize("text,deg", [
    ("1/(2*s + 1) + R/(2*s + 1)", 1),            # identical denominators: merged
    ("1/(R*s + 1) + 1/(L*s + 1)", 2),            # different parameters, equal values: not merged
    ("(s + 3)^-2 - R/(s + 3)^2 + s/(s+3)^2", 2),
])
def test_same_degrees_for_floats_arrays_and_intervals(text, deg):
    tree = parse(text)
    fl = evaluate_rational(tree, {"R": 1.0, "L": 1.0})
    ar = evaluate_rational(tree, {"R": np.ones(3), "L": np.ones(3)})
    iv = evaluate_rational(tree, {"R": Interval(np.full(3, 0.9), np.full(3, 1.1)),
                                  "L": Interval(np.full(3, 0.9), np.full(3, 1.1))})
    assert fl.den_degree == ar.den_degree == iv.den_degree == deg
    assert fl.num_degree == ar.num_degree == iv.num_degree
    # and the interval coefficients enclose the point ones
    Ni, Di = iv.stacked_interval(3)
    N, D = ar.stacked(3)
    assert Ni.contains(N).all() and Di.contains(D).all()


# ------------------------------------------- review additions: more loops, limits, guards
MORE_LOOPS = [
    # nested fractions (a continued fraction of s)
    ("1/(1 + 1/(1 + 1/(s + a)))", dict(a=1.7)),
    # powers of sums, and a negative power of a ratio
    ("(s + a)^3 / ((s + b)^2*(s^2 + c*s + d)^2)", dict(a=1.7, b=0.35, c=2.2, d=0.8)),
    ("((s + a)/(s + b))^-2 / (s + c)^3", dict(a=1.7, b=0.35, c=2.2)),
    # a PID with a filtered derivative, the derivative filter time Td/N
    ("Kp*(1 + 1/(Ti*s) + Td*s/(Td/N*s + 1))", dict(Kp=3.0, Ti=1.5, Td=0.05, N=8.0)),
    # a sensor lag with a parameter, functions and real powers of parameter sub-expressions
    ("sqrt(a*b)*s/(s^2 + d*sqrt(c)*s + c) - exp(-b)/(s + a) + a^1.5*log(c)/(tau*s + 1)",
     dict(a=1.7, b=0.35, c=2.2, d=0.8, tau=0.02)),
    # different denominators sharing a factor: multiplied, not cancelled (closed-loop modes stay)
    ("(s^2 + (a + b)*s + a*b)^2/(s + 1)^5 - s/(s + 1)^2", dict(a=1.7, b=0.35)),
]


def _to_sympy(node, syms, s):
    """The same tree as a sympy expression, numbers as exact rationals of their float values."""
    if isinstance(node, Number):
        return sympy.Rational(node.value)
    if isinstance(node, Name):
        return syms[node.id]
    if isinstance(node, S):
        return s
    if isinstance(node, Neg):
        return -_to_sympy(node.operand, syms, s)
    if isinstance(node, Binary):
        a, b = _to_sympy(node.left, syms, s), _to_sympy(node.right, syms, s)
        return {"+": a + b, "-": a - b, "*": a * b, "/": a / b}[node.op]
    if isinstance(node, Power):
        return _to_sympy(node.base, syms, s) ** _to_sympy(node.exponent, syms, s)
    if isinstance(node, Call):
        return getattr(sympy, node.func)(_to_sympy(node.arg, syms, s))
    raise TypeError(node)


@pytest.mark.parametrize("text,values", MORE_LOOPS)
def test_three_evaluators_agree_with_sympy(text, values):
    # reference: sympy's exact rational function (together + cancel), evaluated with 30 digits
    tree = parse(text)
    s = sympy.Symbol("s")
    syms = {k: sympy.Symbol(k) for k in values}
    V = 4
    env = {k: v * np.linspace(0.9, 1.1, V) for k, v in values.items()}
    N, D = evaluate_rational(tree, env).stacked(V)
    for i in range(V):
        point = {k: float(env[k][i]) for k in values}
        ref = _to_sympy(tree, syms, s).subs({syms[k]: sympy.Rational(v) for k, v in point.items()})
        rn, rd = sympy.fraction(sympy.cancel(sympy.together(ref)))
        # no cancellation: N/D may carry extra common factors, so compare N*rd - D*rn = 0
        cross = sympy.Poly(sympy.expand(sympy.Poly(N[i].tolist(), s).as_expr() * rd
                                        - sympy.Poly(D[i].tolist(), s).as_expr() * rn), s)
        size = sympy.Poly(sympy.expand(sympy.Poly(N[i].tolist(), s).as_expr() * rd), s)
        scale = max(abs(float(c)) for c in size.all_coeffs())
        assert max(abs(float(c)) for c in cross.all_coeffs()) <= 1e-12 * scale
        for s0 in (0.3 + 1.1j, -2.5 + 0.4j, 7j):
            want = complex(sympy.N(ref.subs(s, sympy.Float(s0.real, 30) + sympy.I * sympy.Float(s0.imag, 30)), 30))
            got = np.polyval(N[i], s0) / np.polyval(D[i], s0)
            assert abs(got - want) <= 1e-11 * abs(want)
        # the float evaluator gives the same stacks as the array one
        n1, d1 = evaluate_rational(tree, point).stacked(1)
        np.testing.assert_allclose(n1[0], N[i], rtol=1e-13, atol=0)
        np.testing.assert_allclose(d1[0], D[i], rtol=1e-13, atol=0)
        # and the interval evaluator on a point box encloses them
        Ni, Di = evaluate_rational(tree, {k: Interval(v) for k, v in point.items()}).stacked_interval(1)
        assert Ni.contains(N[i]).all() and Di.contains(D[i]).all()


FUNC_LOOP = ("sqrt(a*c)*s/(s^2 + d*sqrt(c)*s + c) + exp(-b*c)*log(a + c)/(s + cos(a)^2 + 1)"
             " + tan(b)*sin(d)/(s + a^1.5 + c^-0.5) + (a*a - 1)/(s + 2)")
FUNC_BOX = dict(a=(0.5, 2.0), b=(-1.2, 1.2), c=(0.1, 3.0), d=(-4.0, 9.0))


@settings(max_examples=80, deadline=None)
@given(st.lists(st.tuples(st.floats(0, 1), st.floats(0, 1)), min_size=4, max_size=4),
       st.lists(st.floats(0, 1), min_size=4, max_size=4))
def test_interval_coefficients_enclose_points_with_functions(corners, t):
    # sub-boxes of FUNC_BOX, and a point inside each: the point's coefficients lie in the enclosure
    tree = parse(FUNC_LOOP)
    boxes, point = {}, {}
    for (name, (lo, hi)), (u, v), ti in zip(FUNC_BOX.items(), corners, t):
        u, v = sorted((u, v))
        a, b = lo + (hi - lo) * u, lo + (hi - lo) * v
        boxes[name] = Interval(a, b)
        point[name] = min(max(a + ti * (b - a), a), b)
    Ni, Di = evaluate_rational(tree, boxes).stacked_interval(1)
    N, D = evaluate_rational(tree, point).stacked(1)
    assert N.shape[1] == Ni.shape[1] and D.shape[1] == Di.shape[1]
    assert Ni.contains(N).all() and Di.contains(D).all()


def test_same_subexpression_squared_in_interval_mode():
    # x*x of one sub-expression never dips below 0 (the naive product of [-1, 2] by itself would)
    enc = evaluate(parse("(a - 1)*(a - 1)"), {"a": Interval(0.0, 3.0)})
    assert float(enc.lo) == 0.0 and float(enc.hi) >= 4.0
    enc = evaluate(parse("a*b"), {"a": Interval(-1.0, 2.0), "b": Interval(-1.0, 2.0)})
    assert float(enc.lo) <= -2.0  # different names: independent, the full product range


def test_size_limits_give_clean_errors():
    with pytest.raises(ExpressionError, match="nested too deeply"):
        parse("(" * 150 + "a" + ")" * 150)
    with pytest.raises(ExpressionError, match="nested too deeply"):
        parse("-" * 150 + "a")
    with pytest.raises(ExpressionError, match="too long: its tree is 400 levels deep"):
        parse("+".join(["a"] * 400))
    with pytest.raises(ExpressionError) as info:
        parse("a" * 5000 + " b")
    assert len(str(info.value)) < 300  # the long name is cut in the message


def _at_depth(n, fn):
    return fn() if n == 0 else _at_depth(n - 1, fn)


@pytest.mark.parametrize("text", [
    "+".join(["a*s"] * 240),
    "/".join(["(s + a)"] * 40) + "+" + "+".join(["a"] * 200),
    "a^" * 99 + "a",
    "-" * 99 + "a",
    "sqrt(" * 99 + "a" + ")" * 99,
    "(" * 99 + "s + a" + ")" * 99,
])
def test_largest_allowed_expressions_evaluate_on_a_deep_stack(text):
    # within the limits, every evaluator works even when the caller is 300 frames deep
    tree = parse(text)

    def work():
        check(tree, {"a"}, allow_s=True)
        evaluate_rational(tree, {"a": np.array([1.5, 2.0])})
        evaluate_rational(tree, {"a": Interval(np.array([1.5]), np.array([2.0]))})
        to_text(tree)
        names(tree)
        hash(tree)
        return True

    with np.errstate(all="ignore"):
        assert _at_depth(300, work)


def test_soft_keywords_and_case_of_reserved_words():
    assert parse("type + match") == Binary("+", Name("type"), Name("match"))
    for word in ("Inf", "NAN", "infinity", "lambda", "import"):
        with pytest.raises(ExpressionError):
            parse(f"{word} + 1")


def test_domain_guards():
    from sweep.expressions import domain_guards

    got = [(k, to_text(n), role) for k, n, role in domain_guards(parse(
        "a/(b - c) + sqrt(a)*log(b)/s + a^-2 + b^1.5 + c^-0.5 + a^b + tan(c/2) + 1/(s + a)"))]
    assert got == [
        ("nonzero", "b - c", "divisor"),
        ("nonnegative", "a", "sqrt argument"),
        ("positive", "b", "log argument"),
        ("nonzero", "a", "base of a negative power"),
        ("nonnegative", "b", "base of a real power"),
        ("positive", "c", "base of a negative or variable real power"),
        ("positive", "a", "base of a negative or variable real power"),
        ("nonzero", "2", "divisor"),
        ("tan", "c/2", "tan argument"),
    ]
