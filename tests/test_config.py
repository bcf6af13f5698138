"""Config loading and validation: the shipped examples load; bad configs fail cleanly.

Every bad config must give exit status 2 from `sweep check`, one line on
stderr naming the file and the field, no traceback, and nothing written.
"""
from __future__ import annotations

import math
import os
import subprocess
import sys
from pathlib import Path

import pytest

from sweep.config import load_config, parse_config
from sweep.errors import InputError

ROOT = Path(__file__).resolve().parents[1]
CONFIGS = sorted((ROOT / "configs").glob("*.toml"))

GOOD = """
title = "test loop"
[parameters]
a = { nominal = 2.0, tol = "10%" }
b = { nominal = 3.0, low = 2.5, high = 3.5, units = "s" }
[plant]
transfer = "1/(s*(s + a)*(b*s + 1))"
"""


def write(tmp_path: Path, text: str, name: str = "bad.toml") -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


def test_shipped_configs_exist():
    assert len(CONFIGS) >= 3


@pytest.mark.parametrize("path", CONFIGS, ids=[p.stem for p in CONFIGS])
def test_shipped_configs_load(path: Path):
    config = load_config(path)
    assert config.title
    assert config.parameters
    assert len(config.sha256) == 64


def test_good_config_fields(tmp_path: Path):
    config = load_config(write(tmp_path, GOOD, "good.toml"))
    a, b = config.parameters
    assert (a.low, a.nominal, a.high) == pytest.approx((1.8, 2.0, 2.2))
    assert (b.low, b.high, b.units) == (2.5, 3.5, "s")
    assert config.gain_range == (0.0, math.inf)
    assert config.sigma == 1
    assert config.stem == "good"


def test_asymmetric_tolerance_and_fixed(tmp_path: Path):
    text = GOOD.replace('a = { nominal = 2.0, tol = "10%" }', 'a = { nominal = 2.0, tol = ["20%", "80%"] }\nc = 4')
    config = load_config(write(tmp_path, text, "ok.toml"))
    a = config.parameters[0]
    assert (a.low, a.high) == pytest.approx((1.6, 3.6))
    c = config.parameters[1]
    assert not c.uncertain and c.nominal == 4


def test_config_is_frozen(tmp_path: Path):
    config = load_config(write(tmp_path, GOOD, "good.toml"))
    with pytest.raises(Exception):
        config.title = "x"  # type: ignore[misc]


# (label, text transformation or full text, substring the message must contain)
BAD = [
    ("unknown_name", GOOD.replace("(s + a)", "(s + aa)"), "plant.transfer"),
    ("low_gt_high", GOOD.replace("low = 2.5, high = 3.5", "low = 3.5, high = 2.5"), "parameters.b.low"),
    ("nominal_outside", GOOD.replace("nominal = 3.0, low = 2.5", "nominal = 4.0, low = 2.5"), "parameters.b.nominal"),
    ("tol_crosses_zero", GOOD.replace('tol = "10%"', 'tol = "150%"'), "parameters.a.tol"),
    ("tol_negative", GOOD.replace('tol = "10%"', "tol = -0.1"), "parameters.a.tol"),
    ("tol_bad_string", GOOD.replace('tol = "10%"', 'tol = "ten"'), "parameters.a.tol"),
    ("tol_and_bounds", GOOD.replace('tol = "10%"', 'tol = "10%", low = 1, high = 3'), "parameters.a"),
    ("missing_high", GOOD.replace("low = 2.5, high = 3.5", "low = 2.5"), "parameters.b"),
    ("missing_nominal", GOOD.replace("nominal = 2.0, ", ""), "parameters.a"),
    ("nan_literal", GOOD.replace("nominal = 2.0", "nominal = nan"), "parameters.a.nominal"),
    ("inf_nominal", GOOD.replace("nominal = 2.0", "nominal = inf"), "parameters.a.nominal"),
    ("string_nominal", GOOD.replace("nominal = 2.0", 'nominal = "2.0"'), "parameters.a.nominal"),
    ("bool_nominal", GOOD.replace("nominal = 2.0", "nominal = true"), "parameters.a.nominal"),
    ("unknown_param_key", GOOD.replace('tol = "10%"', 'tol = "10%", tolerance = 1'), "parameters.a.tolerance"),
    ("unknown_dist", GOOD.replace('tol = "10%"', 'tol = "10%", dist = "gauss"'), "parameters.a.dist"),
    ("fixed_with_tol", GOOD.replace('tol = "10%"', 'tol = "10%", dist = "fixed"'), "parameters.a.dist"),
    ("reserved_name", GOOD.replace("a = {", "s = {").replace("(s + a)", "(s + 1)"), "parameters.s"),
    ("bad_name", GOOD.replace("a = {", '"2a" = {').replace("(s + a)", "(s + 1)"), "parameters.2a"),
    ("unknown_top_key", GOOD + "\n[sweeep]\nseed = 1\n", "sweeep"),
    ("no_plant", GOOD.split("[plant]")[0], "plant"),
    ("plant_both", GOOD + 'num = ["1"]\nden = ["1", "1"]\n', "plant"),
    ("num_without_den", GOOD.replace('transfer = "1/(s*(s + a)*(b*s + 1))"', 'num = ["1"]'), "plant.den"),
    ("s_in_coefficient", GOOD.replace('transfer = "1/(s*(s + a)*(b*s + 1))"', 'num = ["s"]\nden = ["1", "a"]'), "plant.num[0]"),
    ("s_in_function", GOOD.replace("(s + a)", "(exp(s) + a)"), "plant.transfer"),
    ("syntax_error", GOOD.replace("(s + a)", "(s + a"), "plant.transfer"),
    ("improper", GOOD.replace('transfer = "1/(s*(s + a)*(b*s + 1))"', 'transfer = "(s + a)^2 / (b*s + 1)"'), "improper"),
    ("leading_coef_crosses_zero", GOOD.replace("low = 2.5, high = 3.5", "nominal = 0.5, low = -0.5, high = 1.5").replace("nominal = 3.0, ", ""), "plant.transfer"),
    ("denominator_zero_in_box", GOOD.replace("(b*s + 1)", "((b - 3)*s + 1)"), "plant.transfer"),
    ("sqrt_negative", GOOD.replace("(b*s + 1)", "(sqrt(b - 3)*s + 1)"), "undefined"),
    ("feedback_word", GOOD + '[loop]\nfeedback = "negativ"\n', "loop.feedback"),
    ("gain_range_shape", GOOD + "[loop]\ngain_range = [0]\n", "loop.gain_range"),
    ("gain_range_order", GOOD + "[loop]\ngain_range = [5, 1]\n", "loop.gain_range"),
    ("gain_range_negative", GOOD + "[loop]\ngain_range = [-1, 10]\n", "loop.gain_range[0]"),
    ("operating_outside", GOOD + "[loop]\ngain_range = [0, 10]\noperating_gain = 20\n", "loop.operating_gain"),
    ("controller_unknown", GOOD + '[loop]\ncontroller = "(s + z)/(s + 10)"\n', "loop.controller"),
    ("sensor_type", GOOD + "[loop]\nsensor = [1, 2]\n", "loop.sensor"),
    ("unknown_loop_key", GOOD + "[loop]\ngain = 3\n", "loop.gain"),
    ("unknown_design", GOOD + '[sweep]\ndesigns = ["nominal", "corner"]\n', "sweep.designs[1]"),
    ("duplicate_design", GOOD + '[sweep]\ndesigns = ["nominal", "nominal"]\n', "sweep.designs"),
    ("samples_zero", GOOD + "[sweep]\nsamples = 0\n", "sweep.samples"),
    ("samples_float", GOOD + "[sweep]\nsamples = 10.5\n", "sweep.samples"),
    ("seed_negative", GOOD + "[sweep]\nseed = -1\n", "sweep.seed"),
    ("levels_one", GOOD + "[sweep]\nlevels = 1\n", "sweep.levels"),
    ("chunk_string", GOOD + '[sweep]\nchunk_size = "big"\n', "sweep.chunk_size"),
    ("keep_word", GOOD + '[locus]\nkeep = "some"\n', "locus.keep"),
    ("keep_random_zero", GOOD + '[locus]\nkeep = "random:0"\n', "locus.keep"),
    ("points_small", GOOD + "[locus]\npoints = 1\n", "locus.points"),
    ("not_toml", "title = \n[[[", "not valid TOML"),
    ("title_number", GOOD.replace('title = "test loop"', "title = 3"), "title"),
    ("parameters_not_table", 'parameters = 3\n[plant]\ntransfer = "1/(s+1)"\n', "parameters"),
    ("injection_import", GOOD.replace("(s + a)", "(s + __import__('os').getpid())"), "plant.transfer"),
    ("injection_attribute", GOOD.replace("(s + a)", "(s + a.real)"), "plant.transfer"),
    ("injection_lambda", GOOD.replace("(s + a)", "(s + (lambda: 1)())"), "plant.transfer"),
    ("zero_plant", GOOD.replace('transfer = "1/(s*(s + a)*(b*s + 1))"', 'transfer = "0/(s + a)"'), "plant.transfer"),
    ("pure_gain", GOOD.replace('transfer = "1/(s*(s + a)*(b*s + 1))"', 'transfer = "a*b"'), "plant"),
]


@pytest.mark.parametrize("label,text,needle", BAD, ids=[b[0] for b in BAD])
def test_bad_config_raises_input_error(tmp_path: Path, label: str, text: str, needle: str):
    path = write(tmp_path, text)
    with pytest.raises(InputError) as info:
        load_config(path)
    line = info.value.line()
    assert "\n" not in line
    assert line.startswith(str(path))
    assert needle in line, line


def test_catalogue_is_large_enough():
    assert len(BAD) >= 25


def run_cli(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    env = dict(os.environ)
    env.pop("PYTHONWARNINGS", None)
    return subprocess.run([sys.executable, "-m", "sweep", *args], capture_output=True, text=True, cwd=cwd, env=env)


# A subset through the real command line: exit 2, one line, no traceback, nothing written.
@pytest.mark.parametrize("label,text,needle", BAD[::6], ids=[b[0] for b in BAD[::6]])
def test_bad_config_cli_exit_2(tmp_path: Path, label: str, text: str, needle: str):
    path = write(tmp_path, text)
    before = sorted(os.listdir(tmp_path))
    proc = run_cli("check", str(path), cwd=tmp_path)
    assert proc.returncode == 2, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1, proc.stderr
    assert "Traceback" not in proc.stderr
    assert needle in lines[0]
    assert proc.stdout == ""
    assert sorted(os.listdir(tmp_path)) == before


def test_missing_file_and_folder(tmp_path: Path):
    proc = run_cli("check", str(tmp_path / "nope.toml"), cwd=tmp_path)
    assert proc.returncode == 2 and "nope.toml" in proc.stderr and len(proc.stderr.strip().splitlines()) == 1
    proc = run_cli("check", str(tmp_path), cwd=tmp_path)
    assert proc.returncode == 2 and "folder" in proc.stderr


def test_binary_file(tmp_path: Path):
    path = tmp_path / "bin.toml"
    path.write_bytes(b"\xff\xfe\x00\x01")
    with pytest.raises(InputError, match="UTF-8"):
        load_config(path)


def test_run_with_bad_config_writes_nothing(tmp_path: Path):
    path = write(tmp_path, BAD[0][1])
    proc = run_cli("run", str(path), "-o", str(tmp_path / "out.nc"), cwd=tmp_path)
    assert proc.returncode == 2
    assert sorted(os.listdir(tmp_path)) == ["bad.toml"]


def test_usage_error_exit_2(tmp_path: Path):
    proc = run_cli("plot", "x.nc", "--what", "nonsense", cwd=tmp_path)
    assert proc.returncode == 2
    assert len(proc.stderr.strip().splitlines()) == 1


def test_messages_pin_wording(tmp_path: Path):
    # The wording of the most common errors is part of the interface.
    with pytest.raises(InputError, match=r"unknown name 'aa'.*did you mean 'a'"):
        parse_config(GOOD.replace("(s + a)", "(s + aa)"), source="x.toml")
    with pytest.raises(InputError, match=r"unknown design 'corner'; did you mean 'corners'\?"):
        parse_config(GOOD + '[sweep]\ndesigns = ["corner"]\n', source="x.toml")


def test_cancellation_warns(tmp_path: Path):
    from sweep.warnings import CancellationWarning

    text = GOOD.replace('transfer = "1/(s*(s + a)*(b*s + 1))"', 'transfer = "(s + 2)/(s*(s + 2)*(b*s + 1))"')
    with pytest.warns(CancellationWarning, match="common"):
        parse_config(text, source="x.toml")


def test_inner_coefficient_undefined_in_box(tmp_path: Path):
    text = GOOD.replace("(s + a)", "(s + 1/(a - 2.1))")
    with pytest.raises(InputError, match="undefined or infinite"):
        parse_config(text, source="x.toml")
