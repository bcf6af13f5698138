"""Tests of sweep.designs: counts, bounds, order, determinism, independence of streams."""
from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from scipy import stats

from sweep.config import Config, Parameter, SweepSettings
from sweep.designs import Variants, generate
from sweep.errors import InputError

PARAMS = (
    Parameter("R", 1.2, 1.08, 1.32, "uniform", "ohm"),
    Parameter("J", 4.0e-4, 3.4e-4, 4.6e-4, "normal", "kg m^2"),
    Parameter("C", 1.0e-6, 0.8e-6, 1.8e-6, "normal", "F"),  # asymmetric -20/+80 %
    Parameter("N", 20.0, 20.0, 20.0, "fixed", ""),
)


def make(designs=("nominal", "corners", "random"), *, params=PARAMS, **sweep) -> Config:
    s = SweepSettings(designs=tuple(designs), **{"samples": 50, "levels": 3, "seed": 1, **sweep})
    return Config(
        title="kiln heater", parameters=params, transfer=None, num=None, den=None,
        controller=None, sensor=None, sweep=s, source="kiln.toml",
    )


def test_order_counts_and_labels():
    v = generate(make(("nominal", "corners", "grid", "random", "lhs", "sobol")))
    counts = [1, 8, 27, 50, 50, 50]
    assert v.count == sum(counts)
    names = ["nominal", "corners", "grid", "random", "lhs", "sobol"]
    assert list(v.design) == [n for n, c in zip(names, counts) for _ in range(c)]
    assert set(v.values) == {"R", "J", "C", "N"}
    for k, arr in v.values.items():
        assert arr.shape == (v.count,) and arr.dtype == np.float64
    # variant 0 is the nominal; the fixed parameter is nominal everywhere
    assert [v.values[p.name][0] for p in PARAMS] == [p.nominal for p in PARAMS]
    assert np.all(v.values["N"] == 20.0)
    for p in PARAMS:
        assert np.all((v.values[p.name] >= p.low) & (v.values[p.name] <= p.high))


def test_nominal_is_variant_zero_wherever_listed():
    v = generate(make(("corners", "random", "nominal")))
    assert list(v.design[:2]) == ["nominal", "corners"] and v.design[-1] == "random"
    assert v.values["R"][0] == 1.2


def test_corners_are_vertices_in_binary_order():
    v = generate(make(("corners",)))
    pts = np.stack([v.values[n] for n in ("R", "J", "C")], axis=1)
    lows = np.array([1.08, 3.4e-4, 0.8e-6])
    highs = np.array([1.32, 4.6e-4, 1.8e-6])
    assert np.array_equal(pts[0], lows) and np.array_equal(pts[-1], highs)
    assert len({tuple(r) for r in pts}) == 8
    assert np.array_equal(pts[1], [lows[0], lows[1], highs[2]])  # last parameter is the lowest digit


def test_grid_levels_include_ends():
    v = generate(make(("grid",), levels=4))
    assert v.count == 64
    assert np.allclose(np.unique(v.values["R"]), np.linspace(1.08, 1.32, 4))
    assert np.allclose(np.unique(v.values["C"]), np.linspace(0.8e-6, 1.8e-6, 4))


@pytest.mark.parametrize("design", ["random", "lhs", "sobol"])
def test_reproducible_and_seed_dependent(design):
    a = generate(make((design,), seed=0))
    b = generate(make((design,), seed=0))
    c = generate(make((design,), seed=1))
    for k in a.values:
        np.testing.assert_array_equal(a.values[k], b.values[k])
    assert not np.array_equal(a.values["R"], c.values["R"])


def test_adding_a_design_does_not_change_another():
    a = generate(make(("random",)))
    b = generate(make(("nominal", "lhs", "random")))
    np.testing.assert_array_equal(a.values["J"], b.values["J"][b.design == "random"])


def test_lhs_is_stratified():
    v = generate(make(("lhs",), samples=40))
    u = (v.values["R"] - 1.08) / (1.32 - 1.08)
    # one point in each of the 40 strata (McKay, Beckman and Conover 1979: the LHS property)
    assert sorted(np.floor(u * 40).astype(int)) == list(range(40))
    from sweep.designs import _latin_hypercube

    pts = _latin_hypercube(4, 257, np.random.default_rng(0))
    for j in range(4):
        assert sorted(np.floor(pts[:, j] * 257).astype(int)) == list(range(257))
    # the pairing of strata is random: coordinates are not ordered alike
    assert abs(stats.spearmanr(pts[:, 0], pts[:, 1])[0]) < 0.2


def test_truncated_normal_inverse_matches_scipy():
    # reference: scipy.stats.truncnorm.ppf on the same draws, bounds within 6 sigma
    from sweep.config import Parameter
    from sweep.designs import _from_unit

    u = np.linspace(0.0, 1.0, 2001)
    for low, nominal, high in [(0.85, 1.0, 1.15), (0.8, 1.0, 1.8), (1.0, 1.0, 1.3), (-2.0, 0.5, 1.0)]:
        p = Parameter("X", nominal, low, high, dist="normal")
        sd = (high - low) / 6
        ref = stats.truncnorm.ppf(u, (low - nominal) / sd, (high - nominal) / sd, loc=nominal, scale=sd)
        np.testing.assert_allclose(_from_unit(p, u), ref, rtol=0, atol=1e-12 * (high - low))


def test_sobol_any_count_without_warning():
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("error")
        v = generate(make(("sobol",), samples=37))
    assert v.count == 37


def test_truncated_normal_distribution():
    # mean at the nominal, sigma = (high - low)/6, truncated at the bounds: compare with
    # scipy.stats.truncnorm by a Kolmogorov-Smirnov test (common practice)
    v = generate(make(("random",), samples=4000))
    a, b = (3.4e-4 - 4.0e-4) / 2.0e-5, (4.6e-4 - 4.0e-4) / 2.0e-5
    res = stats.kstest(v.values["J"], stats.truncnorm(a, b, loc=4.0e-4, scale=2.0e-5).cdf)
    assert res.pvalue > 1e-3
    sd = (1.8e-6 - 0.8e-6) / 6
    res = stats.kstest(v.values["C"], stats.truncnorm((0.8e-6 - 1e-6) / sd, (1.8e-6 - 1e-6) / sd, loc=1e-6, scale=sd).cdf)
    assert res.pvalue > 1e-3


def test_corners_refused_above_limit():
    many = tuple(Parameter(f"P{i}", 1.0, 0.9, 1.1) for i in range(21))
    with pytest.raises(InputError, match="lhs.*sobol"):
        generate(make(("corners",), params=many, max_variants=1_000_000))
    # raising the limit allows it (counted, not generated, here)
    cfg = make(("corners",), params=many[:12], max_variants=4096)
    assert generate(cfg).count == 4096


def test_total_above_limit_refused():
    with pytest.raises(InputError, match="max_variants"):
        generate(make(("random", "lhs"), samples=600, max_variants=1000))


def test_no_uncertain_parameters():
    fixed = (Parameter("N", 20.0, 20.0, 20.0, "fixed"),)
    v = generate(make(("nominal", "corners", "grid", "random", "sobol"), params=fixed))
    assert v.count == 5
    assert np.all(v.values["N"] == 20.0)
    v = generate(make(("corners",), params=()))
    assert v.count == 1 and v.values == {}


def test_slice_keeps_global_index():
    v = generate(make())
    s = v.slice(3, 7)
    assert isinstance(s, Variants) and s.count == 4 and s.start == 3
    np.testing.assert_array_equal(s.index, [3, 4, 5, 6])
    np.testing.assert_array_equal(s.values["R"], v.values["R"][3:7])
    assert v.slice(100, 200).count == 0  # past the end: empty
