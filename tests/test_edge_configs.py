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


KEEP_CORNERS_WITHOUT_CORNERS = """
title = "Kiln loop sampled only"
[parameters]
a = { nominal = 1.0, tol = "10%" }
b = { nominal = 2.0, tol = "10%" }
[plant]
transfer = "1 / (s*(s + a)*(s + b))"
[sweep]
designs = ["lhs"]
samples = 20
[locus]
points = 30
keep = "corners"
"""


def test_keep_corners_without_corners_warns_once_and_reading_is_quiet(tmp_path):
    import pytest

    from sweep import plots
    from sweep.errors import InputError
    from sweep.warnings import NothingKeptWarning

    path = tmp_path / "kiln.toml"
    path.write_text(KEEP_CORNERS_WITHOUT_CORNERS)
    with pytest.warns(NothingKeptWarning, match="no locus will be stored"):
        config = parse_config(KEEP_CORNERS_WITHOUT_CORNERS, source=str(path))
    out = runner.run(config, out=tmp_path / "kiln.nc", jobs=1, quiet=True)
    # reading the result parses the stored config again: its warnings are not repeated
    # (pytest's filterwarnings turns any SweepWarning into an error here)
    with xr.open_dataset(out) as ds:
        assert ds.sizes["locus_variant"] == 0
        query.summarize(ds)
        with pytest.raises(InputError, match='keep = "corners" selects none'):
            plots.plot(ds, "locus", tmp_path / "locus.png")
