"""Tests of sweep.bench (the figures themselves are machine-dependent: only their shape is tested)."""
from __future__ import annotations

import json

import numpy as np

from sweep import bench, loop
from sweep.config import parse_config
from sweep.jsonutil import dumps


def test_measure_reports_every_stage_side_by_side():
    result = bench.measure(variants=300)
    assert result["variants_timed"] == 300 and result["degree"] == 6
    for key in bench.STAGES:
        assert result["seconds"][key] > 0
        assert np.isclose(result["variants_per_second"][key], 300 / result["seconds"][key])
    assert result["ratio_to_eigvals_pass"]["eigvals"] == 1.0
    assert abs(result["variants_in_8h"] - 8 * result["variants_in_1h"]) <= 8 and result["variants_in_1h"] > 0
    text = bench.format_result(result)
    for label in bench.STAGES.values():
        assert label in text
    assert json.loads(dumps(result))["gains"] == result["gains"]


def test_baselines_compute_the_same_abscissa():
    # the two baselines solve the same polynomials: same spectral abscissa
    config = bench.default_config()
    vs = bench._random_variants(config, 5)
    N, D = loop.assemble(config, vs.values)
    g = np.geomspace(1.0, 1e3, 7)
    a = bench.companion_eigvals_pass(N, D, config.sigma, g)
    b = bench.roots_loop(N, D, config.sigma, g)
    np.testing.assert_allclose(a, b, rtol=1e-8, atol=1e-8 * np.abs(b).max())


def test_estimate_without_uncertain_parameters():
    config = parse_config('title = "fixed"\n[plant]\nnum = ["1"]\nden = ["1", "2", "3", "1"]\n', source="x.toml")
    seconds = bench.estimate_seconds(config, 1)
    assert np.isfinite(seconds) and seconds > 0
