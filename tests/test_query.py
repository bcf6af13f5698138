"""Tests of sweep.query against plain numpy on synthetic datasets with closed-form answers."""
from __future__ import annotations

import math

import numpy as np
import pytest

from sweep import jsonutil
from sweep.errors import InputError
from sweep.query import QUANTILES, format_summary, ranked_quantile, summarize

from datasets import char_roots, closed_form, make_dataset, polynomials


@pytest.fixture(scope="module")
def base():
    return make_dataset(designs=("nominal", "corners", "random"), samples=40)


@pytest.fixture(scope="module")
def mixed_inf():
    # some variants never lose stability (critical gain inf)
    return make_dataset(designs=("nominal", "corners", "grid", "random"), samples=30, levels=3,
                        rate_range=(2e-3, 1e-3, 4e-3))


@pytest.fixture(scope="module")
def unstable():
    # operating gain inside the spread of critical gains: some variants unstable there
    return make_dataset(designs=("nominal", "corners", "random"), samples=40, operating_gain=12.0)


def _values(ds, i):
    return {n: np.array([float(ds[n].values[i])]) for n in ("J", "L", "Tr", "R", "B", "Kt")}


def test_fields_of_query_json(base):
    s = summarize(base)
    for key in ("n_variants", "reference_gain", "worst", "nominal", "robust_gain_interval",
                "unstable_at_reference", "quantiles", "sensitivity"):
        assert key in s
    assert set(s["worst"]) >= {"variant", "design", "critical_gain", "crossing_frequency",
                               "parameters"}
    assert set(s["quantiles"]) == set(QUANTILES)
    text = jsonutil.dumps(s)  # strict JSON: no NaN / Infinity tokens
    assert "NaN" not in text and "Infinity" not in text


def test_against_numpy(base):
    s = summarize(base)
    crit = base["critical_gain"].values
    low = base["critical_gain_low"].values
    i = int(np.argmin(crit))
    assert s["n_variants"] == crit.size
    assert s["worst"]["variant"] == i
    assert s["worst"]["critical_gain"] == crit.min()
    assert s["worst"]["design"] == str(base["design"].values[i])
    assert s["worst"]["parameters"]["J"] == float(base["J"].values[i])
    assert s["nominal"]["critical_gain"] == crit[0]
    assert s["robust_gain_interval"] == [low.max(), crit.min()]
    for q in QUANTILES:
        assert s["quantiles"][q] == pytest.approx(np.quantile(crit, float(q)), rel=1e-12)
    assert s["unstable_at_reference"] == 0


def test_worst_against_closed_form_and_eigenvalues(base):
    # closed form (cubic Routh criterion, from memory) recomputed from the stored parameters
    s = summarize(base)
    i = s["worst"]["variant"]
    N, D = polynomials({n: base[n].values for n in ("J", "L", "Tr", "R", "B", "Kt")})
    kc, w = closed_form(N, D)
    assert int(np.argmin(kc)) == i
    assert s["worst"]["critical_gain"] == pytest.approx(kc.min(), rel=1e-12)
    assert s["worst"]["crossing_frequency"] == pytest.approx(w[i], rel=1e-12)
    # eigenvalues just below and above the worst critical gain (numpy.roots)
    Ni, Di = polynomials(_values(base, i))
    k = s["worst"]["critical_gain"]
    below = char_roots(Ni[0], Di[0], k * (1 - 1e-6))
    above = char_roots(Ni[0], Di[0], k * (1 + 1e-6))
    assert below.real.max() < 0
    assert above.real.max() > 0
    at = char_roots(Ni[0], Di[0], k)
    j = np.argmin(np.abs(at.real))
    assert abs(at[j].real) < 1e-6 * abs(at[j])
    assert abs(abs(at[j].imag) - s["worst"]["crossing_frequency"]) < 1e-6 * s["worst"]["crossing_frequency"]


def test_inf_quantiles(mixed_inf):
    s = summarize(mixed_inf)
    crit = mixed_inf["critical_gain"].values
    n_inf = int(np.isposinf(crit).sum())
    assert 0 < n_inf < crit.size
    assert s["infinite"] == n_inf
    v = np.sort(crit)
    for q in QUANTILES:
        h = (v.size - 1) * float(q)
        lo, hi = int(math.floor(h)), min(int(math.floor(h)) + 1, v.size - 1)
        frac = h - lo
        if np.isinf(v[lo]) or (frac > 0 and np.isinf(v[hi])):
            expect = math.inf
        else:
            expect = v[lo] + frac * (v[hi] - v[lo])
        assert s["quantiles"][q] == pytest.approx(expect, rel=1e-12)
    assert s["quantiles"]["0.95"] == math.inf
    assert jsonutil.to_jsonable(s["quantiles"])["0.95"] == "inf"
    finite = crit[np.isfinite(crit)]
    assert s["worst"]["critical_gain"] == finite.min()
    assert s["robust_gain_interval"] == [0.0, finite.min()]


def test_ranked_quantile_edges():
    assert ranked_quantile(np.array([1.0, 2.0, np.inf]), 0.5) == 2.0
    assert ranked_quantile(np.array([1.0, 2.0, np.inf]), 0.75) == math.inf
    assert ranked_quantile(np.array([np.inf, np.inf]), 0.0) == math.inf
    assert math.isnan(ranked_quantile(np.array([3.0, 4.0]), 0.1, low_missing=1))
    assert ranked_quantile(np.array([3.0, 4.0]), 1.0, low_missing=1) == 4.0
    assert math.isnan(ranked_quantile(np.array([]), 0.5))


def test_unstable_at_reference(unstable):
    s = summarize(unstable)
    crit = unstable["critical_gain"].values
    stab = unstable["stable_at_reference"].values
    n_un = int((stab == 0).sum())
    assert n_un > 0 and s["unstable_at_reference"] == n_un
    assert s["reference_gain"] == 12.0
    assert math.isnan(s["worst"]["critical_gain"])
    assert jsonutil.to_jsonable(s["worst"])["critical_gain"] is None
    assert s["robust_gain_interval"] is None
    # the worst names the variant reaching furthest right at k = 12: recompute with numpy.roots
    reach = []
    for i in range(crit.size):
        N, D = polynomials(_values(unstable, i))
        reach.append(char_roots(N[0], D[0], 12.0).real.max())
    reach = np.array(reach)
    assert s["worst"]["variant"] == int(np.argmax(reach))
    assert s["worst"]["max_real_part"] == pytest.approx(reach.max(), rel=1e-9)
    assert stab[s["worst"]["variant"]] == 0
    # quantiles: unstable variants rank lowest; positions among them are null
    assert math.isnan(s["quantiles"]["0.001"])
    assert s["quantiles"]["0.95"] == pytest.approx(
        np.quantile(np.where(stab == 0, -np.inf, crit), 0.95), rel=1e-12)


def test_unstable_without_stored_closed_loop_poles():
    ds = make_dataset(operating_gain=12.0, with_operating_quantities=False, samples=20)
    s = summarize(ds)
    assert "loci" in s["worst"]["basis"]
    ds2 = make_dataset(operating_gain=12.0, with_operating_quantities=False, samples=20, keep="none")
    s2 = summarize(ds2)
    assert s2["worst"]["basis"].startswith("first unstable")
    assert ds2["stable_at_reference"].values[s2["worst"]["variant"]] == 0
    # both routes agree with the stored poles route when the loci are there
    assert s["worst"]["variant"] == summarize(make_dataset(operating_gain=12.0, samples=20))["worst"]["variant"]


def test_sensitivity_spearman(base):
    from scipy.stats import spearmanr

    s = summarize(base)
    assert s["sensitivity_method"]["measure"] == "spearman"
    assert s["sensitivity_method"]["designs"] == ["random"]
    m = base["design"].values == "random"
    crit = base["critical_gain"].values[m]
    got = {d["parameter"]: d["score"] for d in s["sensitivity"]}
    assert set(got) == {"J", "L", "Tr"}  # fixed parameters have no score
    for n in got:
        assert got[n] == pytest.approx(spearmanr(base[n].values[m], crit).statistic, abs=1e-12)
    scores = [abs(d["score"]) for d in s["sensitivity"]]
    assert scores == sorted(scores, reverse=True)
    # larger L lowers the critical gain a2 a1/(a3 b0 - a2 b1) (common practice: more lag, less margin)
    assert got["L"] < 0


def test_sensitivity_main_effects():
    ds = make_dataset(designs=("nominal", "corners"))
    s = summarize(ds)
    assert s["sensitivity_method"]["measure"] == "main effect"
    crit = ds["critical_gain"].values[1:]
    for d in s["sensitivity"]:
        x = ds[d["parameter"]].values[1:]
        expect = crit[x == x.max()].mean() - crit[x == x.min()].mean()
        assert d["score"] == pytest.approx(expect, rel=1e-12)
        assert d["relative"] == pytest.approx(expect / ds["critical_gain"].values[0], rel=1e-12)


def test_operating_quantities(unstable):
    s = summarize(unstable)
    op = s["operating"]
    assert op["gain"] == 12.0
    gm = unstable["gain_margin"].values
    zeta = unstable["min_damping"].values
    assert op["gain_margin"]["worst"]["value"] == np.nanmin(gm)
    assert op["min_damping"]["worst"]["value"] == zeta.min()
    assert op["min_damping"]["worst"]["variant"] == int(np.argmin(zeta))
    assert op["min_damping"]["quantiles"]["0.5"] == pytest.approx(np.quantile(zeta, 0.5))
    assert op["gain_margin"]["without_value"] == s["unstable_at_reference"]


def test_no_operating_quantities(base):
    assert summarize(base)["operating"] is None
    ds = make_dataset(with_operating_quantities=False, samples=5)
    assert summarize(ds)["operating"] is None


def test_certified_bracket(base):
    s = summarize(base, certificate={"lower": 8.7, "upper": 8.8, "method": "branch-and-bound",
                                      "exact": False})
    assert s["certified"] == {"lower": 8.7, "upper": 8.8, "method": "branch-and-bound", "exact": False}
    ds = base.copy()
    ds.attrs.update(certified_lower=8.78, certified_upper=8.78, certified_method="kharitonov",
                    certified_exact=1)
    s2 = summarize(ds)
    assert s2["certified"]["exact"] is True and s2["certified"]["method"] == "kharitonov"
    assert summarize(base)["certified"] is None
    text = format_summary(s, base)
    assert "certified worst case" in text and "8.7" in text


def test_format_summary(base, unstable):
    text = format_summary(summarize(base), base)
    assert text.splitlines()[0] == "Winch drum position loop"
    assert "kg m^2" in text and "rad/s" in text
    assert "Sensitivity (spearman" in text
    t2 = format_summary(summarize(unstable), unstable)
    assert "unstable at reference gain" in t2 and "At the operating gain 12" in t2


def test_reference_gain_from_config_text():
    ds = make_dataset(samples=5, operating_gain=9.0)
    del ds.attrs["reference_gain"], ds.attrs["operating_gain"]
    try:
        from sweep.config import parse_config  # noqa: F401
        import sweep.expressions  # noqa: F401
    except ImportError:
        pytest.skip("config parser not available yet")
    assert summarize(ds)["reference_gain"] == 9.0


def test_bad_input():
    ds = make_dataset(samples=5).drop_vars("critical_gain")
    with pytest.raises(InputError, match="critical_gain"):
        summarize(ds)
