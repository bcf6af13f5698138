"""Whole-pipeline runs of configs at the edges of the config language."""
from __future__ import annotations

import json

import numpy as np
import xarray as xr

from sweep import query, runner
from sweep.config import parse_config

NO_PARAMETERS = """
title = "Loop without parameters"
[plant]
num = ["1"]
den = ["1", "3", "2", "0"]
[loop]
operating_gain = 2
[sweep]
designs = ["nominal", "corners", "random"]
samples = 10
[locus]
points = 40
keep = "all"
"""


def test_run_without_parameters(tmp_path):
    # DESIGN section 3: every design reduces to the nominal; 1/(s(s+1)(s+2)) has its
    # critical gain 6 at sqrt(2) rad/s (textbook example, from memory)
    path = tmp_path / "fixed.toml"
    path.write_text(NO_PARAMETERS)
    config = parse_config(NO_PARAMETERS, source=str(path))
    out = runner.run(config, out=tmp_path / "fixed.nc", jobs=1, quiet=True)
    with xr.open_dataset(out) as ds:
        assert ds.sizes["variant"] == 3
        assert list(ds["design"].values) == ["nominal", "corners", "random"]
        np.testing.assert_allclose(ds["critical_gain"].values, 6.0, rtol=1e-12)
        np.testing.assert_allclose(ds["crossing_frequency"].values, np.sqrt(2.0), rtol=1e-12)
        assert ds.sizes["locus_variant"] == 3
        summary = query.summarize(ds)
    assert json.loads(json.dumps(summary, default=str))["n_variants"] == 3
