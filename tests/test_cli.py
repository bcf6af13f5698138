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


TANK = """title = "Mixing tank level"
[parameters]
A = { nominal = 2.0, tol = "10%", units = "m^2" }
q = { nominal = 0.3, low = 0.25, high = 0.4, units = "m^3/s" }
[plant]
num = ["q", "1"]
den = ["A", "A*q + 1", "q"]
[loop]
controller = "(s + 2)/(s + 5)"
feedback = "positive"
gain_range = [0, 10]
"""


def test_check_positive_feedback_coefficient_lists(tmp_path: Path):
    # P(s, k) = D - k N = 2 s^3 + (11.6 - 0.3 k) s^2 + (8.3 - 1.6 k) s + (1.5 - 2 k) at the nominal.
    # Hurwitz for a cubic (textbook, from memory): all coefficients > 0 and a2 a1 > a3 a0. The constant
    # term vanishes first, at k = 0.75 (a real root through the origin, crossing frequency 0).
    cfg = tmp_path / "tank.toml"
    cfg.write_text(TANK)
    proc = sweep("check", str(cfg), "--json")
    assert proc.returncode == 0, proc.stderr
    data = json.loads(proc.stdout)
    for field in CHECK_FIELDS:
        assert field in data, field
    assert data["numerator"] == pytest.approx([0.3, 1.6, 2.0])
    assert data["denominator"] == pytest.approx([2.0, 11.6, 8.3, 1.5])
    assert data["critical_gain"] == pytest.approx(0.75, rel=1e-12)
    assert data["crossing_frequency"] == 0
    assert data["stable_intervals"] == [[0.0, pytest.approx(0.75, rel=1e-12)]]
    assert data["asymptotes"]["angles_deg"] == [0.0]  # positive feedback: the 0-degree locus
    proc = sweep("check", str(cfg))
    assert proc.returncode == 0, proc.stderr
    text = proc.stdout
    for needle in ("m^3/s", "0.25", "0.4", "-16.7/+33.3 %", "feedback positive", "N(s) = 0.3*s^2 + 1.6*s + 2",
                   "D(s) = 2*s^3 + 11.6*s^2 + 8.3*s + 1.5", "critical gain       0.75"):
        assert needle in text, needle


def test_check_without_parameters_and_debug_after_the_command(tmp_path: Path):
    cfg = tmp_path / "bare.toml"
    cfg.write_text('[plant]\ntransfer = "(s + 1)/(s^2 + 0.4*s + 4)"\n')
    proc = sweep("check", str(cfg))
    assert proc.returncode == 0, proc.stderr
    assert "Parameters: none" in proc.stdout
    bad = tmp_path / "bad.toml"
    bad.write_text('[plant]\ntransfer = "1/(s + q)"\n')
    proc = sweep("check", str(bad), "--debug")
    assert proc.returncode != 0 and "Traceback" in proc.stderr  # --debug is honoured after the command
    proc = sweep("check", str(bad))
    assert proc.returncode == 2 and "Traceback" not in proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1 and "plant.transfer" in proc.stderr


def test_first_use_notice_follows_numba_cache(tmp_path):
    from sweep.cli import _kernel_cache_is_cold

    assert _kernel_cache_is_cold(str(tmp_path))  # nothing compiled yet
    for m in ("_analysis_kernel", "rootfind", "_locus_kernel"):
        (tmp_path / f"{m}.kernel-10.py311.nbi").write_text("")
    assert not _kernel_cache_is_cold(str(tmp_path))
    assert not _kernel_cache_is_cold(str(tmp_path / "missing"))  # cannot tell: say nothing
