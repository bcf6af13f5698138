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

import numpy as np
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
    ("sqrt_negative", GOOD.replace("(b*s + 1)", "(sqrt(b - 3)*s + 1)"), "'b - 3' (sqrt argument) must stay at or above 0"),
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
    # found in a review as a new user would write them (a = 2 +-10 %, b in [2.5, 3.5])
    ("duplicate_key", GOOD.replace("[plant]", "a = 3\n[plant]"), "line 6 (parameters.a): not valid TOML (Cannot overwrite a value"),
    ("duplicate_table", GOOD + '[plant]\ntransfer = "1/s"\n', "a table is declared twice"),
    ("divisor_zero_in_box", GOOD.replace("(s + a)", "(s + 1/(b - 2.8))"), "'b - 2.8' (divisor) must stay away from 0"),
    ("divisor_zero_at_box_edge", GOOD.replace("(s + a)", "(s + 1/(b - 2.5))"), "it is 0 at b=2.5"),
    ("log_argument_in_box", GOOD.replace("1/(s*", "log(b - 2.6)/(s*"), "(log argument) must stay above 0"),
    ("tan_pole_in_box", GOOD.replace("1/(s*", "tan(b/2)/(s*"), "'b/2' (tan argument)"),
    ("real_power_negative_base", GOOD.replace("1/(s*", "(b - 2.8)^1.5/(s*"), "(base of a real power) must stay at or above 0"),
    ("leading_zero_at_box_edge", GOOD.replace("low = 2.5", "low = 0.0"), "(of s^3) is 3 at the nominal but 0 at a=1.8, b=0"),
    ("num_den_leading_vanishes", GOOD.replace('transfer = "1/(s*(s + a)*(b*s + 1))"', 'num = ["1"]\nden = ["b - 3.2", "a", "1"]'), "plant.den[0]: the plant's denominator leading coefficient"),
    ("num_leading_changes_sign", GOOD.replace('transfer = "1/(s*(s + a)*(b*s + 1))"', 'num = ["b - 2.8", "1"]\nden = ["1", "a", "1"]'), "plant.num[0]: the plant's numerator leading coefficient"),
    ("tol_overflow", GOOD.replace("nominal = 2.0", "nominal = 1.7e308"), "parameters.a.tol"),
    ("points_huge", GOOD + "[locus]\npoints = 10000000000\n", "locus.points"),
    ("keyword_name", GOOD.replace("a = {", "lambda = {").replace("(s + a)", "(s + 1)"), "parameters.lambda"),
    ("infinity_name", GOOD.replace("a = {", "Infinity = {").replace("(s + a)", "(s + 1)"), "parameters.Infinity"),
    ("long_sum", GOOD.replace("(s + a)", "(s + " + "+".join(["a"] * 400) + ")"), "too long"),
    ("deep_nesting", GOOD.replace("(s + a)", "(s + " + "(" * 150 + "a" + ")" * 150 + ")"), "nested too deeply"),
    ("power_bomb", GOOD.replace("(s + a)", "(s + 9^9^9*a)"), "infinite"),
    ("order_too_high", GOOD.replace("(b*s + 1)", "(b*s + 1)^60"), "62 poles"),
    ("unicode_minus", GOOD.replace("(s + a)", "(s \u2212 a)"), "plant.transfer: unexpected"),
    ("gain_range_string", GOOD + '[loop]\ngain_range = [0, "big"]\n', "loop.gain_range[1]"),
    ("keep_negative", GOOD + '[locus]\nkeep = "random:-1"\n', "locus.keep"),
    ("chunk_zero", GOOD + "[sweep]\nchunk_size = 0\n", "sweep.chunk_size"),
    ("operating_at_range_end", GOOD + "[loop]\ngain_range = [0, 10]\noperating_gain = 10\n", "loop.operating_gain"),
    ("date_value", GOOD.replace("nominal = 2.0", "nominal = 2024-01-01"), "got a date"),
    ("empty_file", "", "missing [plant]"),
    ("sensor_s_in_function", GOOD + '[loop]\nsensor = "1/exp(0.01*s)"\n', "loop.sensor"),
    ("percent_of_zero", GOOD.replace('nominal = 2.0, tol = "10%"', 'nominal = 0, tol = "10%"'), "parameters.a.tol: a percentage of a zero nominal"),
    ("long_string_value", GOOD.replace("nominal = 2.0", 'nominal = "' + "9" * 5000 + '"'), "..."),
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

    text = GOOD.replace('transfer = "1/(s*(s + a)*(b*s + 1))"', 'transfer = "(s + 2)/(s*(s + 2)*(b*s + a))"')
    with pytest.warns(CancellationWarning, match="common"):
        parse_config(text, source="x.toml")


def test_unused_uncertain_parameter_warns():
    from sweep.warnings import UnusedParameterWarning

    text = GOOD.replace('transfer = "1/(s*(s + a)*(b*s + 1))"', 'transfer = "1/(s*(s + a)*(s + 1))"')
    with pytest.warns(UnusedParameterWarning, match="parameter.s. b appear in no expression"):
        parse_config(text, source="x.toml")


def test_inner_coefficient_undefined_in_box(tmp_path: Path):
    text = GOOD.replace("(s + a)", "(s + 1/(a - 2.1))")
    with pytest.raises(InputError, match=r"'a - 2.1' \(divisor\) must stay away from 0, but it is"):
        parse_config(text, source="x.toml")


def test_messages_stay_short(tmp_path: Path):
    # a pasted blob must not come back whole in the one-line message
    for label, text, _ in BAD:
        if label in ("long_sum", "long_string_value"):
            with pytest.raises(InputError) as info:
                parse_config(text, source="x.toml")
            assert len(info.value.line()) < 400, label


def test_byte_order_mark_is_accepted(tmp_path: Path):
    path = tmp_path / "bom.toml"
    path.write_bytes(b"\xef\xbb\xbf" + GOOD.encode())
    config = load_config(path)
    assert config.title == "test loop"
    assert len(config.sha256) == 64


def test_plus_minus_sign_in_tolerance(tmp_path: Path):
    config = parse_config(GOOD.replace('tol = "10%"', 'tol = "\u00b110 %"'), source="x.toml")
    assert (config.parameters[0].low, config.parameters[0].high) == pytest.approx((1.8, 2.2))


def test_soft_keywords_are_plain_names():
    # 'type', 'match' and 'case' are only soft keywords in Python; in configs they are ordinary names
    text = GOOD.replace("a = {", "type = {").replace("(s + a)", "(s + type)")
    assert parse_config(text, source="x.toml").parameters[0].name == "type"


def test_triple_common_factor_warns():
    # np.roots places the roots of (s + 1)^3 about 1e-5 apart, so a distance test misses them
    from sweep.warnings import CancellationWarning

    text = '[plant]\ntransfer = "1/(s + 1)^3"\n[loop]\ncontroller = "(s + 1)^3/(s*(s + 10)^3)"\n'
    with pytest.warns(CancellationWarning, match=r"root -1\)"):
        parse_config(text, source="x.toml")


def test_common_roots_against_sympy_gcd():
    # reference: the roots of sympy's exact polynomial gcd
    import sympy

    from sweep.loop import common_roots

    s = sympy.Symbol("s")
    cases = [
        ((s + 1) ** 3 * (s + 4), (s + 1) * (s + 2) ** 2 * s),
        ((s**2 + 2 * s + 5) ** 2, (s**2 + 2 * s + 5) * (s + 3)),
        ((s + 1) * (s + 2), (s + 3) * (s + 4) * s),
        (s * (s + 7), s**2 * (s + 1)),
    ]
    for a, b in cases:
        pa = np.array([float(c) for c in sympy.Poly(sympy.expand(a), s).all_coeffs()])
        pb = np.array([float(c) for c in sympy.Poly(sympy.expand(b), s).all_coeffs()])
        expected = {complex(r) for r in sympy.Poly(sympy.gcd(a, b), s).all_roots()}
        got = common_roots(pa, pb)
        assert len(got) == len(expected), (a, b, got)
        for r in expected:
            assert min(abs(g - r) for g in got) < 1e-4


def test_guards_pass_when_the_box_is_clear():
    # divisions, sqrt, log, real powers and tan whose arguments keep clear over the box are fine
    text = GOOD.replace("1/(s*", "sqrt(b - 2.4)*log(a)*(b - 2.4)^1.5*tan(a/4)/(s*").replace("(s + a)", "(s + 1/(b - 2.4))")
    parse_config(text, source="x.toml")


def test_check_refuses_oversized_sweep(tmp_path: Path):
    # what `sweep run` would refuse, `sweep check` refuses too: exit 2, one line, nothing written
    params = "".join(f"p{i} = {{ nominal = 1.0, tol = \"1%\" }}\n" for i in range(25))
    text = "[parameters]\n" + params + '[plant]\ntransfer = "p0/(s*(s + p1))"\n[sweep]\ndesigns = ["corners"]\n'
    path = write(tmp_path, text)
    proc = run_cli("check", str(path), cwd=tmp_path)
    assert proc.returncode == 2, proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1 and "max_variants" in proc.stderr
    assert proc.stdout == "" and sorted(os.listdir(tmp_path)) == ["bad.toml"]


def _sympy_loop(config):
    """Nominal C*G*H of a config by sympy (exact rationals of the float parameter values)."""
    import sympy

    from sweep import expressions

    s = sympy.Symbol("s")
    values = {p.name: sympy.Rational(p.nominal) for p in config.parameters}

    def conv(node):
        E = expressions
        if isinstance(node, E.Number):
            return sympy.Rational(node.value)
        if isinstance(node, E.Name):
            return values[node.id]
        if isinstance(node, E.S):
            return s
        if isinstance(node, E.Neg):
            return -conv(node.operand)
        if isinstance(node, E.Binary):
            a, b = conv(node.left), conv(node.right)
            return {"+": a + b, "-": a - b, "*": a * b, "/": a / b}[node.op]
        if isinstance(node, E.Power):
            return conv(node.base) ** conv(node.exponent)
        return getattr(sympy, node.func)(conv(node.arg))

    if config.transfer is not None:
        plant = conv(config.transfer)
    else:
        n = len(config.num) - 1
        d = len(config.den) - 1
        plant = sum(conv(c) * s ** (n - i) for i, c in enumerate(config.num)) / sum(
            conv(c) * s ** (d - i) for i, c in enumerate(config.den))
    return s, sympy.together(conv(config.controller) * plant * conv(config.sensor))


@pytest.mark.parametrize("path", CONFIGS, ids=[p.stem for p in CONFIGS])
def test_assembled_loop_matches_sympy(path: Path):
    # reference: sympy's exact expansion of C*G*H at the nominal values
    import sympy

    from sweep.loop import assemble

    config = load_config(path)
    s, ref = _sympy_loop(config)
    rn, rd = sympy.fraction(sympy.cancel(ref))
    N, D = assemble(config, config.nominal_values())
    n_expr = sympy.Poly([sympy.Rational(c) for c in N[0]], s).as_expr()
    d_expr = sympy.Poly([sympy.Rational(c) for c in D[0]], s).as_expr()
    # N/D may keep a common factor that cancel() drops: compare N*rd with D*rn
    left = sympy.Poly(sympy.expand(n_expr * rd), s).all_coeffs()
    right = sympy.Poly(sympy.expand(d_expr * rn), s).all_coeffs()
    assert len(left) == len(right)
    scale = max(abs(float(c)) for c in left)
    assert max(abs(float(a - b)) for a, b in zip(left, right)) <= 1e-12 * scale


@pytest.mark.parametrize("path", CONFIGS, ids=[p.stem for p in CONFIGS])
def test_assembly_vectorised_and_enclosed(path: Path):
    # a batch of box points assembles row by row like single variants, and the interval
    # enclosure of the whole box holds every point's coefficients
    from sweep.loop import assemble, enclose

    config = load_config(path)
    rng = np.random.default_rng(0)
    unc = config.uncertain
    V = 64
    values = {p.name: np.full(V, p.nominal) for p in config.parameters}
    for p in unc:
        values[p.name] = p.low + (p.high - p.low) * rng.random(V)
        values[p.name][:2] = (p.low, p.high)
    N, D = assemble(config, values)
    for i in (0, 1, V - 1):
        n1, d1 = assemble(config, {k: v[i:i + 1] for k, v in values.items()})
        np.testing.assert_allclose(N[i], n1[0], rtol=1e-14, atol=0)
        np.testing.assert_allclose(D[i], d1[0], rtol=1e-14, atol=0)
    Ni, Di = enclose(config, {p.name: np.array([p.low]) for p in unc}, {p.name: np.array([p.high]) for p in unc})
    assert Ni.contains(N).all() and Di.contains(D).all()
    assert np.all(np.sign(D[:, 0]) == np.sign(D[0, 0]))  # degree invariance over the box
