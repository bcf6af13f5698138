"""The whole job through the command line, as a user runs it: check, run, query, plot, certify."""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import matplotlib.image as mpimg
import numpy as np
import pytest

from sweep import store

CONFIG = """
title = "Small pump loop"
[parameters]
a2 = { nominal = 6.0, tol = "10%" }
a1 = { nominal = 11.0, tol = "10%" }
a0 = { nominal = 6.0, tol = "15%" }
[plant]
num = ["1"]
den = ["1", "a2", "a1", "a0"]
[loop]
operating_gain = 20
[sweep]
designs = ["nominal", "corners", "grid", "random"]
levels = 3
samples = 200
chunk_size = 64
[locus]
points = 60
keep = "corners"
"""


def sweep(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "sweep", *args], capture_output=True, text=True, cwd=cwd)


@pytest.mark.slow
def test_run_query_plot_certify(tmp_path: Path):
    cfg = tmp_path / "pump.toml"
    cfg.write_text(CONFIG)
    out = tmp_path / "pump.nc"
    proc = sweep("run", str(cfg), "-o", str(out), "-j", "1", "--quiet", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    assert out.exists() and (tmp_path / "pump.nc.log").exists()

    proc = sweep("query", str(out), "--json", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    q = json.loads(proc.stdout)
    assert q["n_variants"] == 1 + 8 + 27 + 200
    assert q["certified"] is None

    # Kharitonov's theorem (1978): for this interval family the worst case is exact,
    # and a corner sweep attains it (the Kharitonov polynomials are corners of the box).
    proc = sweep("certify", str(cfg), "-o", str(out), "--json", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    c = json.loads(proc.stdout)
    assert c["method"] == "kharitonov" and c["exact"] is True
    assert c["lower"] == pytest.approx(q["worst"]["critical_gain"], rel=1e-9)
    assert store.certificate_path(out).exists()

    proc = sweep("query", str(out), "--json", cwd=tmp_path)
    q2 = json.loads(proc.stdout)
    assert q2["certified"]["lower"] == pytest.approx(c["lower"])
    proc = sweep("query", str(out), cwd=tmp_path)
    assert "certified" in proc.stdout

    for what in ("locus", "limits", "envelope", "crossings"):
        png = tmp_path / f"{what}.png"
        proc = sweep("plot", str(out), "--what", what, "-o", str(png), cwd=tmp_path)
        assert proc.returncode == 0, proc.stderr
        img = mpimg.imread(png)
        assert np.std(img[..., :3]) > 0.05
    proc = sweep("plot", str(out), "--what", "plane", "--params", "a2", "a0", "-o", str(tmp_path / "p.png"), cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr


def test_certificate_of_another_config_is_ignored(tmp_path: Path):
    result = tmp_path / "r.nc"
    store.write_certificate({"lower": 1.0, "upper": float("inf"), "method": "x"}, result, config_sha256="abc")
    assert store.read_certificate(result, config_sha256="def") is None
    cert = store.read_certificate(result, config_sha256="abc")
    assert cert["lower"] == 1.0 and cert["upper"] == float("inf")
    # nothing left behind but the certificate itself
    assert sorted(p.name for p in tmp_path.iterdir()) == ["r.certificate.json"]
