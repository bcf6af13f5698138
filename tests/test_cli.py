"""The command line as a user meets it: help texts, `check` on every shipped config, JSON."""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
CONFIGS = sorted((ROOT / "configs").glob("*.toml"))

CHECK_FIELDS = [
    "valid", "numerator", "denominator", "open_loop_poles", "open_loop_zeros", "boundary_gains",
    "boundary_frequencies", "stable_intervals", "reference_gain", "critical_gain", "critical_gain_low",
    "crossing_frequency", "asymptotes", "breakaway_points", "departure_angles_deg", "arrival_angles_deg",
    "estimated_run_seconds",
]


def sweep(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "sweep", *args], capture_output=True, text=True, cwd=ROOT)


@pytest.mark.parametrize("command", ["check", "run", "query", "plot", "certify", "bench"])
def test_help(command: str):
    proc = sweep(command, "--help")
    assert proc.returncode == 0
    assert "usage: sweep" in proc.stdout


def test_top_help_and_version():
    proc = sweep("--help")
    assert proc.returncode == 0 and "check" in proc.stdout and "certify" in proc.stdout
    proc = sweep("--version")
    assert proc.returncode == 0 and proc.stdout.startswith("sweep ")
    proc = sweep()
    assert proc.returncode == 2


@pytest.mark.parametrize("path", CONFIGS, ids=[p.stem for p in CONFIGS])
def test_check_every_shipped_config(path: Path):
    proc = sweep("check", str(path))
    assert proc.returncode == 0, proc.stderr
    assert "critical gain" in proc.stdout
    proc = sweep("check", str(path), "--json")
    assert proc.returncode == 0, proc.stderr
    data = json.loads(proc.stdout)
    for field in CHECK_FIELDS:
        assert field in data, field
    assert data["valid"] is True


def test_check_json_classic_cubic(tmp_path: Path):
    # 1/(s(s+1)(s+2)): critical gain 6 at sqrt(2) rad/s (textbook example, from memory).
    cfg = tmp_path / "cubic.toml"
    cfg.write_text('title = "cubic"\n[plant]\ntransfer = "1/(s*(s+1)*(s+2))"\n')
    proc = sweep("check", str(cfg), "--json")
    assert proc.returncode == 0, proc.stderr
    data = json.loads(proc.stdout)
    assert data["critical_gain"] == pytest.approx(6.0, rel=1e-12)
    assert data["crossing_frequency"] == pytest.approx(2 ** 0.5, rel=1e-12)
    assert data["stable_intervals"] == [[0.0, pytest.approx(6.0, rel=1e-12)]]
    assert data["asymptotes"]["centroid"] == pytest.approx(-1.0)
