"""Query and plots on results the other tests do not use: real runs of new small
configs and hand-made datasets at the edges.

Every query answer is recomputed here from the parameter values with plain
numpy (hand-written polynomials, ``numpy.roots`` at gains between the
boundary gains via ``tests/datasets.reference_analysis``, ``numpy.quantile``,
``scipy.stats.spearmanr``), not from `sweep.query`.  The figure checks measure
every figure-level text and legend: none may stick out of the image, and a
legend at the bottom may not cover an axes.
"""
from __future__ import annotations

import io
import json
import math
import warnings

import numpy as np
import pytest
from scipy.stats import spearmanr

from sweep import jsonutil
from sweep.config import load_config
from sweep.errors import InputError
from sweep.plots import KINDS, figure, plane_table
from sweep.query import format_summary, summarize
from sweep.runner import run
from sweep.store import open_result

from datasets import FAMILIES, make_dataset, reference_analysis

pm = np.polymul

# name: (config text, hand-written (N, D) of the parameters, sigma, gain range, operating gain)
CONFIGS = {
    # a hoist with one unstable pole: stable only between two gains; a wide spread in b puts
    # some variants' lower end above the operating gain (unstable at the reference gain)
    "hoist": ("""
title = "Hoist with an unstable mode"
[parameters]
p = { nominal = 1.0, tol = "10%", units = "1/s" }
a = { nominal = 4.0, tol = "10%", units = "1/s" }
b = { nominal = 6.0, tol = "50%", units = "1/s" }
[plant]
transfer = "1 / ((s - p)*(s + a)*(s + b))"
[loop]
operating_gain = 40
[sweep]
designs = ["nominal", "corners", "random"]
samples = 40
[locus]
points = 40
keep = "corners"
""", lambda v: ([1.0], pm(pm([1, -v["p"]], [1, v["a"]]), [1, v["b"]])), 1, (0.0, math.inf), 40.0),
    # a press loop considered from gain 5 up to 400, no operating gain, a fixed parameter
    "press": ("""
title = "Press loop from gain 5"
[parameters]
a = { nominal = 1.0, tol = "10%", units = "1/s" }
b = { nominal = 2.0, tol = "10%", units = "1/s" }
c = { nominal = 10.0, dist = "fixed", units = "1/s" }
[plant]
transfer = "(s + 3) / (s*(s + a)*(s + b)*(s + c))"
[loop]
gain_range = [5, 400]
[sweep]
designs = ["nominal", "corners", "grid", "lhs"]
levels = 3
samples = 20
[locus]
points = 40
keep = "none"
""", lambda v: ([1.0, 3.0], pm(pm([1, 0], [1, v["a"]]), pm([1, v["b"]], [1, v["c"]]))), 1,
              (5.0, 400.0), None),
    # positive feedback through three lags, sobol only, one uncertain parameter
    "heater": ("""
title = "Regenerative heater, positive feedback"
[parameters]
a = { nominal = 1.0, tol = "20%", units = "1/s" }
[plant]
transfer = "1 / ((s + a)*(s + 2)*(s + 3))"
[loop]
feedback = "positive"
operating_gain = 2
[sweep]
designs = ["sobol"]
samples = 16
[locus]
points = 40
keep = "random:2"
""", lambda v: ([1.0], pm(pm([1, v["a"]], [1, 2]), [1, 3])), -1, (0.0, math.inf), 2.0),
}


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    out = {}
    for name, (text, *_rest) in CONFIGS.items():
        d = tmp_path_factory.mktemp(name)
        (d / f"{name}.toml").write_text(text)
        cfg = load_config(d / f"{name}.toml")
        out[name] = open_result(run(cfg, out=d / f"{name}.nc", jobs=1, quiet=True))
    return out


def _close(got, want, rtol=1e-6) -> bool:
    if got is None or (isinstance(got, float) and math.isnan(got)):
        return want is None or math.isnan(want)
    if want is None or math.isnan(want):
        return False
    if math.isinf(got) or math.isinf(want):
        return got == want
    return abs(got - want) <= rtol * max(1.0, abs(want))


def _reference(ds, name):
    """Per-variant answers from the parameter values alone (numpy, tests/datasets.py)."""
    _text, polys, sigma, grange, k0 = CONFIGS[name]
    names = [n for n in ("p", "a", "b", "c") if n in ds.coords]
    rows = []
    for i in range(ds.sizes["variant"]):
        v = {n: float(ds[n].values[i]) for n in names}
        N, D = (np.atleast_1d(np.asarray(x, float)) for x in polys(v))
        r = reference_analysis(N, D, sigma=sigma, gain_range=grange,
                               k_ref=grange[0] if k0 is None else k0)
        k = grange[0] if k0 is None else k0
        P = D.copy()
        P[-N.size:] += sigma * k * N
        roots = np.roots(P)
        r["reach"] = roots.real.max()
        r["zeta"] = (-roots.real / np.abs(roots)).min()
        rows.append(r)
    return rows, (grange[0] if k0 is None else k0), k0


@pytest.mark.parametrize("name", sorted(CONFIGS))
def test_query_of_real_runs_against_numpy(runs, name):
    ds = runs[name]
    rows, k_ref, k0 = _reference(ds, name)
    crit = np.array([r["critical_gain"] for r in rows], float)
    low = np.array([r["critical_gain_low"] for r in rows], float)
    freq = np.array([r["crossing_frequency"] for r in rows], float)
    stable = np.array([r["stable_at_reference"] for r in rows], bool)
    # the run itself against the reference (a new config, not one the analysis tests use)
    np.testing.assert_allclose(ds["critical_gain"].values, crit, rtol=1e-7)
    np.testing.assert_array_equal(ds["stable_at_reference"].values == 1, stable)

    js = json.loads(jsonutil.dumps(summarize(ds)))  # through JSON, as `query --json` prints it
    q = summarize(ds)
    V = crit.size
    assert js["n_variants"] == V and _close(q["reference_gain"], k_ref)
    assert q["unstable_at_reference"] == int((~stable).sum())
    design = ds["design"].values.astype(str)
    w = q["worst"]
    if stable.all():
        i = int(np.argmin(crit))
        assert _close(w["critical_gain"], crit[i]) and _close(w["crossing_frequency"], freq[i], 1e-6)
        assert crit[w["variant"]] == crit[i]
        assert q["robust_gain_interval"] == pytest.approx([low.max(), crit.min()], rel=1e-7)
    else:  # DESIGN section 6: the variant reaching furthest right, critical gain null
        reach = np.array([r["reach"] for r in rows])
        assert w["variant"] == int(np.flatnonzero(~stable)[np.argmax(reach[~stable])])
        assert js["worst"]["critical_gain"] is None and js["robust_gain_interval"] is None
    assert w["design"] == design[w["variant"]]
    for n, val in w["parameters"].items():
        assert val == float(ds[n].values[w["variant"]])
    nom = np.flatnonzero(design == "nominal")
    if nom.size:
        assert _close(q["nominal"]["critical_gain"], crit[nom[0]])
    else:
        assert js["nominal"] is None
    # quantiles over the sampled designs (>= 10 of them), unstable variants ranked lowest
    sampled = np.isin(design, ("random", "lhs", "sobol"))
    basis = sampled if sampled.sum() >= 10 else np.ones(V, bool)
    y = np.where(stable, crit, -1e300)[basis]
    for key, val in q["quantiles"].items():
        want = float(np.quantile(y, float(key)))
        assert _close(val, math.nan if want < -1e250 else want), (key, val, want)
    # Spearman over the sampled variants (scipy), most influential first
    unc = [n for n in w["parameters"] if np.ptp(ds[n].values) > 0]
    scores = {d["parameter"]: d["score"] for d in q["sensitivity"]}
    assert set(scores) == set(unc)
    for n in unc:
        rho = spearmanr(ds[n].values[sampled], np.where(stable, crit, -np.inf)[sampled]).statistic
        assert scores[n] == pytest.approx(rho, abs=1e-12)
    assert [d["measure"] for d in q["sensitivity"]] == ["spearman"] * len(unc)
    # margins at the operating gain
    if k0 is None:
        assert q["operating"] is None
    else:
        zeta = np.array([r["zeta"] for r in rows])
        op = q["operating"]
        assert op["min_damping"]["worst"]["value"] == pytest.approx(zeta.min(), rel=1e-7)
        for key, val in op["min_damping"]["quantiles"].items():
            assert val == pytest.approx(float(np.quantile(zeta[basis], float(key))), rel=1e-7)
        gm = crit[stable] / k0
        assert op["gain_margin"]["worst"]["value"] == pytest.approx(gm.min(), rel=1e-7)
    text = format_summary(q, ds)
    assert "Worst case: variant" in text and "nan" not in text.lower()


def _outside(fig) -> list[str]:
    """Figure-level texts and legends sticking out of the image; bottom legends covering an axes."""
    fig.savefig(io.BytesIO(), format="png", dpi=72)
    r = fig._get_renderer()
    W, H = fig.bbox.width, fig.bbox.height
    bad = []
    for a in list(fig.texts) + list(fig.legends) + [ax.get_legend() for ax in fig.axes if ax.get_legend()]:
        b = a.get_window_extent(r)
        if b.x0 < -1 or b.x1 > W + 1 or b.y0 < -1 or b.y1 > H + 1:
            bad.append(f"{type(a).__name__} {getattr(a, 'get_text', lambda: '')()[:40]!r} "
                       f"x {b.x0:.0f}..{b.x1:.0f} of {W:.0f}")
    for leg in fig.legends:
        lb = leg.get_window_extent(r)
        for ax in fig.axes:
            tb = ax.get_tightbbox(r) if ax.get_visible() else None
            if tb is not None and lb.overlaps(tb):
                bad.append("a legend covers an axes")
    return bad


EDGE_DATASETS = {
    # every critical gain infinite (a fast rate path), two panels of limits
    "all_inf": dict(designs=("nominal", "corners", "random"), samples=12,
                    rate_range=(3.5e-3, 3e-3, 4e-3),
                    ranges={"J": (4e-4, 3.4e-4, 4.6e-4, "kg m^2"), "L": (3e-3, 2.5e-3, 3.6e-3, "H"),
                            "Tr": (3.5e-3, 3e-3, 4e-3, "s"), "R": (1.2, 1.2, 1.2, "ohm"),
                            "B": (1e-3, 1e-3, 1e-3, "N m s"), "Kt": (0.05, 0.05, 0.05, "N m/A")}),
    # every variant unstable at the operating gain, two uncertain parameters
    "all_unstable": dict(family="kiln", designs=("nominal", "corners", "sobol"), samples=12,
                         operating_gain=50.0,
                         ranges={"a": (1.0, 0.8, 1.2, "1/s"), "b": (2.0, 1.6, 2.4, "1/s"),
                                 "c": (3.0, 3.0, 3.0, "1/s")}),
    # one uncertain parameter: one narrow panel
    "one_param": dict(family="lift", designs=("nominal", "corners", "grid", "random"), samples=10,
                      operating_gain=60.0,
                      ranges={"p": (1.0, 1.0, 1.0, "1/s"), "a": (4.0, 4.0, 4.0, "1/s"),
                              "b": (6.0, 5.0, 7.0, "1/s")}),
}


@pytest.fixture(scope="module")
def edge():
    return {k: make_dataset(points=25, **kw) for k, kw in EDGE_DATASETS.items()}


@pytest.mark.parametrize("case", sorted(EDGE_DATASETS))
def test_every_figure_fits_its_image(edge, case):
    ds = edge[case]
    for what in KINDS:
        with warnings.catch_warnings():
            warnings.simplefilter("error")  # no warning spam either
            try:
                fig = figure(ds, what)
            except InputError as exc:  # the plane needs a grid of two parameters
                assert what == "plane" and ("grid" in str(exc) or "vary" in str(exc)), str(exc)
                continue
            assert _outside(fig) == [], (case, what)


def test_limits_legend_names_an_infinite_worst_case_as_such(edge):
    # every critical gain is inf: the worst-case ring is not "unstable at the reference gain"
    fig = figure(edge["all_inf"], "limits")
    labels = [t.get_text() for leg in fig.legends for t in leg.get_texts()]
    worst = [lab for lab in labels if lab.startswith("worst case")]
    assert worst and "unstable" not in worst[0] and "inf" in worst[0], labels
    sub = " ".join(t.get_text() for t in fig.texts).replace("\n", " ")
    assert "no variant loses stability" in sub and "unstable at the reference" not in sub
    fig = figure(edge["all_unstable"], "limits")
    sub = " ".join(t.get_text() for t in fig.texts).replace("\n", " ")
    assert "every variant is unstable at the reference gain" in sub


def test_plane_takes_the_only_two_uncertain_parameters(runs):
    ds = runs["press"]  # a, b uncertain; c fixed; grid 3 x 3
    t = plane_table(ds, None)
    assert set(t.dims) == {"a", "b"} and t.shape == (3, 3)
    sub = " ".join(t.get_text() for t in figure(ds, "plane").texts).replace("\n", " ")
    assert "no other uncertain parameter" in sub, sub


def test_plane_refusals_say_what_the_result_lacks(runs, edge):
    # no grid design: said before asking for parameters
    with pytest.raises(InputError, match="grid design"):
        plane_table(runs["hoist"], None)
    # one uncertain parameter: said even with a grid design present
    with pytest.raises(InputError, match="has 1 .a."):
        plane_table(runs["heater"], None)
    with pytest.raises(InputError, match=r"has 1 \(b\)"):
        plane_table(edge["one_param"], ("a", "b"))


def test_query_text_without_parameters_and_with_one_variant():
    ds = make_dataset(designs=("nominal",), ranges={n: (v[0], v[0], v[0], v[3])
                                                   for n, v in FAMILIES["winch"]["parameters"].items()})
    ds = ds.drop_vars(list(FAMILIES["winch"]["parameters"]))  # a config without parameters
    text = format_summary(summarize(ds), ds)
    assert "over 1 variant (nominal)" in text
    assert "(none: the config has no parameters)" in text
    with pytest.raises(InputError, match="no parameters to plot"):
        figure(ds, "limits")
    with pytest.raises(InputError, match="envelope, crossings or locus"):
        figure(ds, "plane")


def test_query_text_shows_an_undefined_certificate_as_none(runs):
    ds = runs["hoist"]  # some variants unstable at the reference gain
    cert = {"lower": math.nan, "upper": math.nan, "method": "branch-and-bound", "exact": False,
            "status": "unstable_at_reference"}
    text = format_summary(summarize(ds, certificate=cert), ds)
    line = next(x for x in text.splitlines() if "certified worst case" in x)
    assert "none (branch-and-bound: some variant is unstable at the reference gain)" in line
    assert "[-" not in line


def test_crossings_count_axis_has_whole_variants():
    ds = make_dataset(designs=("nominal",), points=20)  # one variant: one bar of height 1
    fig = figure(ds, "crossings")
    fig.savefig(io.BytesIO(), format="png", dpi=50)
    for ax in fig.axes:
        ticks = [t for t in ax.get_yticks() if ax.get_ylim()[0] <= t <= ax.get_ylim()[1]]
        assert ticks and all(float(t).is_integer() for t in ticks), ticks


def test_envelope_symlog_ticks_share_one_minus_sign(edge):
    # spectral abscissas from -1 down to -20k (a first-order loop at high gain): the labels
    # -10 and -10k must carry the same minus sign
    ds = edge["all_inf"].copy()
    g = ds["gain"].values
    absc = -np.geomspace(1.0, 2e4, g.size)
    for name, f in (("abscissa_min", 1.2), ("abscissa_max", 0.8), ("abscissa_mean", 1.0)):
        ds[name] = ("gain", absc * f, ds[name].attrs)
    labels = [t.get_text() for t in figure(ds, "envelope").axes[0].get_yticklabels()]
    assert "-10k" in labels and "-10" in labels, labels
    assert not any("\u2212" in lab for lab in labels), labels


def test_worst_case_stable_from_the_range_start_says_so(runs):
    q = summarize(runs["press"])  # gain_range = [5, 400], no operating gain
    assert q["gain_range"] == [5.0, 400.0] and q["reference_gain"] == 5.0
    text = format_summary(q, runs["press"])
    assert any("stable from gain" in line and line.rstrip().endswith("5  (the start of the gain range)")
               for line in text.splitlines()), text
    q = summarize(runs["hoist"])  # conditionally stable: the interval starts above the range start
    assert q["gain_range"] == [0.0, math.inf]


def test_sensitivity_says_why_nothing_is_ranked(edge):
    inf = summarize(edge["all_inf"])["sensitivity_method"]["note"]
    assert "keeps stability over the whole gain range" in inf and "unstable" not in inf
    uns = summarize(edge["all_unstable"])["sensitivity_method"]["note"]
    assert "is unstable at the reference gain" in uns and "inf" not in uns


def test_long_title_and_long_parameter_names_do_not_collide():
    ds = make_dataset(designs=("nominal", "corners", "grid", "random"), samples=20, levels=3,
                      points=20, title="A winch drum position loop with a tacho path in the sensor "
                                       "and three uncertain parameters, named the long way round")
    ds = ds.rename({"J": "drum_rotor_inertia_total", "L": "armature_winding_inductance"})
    for n in ("drum_rotor_inertia_total", "armature_winding_inductance"):
        ds[n].attrs["units"] = "kg m^2 per unit"
    for what in KINDS:
        fig = figure(ds, what, params=("drum_rotor_inertia_total", "armature_winding_inductance"))
        assert _outside(fig) == [], what
        r = fig._get_renderer()
        texts = [t for t in fig.texts if t.get_text()]
        for i, a in enumerate(texts):  # title, subtitle and notes apart
            for b in texts[i + 1:]:
                assert not a.get_window_extent(r).overlaps(b.get_window_extent(r)), (what, a, b)
        labels = [ax.xaxis.label.get_window_extent(r) for ax in fig.axes
                  if ax.get_visible() and ax.get_xlabel()]
        for i, a in enumerate(labels):  # neighbouring panels' axis labels apart
            for b in labels[i + 1:]:
                assert not a.overlaps(b), what
