"""Acceptance catalogue of configs that are not in tests/test_config.py.

Written as a careless and as a hostile new user would write them. Every bad
config must make `sweep check` and `sweep run` exit with status 2 and one
line on stderr that names the file and the field (and says what to do), with
no traceback, nothing on stdout and nothing written. The good-but-unusual
configs cover the syntax variants of DESIGN section 2 one by one.
"""
from __future__ import annotations

import ast
import json
import math
import operator
import os
import warnings
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from sweep import cli
from sweep.config import load_config, parse_config
from sweep.errors import ExpressionError, InputError
from sweep.expressions import evaluate, parse
from sweep.loop import assemble

BASE = """
title = "Kiln damper loop"
[parameters]
a = { nominal = 2.0, tol = "10%" }
b = { nominal = 3.0, low = 2.5, high = 3.5, units = "s" }
[plant]
transfer = "1/(s*(s + a)*(b*s + 1))"
"""
T = 'transfer = "1/(s*(s + a)*(b*s + 1))"'


def _swap(old: str, new: str) -> str:
    assert old in BASE, old
    return BASE.replace(old, new)


# (label, config text, text the one error line must contain: the field, often with the point of the message)
BAD = [
    # typos in section and field names
    ("pasted_blob_as_key", BASE + "[sweep]\n" + "x" * 5000 + " = 1\n", "sweep.xxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxx...: unknown key"),
    ("pasted_blob_as_section", "[" + "x" * 5000 + "]\n" + BASE, "unknown key 'xxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxx...'"),
    ("pasted_blob_as_design", BASE + '[sweep]\ndesigns = ["' + "x" * 5000 + '"]\n', "sweep.designs[0]: unknown design"),
    ("pasted_blob_as_feedback", BASE + '[loop]\nfeedback = "' + "x" * 5000 + '"\n', "loop.feedback: unknown feedback"),
    ("pasted_blob_unquoted", BASE + "x" * 5000 + " = \n", "line 8 (plant.xxxxxxxxxxxxxxxxxxxxxxxxxxxxxxx...): not valid TOML"),
    ("section_typo", BASE + '[lop]\nfeedback = "negative"\n', "lop: unknown key 'lop'; did you mean 'loop'?"),
    ("plant_field_typo", _swap("transfer =", "tranfer ="), "plant.tranfer: unknown key 'tranfer'; did you mean 'transfer'?"),
    ("parameter_field_typo", _swap("nominal = 2.0", "nominall = 2.0"), "parameters.a.nominall"),
    ("sweep_field_typo", BASE + "[sweep]\nsamplse = 5\n", "sweep.samplse: unknown key 'samplse'; did you mean 'samples'?"),
    ("locus_field_typo", BASE + "[locus]\npoint = 5\n", "locus.point"),
    # wrong types
    ("units_number", _swap('units = "s"', "units = 5"), "parameters.b.units: expected a string"),
    ("units_list", _swap('units = "s"', 'units = ["s"]'), "parameters.b.units"),
    ("dist_number", _swap('tol = "10%"', 'tol = "10%", dist = 3'), "parameters.a.dist: expected a string"),
    ("parameter_string", _swap('a = { nominal = 2.0, tol = "10%" }', 'a = "2.0"'), "parameters.a: expected a number or a table"),
    ("parameter_empty_table", _swap('a = { nominal = 2.0, tol = "10%" }', "a = {}"), "parameters.a: missing 'nominal'"),
    ("title_table", _swap('title = "Kiln damper loop"', "[title]\nx = 1"), "title: expected a string"),
    ("title_two_lines", _swap('title = "Kiln damper loop"', 'title = """Kiln\ndamper loop"""'), "title: contains the control character '\\n'"),
    ("title_terminal_escape", _swap('title = "Kiln damper loop"', 'title = "\\u001b[2JKiln"'), "title: contains the control character '\\x1b'"),
    ("units_with_newline", _swap('units = "s"', 'units = "s\\n"'), "parameters.b.units: contains the control character"),
    ("plant_string", 'plant = "1/s"\n', "plant: expected a table"),
    ("loop_array_of_tables", BASE + '[[loop]]\nfeedback = "negative"\n', "loop: expected a table"),
    ("transfer_boolean", _swap(T, "transfer = true"), "plant.transfer: expected an expression or a number"),
    ("num_nested_list", _swap(T, 'num = [[1]]\nden = [1, 1]'), "plant.num[0]"),
    ("num_string", _swap(T, 'num = "1"\nden = "s + 1"'), "plant.num: expected a non-empty list"),
    ("controller_list", BASE + '[loop]\ncontroller = ["s + 1", "s + 2"]\n', "loop.controller"),
    ("sensor_table", BASE + "[loop]\nsensor = { num = 1 }\n", "loop.sensor"),
    # tolerances
    ("tol_asymmetric_same_signs", _swap('"10%"', '"-20%/-80%"'), "parameters.a.tol: tolerance '-20%/-80%' gives two minus sides"),
    ("tol_slash_without_percent", _swap('"10%"', '"-20/+80"'), "parameters.a.tol: cannot read '-20/+80' as a tolerance"),
    ("tol_lone_minus", _swap('"10%"', '"-10%"'), "parameters.a.tol: a single sign in '-10%' is ambiguous"),
    ("tol_lone_plus", _swap('"10%"', '"+10%"'), "parameters.a.tol: a single sign"),
    ("tol_list_plus_on_minus_side", _swap('"10%"', '["+20%", "-80%"]'), "parameters.a.tol[0]: the minus side"),
    ("tol_list_negative_number", _swap('"10%"', "[-0.1, 0.2]"), "parameters.a.tol[0]: tolerance must not be negative"),
    ("tol_list_three", _swap('"10%"', '["1%", "2%", "3%"]'), "parameters.a.tol: a tolerance list needs two entries"),
    ("tol_list_over_100", _swap('"10%"', '["20%", "150%"]'), "parameters.a.tol[1]"),
    ("tol_percent_word", _swap('"10%"', '"10 percent"'), "parameters.a.tol: tolerance string '10 percent' must end in '%'"),
    ("tol_double_percent", _swap('"10%"', '"10%%"'), "parameters.a.tol: cannot read '10%%'"),
    ("tol_empty", _swap('"10%"', '""'), "parameters.a.tol"),
    ("tol_nan_percent", _swap('"10%"', '"nan%"'), "parameters.a.tol"),
    ("tol_boolean", _swap('"10%"', "true"), "parameters.a.tol: expected a number, got a boolean"),
    ("tol_integer_beyond_float", _swap('"10%"', "1" + "0" * 400), "parameters.a.tol: 1000000000"),
    ("tol_infinite", _swap('"10%"', "inf"), "parameters.a.tol"),
    ("normal_zero_percent", _swap('tol = "10%"', 'tol = "0%", dist = "normal"'), "parameters.a: a normal distribution needs a width above zero"),
    ("normal_zero_absolute", _swap('tol = "10%"', 'tol = 0, dist = "normal"'), "parameters.a: a normal distribution needs a width"),
    ("normal_point_bounds", _swap("low = 2.5, high = 3.5", 'low = 3.0, high = 3.0, dist = "normal"'), "parameters.b: a normal distribution"),
    ("unknown_distribution", _swap('tol = "10%"', 'tol = "10%", dist = "gaussian"'), "parameters.a.dist: unknown distribution 'gaussian'"),
    ("nominal_below_low", _swap("nominal = 3.0, low = 2.5", "nominal = 2.0, low = 2.5"), "parameters.b.nominal: nominal (2) lies outside"),
    ("only_high", _swap("low = 2.5, high = 3.5", "high = 3.5"), "parameters.b: missing 'low'"),
    ("fixed_with_bounds", _swap("low = 2.5, high = 3.5", 'low = 2.5, high = 3.5, dist = "fixed"'), "parameters.b.dist: a fixed parameter takes no tolerance"),
    # names
    ("name_shadows_exp", _swap("a = {", "exp = {").replace("(s + a)", "(s + exp)"), "parameters.exp: 'exp' is reserved"),
    ("name_is_k", _swap("a = {", "k = {").replace("(s + a)", "(s + k)"), "parameters.k: 'k' is reserved"),
    ("name_is_s", _swap("a = {", "s = {").replace("(s + a)", "(s + 1)"), "parameters.s: 's' is reserved"),
    ("name_unicode_quoted", _swap("a = {", '"\u03b1" = {').replace("(s + a)", "(s + \u03b1)"), "parameters.\u03b1: parameter name"),
    ("name_unicode_bare", _swap("a = {", "\u03b1 = {"), "line 4: not valid TOML"),
    ("name_with_space", _swap("a = {", '"a b" = {').replace("(s + a)", "(s + 1)"), "parameters.a b: parameter name"),
    ("name_too_long", _swap("a = {", "a" * 500 + " = {").replace("(s + a)", "(s + 1)"), "is too long (at most 64)"),
    ("name_true", _swap("a = {", '"True" = {').replace("(s + a)", "(s + 1)"), "parameters.True: 'True' is a reserved word"),
    ("name_is_a_dataset_dimension", _swap("a = {", "gain = {").replace("(s + a)", "(s + gain)"), "parameters.gain: parameter name 'gain' is also a name in the result file"),
    ("name_is_a_dataset_variable", _swap("a = {", "critical_gain = {").replace("(s + a)", "(s + critical_gain)"), "parameters.critical_gain"),
    ("gain_written_in_plant", _swap("1/(s*", "k/(s*"), "plant.transfer: unknown name 'k': the loop gain k is what the sweep varies"),
    ("capital_s", _swap("(s + a)", "(S + a)"), "plant.transfer: unknown name 'S': the Laplace variable is written in lower case, s"),
    ("name_pi_undefined", _swap("(s + a)", "(s + pi)"), "plant.transfer: unknown name 'pi'"),
    # expressions
    ("unbalanced_open", _swap("(b*s + 1))", "(b*s + 1)"), "plant.transfer: unbalanced parentheses: '(' at position 3"),
    ("unbalanced_close", _swap("(b*s + 1))", "(b*s + 1)))"), "plant.transfer: unbalanced parentheses: ')' at position 24"),
    ("s_in_parameter_expression", _swap(T, 'num = ["a*s"]\nden = ["1", "b", "0"]'), "plant.num[0]: the Laplace variable 's' is not allowed"),
    ("unknown_function", _swap("(s + a)", "(s + abs(a))"), "plant.transfer: unknown function 'abs' at position 11"),
    ("product_without_star_s", _swap("(s*(s + a)", "(s(s + a)"), "plant.transfer: 's(' at position 4: s is not a function; to multiply, write 's*(...)'"),
    ("product_without_star_name", _swap("(s + a)", "(s + a(b + 1))"), "to multiply, write 'a*(...)'"),
    ("number_glued_to_name", _swap("(s + a)", "(2s + a)"), "plant.transfer: malformed number '2s'"),
    ("dead_time", _swap(T, 'transfer = "exp(-0.1*s)/(s*(s + a))"'), "plant.transfer: 's' inside exp(...) is not allowed"),
    ("s_power_1000", _swap(T, 'transfer = "1/s^1000"'), "plant.transfer: exponent 1000 on an expression in s is too large"),
    ("s_power_of_power", _swap(T, 'transfer = "1/(((s + 1)^64)^64)^64"'), "plant.transfer: the expression can reach degree 262144 in s"),
    ("s_powers_multiplied", BASE + '[loop]\nsensor = "1/((s + 1)^60*(s + 2)^60*(s + 3)^60*(s + 4)^60)"\n', "loop.sensor: the expression can reach degree 240"),
    ("s_in_long_exponent", _swap("(s + a)", "(s + 2^(s" + " + a" * 200 + "))"), "plant.transfer: 's' in an exponent is not allowed (in '2^(s + a + a + a + a + a + a + a + a ...')"),
    ("long_real_exponent_of_s", _swap("(s + a)", "(s + s^(a" + " + a" * 200 + "))"), "needs a literal integer exponent, found 'a + a + a"),
    ("s_power_real", _swap(T, 'transfer = "1/s^1.5"'), "plant.transfer: a power of an expression in s needs a literal integer exponent"),
    ("parameter_power_overflows", _swap("(s + a)", "(s + a^1000)"), "plant.transfer: the plant has a pole of size 1.07e+301"),
    ("nesting_500", _swap("(s + a)", "(s + " + "(" * 500 + "a" + ")" * 500 + ")"), "plant.transfer: expression is nested too deeply"),
    ("one_megabyte", _swap("(s + a)", "(s + " + "a+" * 500_000 + "a)"), "plant.transfer: expression is 1000023 characters long"),
    ("comma_decimal", _swap(T, 'transfer = "1,5/(s*(s + a)*(b*s + 1))"'), "plant.transfer: unexpected ','"),
    ("semicolon", _swap(T, 'transfer = "1/(s + a); 2/(b*s + 1)"'), "plant.transfer: unexpected ';'"),
    ("square_brackets", _swap(T, 'transfer = "1/[s*(s + a)*(b*s + 1)]"'), "plant.transfer: unexpected indexing '['"),
    ("caret_twice", _swap(T, 'transfer = "1/(s*(s + a)^^2*(b*s + 1))"'), "plant.transfer: expected a number, a name or '('"),
    ("empty_expression", _swap(T, 'transfer = "   "'), "plant.transfer: empty expression"),
    ("divisor_reaches_zero", _swap("low = 2.5, high = 3.5", "low = -1, high = 3.5").replace("(s + a)", "(s + 1/b)"), "plant.transfer: 'b' (divisor) must stay away from 0"),
    ("divide_by_literal_zero", _swap("(s + a)", "(s + 1/0)"), "plant.transfer: '0' (divisor) must stay away from 0"),
    ("divide_by_difference_of_itself", _swap("(s + a)", "(s + 1/(a - a))"), "plant.transfer: 'a - a' (divisor)"),
    ("sqrt_of_negative", _swap("(s + a)", "(s + sqrt(-1))"), "plant.transfer: '-1' (sqrt argument)"),
    ("log_of_zero", _swap("(s + a)", "(s + log(0))"), "plant.transfer: '0' (log argument)"),
    ("exp_overflows", _swap("(s + a)", "(s + exp(1000*a))"), "plant.transfer: the plant evaluates to an infinite"),
    ("loop_divides_by_zero", _swap(T, 'transfer = "1/(s - s)"'), "plant.transfer: the denominator is zero"),
    ("numerator_list_zero", _swap(T, "num = [0]\nden = [1, 1]"), "plant.num: the numerator is zero"),
    ("denominator_list_zero", _swap(T, "num = [1]\nden = [0, 0]"), "plant.den: the denominator is zero"),
    ("pole_beyond_float", _swap(T, "num = [1]\nden = [1e-320, 1, 0]"), "plant.den: the plant has a pole too large for floating point"),
    ("pole_at_1e160", _swap(T, "num = [1]\nden = [1e-160, 1, 0]"), "plant.den: the plant has a pole of size 1e+160"),
    ("zero_at_1e200", _swap(T, 'num = [1e-200, 1]\nden = [1, "a", "b", 0]'), "plant.num: the plant has a zero of size 1e+200"),
    ("controller_tiny_lag", BASE + '[loop]\ncontroller = "1/(1e-150*s + 1)"\n', "loop.controller: the controller has a pole of size 1e+150"),
    ("order_changes_in_box", _swap("(b*s + 1)", "((b - 3)*s + 1)"), "plant.transfer: the plant's order changes inside the tolerance box"),
    # improper or degenerate loops, controller and sensor in s
    ("improper_plant", _swap(T, 'transfer = "s^2/(s + a)"'), "plant: improper loop: 2 zero(s) but only 1 pole(s)"),
    ("improper_through_sensor", BASE + '[loop]\nsensor = "(s + 1)^4"\n', "plant: improper loop: 4 zero(s) but only 3 pole(s)"),
    ("controller_s_in_exp", BASE + '[loop]\ncontroller = "exp(-0.1*s)"\n', "loop.controller: 's' inside exp(...)"),
    ("controller_s_in_exponent", BASE + '[loop]\ncontroller = "2^s"\n', "loop.controller: 's' in an exponent is not allowed"),
    ("controller_zero", BASE + "[loop]\ncontroller = 0\n", "loop.controller: the numerator is zero"),
    ("sensor_divides_by_zero", BASE + '[loop]\nsensor = "1/(s - s)"\n', "loop.sensor: the denominator is zero"),
    ("pure_gain_number", _swap(T, "transfer = 5"), "plant: the loop has no poles"),
    # [loop]
    ("feedback_unity", BASE + '[loop]\nfeedback = "unity"\n', "loop.feedback: unknown feedback 'unity'; expected negative or positive"),
    ("feedback_capital", BASE + '[loop]\nfeedback = "Negative"\n', "loop.feedback: unknown feedback 'Negative'"),
    ("feedback_number", BASE + "[loop]\nfeedback = -1\n", "loop.feedback: expected a string"),
    ("gain_range_reversed", BASE + "[loop]\ngain_range = [100, 0]\n", "loop.gain_range: low (100) must be below high (0)"),
    ("gain_range_all_negative", BASE + "[loop]\ngain_range = [-10, -1]\n", "loop.gain_range[0]: gains must not be negative"),
    ("gain_range_one_element", BASE + "[loop]\ngain_range = [5]\n", "loop.gain_range: expected [low, high]"),
    ("gain_range_strings", BASE + '[loop]\ngain_range = ["0", "10"]\n', "loop.gain_range[0]: expected a number, got a string '0'"),
    ("gain_range_scalar", BASE + "[loop]\ngain_range = 10\n", "loop.gain_range: expected [low, high]"),
    ("gain_range_empty", BASE + "[loop]\ngain_range = [1, 1]\n", "loop.gain_range: low (1) must be below high (1)"),
    ("gain_range_nan", BASE + "[loop]\ngain_range = [0, nan]\n", "loop.gain_range[1]: NaN is not allowed"),
    ("gain_range_minus_inf", BASE + "[loop]\ngain_range = [0, -inf]\n", "loop.gain_range[1]"),
    ("gain_range_capital_inf", BASE + "[loop]\ngain_range = [0, Inf]\n", "line 9 (loop.gain_range): not valid TOML"),
    ("operating_gain_outside", BASE + "[loop]\ngain_range = [0, 10]\noperating_gain = 11\n", "loop.operating_gain: 11 is not strictly inside gain_range (0, 10)"),
    ("gain_range_subnormal", BASE + "[loop]\ngain_range = [1e-320, 1e-300]\n", "loop.gain_range[0]: a gain of 9.99989e-321 is at the edge of floating point"),
    ("gain_range_near_overflow", BASE + "[loop]\ngain_range = [1.7e308, inf]\n", "loop.gain_range[0]: a gain of 1.7e+308"),
    ("operating_gain_subnormal", BASE + "[loop]\noperating_gain = 1e-320\n", "loop.operating_gain: a gain of"),
    ("operating_gain_zero", BASE + "[loop]\noperating_gain = 0\n", "loop.operating_gain: 0 is not strictly inside"),
    ("operating_gain_string", BASE + '[loop]\noperating_gain = "35"\n', "loop.operating_gain: expected a number"),
    ("operating_gain_list", BASE + "[loop]\noperating_gain = [3]\n", "loop.operating_gain: expected a number, got a list"),
    # [sweep] and [locus]
    ("points_zero", BASE + "[locus]\npoints = 0\n", "locus.points: must be at least 3, got 0"),
    ("points_1e9", BASE + "[locus]\npoints = 1000000000\n", "locus.points: 1000000000 gains is more than the 100000 allowed"),
    ("points_float", BASE + "[locus]\npoints = 1e9\n", "locus.points: expected a whole number"),
    ("seed_negative", BASE + "[sweep]\nseed = -3\n", "sweep.seed: must be at least 0, got -3"),
    ("seed_float", BASE + "[sweep]\nseed = 1.5\n", "sweep.seed: expected a whole number"),
    ("seed_string", BASE + '[sweep]\nseed = "1"\n', "sweep.seed: expected a whole number, got a string"),
    ("max_variants_exceeded", BASE + '[sweep]\ndesigns = ["random"]\nsamples = 2000000\n', "sweep.max_variants: the designs make 2000000 variants"),
    ("max_variants_lowered", BASE + '[sweep]\ndesigns = ["random"]\nsamples = 200\nmax_variants = 100\n', "sweep.max_variants"),
    ("grid_explodes", BASE + '[sweep]\ndesigns = ["grid"]\nlevels = 100000\n', "sweep.designs: design 'grid' would make 100000^2"),
    ("designs_capitalised", BASE + '[sweep]\ndesigns = ["Nominal"]\n', "sweep.designs[0]: unknown design 'Nominal'; did you mean 'nominal'?"),
    ("designs_number", BASE + "[sweep]\ndesigns = 3\n", "sweep.designs: expected a non-empty list"),
    ("keep_random_x", BASE + '[locus]\nkeep = "random:x"\n', "locus.keep: unknown keep 'random:x'"),
    ("keep_random_empty", BASE + '[locus]\nkeep = "random:"\n', "locus.keep"),
    ("keep_capitalised", BASE + '[locus]\nkeep = "ALL"\n', "locus.keep: unknown keep 'ALL'"),
    ("keep_number", BASE + "[locus]\nkeep = 5\n", "locus.keep: expected a string"),
    # TOML mistakes: the line, the key written on it and a hint
    ("duplicate_parameter", _swap("b = {", "a = {"), "line 5 (parameters.a): not valid TOML (Cannot overwrite a value"),
    ("duplicate_key_inline", _swap('tol = "10%"', 'tol = "10%", tol = "5%"'), "line 4 (parameters.a): not valid TOML (Duplicate"),
    ("percent_unquoted", _swap('"10%"', "10%"), "line 4 (parameters.a): not valid TOML"),
    ("expression_unquoted", _swap(T, "transfer = 1/(s + 1)"), "line 7 (plant.transfer): not valid TOML"),
    ("word_unquoted", BASE + "[loop]\nfeedback = negative\n", "line 9 (loop.feedback): not valid TOML (Invalid value"),
    ("colon_instead_of_equals", _swap("transfer =", "transfer:"), "line 7 (plant.transfer): not valid TOML"),
    ("inline_table_over_lines", _swap("nominal = 2.0, tol", "nominal = 2.0,\n tol"), "line 4 (parameters.a): not valid TOML"),
    ("decimal_comma", _swap("nominal = 2.0", "nominal = 2,0"), "line 4 (parameters.a): not valid TOML (Expected '=' after a key in a key/value pair, column 20: 'a = { nominal = 2,0, tol = \"10%\" }'); write decimals with a point"),
    ("leading_point", _swap("nominal = 2.0", "nominal = .5"), "write a digit on both sides of the point"),
    ("unit_letters_on_number", _swap("nominal = 3.0", "nominal = 3 ms"), "high = 3.5, units = \"s\" }'); numbers take no unit letters"),
    ("number_in_quotes_with_unit", _swap("nominal = 3.0", 'nominal = "3 ms"'), "parameters.b.nominal: expected a number, got a string '3 ms'; write the number without quotes (units go in units"),
    ("unterminated_string", BASE + '[loop]\ncontroller = "s', "not valid TOML (Unterminated string"),
    ("yaml_instead_of_toml", "plant:\n  transfer: 1/s\n", "line 1 (plant): not valid TOML"),
    ("only_a_comment", "# nothing here yet\n", "plant: missing [plant] table"),
]


def _run_cli(args: list[str], capsys) -> tuple[int, str, str]:
    code = cli.main(args)
    out, err = capsys.readouterr()
    return code, out, err


def _listing(root: Path) -> list[str]:
    return sorted(str(p.relative_to(root)) for p in root.rglob("*"))


def _assert_one_clean_line(code: int, out: str, err: str, path: Path, needle: str, command: str) -> None:
    assert code == 2, err
    assert out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert "Traceback" not in err
    assert lines[0].startswith(f"sweep {command}: {path}: "), lines[0]
    assert needle in lines[0], lines[0]
    assert len(lines[0]) < 600, lines[0]


def test_catalogue_is_large_and_labels_unique():
    assert len(BAD) >= 40
    assert len({label for label, _, _ in BAD}) == len(BAD)


@pytest.mark.parametrize("label,text,needle", BAD, ids=[b[0] for b in BAD])
def test_bad_config_exit_2_one_line_nothing_written(tmp_path: Path, monkeypatch, capsys, label: str, text: str, needle: str):
    monkeypatch.chdir(tmp_path)
    path = tmp_path / "kiln.toml"
    path.write_text(text, encoding="utf-8")
    before = _listing(tmp_path)
    _assert_one_clean_line(*_run_cli(["check", str(path)], capsys), path, needle, "check")
    code, out, err = _run_cli(["check", "--json", str(path)], capsys)
    _assert_one_clean_line(code, "", err, path, needle, "check")
    verdict = json.loads(out)  # the same error, for scripts
    assert verdict["valid"] is False and verdict["file"] == str(path)
    assert err.strip() == f"sweep check: {verdict['error']}"
    _assert_one_clean_line(*_run_cli(["run", str(path), "-o", str(tmp_path / "out" / "kiln.nc"), "--quiet"], capsys),
                           path, needle, "run")
    _assert_one_clean_line(*_run_cli(["run", str(path), "--quiet"], capsys), path, needle, "run")  # default results/
    assert _listing(tmp_path) == before


FILES = [
    ("empty", b"", "plant: missing [plant] table"),
    ("binary", bytes(range(256)), "not a UTF-8 text file"),
    ("latin1", BASE.replace("Kiln", "Four \xe0 chaux").encode("latin-1"), "not a UTF-8 text file"),
    ("utf16", BASE.encode("utf-16"), "not a UTF-8 text file"),
    ("nul_bytes", BASE.encode() + b"\x00\x00", "not valid TOML"),
    ("eleven_megabytes", BASE.encode() + b"#" * 11_000_000, "is larger than 10 MB"),
]


@pytest.mark.parametrize("label,data,needle", FILES, ids=[f[0] for f in FILES])
def test_unreadable_files(tmp_path: Path, monkeypatch, capsys, label: str, data: bytes, needle: str):
    monkeypatch.chdir(tmp_path)
    path = tmp_path / f"{label}.toml"
    path.write_bytes(data)
    before = _listing(tmp_path)
    _assert_one_clean_line(*_run_cli(["check", str(path)], capsys), path, needle, "check")
    _assert_one_clean_line(*_run_cli(["run", str(path), "--quiet"], capsys), path, needle, "run")
    assert _listing(tmp_path) == before


def test_folder_and_missing_file(tmp_path: Path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    _assert_one_clean_line(*_run_cli(["check", str(tmp_path)], capsys), tmp_path, "is a folder, not a config file", "check")
    missing = tmp_path / "nope.toml"
    _assert_one_clean_line(*_run_cli(["run", str(missing)], capsys), missing, "cannot read the file", "run")
    assert _listing(tmp_path) == []


def test_debug_shows_the_traceback(tmp_path: Path):
    path = tmp_path / "kiln.toml"
    path.write_text(BAD[0][1])
    with pytest.raises(InputError):
        cli.main(["--debug", "check", str(path)])
    with pytest.raises(InputError):
        cli.main(["check", str(path), "--debug"])


def test_command_line_mistakes_are_one_line(tmp_path: Path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    path = tmp_path / "kiln.toml"
    path.write_text(BASE)
    for args, needle in [
        (["run", str(path), "-j", "0"], "sweep run: -j: must be at least 1, got 0"),
        (["certify", str(path), "--rtol", "0"], "sweep certify: --rtol: must lie between 0 and 1"),
        (["certify", str(path), "--max-seconds", "nan"], "sweep certify: --max-seconds: must be a positive number"),
        (["run", str(path), "-j", "many"], "invalid int value: 'many'"),
        (["check"], "the following arguments are required: CONFIG"),
        (["launch", str(path)], "invalid choice: 'launch'"),
    ]:
        try:
            code = cli.main(args)
        except SystemExit as exc:  # argparse's own usage errors leave through exit()
            code = exc.code
        out, err = capsys.readouterr()
        assert code == 2, (args, err)
        assert len(err.strip().splitlines()) == 1 and needle in err, (args, err)
    assert _listing(tmp_path) == ["kiln.toml"]


# ---------------------------------------------------------------------------
# Good but unusual: each syntax variant of DESIGN section 2 on its own
# ---------------------------------------------------------------------------

def _bounds(text: str, name: str = "a") -> tuple[float, float, float, str]:
    p = {q.name: q for q in parse_config(text, source="kiln.toml").parameters}[name]
    return p.low, p.nominal, p.high, p.dist


@pytest.mark.parametrize("tol,low,high", [
    ('"10%"', 1.8, 2.2),
    ('"10 %"', 1.8, 2.2),
    ('" 10% "', 1.8, 2.2),
    ('"1e1%"', 1.8, 2.2),
    ('"+-10%"', 1.8, 2.2),
    ('"+/-10%"', 1.8, 2.2),
    ('"\u00b110%"', 1.8, 2.2),
    ("0.2", 1.8, 2.2),
    ("2e-1", 1.8, 2.2),
    ('["20%", "80%"]', 1.6, 3.6),  # -20/+80 %, the electrolytic-capacitor spread of DESIGN section 1
    ('["-20%", "+80%"]', 1.6, 3.6),
    ('"-20%/+80%"', 1.6, 3.6),
    ('"+80%/-20%"', 1.6, 3.6),
    ('"-20/+80%"', 1.6, 3.6),
    ('[0.4, "80%"]', 1.6, 3.6),
    ('["0%", "10%"]', 2.0, 2.2),
])
def test_tolerance_spellings(tol: str, low: float, high: float):
    lo, nom, hi, dist = _bounds(_swap('"10%"', tol))
    assert (lo, nom, hi) == pytest.approx((low, 2.0, high), rel=1e-12)
    assert dist == "uniform"


def test_parameter_forms():
    # a sub-table, a bare number (fixed), a zero tolerance (fixed), an integer nominal,
    # a negative nominal with a percentage
    text = """
[parameters]
c = 4
d = { nominal = 5, tol = 0 }
e = { nominal = -2.0, tol = "5%" }
b = { nominal = 3.0, low = 2.5, high = 3.5, units = "s" }
[parameters.a]
nominal = 2
tol = "10%"
units = "1/s"
[plant]
transfer = "1/(s*(s + a)*(b*s + 1)*(s + c + d - e))"
"""
    config = parse_config(text, source="kiln.toml")
    params = {p.name: p for p in config.parameters}
    assert (params["a"].low, params["a"].high, params["a"].units) == (pytest.approx(1.8), pytest.approx(2.2), "1/s")
    assert not params["c"].uncertain and not params["d"].uncertain
    assert (params["e"].low, params["e"].high) == (pytest.approx(-2.1), pytest.approx(-1.9))
    assert [p.name for p in config.uncertain] == ["e", "b", "a"]


# Each line spells the loop 1/(s (s + 2) (3 s + 1)) at the nominal another way.
SAME_LOOP = [
    ("transfer", BASE),
    ("num_den_expressions", _swap(T, 'num = ["1"]\nden = ["b", "a*b + 1", "a", 0]')),
    ("num_den_numbers_and_strings", _swap(T, 'num = [1]\nden = ["b", "a*b + 1", "a", "0"]')),
    ("scientific_notation", _swap(T, 'transfer = "1.0E+0/(s*(s + 2e0*a/2.0e-0)*(b*s + 1e0))"')),
    ("double_star_powers", _swap(T, 'transfer = "(s*(s + a))**-1 * (b*s + 1)**-1"')),
    ("negative_exponents", _swap(T, 'transfer = "s^-1*(s + a)^-1*(b*s + 1)^-1"')),
    ("functions_of_parameters", _swap(T, 'transfer = "1/(s*(s + exp(log(a)))*(sqrt(b^2)*s + cos(0)))"')),
    ("factor_moved_to_controller", _swap(T, 'transfer = "1/(s*(s + a))"') + '[loop]\ncontroller = "1/(b*s + 1)"\n'),
    ("factor_moved_to_sensor", _swap(T, 'transfer = "1/(s + a)"') + '[loop]\nsensor = "1/(s*(b*s + 1))"\n'),
    ("multi_line_string", _swap(T, 'transfer = """1/(s*(s + a)\n    *(b*s + 1))"""')),
    ("crlf_line_ends", BASE.replace("\n", "\r\n")),
    ("tabs_in_expression", _swap("(s + a)", "(s\t+\ta)")),
    ("literal_string", _swap(T, "transfer = '1/(s*(s + a)*(b*s + 1))'")),
]


@pytest.mark.parametrize("label,text", SAME_LOOP, ids=[s[0] for s in SAME_LOOP])
def test_spellings_of_one_loop(label: str, text: str):
    config = parse_config(text, source="kiln.toml")
    N, D = assemble(config, config.nominal_values())
    scale = D[0, 0]
    np.testing.assert_allclose(N[0] / scale, [1.0 / 3.0], rtol=1e-14)
    np.testing.assert_allclose(D[0] / scale, [1.0, 7.0 / 3.0, 2.0 / 3.0, 0.0], rtol=1e-14, atol=1e-15)


def test_check_json_fields_and_values(tmp_path: Path, monkeypatch, capsys):
    # 1/(s (s + 1)(s + 2)): critical gain 6 at sqrt(2) rad/s, Routh (textbook example, from memory)
    text = """
title = "Pump speed loop, no tolerances"
[plant]
num = [1]
den = [1, 3, 2, 0]
[loop]
gain_range = [0, "inf"]
operating_gain = 1.5
"""
    monkeypatch.chdir(tmp_path)
    path = tmp_path / "pump.toml"
    path.write_text(text)
    code, out, err = _run_cli(["check", "--json", str(path)], capsys)
    assert code == 0, err
    data = json.loads(out)
    # the fields of DESIGN section 6, in its order
    for key in ("valid", "numerator", "denominator", "open_loop_poles", "open_loop_zeros", "boundary_gains",
                "boundary_frequencies", "stable_intervals", "reference_gain", "critical_gain", "critical_gain_low",
                "crossing_frequency", "asymptotes", "breakaway_points", "departure_angles_deg",
                "arrival_angles_deg", "estimated_run_seconds"):
        assert key in data, key
    assert data["valid"] is True
    assert data["numerator"] == [1.0] and data["denominator"] == [1.0, 3.0, 2.0, 0.0]
    assert data["critical_gain"] == pytest.approx(6.0, rel=1e-12)
    assert data["crossing_frequency"] == pytest.approx(math.sqrt(2.0), rel=1e-12)
    assert data["stable_intervals"] == [[0.0, pytest.approx(6.0, rel=1e-12)]]
    assert data["reference_gain"] == 1.5
    assert set(data["asymptotes"]) == {"centroid", "angles_deg"}
    assert data["asymptotes"]["centroid"] == pytest.approx(-1.0)  # (0 - 1 - 2) / 3
    assert sorted(data["asymptotes"]["angles_deg"]) == pytest.approx([-60.0, 60.0, 180.0])
    # breakaway: 3 s^2 + 6 s + 2 = 0, s = -1 + 1/sqrt(3) (from memory)
    [[s, k]] = data["breakaway_points"]
    assert s == pytest.approx(-1 + 1 / math.sqrt(3), rel=1e-10)
    assert data["estimated_run_seconds"] is None or data["estimated_run_seconds"] >= 0
    code, out, err = _run_cli(["check", str(path)], capsys)
    assert code == 0 and "Pump speed loop" in out and "critical gain" in out
    assert _listing(tmp_path) == ["pump.toml"]


def test_check_text_says_why_the_critical_gain_is_missing(tmp_path: Path, monkeypatch, capsys):
    path = tmp_path / "kiln.toml"
    path.write_text(BASE + "[loop]\noperating_gain = 50\n")  # beyond the nominal critical gain
    monkeypatch.chdir(tmp_path)
    code, out, err = _run_cli(["check", str(path)], capsys)
    assert code == 0, err
    assert "unstable at the reference gain" in out


def test_help_of_every_command(capsys):
    for command in ("", "check", "run", "query", "plot", "certify", "bench"):
        with pytest.raises(SystemExit) as info:
            cli.main([command, "--help"] if command else ["--help"])
        assert info.value.code == 0
        out = capsys.readouterr().out
        assert out.startswith("usage: sweep")
    with pytest.raises(SystemExit):
        cli.main(["plot", "--help"])
    text = capsys.readouterr().out
    for view in ("locus", "limits", "envelope", "crossings", "plane"):
        assert f"{view} - " in " ".join(text.split())


# ---------------------------------------------------------------------------
# The parser against Python's own operator precedence, on unusual spellings
# ---------------------------------------------------------------------------

_BINOPS = {ast.Add: operator.add, ast.Sub: operator.sub, ast.Mult: operator.mul, ast.Div: operator.truediv,
           ast.Pow: operator.pow}


def _python_value(text: str, env: dict[str, float]) -> float:
    """Reference: Python's grammar (where ``**`` also binds tighter than a unary sign on its left and
    is right-associative; language reference, from memory) walked on its syntax tree, never executed."""
    def walk(node):
        if isinstance(node, ast.Expression):
            return walk(node.body)
        if isinstance(node, ast.Constant):
            return float(node.value)
        if isinstance(node, ast.Name):
            return env[node.id]
        if isinstance(node, ast.UnaryOp):
            v = walk(node.operand)
            return -v if isinstance(node.op, ast.USub) else v
        if isinstance(node, ast.BinOp):
            return _BINOPS[type(node.op)](walk(node.left), walk(node.right))
        raise TypeError(node)

    return walk(ast.parse(text, mode="eval"))


_atoms = st.sampled_from(["a", "b", "2", "0.5", "3", "1.5e0", "(a)", "(-b)"])


@st.composite
def _spellings(draw, depth: int = 3) -> str:
    if depth == 0:
        return draw(_atoms)
    left = draw(_spellings(depth - 1))
    right = draw(_spellings(depth - 1))
    sign = draw(st.sampled_from(["", "-", "+", "- ", "-(", "--"]))
    op = draw(st.sampled_from([" + ", "-", " * ", "/", "^", " ** ", "^-", "*-", "^+"]))
    expr = f"{left}{op}{right}"
    if sign.endswith("("):
        return f"{sign}{expr})"
    return f"{sign}{expr}"


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.filter_too_much])
@given(_spellings(), st.floats(0.3, 3.0), st.floats(0.3, 3.0))
def test_parser_follows_python_precedence(text: str, a: float, b: float):
    python_text = text.replace("^", "**")
    env = {"a": a, "b": b}
    try:
        ref = _python_value(python_text, env)
    except (ZeroDivisionError, OverflowError):
        assume(False)
    assume(isinstance(ref, float) and math.isfinite(ref) and abs(ref) < 1e100)
    with np.errstate(all="ignore"):
        got = float(evaluate(parse(text), env))
    assert math.isclose(got, ref, rel_tol=1e-9, abs_tol=1e-12), (text, got, ref)


@pytest.mark.parametrize("text,value", [
    ("-2^2", -4.0), ("2^-1", 0.5), ("2^3^2", 512.0), ("-2^-2", -0.25), ("2**-1**2", 0.5),
    ("--2", 2.0), ("2*-3", -6.0), ("(-2)^2", 4.0), ("-(2)^3", -8.0), ("2^+3", 8.0), ("8/2/2", 2.0), ("2-3-4", -5.0),
])
def test_precedence_examples(text: str, value: float):
    # conventional precedence: the power binds tighter than a sign on its left, and right-associates (from memory)
    assert evaluate(parse(text), {}) == value


def test_expression_errors_never_escape_as_other_types():
    for text in ["(", ")", "a b", "1e", "1..2", ".", "s(", "exp", "exp()", "exp(a, b)", "\u00b2", "a\u2212b"]:
        with pytest.raises(ExpressionError):
            parse(text)


def test_load_config_reads_a_path_object(tmp_path: Path):
    path = tmp_path / "kiln.toml"
    path.write_text(BASE)
    assert load_config(path).source == str(path)
    assert load_config(str(path)).stem == "kiln"
    assert os.listdir(tmp_path) == ["kiln.toml"]


def test_parameters_used_only_in_controller_and_sensor(recwarn):
    # a lead network zero z and a sensor lag T carry the tolerances; the plant is fixed
    text = """
[parameters]
z = { nominal = 20, tol = "10%" }
T = { nominal = 1e-3, tol = ["0%", "50%"] }
[plant]
num = [1]
den = [1, 3, 2, 0]
[loop]
controller = "(s + z)/(s + 200)"
sensor = "1/(T*s + 1)"
"""
    config = parse_config(text, source="lead.toml")
    assert [p.name for p in config.uncertain] == ["z", "T"]
    assert not [w for w in recwarn if "appear in no expression" in str(w.message)]
    N, D = assemble(config, {"z": np.array([18.0, 22.0]), "T": np.array([1e-3, 1.5e-3])})
    np.testing.assert_allclose(N, [[1.0, 18.0], [1.0, 22.0]])
    # D = (s + 200) (s^3 + 3 s^2 + 2 s) (T s + 1), expanded by hand
    for row, t in zip(D, (1e-3, 1.5e-3)):
        expected = np.polymul(np.polymul([1.0, 200.0], [1.0, 3.0, 2.0, 0.0]), [t, 1.0])
        np.testing.assert_allclose(row, expected, rtol=1e-14)


_TOKENS = ["s", "a", "b", "1", "0", "2.5", "1e-3", "1e300", "+", "-", "*", "/", "^", "**", "(", ")", "sqrt(",
           "exp(", "log(", "tan(", "-1", " ", "64", "a^b", "s^2", "k", "S", "2s", ",", "%", "\u2212"]
_VALUES = ['1', '0', '-1', '"10%"', '"0%"', '1e300', '1e-300', '"x"', '[1, 2]', '[]', '{}', 'true', 'inf', '-inf',
           'nan', '"-20%/+80%"', '["5%", "99%"]', '2.5', '1e-320', '99999999999999999999', '"+-5%"', '"-5%"']


@settings(max_examples=300, deadline=None)
@given(
    st.lists(st.sampled_from(_TOKENS), min_size=1, max_size=14).map("".join),
    st.dictionaries(st.sampled_from(["nominal", "tol", "low", "high", "dist", "units"]), st.sampled_from(_VALUES), max_size=4),
    st.lists(st.sampled_from(_TOKENS), min_size=1, max_size=8).map("".join),
    st.sampled_from(_VALUES),
    st.sampled_from(_VALUES),
)
def test_any_garbage_is_input_error_or_a_config(transfer: str, spec: dict, controller: str, g0: str, g1: str):
    """Whatever a user writes, loading gives a Config or one InputError line, never another exception."""
    fields = ", ".join(f"{k} = {v}" for k, v in spec.items())
    text = (f'[parameters]\na = {{ nominal = 2, tol = "10%" }}\nb = {{ {fields} }}\n[plant]\n'
            f'transfer = "{transfer}"\n[loop]\ncontroller = "{controller}"\ngain_range = [{g0}, {g1}]\n')
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            parse_config(text, source="fuzz.toml")
        except InputError as exc:
            line = exc.line()
            assert "\n" not in line and line.startswith("fuzz.toml: ")


def test_messages_list_few_parameters():
    # forty long names in one leading coefficient: the message names four and counts the rest
    names = [f"p{i:02d}_winding_resistance_of_the_stage" for i in range(40)]
    text = "[parameters]\n" + "\n".join(f"{n} = {{ nominal = 1, tol = '10%' }}" for n in names)
    text += f'\n[plant]\ntransfer = "1/(s*((({" + ".join(names)}) - 40)*s + 1))"\n'
    with pytest.raises(InputError) as info:
        parse_config(text, source="stages.toml")
    line = info.value.line()
    assert "(and 36 more)" in line and "and 36 more" in line.split("tolerances of")[1]
    assert len(line) < 700
