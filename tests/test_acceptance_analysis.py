"""Acceptance checks of the loop analysis on loops that are in no other test.

Each loop is one of our own scenarios (name first); the references are sympy
exact Hurwitz determinants in k (`test_analysis.sympy_reference`), exact
breakaway roots (sympy), mpmath roots, and textbook facts from memory, named
beside each check.
"""
from __future__ import annotations

import math

import mpmath
import numpy as np
import pytest
import sympy as sp

from sweep.analysis import analyze, analyze_stack
from sweep.errors import InputError
from test_analysis import _angle_sum_arrival, _angle_sum_departure, _canonical, _close, sympy_reference
from test_locus import pair, poly

INF = math.inf


# seven lags from 1e4 s down to 1e-3 s: coefficient spread far beyond 1e12
_SPREAD_D = np.real(np.poly(-np.logspace(-4, 3, 12)))

# (name, num, den, feedback, gain_range, operating_gain)
LOOPS = [
    ("sander, zero in the right half plane", [-1, 1], poly([1, 0], [1, 2], [1, 3]), "negative", (0, INF), None),
    ("balance beam, RHP pole, stable only above a gain", [1, 1], [1, -1, 0], "negative", (0, INF), None),
    ("levitator, RHP pole and zero pair", [1, 2], poly([1, -1], [1, 3], [1, 5]), "negative", (0, INF), None),
    ("gantry, RHP pole, two zeros", poly([1, 1], [1, 2]), poly([1, -1], [1, 0], [1, 6], [1, 8]), "negative",
     (0, INF), None),
    ("telescope, triple integrator (never stable)", [1], [1, 0, 0, 0], "negative", (0, INF), None),
    ("satellite, double integrator with lead", [1, 1], [1, 10, 0, 0], "negative", (0, INF), None),
    ("antenna, lightly damped pair", [1], poly([1, 1], pair(-0.01, 10)), "negative", (0, INF), None),
    ("printer, notch zeros on the axis", [1, 0, 4], poly([1, 0], [1, 1], [1, 2], [1, 3]), "negative", (0, INF), None),
    ("spring, undamped open-loop pair", [1], poly([1, 0, 4], [1, 1]), "negative", (0, INF), None),
    ("spring with a zero, stable for every gain", [1, 0.5], poly([1, 0, 4], [1, 1]), "negative", (0, INF), None),
    ("fan, root through infinity, negative feedback", [-0.5, 1, 1], [1, 3, 2], "negative", (0, INF), None),
    ("fan, root through the origin, positive feedback", [0.5, 1, 1], [1, 3, 2], "positive", (0, INF), None),
    ("blower, root through infinity, positive feedback", [0.25, 1, 1, 1], poly([1, 1], [1, 2], [1, 3]), "positive",
     (0, INF), None),
    ("heater, positive feedback, root through the origin", [1, 1], poly([1, 2], [1, 3], [1, 4]), "positive",
     (0, INF), None),
    ("cooler, positive feedback, RHP zero", [1, -1], poly([1, 2], [1, 3], [1, 4]), "positive", (0, INF), None),
    ("loader, positive lower end", [1], poly([1, 0], [1, 4], [1, 5]), "negative", (3, INF), None),
    ("loader, finite range below the crossing", [1], poly([1, 0], [1, 4], [1, 5]), "negative", (0, 100), None),
    ("conveyor, crossing at the upper end", [1], poly([1, 0], [1, 1], [1, 2]), "negative", (0, 6), None),
    ("conveyor, crossing at the lower end", [1], poly([1, 0], [1, 1], [1, 2]), "negative", (6, 10), None),
    ("conveyor, range above the crossing", [1], poly([1, 0], [1, 1], [1, 2]), "negative", (7, 100), None),
    ("mixer, operating gain in the unstable gap", [1, 2, 5], [1, 11, 38, 55, 45, 18], "negative", (0, INF), 30.0),
    ("roller, triple pole", [1], poly([1, 1], [1, 1], [1, 1]), "negative", (0, INF), 2.0),
    ("kiln, degree 12, coefficient spread 1e25", [1], _SPREAD_D, "negative", (0, INF), None),
    ("dryer, parasitic pole 1e9 faster (tiny leading coefficient)", [1], [1e-9, 1, 3, 2, 0], "negative", (0, INF),
     None),
    ("press, tiny leading coefficient, degree 5", [1, 2], [1e-12, 1e-3, 1, 3, 2, 0], "negative", (0, INF), None),
    ("crane, complex breakaway points", [1], poly([1, 0], [1, 4], [1, 4, 20]), "negative", (0, INF), 90.0),
    ("tank, no crossing at all", [1], [1, 1], "negative", (0, INF), None),
    ("reactor, first order unstable", [1], [1, -1], "negative", (0, INF), None),
    ("valve, first order, deg N = deg D", [1, -2], [1, 1], "negative", (0, INF), None),
    ("valve, first order, deg N = deg D, positive", [1, -2], [1, 1], "positive", (0, INF), None),
    ("winch, integrator only", [1], [1, 0], "negative", (0, INF), 3.0),
    ("pointer, type 2 with RHP zero", [-1, 1], [1, 1, 0, 0], "negative", (0, INF), None),
    ("pipe, first-order delay approximation", [-1, 2], poly([1, 0], [1, 1], [1, 2]), "negative", (0, INF), 0.6),
    ("truss, two lightly damped pairs", [1, 1], poly(pair(-0.05, 1), pair(-0.05, 3)), "negative", (0, INF), None),
    ("lathe, negative leading ratio", [-2, 1], poly([1, 1], [1, 3]), "negative", (0, INF), None),
    ("slide, root through infinity inside a finite range", [-1, 0, 4], poly([1, 1], [1, 2]), "negative", (0, 5), None),
    ("arm, degree 8 with two resonances", poly([1, 0.5], [1, 3]),
     poly([1, 0], [1, 1], pair(-0.1, 2), pair(-0.2, 5), [1, 8], [1, 20]), "negative", (0, INF), 100.0),
]


def _breakaway_reference(num, den, sigma, lo, hi):
    """Real roots of N D' - N' D with a real gain strictly inside (lo, hi), exactly.

    reference: sympy exact real roots (METHODS, root-locus sketch quantities)
    """
    s = sp.symbols("s")
    N = sp.Poly([sp.Rational(x) for x in np.asarray(num, float)], s)
    D = sp.Poly([sp.Rational(x) for x in np.asarray(den, float)], s)
    R = N * D.diff(s) - N.diff(s) * D
    out = set()
    if R.is_zero or R.degree() < 1:
        return []
    for r in sp.real_roots(R):
        if N.eval(r) == 0:
            continue
        k = -D.eval(r) / (sigma * N.eval(r))
        if lo < k < hi:
            out.add((float(r), float(k)))
    return sorted(out)


@pytest.mark.parametrize("name,num,den,fb,gr,k0", LOOPS, ids=[l[0] for l in LOOPS])
def test_new_loops_against_exact_references(name, num, den, fb, gr, k0):
    sigma = 1 if fb == "negative" else -1
    a = analyze(num, den, feedback=fb, gain_range=gr, operating_gain=k0)
    assert not a.ill_conditioned and a.routh_agrees and not a.fixed_axis_root
    # reference: sympy exact Hurwitz determinants in k
    g_ref, w_ref, iv_ref = sympy_reference(num, den, sigma, gr[0], None if math.isinf(gr[1]) else gr[1])
    ours = _canonical(a.boundary_gains, a.boundary_frequencies)
    ref = _canonical(g_ref, w_ref)
    assert len(ours) == len(ref), (ours, ref)
    for (x, wx), (y, wy) in zip(ours, ref):
        assert _close(x, y) and _close(wx, wy, 1e-8), (ours, ref)
    assert len(a.stable_intervals) == len(iv_ref), (a.stable_intervals, iv_ref)
    for (x0, x1), (y0, y1) in zip(a.stable_intervals, iv_ref):
        assert _close(x0, y0) and _close(x1, y1)
    # critical gain, its low end and crossing frequency (DESIGN section 3)
    ref_k = gr[0] if k0 is None else k0
    holding = [iv for iv in iv_ref if (iv[0] < ref_k < iv[1]) or (k0 is None and iv[0] == ref_k)]
    assert a.reference_gain == ref_k
    if holding:
        lo_i, hi_i = holding[0]
        assert a.stable_at_reference
        assert _close(a.critical_gain, INF if hi_i == gr[1] else hi_i)
        assert _close(a.critical_gain_low, lo_i)
        if math.isinf(a.critical_gain):
            assert math.isnan(a.crossing_frequency)
        else:
            w_at = [w for g, w in ref if _close(g, a.critical_gain)]
            assert any(_close(a.crossing_frequency, w, 1e-8) for w in w_at)
    else:
        assert not a.stable_at_reference
        assert math.isnan(a.critical_gain) and math.isnan(a.critical_gain_low)
        assert math.isnan(a.crossing_frequency)
    # breakaway / break-in points: real s only, gain strictly inside the range
    if len(den) <= 6:
        b_ref = _breakaway_reference(num, den, sigma, gr[0], gr[1])
        assert len(a.breakaway_points) == len(b_ref), (a.breakaway_points, b_ref)
        for (x, kx), (y, ky) in zip(sorted(a.breakaway_points), b_ref):
            assert _close(x, y, 1e-7) and _close(kx, ky, 1e-7)
    # departure / arrival angles: the angle-sum formulas of METHODS (from memory)
    poles = np.roots(np.asarray(den, float))
    zeros = np.roots(np.trim_zeros(np.asarray(num, float), "f"))
    deg180 = sigma * np.sign(num[0]) * np.sign(den[0]) > 0
    for p, ang in a.departure_angles_deg:
        d = ang - _angle_sum_departure(p, poles, zeros, deg180)
        assert abs((d + 180) % 360 - 180) < 1e-6
    for z, ang in a.arrival_angles_deg:
        d = ang - _angle_sum_arrival(z, poles, zeros, deg180)
        assert abs((d + 180) % 360 - 180) < 1e-6
    # at the operating gain: closed-loop poles against mpmath, margins from them
    if k0 is not None:
        Pk = np.polyadd(np.asarray(den, float), sigma * k0 * np.asarray(num, float))
        with mpmath.workdps(40):
            ref_r = np.array([complex(z) for z in mpmath.polyroots(
                [mpmath.mpf(float(c)) for c in np.trim_zeros(Pk, "f")], maxsteps=400, extraprec=400)])
        cl = np.array(a.closed_loop_poles)
        assert cl.size == ref_r.size
        cost = np.abs(cl[:, None] - ref_r[None, :])
        assert np.all(cost.min(axis=1) <= 1e-9 * max(1.0, np.abs(ref_r).max()))
        assert a.min_damping == pytest.approx(min(-ref_r.real / np.abs(ref_r)), rel=1e-8, abs=1e-12)
        if a.stable_at_reference:
            assert a.gain_margin == pytest.approx(a.critical_gain / k0)
            assert a.gain_margin_db == pytest.approx(20 * math.log10(a.critical_gain / k0))


def test_textbook_four_pole_loop():
    # 1/(s(s+4)(s^2+4s+20)): critical gain 260 at sqrt(10) rad/s, the real breakaway
    # point -2 at k = 64; the complex breakaway points -2 +- j sqrt(6) (k = 100) are
    # not real and are not reported; asymptotes at -2, +-45 and +-135 deg (from memory)
    a = analyze([1], poly([1, 0], [1, 4], [1, 4, 20]))
    assert a.critical_gain == pytest.approx(260.0, rel=1e-12)
    assert a.crossing_frequency == pytest.approx(math.sqrt(10), rel=1e-12)
    assert a.breakaway_points == [(pytest.approx(-2.0), pytest.approx(64.0))]
    assert a.asymptotes["centroid"] == pytest.approx(-2.0)
    assert a.asymptotes["angles_deg"] == pytest.approx([-135.0, -45.0, 45.0, 135.0])


def test_textbook_triple_pole():
    # 1/(s+1)^3: Routh gives k = 8 at sqrt(3) rad/s (from memory); no departure angle
    # from a repeated real pole, no breakaway inside (0, inf) (the poles split at k = 0)
    a = analyze([1], poly([1, 1], [1, 1], [1, 1]))
    assert a.critical_gain == pytest.approx(8.0, rel=1e-12)
    assert a.crossing_frequency == pytest.approx(math.sqrt(3), rel=1e-12)
    assert a.departure_angles_deg == [] and a.breakaway_points == []


def test_positive_feedback_double_integrator_is_never_stable():
    # 1/s^2 closed with positive feedback: P = s^2 - k has the real roots +-sqrt(k)
    # for every k > 0, never on the axis inside the range (hand computation; the
    # Hurwitz determinant reference is identically zero here)
    a = analyze([1], [1, 0, 0], feedback="positive", operating_gain=4.0)
    assert a.boundary_gains == [] and a.stable_intervals == []
    assert not a.stable_at_reference and math.isnan(a.critical_gain)
    assert sorted(z.real for z in a.closed_loop_poles) == [pytest.approx(-2.0), pytest.approx(2.0)]
    assert not a.ill_conditioned and a.routh_agrees


def test_textbook_unstable_pole_stabilised_above_a_gain():
    # (s+1)/(s(s-1)): P = s^2 + (k-1) s + k is stable exactly for k > 1, crossing at
    # 1 rad/s (hand Routh array, from memory)
    a = analyze([1, 1], [1, -1, 0], operating_gain=3.0)
    assert a.boundary_gains == [pytest.approx(1.0, rel=1e-12)]
    assert a.boundary_frequencies == [pytest.approx(1.0, rel=1e-12)]
    assert a.critical_gain == INF and a.critical_gain_low == pytest.approx(1.0, rel=1e-12)
    assert a.lower_gain_margin == pytest.approx(1 / 3, rel=1e-12)


# ---------------------------------------------------------------------------
# operating gain at an end of the range, near a tangent touch; dominance ratio

def test_operating_gain_at_the_upper_end_on_a_crossing_is_not_stable():
    # 1/(s(s+2)(s+4)) has an axis pair at k = 48 (from memory); with the range
    # (0, 48] that crossing is no boundary gain, but the operating gain 48 sits on it
    a = analyze([1], [1, 6, 8, 0], gain_range=(0, 48), operating_gain=48.0)
    assert a.boundary_gains == []
    assert not a.stable_at_reference
    assert math.isnan(a.critical_gain) and math.isnan(a.gain_margin)
    # just inside the range it is stable, with no loss of stability inside the range
    b = analyze([1], [1, 6, 8, 0], gain_range=(0, 48), operating_gain=47.0)
    assert b.stable_at_reference and b.critical_gain == INF


def test_operating_gain_at_the_lower_end_on_a_root():
    # k = 0 with an open-loop pole at the origin: P = s(s+1) has a root on the axis
    a = analyze([1], [1, 1, 0], operating_gain=0.0)
    assert not a.stable_at_reference and math.isnan(a.critical_gain)
    assert math.isnan(a.dominance_ratio)
    # an open-loop pair on the axis: the crossing is at k = 0 exactly
    b = analyze([1, 0.5], poly([1, 0, 4], [1, 1]), operating_gain=0.0)
    assert not b.stable_at_reference
    # a stable open loop at k = 0 is stable (closed-loop poles -1, -2)
    c = analyze([1], [1, 3, 2], operating_gain=0.0)
    assert c.stable_at_reference and c.critical_gain == INF and c.dominance_ratio == pytest.approx(2.0)
    # range starting at 6 on the crossing of 1/(s(s+1)(s+2)) (critical gain 6, from memory)
    d = analyze([1], [1, 3, 2, 0], gain_range=(6, 10), operating_gain=6.0)
    assert not d.stable_at_reference
    # a root through infinity at the lower end: (s^2 - 1)... P = (1 - k) s^2 + 3 s + 2 + k
    e = analyze([-1, 0, 1], [1, 3, 2], gain_range=(1, 5), operating_gain=1.0)
    assert not e.stable_at_reference


def test_operating_gain_away_from_a_tangent_touch():
    # s(s^2+s+1) + k(s^2+s+4): the pair touches the axis at k = 1 and goes back
    # (Hurwitz condition (k-1)^2 >= 0, hand computation, from memory). At the touch the
    # loop is on the boundary; well away from it the stability is not in doubt
    # (closed-loop roots from numpy, common practice)
    num, den = [1, 1, 4], [1, 1, 1, 0]
    assert not analyze(num, den, operating_gain=1.0).stable_at_reference
    for k0, low in ((0.5, 0.0), (2.0, 1.0), (5.0, 1.0)):
        a = analyze(num, den, operating_gain=k0)
        assert np.all(np.roots(np.polyadd(den, k0 * np.array(num, float))).real < -1e-3)
        assert a.stable_at_reference, k0
        assert a.critical_gain_low == pytest.approx(low, rel=1e-6, abs=1e-12)
        assert a.ill_conditioned      # the touch itself keeps half the digits


def test_dominance_ratio_of_equally_slow_modes():
    # two pairs with real part -1: no pole dominates, the ratio is 1 (DESIGN: real
    # part of the next-slowest pole over the slowest's); roots by hand
    a = analyze([1], poly(pair(-1, 1), pair(-1, 2)), operating_gain=1e-9)
    assert a.dominance_ratio == pytest.approx(1.0, rel=1e-6)
    assert not a.second_order_ok
    # a single pair has no next-slowest pole
    assert math.isnan(analyze([1], [1, 2, 2], operating_gain=1.0).dominance_ratio)
    # pair at -1 +- j and a pole at -12: 12 (rule of thumb >= 10 met, common practice)
    b = analyze([1], poly(pair(-1, 1), [1, 12]), operating_gain=1e-12)
    assert b.dominance_ratio == pytest.approx(12.0, rel=1e-9) and b.second_order_ok


# ---------------------------------------------------------------------------
# conditioning

def test_degree_12_spread_boundaries_against_mpmath():
    # 12 lags from 1e4 s to 1e-3 s and three zeros: each boundary gain puts a root on
    # the axis at its frequency (mpmath 60-digit roots of P at that gain)
    num = np.real(np.poly([-0.01, -0.3, -20.0]))
    a = analyze(num, _SPREAD_D)
    assert not a.ill_conditioned and a.boundary_gains
    Np = np.concatenate([np.zeros(_SPREAD_D.size - num.size), num])
    with mpmath.workdps(60):
        for g, w in zip(a.boundary_gains, a.boundary_frequencies):
            c = [mpmath.mpf(float(d)) + mpmath.mpf(float(g)) * mpmath.mpf(float(x)) for d, x in zip(_SPREAD_D, Np)]
            r = mpmath.polyroots(c, maxsteps=2000, extraprec=2000)
            near = min(r, key=lambda z: abs(z - 1j * w))
            assert abs(near - 1j * w) < 1e-8 * w


def test_common_axis_factor_is_reported_not_a_crash():
    # N and D share s^2 + 9: +-3j is a closed-loop root for every gain; the loop is never
    # stable, the rest of the analysis still runs
    a = analyze(poly([1, 0, 9], [1, 1]), poly([1, 0, 9], [1, 2], [1, 3], [1, 4]), operating_gain=1.0)
    assert a.fixed_axis_root and not a.stable_at_reference
    assert a.stable_intervals == [] and math.isnan(a.critical_gain)
    assert len(a.closed_loop_poles) == 5


def test_batch_equals_one_at_a_time_on_the_new_loops():
    # loops grouped by degree (numerators padded with leading zeros): every row of a
    # batch equals that loop analysed alone, bit for bit
    groups: dict[tuple[int, str], list] = {}
    for _, num, den, fb, gr, _k0 in LOOPS:
        if gr == (0, INF):
            groups.setdefault((len(den), fb), []).append((np.asarray(num, float), np.asarray(den, float)))
    checked = 0
    for (w, fb), rows in groups.items():
        if len(rows) < 2:
            continue
        m = max(r[0].size for r in rows)
        N = np.array([np.concatenate([np.zeros(m - r[0].size), r[0]]) for r in rows])
        D = np.array([r[1] for r in rows])
        sigma = 1 if fb == "negative" else -1
        for op in (None, 0.7):
            full = analyze_stack(N, D, sigma=sigma, operating_gain=op)
            for i in range(len(rows)):
                one = analyze_stack(N[i:i + 1], D[i:i + 1], sigma=sigma, operating_gain=op)
                for k in full:
                    np.testing.assert_array_equal(full[k][i], one[k][0], err_msg=k)
                checked += 1
    assert checked >= 20


# ---------------------------------------------------------------------------
# the one-loop front with every kind of input

def test_analyze_accepts_lists_tuples_ints_arrays_and_leading_zeros():
    ref = analyze([2.0], [1.0, 3.0, 2.0, 0.0])     # critical gain 3 (6 / 2, from memory)
    assert ref.critical_gain == pytest.approx(3.0)
    for num, den in (([2], [1, 3, 2, 0]), ((2,), (1, 3, 2, 0)), (np.array([2]), np.array([1, 3, 2, 0])),
                     (np.array([2.0], np.float32), np.array([1, 3, 2, 0], np.float32)),
                     ([0, 0, 2], [1, 3, 2, 0]), ([2], [0, 1, 3, 2, 0])):
        a = analyze(num, den)
        assert a.numerator == [2.0] and a.denominator == [1.0, 3.0, 2.0, 0.0]
        assert a.boundary_gains == ref.boundary_gains and a.critical_gain == ref.critical_gain


@pytest.mark.parametrize("kwargs", [
    dict(num="12", den=[1, 1]),                        # a string is not a coefficient list
    dict(num=[1], den=[1, 1], operating_gain="high"),
    dict(num=[1], den=[1, 1], gain_range=(-INF, 0)),   # the lower end must be finite
    dict(num=[1], den=[0, 0]),
    dict(num=[1j], den=[1, 1]),
])
def test_analyze_bad_input_is_one_input_error(kwargs):
    kw = dict(kwargs)
    num, den = kw.pop("num"), kw.pop("den")
    with pytest.raises(InputError):
        analyze(num, den, **kw)


def test_huge_coefficient_ratio_has_no_overflow_warning():
    # N/D leading ratio 1e308 / 1e-308 overflows a division; only its sign matters
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("error")
        a = analyze([1e308], [1e-308, 1])
    assert a.asymptotes["angles_deg"] == [180.0]


def test_every_new_loop_gives_strict_json():
    # DESIGN section 6: inf as "inf", NaN as null, complex as [re, im]; strict JSON
    import json

    for _, num, den, fb, gr, k0 in LOOPS:
        d = analyze(num, den, feedback=fb, gain_range=gr, operating_gain=k0).to_dict()
        text = json.dumps(d, allow_nan=False)
        assert json.loads(text)["reference_gain"] == (gr[0] if k0 is None else k0)


def test_real_factor_common_to_n_and_d_is_no_breakaway_point():
    # (s+1)/(s(s+1)(s+2)(s+3)): the cancelled factor keeps a closed-loop root at -1 for
    # every gain; there k = -D/N is 0/0 (N D' - N' D has a double root there), not a
    # breakaway point. The reduced loop 1/(s(s+2)(s+3)) breaks away where 3s^2 + 10s + 6
    # = 0, at (-10 + sqrt 28)/6, and loses stability at k = 30 (hand Routh array, from memory)
    a = analyze([1, 1], np.real(np.poly([-1.0, -2.0, -3.0, 0.0])))
    s_b = (-10 + math.sqrt(28)) / 6
    k_b = -s_b * (s_b + 2) * (s_b + 3)
    assert a.breakaway_points == [(pytest.approx(s_b, rel=1e-10), pytest.approx(k_b, rel=1e-10))]
    assert a.critical_gain == pytest.approx(30.0, rel=1e-12) and not a.fixed_axis_root


def test_lower_gain_margin_only_where_stability_is_lost_below():
    # 1/(s(s+4)(s+5)) is stable for 0 < k < 180 (hand Routh array: 9 * 20 = 180, from
    # memory). With the range starting at 3 the stable interval is (3, 180): its lower
    # end is the range's, the loop stays stable below it, so there is no lower margin
    a = analyze([1], poly([1, 0], [1, 4], [1, 5]), gain_range=(3, INF), operating_gain=10.0)
    assert a.critical_gain_low == 3.0 and a.critical_gain == pytest.approx(180.0, rel=1e-12)
    assert math.isnan(a.lower_gain_margin)
    assert a.gain_margin == pytest.approx(18.0, rel=1e-12)
    # s^3 + k(s+1)^2 loses stability below k = 1/2 (hand Routh array, from memory):
    # a lower margin whatever the range's lower end
    b = analyze([1, 2, 1], [1, 0, 0, 0], gain_range=(0.1, INF), operating_gain=2.0)
    assert b.lower_gain_margin == pytest.approx(0.25, rel=1e-10)


@pytest.mark.parametrize("coeffs,expect", [
    ([1, 2, 2, 4, 11, 10], 2),                          # epsilon rule (textbook example, from memory)
    (np.polymul([1, 0, -1], [1, 2]), 1),               # row of zeros from the pair +-1
    ([1, 0, 0, 0, -1], 1),                              # s^4 - 1: roots +-1, +-j
    (np.polymul(np.polymul([1, 0, 1], [1, 0, 1]), [1, 0, 2]), 0),   # two rows of zeros, all on the axis
    ([-1, -2, -3, -1], 0),                              # negative leading coefficient
    (np.polymul([1, 2, 5], [1, -2, 5]), 2),             # mirror-image pairs
    ([1, -3], 1),
])
def test_routh_counts_on_new_polynomials(coeffs, expect):
    # reference: the number of mpmath 50-digit roots with positive real part
    from sweep.routh import routh_array

    with mpmath.workdps(50):
        roots = mpmath.polyroots([mpmath.mpf(float(x)) for x in coeffs], maxsteps=500, extraprec=500)
    assert sum(1 for z in roots if z.real > 1e-30) == expect
    assert routh_array(coeffs)[1] == expect


def test_routh_array_refuses_non_finite_coefficients():
    from sweep.routh import routh_array

    for bad in ([math.nan, 1.0], [1.0, math.inf], [[1.0, 2.0], [3.0, 4.0]]):
        with pytest.raises(ValueError):
            routh_array(bad)


@pytest.mark.parametrize("delta", [1e-2, 1e-6, 1e-8, 1e-10, 1e-12, 1e-14, -1e-14, -1e-12, -1e-10, -1e-6])
def test_near_tangent_family_is_right_or_flagged(delta):
    # s(s^2+s+1) + k(s^2+s+4+delta): the tangent touch at k = 1 splits into two close
    # crossings (delta > 0) or none (delta < 0). Either the digits are right (sympy exact
    # Hurwitz determinants) or the result is flagged ill-conditioned - never silently wrong
    num, den = [1, 1, 4 + delta], [1, 1, 1, 0]
    a = analyze(num, den)
    g_ref, w_ref, iv_ref = sympy_reference(num, den, 1, 0, None)
    ours = _canonical(a.boundary_gains, a.boundary_frequencies)
    ref = _canonical(g_ref, w_ref)
    right = (len(ours) == len(ref) and all(_close(x, y) and _close(wx, wy, 1e-8)
                                           for (x, wx), (y, wy) in zip(ours, ref))
             and len(a.stable_intervals) == len(iv_ref)
             and all(_close(x0, y0) and _close(x1, y1) for (x0, x1), (y0, y1) in zip(a.stable_intervals, iv_ref)))
    assert right or a.ill_conditioned
    if abs(delta) >= 1e-6:
        assert right and not a.ill_conditioned
