"""Certified bounds on families the other certify tests do not use.

* Interval families of 3 to 6 independent coefficients against an exact
  computation with sympy: the worst-case critical gain of an interval family is
  the smallest critical gain of its four Kharitonov pencils (Kharitonov 1978;
  METHODS.md), each found here from the exact real roots in ``k`` of the
  constant term and of the Hurwitz determinant ``Delta_{n-1}`` and an exact
  Hurwitz test (all leading principal minors positive, from memory) between them.
* Products and quotients of parameters (motor, thermal lags, a parameter in both
  ``N`` and ``D``) against dense sampling with `sweep.analysis`: the lower bound
  is never above a sampled critical gain, and the gap meets ``rtol``.
* The edges: the order changing inside the box, stability for every gain,
  positive feedback (closed form), and a tolerance too small for the budget.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
import sympy as sp

from sweep import analysis, loop
from sweep.certify import certify, format_certificate, is_interval_family
from sweep.config import parse_config

INF = math.inf


def _config(text: str):
    return parse_config(text, source="<test>")


# --------------------------------------------------------------- exact Kharitonov with sympy

def _hurwitz_stable(c: list) -> bool:
    """Exact Hurwitz test of a polynomial (highest power first, rational entries, c[0] > 0)."""
    n = len(c) - 1
    a = [sp.Rational(x) for x in c]
    H = sp.zeros(n, n)
    for i in range(n):
        for j in range(n):
            k = 2 * (j + 1) - (i + 1)  # entry a_{2j-i} of the Hurwitz matrix (1-based), a_0 = lead
            if 0 <= k <= n:
                H[i, j] = a[k]
    return a[0] > 0 and all(H[:m, :m].det() > 0 for m in range(1, n + 1))


def _kharitonov(lo: list, hi: list) -> list[list]:
    """The four Kharitonov polynomials (highest power first) of interval coefficients
    given highest power first; pattern by power from the constant term (Kharitonov 1978)."""
    patterns = ("llhh", "hhll", "lhhl", "hllh")
    out = []
    for pat in patterns:
        n = len(lo) - 1
        out.append([(lo if pat[(n - i) % 4] == "l" else hi)[i] for i in range(n + 1)])
    return out


def _pencil_critical_gain(KD: list, KN: list, ref: sp.Rational) -> float:
    """Upper end of the stable k-interval of ``KD + k KN`` holding ``ref`` (exact roots in k)."""
    k = sp.symbols("k")
    n = len(KD) - 1
    KN = [0] * (len(KD) - len(KN)) + list(KN)
    P = [sp.Rational(d) + k * sp.Rational(m) for d, m in zip(KD, KN)]
    # Hurwitz determinant Delta_{n-1}(k): vanishes when a pair of roots is on the imaginary axis
    H = sp.zeros(n, n)
    for i in range(n):
        for j in range(n):
            idx = 2 * (j + 1) - (i + 1)
            if 0 <= idx <= n:
                H[i, j] = P[idx]
    candidates = set()
    for expr in (P[-1], P[0], H[: n - 1, : n - 1].det() if n > 1 else sp.Integer(1)):
        poly = sp.Poly(sp.expand(expr), k)
        if poly.degree() > 0:
            candidates |= {r for r in sp.real_roots(poly) if r > ref}
    cand = sorted(candidates, key=lambda r: float(r.evalf(50)))
    assert _hurwitz_stable([p.subs(k, ref + sp.Rational(1, 10**9)) for p in P])
    for i, c in enumerate(cand):
        cf = sp.Rational(str(sp.N(c, 40)))
        nxt = sp.Rational(str(sp.N(cand[i + 1], 40))) if i + 1 < len(cand) else 2 * cf + 1
        if not _hurwitz_stable([p.subs(k, (cf + nxt) / 2) for p in P]):
            return float(sp.N(c, 30))
    return INF


def _sympy_worst(num_lo, num_hi, den_lo, den_hi, sigma, ref) -> float:
    if sigma < 0:  # positive feedback: -N has the interval [-hi, -lo]
        num_lo, num_hi = [-x for x in num_hi], [-x for x in num_lo]
    KN, KD = _kharitonov(num_lo, num_hi), _kharitonov(den_lo, den_hi)
    return min(_pencil_critical_gain(d, m, sp.Rational(ref)) for d, m in zip(KD, KN))


# name: (parameters {name: (low, high)} in order, num, den, [loop] lines, sigma, reference)
INTERVAL_FAMILIES = {
    "valve3": ({"a2": ("5/2", "7/2"), "a1": ("8/5", "12/5"), "b0": ("9/10", "11/10")},
               ["b0"], ["1", "a2", "a1", "0"], 'controller = "2"', 1, 0),
    "winder5": ({"b1": ("1/10", "3/20"), "b0": ("9/10", "11/10"), "a2": ("18/5", "22/5"),
                 "a1": ("9/2", "11/2"), "a0": ("1/2", "3/2")},
                ["b1", "b0"], ["1", "a2", "a1", "a0"], "operating_gain = 1", 1, 1),
    "extruder6": ({"a4": ("19/20", "21/20"), "a3": ("9", "11"), "a2": ("63/2", "77/2"),
                   "a1": ("85/2", "115/2"), "a0": ("96/5", "144/5"), "b0": ("9/5", "11/5")},
                  ["b0"], ["a4", "a3", "a2", "a1", "a0"], "operating_gain = 10", 1, 10),
    "recirculation4": ({"a2": ("27/5", "33/5"), "a1": ("99/10", "121/10"), "a0": ("51/10", "69/10"),
                        "b0": ("9/10", "11/10")},
                       ["b0"], ["1", "a2", "a1", "a0"], 'feedback = "positive"', -1, 0),
    # a right-half-plane zero: a negative numerator coefficient
    "level5": ({"b1": ("4/25", "6/25"), "b0": ("9/10", "11/10"), "a2": ("18/5", "22/5"),
                "a1": ("9/2", "11/2"), "a0": ("9/5", "11/5")},
               ["-b1", "b0"], ["1", "a2", "a1", "a0"], "", 1, 0),
    # a large zero term: the family never loses stability (inf)
    "tacho4": ({"b1": ("2/5", "3/5"), "b0": ("9/10", "11/10"), "a2": ("18/5", "22/5"),
                "a1": ("9/2", "11/2")},
               ["b1", "b0"], ["1", "a2", "a1", "0"], "", 1, 0),
}


def _interval_toml(params, num, den, loop_lines) -> str:
    lines = ['title = "interval family"', "[parameters]"]
    for n, (a, b) in params.items():
        lo, hi = float(sp.Rational(a)), float(sp.Rational(b))
        lines.append(f"{n} = {{ nominal = {0.5 * (lo + hi)!r}, low = {lo!r}, high = {hi!r} }}")
    lines += ["[plant]", "num = [" + ", ".join(f'"{x}"' for x in num) + "]",
              "den = [" + ", ".join(f'"{x}"' for x in den) + "]", "[loop]", loop_lines]
    return "\n".join(lines) + "\n"


@pytest.mark.parametrize("name", sorted(INTERVAL_FAMILIES))
def test_interval_families_against_exact_kharitonov(name):
    params, num, den, loop_lines, sigma, ref = INTERVAL_FAMILIES[name]
    cfg = _config(_interval_toml(params, num, den, loop_lines))
    assert is_interval_family(cfg)
    res = certify(cfg)
    assert res["method"] == "kharitonov" and res["exact"] and res["status"] == "exact"

    def ends(row):
        lo, hi = [], []
        for c in row:
            if c in params:
                a, b = sp.Rational(params[c][0]), sp.Rational(params[c][1])
            elif c.startswith("-") and c[1:] in params:
                a, b = -sp.Rational(params[c[1:]][1]), -sp.Rational(params[c[1:]][0])
            else:
                a = b = sp.Rational(c)
            lo.append(a)
            hi.append(b)
        return lo, hi
    (nl, nh), (dl, dh) = ends(num), ends(den)
    if "controller" in loop_lines:  # a constant controller scales N
        f = sp.Rational(loop_lines.split('"')[1])
        nl, nh = [f * x for x in nl], [f * x for x in nh]
    want = _sympy_worst(nl, nh, dl, dh, sigma, ref)  # Kharitonov (1978), exact with sympy
    assert res["lower"] == res["upper"]
    if math.isinf(want):
        assert res["upper"] == INF
    else:
        assert res["upper"] == pytest.approx(want, rel=1e-9)
        # the reported corner attains it
        x = {n: np.array([v]) for n, v in res["worst_parameters"].items()}
        N, D = loop.assemble(cfg, x, count=1)
        a = analysis.analyze_stack(N, D, sigma=sigma, gain_range=(0.0, INF),
                                   operating_gain=cfg.operating_gain)
        assert a["critical_gain"][0] == pytest.approx(want, rel=1e-9)


# --------------------------------------------------------------- branch-and-bound vs sampling

BNB_FAMILIES = {
    "spindle": """
[parameters]
R  = { nominal = 1.2, tol = "10%" }
L  = { nominal = 3.0e-3, low = 2.5e-3, high = 3.6e-3 }
J  = { nominal = 4.0e-4, tol = "15%" }
B  = { nominal = 1.0e-3, tol = 2.0e-4 }
Kt = { nominal = 0.05, tol = "5%" }
Ng = { nominal = 20, dist = "fixed" }
[plant]
transfer = "Kt / (s*((J*s + B)*(L*s + R) + Kt^2)) / Ng"
[loop]
controller = "(s + 20) / (s + 200)"
sensor = "1 / (0.001*s + 1)"
operating_gain = 35
""",
    "oven": """
[parameters]
T1 = { nominal = 10.0, tol = "20%" }
T2 = { nominal = 3.0, tol = "20%" }
T3 = { nominal = 1.0, tol = "30%" }
K  = { nominal = 2.0, tol = "10%" }
[plant]
transfer = "K / ((T1*s + 1)*(T2*s + 1)*(T3*s + 1))"
[loop]
operating_gain = 2
""",
    # z in the numerator and the denominator
    "damper": """
[parameters]
z = { nominal = 2.0, tol = "20%" }
p = { nominal = 5.0, tol = "20%" }
[plant]
transfer = "(s + z) / (s*(s + 2*z)*(s + p)*(s + 1))"
[loop]
operating_gain = 1
""",
}


def _sampled(cfg, count=3000, seed=11) -> np.ndarray:
    """Critical gains of the corners and of random points of the box by `sweep.analysis`."""
    unc = cfg.uncertain
    rng = np.random.default_rng(seed)
    u = np.concatenate([rng.random((count, len(unc))),
                        np.array(np.meshgrid(*[[0.0, 1.0]] * len(unc))).reshape(len(unc), -1).T])
    vals = {p.name: p.low + u[:, i] * (p.high - p.low) for i, p in enumerate(unc)}
    for p in cfg.parameters:
        vals.setdefault(p.name, np.full(u.shape[0], p.nominal))
    N, D = loop.assemble(cfg, vals, count=u.shape[0])
    return analysis.analyze_stack(N, D, sigma=cfg.sigma, gain_range=tuple(cfg.gain_range),
                                  operating_gain=cfg.operating_gain)["critical_gain"]


@pytest.mark.parametrize("name", sorted(BNB_FAMILIES))
def test_branch_and_bound_brackets_dense_sampling(name):
    cfg = _config('title = "t"\n' + BNB_FAMILIES[name])
    assert not is_interval_family(cfg)
    rtol = 0.01
    res = certify(cfg, rtol=rtol)
    assert res["method"] == "branch-and-bound" and res["status"] == "certified"
    g = _sampled(cfg)
    assert not np.isnan(g).any()
    lower, upper = res["lower"], res["upper"]
    assert lower <= g.min()  # sound: no sampled variant below the guaranteed bound
    assert upper - lower <= rtol * upper
    # upper is the critical gain of the reported point
    x = {n: np.array([v]) for n, v in res["worst_parameters"].items()}
    for p in cfg.parameters:
        x.setdefault(p.name, np.array([p.nominal]))
    N, D = loop.assemble(cfg, x, count=1)
    a = analysis.analyze_stack(N, D, sigma=cfg.sigma, gain_range=tuple(cfg.gain_range),
                               operating_gain=cfg.operating_gain)
    assert a["critical_gain"][0] == pytest.approx(upper, rel=1e-9)


def test_tiny_tolerance_with_a_small_budget_is_an_honest_bracket():
    cfg = _config('title = "t"\n' + BNB_FAMILIES["oven"])
    res = certify(cfg, rtol=1e-9, max_boxes=400)
    assert res["status"] == "budget" and res["relative_gap"] > 1e-9
    assert res["lower"] <= _sampled(cfg).min() and res["lower"] < res["upper"]
    text = format_certificate(res)
    assert "requested tolerance not reached" in text and "budget" in text


def test_stiff_converter_proves_stability_at_the_reference():
    # a buck stage with coefficients from 1e-6 to 1e10 and a lightly damped LC pair at light
    # load: boxes not yet proven stable at the reference must split their widest side (the
    # first-order weights halved the input voltage, which enters one factor only, until the
    # budget ran out with nothing proven)
    cfg = _config("""
title = "buck"
[parameters]
Vin   = { nominal = 12.0,   tol = "10%" }
L     = { nominal = 4.7e-6, tol = "10%" }
C     = { nominal = 220e-6, tol = "10%" }
Resr  = { nominal = 0.03,   low = 0.01, high = 0.06 }
Rload = { nominal = 1.0,    low = 0.5, high = 10.0 }
[plant]
transfer = "Vin * (1 + s*C*Resr) / (L*C*s^2 + s*(L/Rload + C*Resr) + 1) / 1.5"
[loop]
controller = "(1 + s/2000) / (s * (1 + s/60000))"
sensor = "0.2424"
operating_gain = 120
""")
    res = certify(cfg, rtol=0.01, max_boxes=20_000)
    # stability at 120 proven everywhere (was reference_unproven), the gap still open
    assert res["status"] == "budget", res["message"]
    g = _sampled(cfg, count=1000)
    assert 150.0 < res["lower"] <= g.min() and res["upper"] < 1.15 * res["lower"]


def test_order_change_inside_the_box_says_where():
    # P = (s + a) - k (c s + 1) at k = 8: the s coefficient 1 - 8 c vanishes at c = 1/8
    cfg = _config("""
title = "bypass"
[parameters]
c = { nominal = 0.1, low = 0.05, high = 0.2 }
a = { nominal = 2.0, tol = "10%" }
[plant]
transfer = "(c*s + 1) / (s + a)"
[loop]
feedback = "positive"
operating_gain = 8
""")
    res = certify(cfg)
    assert res["status"] == "degree_invariance_fails"
    assert math.isnan(res["lower"]) and math.isnan(res["upper"])
    c_lo, c_hi = res["where"]["c"]
    assert c_lo <= 0.125 <= c_hi and c_hi - c_lo < 1e-6
    assert "c = 0.125" in res["message"] and "undefined" in format_certificate(res)


def test_stable_for_every_gain_is_inf_both_ways():
    cfg = _config("""
title = "fan"
[parameters]
T = { nominal = 0.5, tol = "20%" }
K = { nominal = 2.0, tol = "10%" }
[plant]
transfer = "K / ((T*s + 1)*(s + 1))"
""")
    res = certify(cfg)
    assert res["status"] == "certified" and res["lower"] == res["upper"] == INF
    assert format_certificate(res).splitlines()[0] == (
        "worst-case critical gain: inf (no loss of stability within the gain range), "
        "proven over the whole box")


def test_positive_feedback_closed_form():
    # P = (T1 s + 1)(T2 s + 1) - k K: a real root through the origin at k = 1/K (from memory),
    # so the worst case is 1 / max K whatever the lags
    cfg = _config("""
title = "heater"
[parameters]
T1 = { nominal = 4.0, tol = "25%" }
T2 = { nominal = 0.5, tol = "25%" }
K  = { nominal = 2.0, tol = "10%" }
[plant]
transfer = "K / ((T1*s + 1)*(T2*s + 1))"
[loop]
feedback = "positive"
""")
    res = certify(cfg, rtol=1e-6)
    assert res["status"] == "certified"
    assert res["lower"] <= 1 / 2.2 <= res["upper"]
    assert res["upper"] == pytest.approx(1 / 2.2, rel=1e-12)
    assert res["worst_parameters"]["K"] == pytest.approx(2.2)


@pytest.mark.parametrize("coefficient", ["6/a", "a^3", "2*a + 1", "3 + sin(a)"])
def test_bound_never_above_the_sweeps_own_value_at_a_corner(coefficient):
    # single-use coefficients (interval families, or branch-and-bound when the range is not
    # attained at the ends as for sin): the pencil routine and the analysis may differ in the
    # last digits at the worst corner; the bound must still not exceed the sweep's value there
    cfg = _config(f"""
title = "t"
[parameters]
a = {{ nominal = 1.5, low = 1.0, high = 2.0 }}
b = {{ nominal = 11.0, tol = "10%" }}
[plant]
num = ["1"]
den = ["1", "{coefficient}", "b", "6"]
""")
    res = certify(cfg)
    assert res["status"] in ("exact", "certified")
    assert res["lower"] <= _sampled(cfg, count=500).min()
