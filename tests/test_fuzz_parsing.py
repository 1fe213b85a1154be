"""Fuzzing the readers (issue 15, classes 2, 5 and 9), property-based.

Class 2: numbers that overflow a double or Python's digit limit, deeply
nested arrays and tables, and arbitrary bytes become one-line CaseErrors
naming the file (and the table and key where there is one); never another
exception.
Class 5: a value with line breaks or control characters, typer's own usage
errors (unknown option, missing argument, a word where a number belongs)
and path errors give exactly one line on stderr, exit 2, naming the option.
Class 9: a C prefix with trailing white space, a non-finite tolerance and a
NaN or infinite value of any float option are refused.

Instances are generated (hypothesis, fixed seed by derandomize, bounded
examples). The base case is invented demo data.
"""

from __future__ import annotations

import math

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from loopcheck.io.casefile import CaseError, case_from_string, read_case
from loopcheck.cli.main import app

ENV = {"COLUMNS": "200", "NO_COLOR": "1"}
FUZZ = settings(derandomize=True, max_examples=40, deadline=None,
                suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
#: command-line runs cost about 0.1 s each: fewer examples
CLI_FUZZ = settings(FUZZ, max_examples=12)

KEYS = {  # table -> keys holding numbers with units
    "filter": ["L1", "C", "L2", "R1", "R2"],
    "grid": ["f", "Lg", "Rg"],
    "sampling": ["fs", "delay"],
    "control": ["Kp", "Ki", "Hi"],
}
BASE = {
    "filter": {"L1": '"1.5 mH"', "C": '"20 uF"', "L2": '"0.6 mH"', "R1": '"20 mOhm"', "R2": '"10 mOhm"'},
    "grid": {"f": '"50 Hz"', "Lg": '"0.5 mH"', "Rg": "0"},
    "sampling": {"fs": '"10 kHz"', "delay": "1"},
    "control": {"feedback": '"grid"', "kind": '"PI"', "Kp": '"5 V/A"', "Ki": '"3000 V/A/s"', "Hi": '"7 V/A"'},
}


def case_text(table=None, key=None, raw=None, extra="") -> str:
    lines = ['name = "parsing fuzz"']
    for t, kv in BASE.items():
        lines.append(f"[{t}]")
        for k, v in kv.items():
            lines.append(f"{k} = {raw if (t, k) == (table, key) else v}")
    return "\n".join(lines) + "\n" + extra


def assert_one_line_case_error(text, *needles):
    with pytest.raises(CaseError) as e:
        case_from_string(text, "fuzz.toml")
    msg = str(e.value)
    assert "\n" not in msg and "\r" not in msg, msg
    assert msg.startswith("fuzz.toml:"), msg
    for n in needles:
        assert n in msg, (n, msg)
    return msg


tables_keys = st.sampled_from([(t, k) for t, ks in KEYS.items() for k in ks])
prefixes = st.sampled_from(["", "p", "n", "u", "m", "k", "M", "G"])
units = {"filter": {"L1": "H", "C": "F", "L2": "H", "R1": "Ohm", "R2": "Ohm"},
         "grid": {"f": "Hz", "Lg": "H", "Rg": "Ohm"}, "sampling": {"fs": "Hz", "delay": ""},
         "control": {"Kp": "V/A", "Ki": "V/A/s", "Hi": "V/A"}}


def test_the_base_case_is_valid():
    case_from_string(case_text(), "fuzz.toml")


@FUZZ
@given(tk=tables_keys, digits=st.integers(309, 6000), sign=st.sampled_from(["", "-", "+"]))
def test_huge_whole_numbers(tk, digits, sign):
    # beyond the double range (10^309) up to beyond Python's int-str limit (4300 digits)
    raw = sign + "9" * digits
    msg = assert_one_line_case_error(case_text(*tk, raw=raw))
    if digits < 4300:  # tomllib can read it: the key is named
        assert f"[{tk[0]}] {tk[1]}" in msg


@FUZZ
@given(tk=tables_keys, exp=st.integers(309, 10**12), neg=st.booleans(), prefix=prefixes,
       mantissa=st.sampled_from(["1", "9.99", "0.5", "123"]))
def test_overflowing_exponents(tk, exp, neg, prefix, mantissa):
    unit = units[tk[0]][tk[1]]
    text = f"{mantissa}e{'-' if neg else ''}{exp}" + (f" {prefix}{unit}" if unit else "")
    try:
        case = case_from_string(case_text(*tk, raw=f'"{text}"'), "fuzz.toml")
    except CaseError as e:
        assert "\n" not in str(e) and f"[{tk[0]}] {tk[1]}" in str(e)
    else:  # an underflow to zero may be a valid value (R1 = 0, Lg = 0, Hi = 0)
        assert neg


@FUZZ
@given(depth=st.integers(60, 6000), kind=st.sampled_from(["array", "table"]), key=st.sampled_from(["x", "Kp"]))
def test_deep_nesting(depth, kind, key):
    if kind == "array":
        raw = "[" * depth + "1" + "]" * depth
    else:
        raw = "{a = " * depth + "1" + "}" * depth
    msg = assert_one_line_case_error(case_text("control", key, raw) if key == "Kp" else case_text() + f"{key} = {raw}\n")
    assert "fuzz.toml" in msg


@settings(derandomize=True, max_examples=60, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.binary(max_size=400) | st.text(max_size=300).map(lambda s: s.encode("utf-8", "surrogatepass")))
def test_arbitrary_bytes(tmp_path_factory, data):
    p = tmp_path_factory.mktemp("bytes") / "case.toml"
    p.write_bytes(data)
    try:
        read_case(p)
    except CaseError as e:
        assert "\n" not in str(e) and str(e).startswith(str(p))


control_chars = st.text(alphabet=st.sampled_from(["\n", "\r", "\t", "\x1b", "\x00", "\x7f", "\u2028"]),
                        min_size=1, max_size=3)


@FUZZ
@given(tk=st.sampled_from([("control", "kind"), ("control", "feedback"), ("filter", "L1"), ("control", "Kp"),
                           ("grid", "f")]),
       before=st.text(alphabet="abc12 mH", max_size=5), ctrl=control_chars, after=st.text(alphabet="xyz", max_size=5))
def test_values_with_line_breaks_give_one_line(tk, before, ctrl, after):
    value = before + ctrl + after
    toml_string = '"' + "".join(f"\\u{ord(c):04x}" for c in value) + '"'
    msg = assert_one_line_case_error(case_text(*tk, raw=toml_string), f"[{tk[0]}] {tk[1]}")
    assert msg.isprintable(), repr(msg)


# --- class 5 through the command line ----------------------------------------

COMMANDS = ["check", "map", "grid", "pick", "export", "simulate", "harmonics", "report"]
word = st.text(alphabet="abcdefghijklmnopqrstuvwxyz-", min_size=1, max_size=12).filter(lambda w: not w.startswith("-"))


def assert_one_line_exit_2(r, *needles):
    assert r.exit_code == 2, (r.exit_code, r.stdout, r.stderr)
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), r.stderr
    assert "Traceback" not in r.stderr
    for n in needles:
        assert n in lines[0], (n, lines[0])


@CLI_FUZZ
@given(command=st.sampled_from(COMMANDS), name=word)
def test_unknown_options_are_one_line(command, name):
    r = CliRunner().invoke(app, [command, "cases/residential-5kva-1ph.toml", f"--zz{name}"], env=ENV)
    assert_one_line_exit_2(r, f"--zz{name}", command)


@FUZZ
@given(command=st.sampled_from(COMMANDS))
def test_missing_arguments_are_one_line(command):
    r = CliRunner().invoke(app, [command], env=ENV)
    assert_one_line_exit_2(r, "CASE.toml")


INT_OPTIONS = [("map", "--x-points"), ("map", "--y-points"), ("grid", "--points"), ("grid", "--monte-carlo"),
               ("grid", "--seed"), ("pick", "--points"), ("pick", "--lg-points"), ("harmonics", "--top")]


@CLI_FUZZ
@given(opt=st.sampled_from(INT_OPTIONS), value=word | st.sampled_from(["1.5", "1e3", "", "nan"]))
def test_bad_whole_numbers_are_one_line(opt, value):
    command, option = opt
    r = CliRunner().invoke(app, [command, "cases/residential-5kva-1ph.toml", option, value], env=ENV)
    assert_one_line_exit_2(r, option)


@settings(FUZZ, max_examples=5)
@given(name=st.text(alphabet="ab\n\t\x1bc", min_size=1, max_size=6))
def test_path_errors_name_the_option_and_stay_one_line(tmp_path_factory, name):
    tmp = tmp_path_factory.mktemp("path")
    (tmp / "dir.html").mkdir()
    r = CliRunner().invoke(app, ["report", "cases/residential-5kva-1ph.toml", "-o", str(tmp / "dir.html")], env=ENV)
    assert_one_line_exit_2(r, "-o ")
    missing = tmp / f"missing{name}.toml"
    r = CliRunner().invoke(app, ["check", str(missing)], env=ENV)
    assert_one_line_exit_2(r, "cannot read the case file")


# --- class 9 -------------------------------------------------------------------

FIRMWARE = '\n[firmware]\ncurrent_counts_per_A = 40.96\nmodulator_counts_per_V = 6.0\nprefix = "{p}"\n'


@CLI_FUZZ
@given(ident=st.from_regex(r"[A-Za-z_][A-Za-z0-9_]{0,8}", fullmatch=True),
       tail=st.sampled_from(["\\n", "\\r\\n", " ", "\\t", "-", ".", "\\u00e9"]))
def test_c_prefix_must_be_exactly_an_identifier(ident, tail):
    from loopcheck.io.read_firmware import read_firmware_settings

    ok = case_from_string(case_text(extra=FIRMWARE.format(p=ident)), "fuzz.toml")
    read_firmware_settings(ok.tables["firmware"], ok.where("firmware"), damping_gain_used=True)
    bad = case_from_string(case_text(extra=FIRMWARE.format(p=ident + tail)), "fuzz.toml")
    with pytest.raises(CaseError) as e:
        read_firmware_settings(bad.tables["firmware"], bad.where("firmware"), damping_gain_used=True)
    assert "prefix" in str(e.value) and "\n" not in str(e.value)


@FUZZ
@given(exp=st.integers(309, 100000), form=st.sampled_from(["+{}", "-{}", "\u00b1{}", "-20 % / +{}", "{}"]),
       key=st.sampled_from(["L1", "C", "L2"]))
def test_non_finite_tolerances_are_refused(exp, form, key):
    from loopcheck.io.read_tolerance import parse_tolerance_table

    band = form.format(f"1e{exp} %")
    case = case_from_string(case_text(extra=f'\n[tolerance]\n{key} = "{band}"\n'), "fuzz.toml")
    with pytest.raises(CaseError) as e:
        parse_tolerance_table(case.tables["tolerance"], case.where("tolerance"), case.design)
    assert key in str(e.value) and "\n" not in str(e.value)


@FUZZ
@given(deviation=st.floats(1.0001, 1e300), key=st.sampled_from(["L1", "C", "L2", "R1"]))
def test_tolerances_beyond_100_percent_are_refused(deviation, key):
    from loopcheck.io.read_tolerance import parse_tolerance_table

    case = case_from_string(case_text(extra=f'\n[tolerance]\n{key} = "+{deviation * 100!r} %"\n'), "fuzz.toml")
    with pytest.raises(CaseError):
        parse_tolerance_table(case.tables["tolerance"], case.where("tolerance"), case.design)


def _float_options():
    """Every option of every command whose type is float (read from the app)."""
    import typing

    import typer.main

    group = typer.main.get_command(app)
    out = []
    for name, cmd in group.commands.items():
        for p in cmd.params:
            ann = getattr(getattr(p, "type_descriptor", None), "annotation", None)
            args = typing.get_args(ann)
            inner = [a for a in args if a is not type(None)]
            if p.opts and (ann is float or inner == [float] or (inner and all(a is float for a in inner))):
                out.append((name, max(p.opts, key=len), max(1, len(inner)) if inner and inner != [float] else 1))
    return out


FLOAT_OPTIONS = _float_options()


def test_float_options_were_found():
    assert ("grid", "--sensitivity-peak", 1) in FLOAT_OPTIONS and len(FLOAT_OPTIONS) >= 5


@CLI_FUZZ
@given(opt=st.sampled_from(FLOAT_OPTIONS), value=st.sampled_from(["nan", "NaN", "inf", "-inf", "+Infinity", "1e999"]))
def test_float_options_refuse_non_finite_values(opt, value):
    command, option, nargs = opt
    r = CliRunner().invoke(app, [command, "cases/residential-5kva-1ph.toml", option, *([value] * nargs)], env=ENV)
    assert_one_line_exit_2(r, option)
    assert math.isnan(float(value)) or math.isinf(float(value))


OPTIONAL_NUMBERS = [  # (table, key, reader)
    ("targets", "phase_margin", "targets"), ("targets", "gain_margin", "targets"),
    ("targets", "sensitivity_peak", "targets"), ("scenario", "grid_phase_deg", "scenario"),
    ("harmonics", "current_phase_deg", "harmonics"), ("scenario", "points_per_sample", "scenario"),
    ("firmware", "adc_bits", "firmware"),
]


def _read_optional(case, table, reader):
    if reader == "targets":
        from loopcheck.io.read_targets import parse_targets

        return parse_targets(case.tables.get("targets"), case.where("targets"))
    if reader == "scenario":
        from loopcheck.io.read_scenario import parse_scenario

        return parse_scenario(case.tables.get("scenario"), case.where("scenario"))
    if reader == "harmonics":
        from loopcheck.io.read_pwm import read_harmonics_options

        return read_harmonics_options(case)
    from loopcheck.io.read_firmware import read_firmware_settings

    return read_firmware_settings(case.tables["firmware"], case.where("firmware"), damping_gain_used=True)


@FUZZ
@given(entry=st.sampled_from(OPTIONAL_NUMBERS), digits=st.integers(309, 4000), sign=st.sampled_from(["", "-"]),
       as_db=st.booleans())
def test_huge_numbers_in_optional_tables(entry, digits, sign, as_db):
    table, key, reader = entry
    raw = sign + "9" * digits
    if as_db and table == "targets":
        raw = f'"{sign}1e{digits} dB"'
    case = case_from_string(case_text(extra=f"\n[{table}]\n{key} = {raw}\n"), "fuzz.toml")
    with pytest.raises(CaseError) as e:
        _read_optional(case, table, reader)
    assert key in str(e.value) and "\n" not in str(e.value) and len(str(e.value)) < 400
