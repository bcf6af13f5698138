"""Tests of sweep.query against an independent numpy computation on generated datasets.

The datasets (tests/datasets.py) are built with plain numpy from three small
loops with closed-form answers; `expected` below recomputes every answer of
`summarize` from the stored per-variant numbers with numpy's own quantile,
scipy's Spearman correlation and ``numpy.roots``, written without looking at
how `sweep.query` does it.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
import xarray as xr

from sweep import jsonutil
from sweep.errors import InputError
from sweep.query import (QUANTILES, format_summary, quantile_basis, ranked_quantile, spearman,
                         summarize, worst_variants)

from datasets import (FAMILIES, char_roots, closed_form, make_dataset, not_computed, polynomials,
                      variant_polynomials)

SAMPLED = ("random", "lhs", "sobol")
FIXED_WINCH = {n: (v[0], v[0], v[0], v[3]) for n, v in FAMILIES["winch"]["parameters"].items()}

# name: (family, make_dataset keywords, post-processing)
CASES = {
    "winch": ("winch", dict(designs=("nominal", "corners", "random"), samples=40), None),
    "some_inf": ("winch", dict(designs=("nominal", "corners", "grid", "random"), samples=30,
                               rate_range=(2e-3, 1e-3, 4e-3)), None),
    "all_inf": ("winch", dict(designs=("nominal", "corners", "random"), samples=12,
                              rate_range=(3.5e-3, 3e-3, 4e-3)), None),
    "some_unstable": ("winch", dict(designs=("nominal", "corners", "random"), samples=40,
                                    operating_gain=12.0), None),
    "all_unstable": ("winch", dict(designs=("nominal", "corners", "random"), samples=20,
                                   operating_gain=1000.0), None),
    "not_computed": ("winch", dict(designs=("nominal", "corners", "random"), samples=30),
                     lambda ds: not_computed(ds, [2, 15])),
    "single": ("winch", dict(designs=("nominal",)), None),
    "no_uncertain": ("winch", dict(designs=("nominal", "corners", "random"), ranges=FIXED_WINCH),
                     None),
    "conditional": ("lift", dict(designs=("nominal", "corners", "lhs"), samples=30,
                                 operating_gain=60.0), None),
    "positive": ("kiln", dict(designs=("nominal", "corners", "sobol"), samples=25), None),
    "positive_unstable": ("kiln", dict(designs=("nominal", "corners", "sobol"), samples=25,
                                       operating_gain=5.0), None),
    "corners_few_random": ("winch", dict(designs=("nominal", "corners", "random"), samples=5), None),
    "grid_corners": ("lift", dict(designs=("nominal", "grid", "corners"), levels=3,
                                  operating_gain=60.0), None),
    "grid_lhs": ("winch", dict(designs=("grid", "lhs"), levels=3, samples=30), None),
}


@pytest.fixture(scope="module")
def datasets():
    out = {}
    for name, (family, kw, post) in CASES.items():
        ds = make_dataset(family=family, points=30, **kw)
        out[name] = post(ds) if post else ds
    return out


def _np_quantiles(y: np.ndarray) -> dict[str, float]:
    """numpy's linear quantile with -inf (unstable) -> NaN and +inf kept (independent route).

    The infinities are replaced by huge finite stand-ins so numpy ranks and
    interpolates normally; a result pulled toward a stand-in is that infinity.
    """
    big = 1e300
    z = np.where(np.isposinf(y), big, np.where(np.isneginf(y), -big, y))
    out = {}
    for q in QUANTILES:
        v = float(np.quantile(z, float(q))) if z.size else math.nan
        out[q] = math.nan if v < -1e250 else math.inf if v > 1e250 else v
    return out


def expected(ds: xr.Dataset, family: str) -> dict:
    """Every number of `summarize`, recomputed independently with numpy."""
    crit = ds["critical_gain"].values
    low = ds["critical_gain_low"].values
    stab = ds["stable_at_reference"].values == 1
    design = ds["design"].values.astype(str)
    k_ref = float(ds.attrs["reference_gain"])
    sigma = 1 if ds.attrs["feedback"] == "negative" else -1
    out = {"n_variants": crit.size, "unstable_at_reference": int((~stab).sum()),
           "infinite": int(np.isposinf(crit).sum()), "not_computed": int((stab & np.isnan(crit)).sum())}
    if (~stab).any():
        # the unstable variant whose roots at k_ref reach furthest right, by numpy.roots
        reach = np.full(crit.size, -np.inf)
        for i in np.flatnonzero(~stab):
            N, D = variant_polynomials(ds, i, family)
            reach[i] = char_roots(N, D, k_ref, sigma).real.max()
        out["worst"] = int(np.argmax(reach))
        out["reach"] = float(reach.max())
        out["robust"] = None
    else:
        out["worst"] = int(np.nanargmin(crit))
        out["robust"] = None if np.isnan(crit).any() else [float(low.max()), float(crit.min())]
    sampled = np.isin(design, SAMPLED)
    basis = sampled if sampled.sum() >= 10 else np.ones(crit.size, bool)
    y = np.where(stab, crit, -np.inf)[basis]
    out["quantiles"] = _np_quantiles(y[~np.isnan(y)])
    # sensitivity: rank correlation over the sampled designs, main effects over corners/grid
    names = [n for n in FAMILIES[family]["parameters"] if np.ptp(ds[n].values) > 0]
    out["sensitivity"] = {}
    if names and sampled.sum() >= 10:
        from scipy.stats import spearmanr

        yy = np.where(stab, crit, -np.inf)[sampled]
        ok = ~np.isnan(yy)
        if np.unique(yy[ok]).size > 1:
            out["measure"] = "spearman"
            for n in names:
                out["sensitivity"][n] = spearmanr(ds[n].values[sampled][ok], yy[ok]).statistic
        else:
            out["measure"] = None
    elif names:
        lev = np.isin(design, ("corners", "grid"))
        yy = np.where(stab, crit, k_ref)[lev]
        fin = yy[np.isfinite(yy)]
        yy = np.where(np.isposinf(yy), fin.max() if fin.size else k_ref, yy)
        if np.unique(yy[~np.isnan(yy)]).size > 1:
            out["measure"] = "main effect"
            for n in names:
                x = ds[n].values[lev]
                out["sensitivity"][n] = yy[x == x.max()].mean() - yy[x == x.min()].mean()
        else:
            out["measure"] = None
    else:
        out["measure"] = None
    return out


@pytest.mark.parametrize("case", sorted(CASES))
def test_against_independent_numpy(datasets, case):
    ds = datasets[case]
    family = CASES[case][0]
    s = summarize(ds)
    e = expected(ds, family)
    for key in ("n_variants", "unstable_at_reference", "infinite", "not_computed"):
        assert s[key] == e[key], key
    assert s["worst"]["variant"] == e["worst"]
    i = e["worst"]
    assert s["worst"]["design"] == str(ds["design"].values[i])
    for n in FAMILIES[family]["parameters"]:
        assert s["worst"]["parameters"][n] == float(ds[n].values[i])
    if e["unstable_at_reference"]:
        assert math.isnan(s["worst"]["critical_gain"])
        assert s["worst"]["max_real_part"] == pytest.approx(e["reach"], rel=1e-6, abs=1e-9)
    else:
        assert s["worst"]["critical_gain"] == np.nanmin(ds["critical_gain"].values)
        np.testing.assert_equal(s["worst"]["crossing_frequency"], ds["crossing_frequency"].values[i])
    if e["robust"] is None:
        assert s["robust_gain_interval"] is None
        assert s["robust_gain_interval_note"]
    else:
        assert s["robust_gain_interval"] == e["robust"]
    for q in QUANTILES:
        got, want = s["quantiles"][q], e["quantiles"][q]
        if math.isnan(want):
            assert math.isnan(got), q
        else:
            assert got == pytest.approx(want, rel=1e-12), q
    assert s["sensitivity_method"]["measure"] == e["measure"]
    got = {d["parameter"]: d["score"] for d in s["sensitivity"]}
    assert set(got) == set(e["sensitivity"])
    for n, v in e["sensitivity"].items():
        assert got[n] == pytest.approx(v, rel=1e-12, abs=1e-12)
    scores = [abs(d["score"]) for d in s["sensitivity"]]
    assert scores == sorted(scores, reverse=True)
    # strict JSON, conventions of DESIGN section 6
    text = jsonutil.dumps(s)
    assert "NaN" not in text and "Infinity" not in text
    json.loads(text)
    # every design of the case produces readable text
    assert format_summary(s, ds).splitlines()[0] == ds.attrs["title"]


@pytest.mark.parametrize("case", ["winch", "some_inf", "conditional", "positive", "grid_corners",
                                  "not_computed", "single"])
def test_worst_verified_by_eigenvalues(datasets, case):
    # numpy.roots just below and just above the worst critical gain (and the lower end)
    ds = datasets[case]
    family = CASES[case][0]
    sigma = 1 if ds.attrs["feedback"] == "negative" else -1
    s = summarize(ds)
    w = s["worst"]
    N, D = variant_polynomials(ds, w["variant"], family)
    k = w["critical_gain"]
    assert math.isfinite(k)
    assert char_roots(N, D, k * (1 - 1e-6), sigma).real.max() < 0
    assert char_roots(N, D, k * (1 + 1e-6), sigma).real.max() > 0
    at = char_roots(N, D, k, sigma)
    j = np.argmin(np.abs(at.real))
    assert abs(at[j].real) < 1e-6 * max(1.0, abs(at[j]))
    assert abs(abs(at[j].imag) - w["crossing_frequency"]) < 1e-6 * max(1.0, w["crossing_frequency"])
    lo = w["critical_gain_low"]
    if lo > 0:  # conditionally stable: unstable just below the lower end
        assert char_roots(N, D, lo * (1 - 1e-6), sigma).real.max() > 0
        assert char_roots(N, D, lo * (1 + 1e-6), sigma).real.max() < 0
    # and the closed form (cubic Routh criterion, from memory) over every variant
    Ns, Ds = polynomials({n: ds[n].values for n in FAMILIES[family]["parameters"]}, family)
    kc, wc, _low = closed_form(Ns, Ds, family)
    computed = ~np.isnan(ds["critical_gain"].values)
    assert k == pytest.approx(np.min(kc[computed]), rel=1e-12)


def test_conditionally_stable_interval(datasets):
    # lift: stable for pab < k < pab + (a+b-p)(ab-pa-pb) (cubic Routh criterion, from memory)
    ds = datasets["conditional"]
    s = summarize(ds)
    a, b, p = ds["a"].values, ds["b"].values, ds["p"].values
    lo = (p * a * b).max()
    hi = (p * a * b + (a + b - p) * (a * b - p * a - p * b)).min()
    assert s["robust_gain_interval"] == [pytest.approx(lo, rel=1e-12), pytest.approx(hi, rel=1e-12)]
    assert s["robust_gain_interval"][0] > 0
    lo_v, hi_v = s["robust_gain_interval_variants"]
    assert ds["critical_gain_low"].values[lo_v] == s["robust_gain_interval"][0]
    assert ds["critical_gain"].values[hi_v] == s["robust_gain_interval"][1]
    lgm = s["operating"]["lower_gain_margin"]
    assert lgm["worst"]["value"] == pytest.approx(lo / 60.0, rel=1e-12)
    text = format_summary(s, ds)
    assert "lower gain margin" in text and "lower end: variant" in text


def test_positive_feedback_through_origin(datasets):
    # kiln: P = (s+a)(s+b)(s+c) - k loses stability through s = 0 at k = abc (from memory)
    ds = datasets["positive"]
    s = summarize(ds)
    abc = ds["a"].values * ds["b"].values * ds["c"].values
    assert s["feedback"] == "positive"
    assert s["worst"]["critical_gain"] == pytest.approx(abc.min(), rel=1e-12)
    assert s["worst"]["crossing_frequency"] == 0.0
    assert "through the origin" in format_summary(s, ds)


def test_quantiles_use_the_sampled_designs(datasets):
    ds = datasets["winch"]
    mask, basis = quantile_basis(ds)
    assert basis["designs"] == ["random"] and basis["variants"] == 40
    assert mask.sum() == 40 and not mask[0]  # the nominal is not a draw
    crit = ds["critical_gain"].values
    s = summarize(ds)
    assert s["quantiles"]["0.5"] == pytest.approx(np.quantile(crit[mask], 0.5), rel=1e-12)
    # with fewer than 10 sampled variants every variant counts, and the note says what they are
    _m, b2 = quantile_basis(datasets["corners_few_random"])
    assert b2["variants"] == datasets["corners_few_random"].sizes["variant"]
    assert "not probabilities" in b2["note"]


def test_inf_quantiles(datasets):
    s = summarize(datasets["some_inf"])
    assert 0 < s["infinite"] < s["n_variants"]
    assert s["quantiles"]["0.95"] == math.inf
    assert jsonutil.to_jsonable(s["quantiles"])["0.95"] == "inf"
    crit = datasets["some_inf"]["critical_gain"].values
    assert s["robust_gain_interval"] == [0.0, crit[np.isfinite(crit)].min()]
    s2 = summarize(datasets["all_inf"])
    assert s2["robust_gain_interval"] == [0.0, math.inf]
    assert jsonutil.to_jsonable(s2)["robust_gain_interval"] == [0.0, "inf"]
    assert s2["sensitivity"] == [] and "nothing to rank" in s2["sensitivity_method"]["note"]
    assert jsonutil.to_jsonable(s2["worst"])["crossing_frequency"] is None


def test_spearman_against_scipy():
    # our numpy Spearman (average ranks for ties, infinities ranked like numbers) against scipy
    from scipy.stats import spearmanr

    rng = np.random.default_rng(3)
    for _ in range(200):
        n = int(rng.integers(3, 60))
        x = rng.integers(0, 4, n).astype(float) if rng.random() < 0.5 else rng.normal(size=n)
        y = rng.normal(size=n)
        y[rng.random(n) < 0.15] = np.inf
        y[rng.random(n) < 0.15] = -np.inf
        want = spearmanr(x, y).statistic
        got = spearman(x, y)
        assert got == pytest.approx(0.0 if np.isnan(want) else want, abs=1e-12)


def test_ranked_quantile_edges():
    assert ranked_quantile(np.array([1.0, 2.0, np.inf]), 0.5) == 2.0
    assert ranked_quantile(np.array([1.0, 2.0, np.inf]), 0.75) == math.inf
    assert ranked_quantile(np.array([np.inf, np.inf]), 0.0) == math.inf
    assert math.isnan(ranked_quantile(np.array([3.0, 4.0]), 0.1, low_missing=1))
    assert ranked_quantile(np.array([3.0, 4.0]), 1.0, low_missing=1) == 4.0
    assert math.isnan(ranked_quantile(np.array([]), 0.5))


def test_unstable_at_reference(datasets):
    ds = datasets["some_unstable"]
    s = summarize(ds)
    assert s["reference_gain"] == 12.0
    assert jsonutil.to_jsonable(s["worst"])["critical_gain"] is None
    assert ds["stable_at_reference"].values[s["worst"]["variant"]] == 0
    assert s["worst"]["basis"] == "closed-loop poles at the reference gain"
    assert math.isnan(s["quantiles"]["0.001"])
    assert "rank lowest" in s["quantile_note"]
    # every variant unstable: nothing to rank, no quantile, still a worst variant
    s2 = summarize(datasets["all_unstable"])
    assert s2["unstable_at_reference"] == s2["n_variants"]
    assert all(math.isnan(v) for v in s2["quantiles"].values())
    assert s2["sensitivity"] == []
    text = format_summary(s2, datasets["all_unstable"])
    assert "unstable at reference gain" in text and "Sensitivity: " in text


def test_unstable_without_stored_closed_loop_poles():
    ds = make_dataset(operating_gain=12.0, with_operating_quantities=False, samples=20, points=30)
    s = summarize(ds)
    assert "loci" in s["worst"]["basis"]
    ds2 = make_dataset(operating_gain=12.0, with_operating_quantities=False, samples=20, keep="none",
                       points=30)
    s2 = summarize(ds2)
    assert s2["worst"]["basis"].startswith("first unstable")
    assert ds2["stable_at_reference"].values[s2["worst"]["variant"]] == 0
    # the loci route agrees with the stored-poles route
    full = summarize(make_dataset(operating_gain=12.0, samples=20, points=30))
    assert s["worst"]["variant"] == full["worst"]["variant"]


def test_not_computed_variants(datasets):
    s = summarize(datasets["not_computed"])
    assert s["not_computed"] == 2
    assert s["robust_gain_interval"] is None and "ill-conditioned" in s["robust_gain_interval_note"]
    assert "among the" in s["worst"]["basis"]
    assert s["flags"]["ill_conditioned"] == 2
    text = format_summary(s, datasets["not_computed"])
    assert "not computed" in text and "Flagged variants" in text


def test_single_variant_and_no_uncertain_parameters(datasets):
    for case in ("single", "no_uncertain"):
        ds = datasets[case]
        s = summarize(ds)
        assert s["n_variants"] == 1
        assert s["worst"]["variant"] == 0 and s["nominal"]["variant"] == 0
        assert s["sensitivity"] == []
        assert s["sensitivity_method"]["note"] == "no uncertain parameters"
        assert len({s["quantiles"][q] for q in QUANTILES}) == 1


def test_sensitivity_measure_follows_the_designs(datasets):
    assert summarize(datasets["winch"])["sensitivity_method"]["designs"] == ["random"]
    m = summarize(datasets["corners_few_random"])["sensitivity_method"]
    assert m["measure"] == "main effect" and m["designs"] == ["corners"]
    m = summarize(datasets["grid_corners"])["sensitivity_method"]
    assert m["measure"] == "main effect" and m["designs"] == ["corners", "grid"]
    assert summarize(datasets["grid_lhs"])["sensitivity_method"]["measure"] == "spearman"
    # larger L lowers the critical gain a2 a1/(a3 b0 - a2 b1) (common practice: more lag, less margin)
    got = {d["parameter"]: d["score"] for d in summarize(datasets["winch"])["sensitivity"]}
    assert got["L"] < 0


def test_main_effect_relative_to_nominal():
    ds = make_dataset(designs=("nominal", "corners"), points=30)
    s = summarize(ds)
    crit = ds["critical_gain"].values[1:]
    for d in s["sensitivity"]:
        x = ds[d["parameter"]].values[1:]
        expect = crit[x == x.max()].mean() - crit[x == x.min()].mean()
        assert d["relative"] == pytest.approx(expect / ds["critical_gain"].values[0], rel=1e-12)


def test_operating_quantities(datasets):
    ds = datasets["some_unstable"]
    s = summarize(ds)
    op = s["operating"]
    assert op["gain"] == 12.0
    gm = ds["gain_margin"].values
    zeta = ds["min_damping"].values
    assert op["gain_margin"]["worst"]["value"] == np.nanmin(gm)
    assert op["gain_margin"]["worst"]["db"] == pytest.approx(20 * np.log10(np.nanmin(gm)))
    assert op["min_damping"]["worst"]["value"] == zeta.min()
    assert op["min_damping"]["worst"]["variant"] == int(np.argmin(zeta))
    m = ds["design"].values == "random"
    assert op["min_damping"]["quantiles"]["0.5"] == pytest.approx(np.quantile(zeta[m], 0.5))
    assert op["gain_margin"]["without_value"] == s["unstable_at_reference"]
    assert op["lower_gain_margin"] is None  # every stable interval starts at 0
    # complex numbers as [re, im] in JSON
    poles = jsonutil.to_jsonable(s["worst"])["closed_loop_poles"]
    assert len(poles) == 3 and all(len(p) == 2 for p in poles)


def test_no_operating_quantities(datasets):
    assert summarize(datasets["winch"])["operating"] is None
    assert summarize(datasets["winch"])["worst"]["closed_loop_poles"] is None
    ds = make_dataset(with_operating_quantities=False, samples=5, points=30)
    assert summarize(ds)["operating"] is None


def test_certified_bracket(datasets):
    base = datasets["winch"]
    s = summarize(base, certificate={"lower": 8.7, "upper": 8.8, "method": "branch-and-bound",
                                      "exact": False, "status": "certified"})
    assert s["certified"] == {"lower": 8.7, "upper": 8.8, "method": "branch-and-bound", "exact": False,
                              "status": "certified"}
    ds = base.copy()
    ds.attrs.update(certified_lower=8.78, certified_upper=8.78, certified_method="kharitonov",
                    certified_exact=1)
    s2 = summarize(ds)
    assert s2["certified"]["exact"] is True and s2["certified"]["method"] == "kharitonov"
    assert summarize(base)["certified"] is None
    text = format_summary(s, base)
    assert "certified worst case" in text and "8.7" in text and "guaranteed bounds" in text
    # an unproven certificate is not called guaranteed
    unproven = summarize(base, certificate={"lower": None, "upper": 8.8, "method": "branch-and-bound",
                                             "exact": False, "status": "reference_unproven"})
    text = format_summary(unproven, base)
    assert "not proven" in text and "guaranteed" not in text


def test_format_summary(datasets):
    base = datasets["winch"]
    text = format_summary(summarize(base), base)
    assert text.splitlines()[0] == "Winch drum position loop"
    assert "kg m^2" in text and "rad/s" in text
    assert "Spearman rank correlation" in text
    assert "over 40 variants (random)" in text
    t2 = format_summary(summarize(datasets["some_unstable"]), datasets["some_unstable"])
    assert "unstable at reference gain" in t2 and "At the operating gain 12" in t2
    assert " dB)" in t2


def test_plain_python_values(datasets):
    # notebooks: nothing numpy-typed in the dict (it prints and compares like plain data)
    def walk(x):
        if isinstance(x, dict):
            for k, v in x.items():
                assert type(k) is str
                walk(v)
        elif isinstance(x, list):
            for v in x:
                walk(v)
        else:
            assert x is None or type(x) in (int, float, str, bool, complex), (type(x), x)
    for name in ("winch", "some_unstable", "conditional", "not_computed"):
        walk(summarize(datasets[name]))


def test_worst_variants_table(datasets):
    ds = datasets["some_unstable"]
    t = worst_variants(ds, 5)
    assert isinstance(t, xr.Dataset) and t.sizes["variant"] == 5
    assert (t["stable_at_reference"].values == 0).all()  # unstable ones first
    assert int(t["variant"].values[0]) == summarize(ds)["worst"]["variant"]
    t2 = worst_variants(datasets["winch"], 4)
    crit = datasets["winch"]["critical_gain"].values
    assert list(t2["critical_gain"].values) == sorted(crit)[:4]
    assert "J" in t2.coords and "design" in t2.coords


def test_reference_gain_from_config_text():
    ds = make_dataset(samples=5, operating_gain=9.0, points=30)
    del ds.attrs["reference_gain"], ds.attrs["operating_gain"]
    assert summarize(ds)["reference_gain"] == 9.0


def test_bad_input():
    ds = make_dataset(samples=5, points=30).drop_vars("critical_gain")
    with pytest.raises(InputError, match="critical_gain"):
        summarize(ds)


def test_cli_bad_result_file(tmp_path, capsys):
    from sweep.cli import main

    assert main(["query", str(tmp_path / "missing.nc")]) == 2
    err = capsys.readouterr().err
    assert "missing.nc" in err and "sweep run" in err and len(err.strip().splitlines()) == 1
    bad = tmp_path / "bad.nc"
    bad.write_text("title = 'not a result'\n")
    assert main(["query", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "bad.nc" in err and len(err.strip().splitlines()) == 1
