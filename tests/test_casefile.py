"""Case files: SI values, defaults, warnings, and one-line errors (exit 2).

Error classes come from the issue's list: unknown key and table, missing
key, wrong unit, non-numeric, negative or zero component, delay outside
0..1, unknown choices, resonance at or above fs/2, unreadable TOML. Each is
checked through the real CLI: exit code 2, one line ``error: <file>: ...``
on stderr naming the key, no traceback, nothing on stdout.

The resonance used in the fs/2 checks is the lossless LCL formula
fr = sqrt((L1+L2)/(L1*L2*C))/(2*pi) (M. Liserre, F. Blaabjerg and S. Hansen,
"Design and Control of an LCL-Filter-Based Three-Phase Active Rectifier",
IEEE Trans. Ind. Appl., vol. 41, no. 5, 2005).
"""

import copy
import math

import pytest
from typer.testing import CliRunner

from loopcheck.io.casefile import (
    REQUIRED,
    CaseError,
    case_from_string,
    check_keys,
    read_case,
    read_choice,
    read_int_list,
    read_pair,
    read_quantity,
    where,
)
from loopcheck.cli.main import app

ENV = {"COLUMNS": "200", "NO_COLOR": "1"}
runner = CliRunner()

BASE = {
    None: {"name": '"base"'},
    "filter": {"L1": '"1.8 mH"', "C": '"4.7 uF"', "L2": '"0.6 mH"'},
    "grid": {"f": '"50 Hz"', "Lg": '"0 mH"'},
    "sampling": {"fs": '"10 kHz"', "delay": "1"},
    "control": {"feedback": '"grid"', "kind": '"PR"', "Kp": '"10 V/A"', "Kr": '"500 V/A/s"', "Hi": '"0 V/A"'},
}


def render(tables: dict) -> str:
    lines = []
    for name, body in tables.items():
        if name is not None:
            lines.append(f"[{name}]")
        lines += [f"{k} = {v}" for k, v in body.items()]
    return "\n".join(lines) + "\n"


def variant(**changes) -> str:
    """BASE with changes: table__key="value" sets, table__key=None deletes."""
    t = copy.deepcopy(BASE)
    for spec, value in changes.items():
        table, key = spec.split("__")
        table = None if table == "top" else table.replace("_dot_", ".")
        if value is None:
            t[table].pop(key, None)
        else:
            t.setdefault(table, {})[key] = value
    return render(t)


def run_cli(tmp_path, text: str, name: str = "case.toml"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path, runner.invoke(app, ["check", str(path)], env=ENV)


def assert_one_line_error(result, path, *needles):
    assert result.exit_code == 2, (result.exit_code, result.stdout, result.stderr)
    assert result.stdout == ""
    err = result.stderr.strip("\n")
    assert "\n" not in err, err
    assert err.startswith(f"error: {path}: "), err
    assert "Traceback" not in result.output
    for needle in needles:
        assert needle in err, (needle, err)
    return err


# --- valid input -------------------------------------------------------------


def test_base_case_values_in_si():
    case = case_from_string(render(BASE), "base.toml")
    d = case.design
    assert (d.filter.L1_H, d.filter.C_F, d.filter.L2_H) == (1.8e-3, 4.7e-6, 0.6e-3)
    assert d.sampling.fs_hz == 10e3 and d.sampling.delay == 1.0
    assert d.control.Kp_V_per_A == 10.0 and d.control.Kr == 500.0
    # documented defaults
    assert (d.filter.R1_ohm, d.filter.R2_ohm, d.grid.Rg_ohm) == (0.0, 0.0, 0.0)
    assert d.filter.damping.kind == "none"
    assert d.control.integrator == "forward-euler" and d.control.resonator == "tustin-prewarp"
    assert d.control.harmonics == () and d.control.wc_rad_s == 0.0
    assert d.grid.Lg_range_H is None
    assert d.name == "base" and case.warnings == ()


def test_name_defaults_to_file_stem():
    assert case_from_string(variant(top__name=None), "cases/my-inverter.toml").design.name == "my-inverter"


def test_bare_numbers_are_si():
    text = variant(filter__L1="1.8e-3", filter__C="4.7e-6", sampling__fs="10000", control__Kp="10")
    d = case_from_string(text, "x.toml").design
    assert d.filter.L1_H == 1.8e-3 and d.filter.C_F == 4.7e-6 and d.sampling.fs_hz == 1e4


def test_micro_and_ohm_spellings():
    text = variant(filter__C='"4.7 \u00b5F"', filter__R1='"20 m\u03a9"', filter__R2='"5 mOhm"')
    d = case_from_string(text, "x.toml").design
    assert d.filter.C_F == 4.7e-6 and d.filter.R1_ohm == 0.02 and d.filter.R2_ohm == 0.005


@pytest.mark.parametrize(
    "damping, expected",
    [
        ({"kind": '"series-R"', "Rd": '"2 Ohm"'}, ("series-R", 2.0, 0.0, 0.0)),
        ({"kind": '"split-RC"', "Rd": '"3 Ohm"', "Cd": '"2.2 uF"'}, ("split-RC", 3.0, 2.2e-6, 0.0)),
        (
            {"kind": '"split-RLC"', "Rd": '"3 Ohm"', "Cd": '"2.2 uF"', "Ld": '"0.1 mH"'},
            ("split-RLC", 3.0, 2.2e-6, 1e-4),
        ),
        ({"kind": '"none"'}, ("none", 0.0, 0.0, 0.0)),
    ],
)
def test_passive_damping_variants(damping, expected):
    t = copy.deepcopy(BASE)
    t["filter.damping"] = damping
    t = {k: t[k] for k in [None, "filter", "filter.damping", "grid", "sampling", "control"]}
    dmp = case_from_string(render(t), "x.toml").design.filter.damping
    assert (dmp.kind, dmp.Rd_ohm, dmp.Cd_F, dmp.Ld_H) == expected


def test_inline_damping_table_is_the_same():
    text = variant(filter__damping='{ kind = "series-R", Rd = "2 Ohm" }')
    assert case_from_string(text, "x.toml").design.filter.damping.Rd_ohm == 2.0


def test_ranges_and_optional_tables_are_kept():
    text = variant(grid__Lg_range='["0 mH", "4 mH"]', grid__Lg='"1 mH"', map__x='"fr/fs"', tolerance__C='"\u00b110 %"')
    case = case_from_string(text, "x.toml")
    assert case.design.grid.Lg_range_H == (0.0, 4e-3)
    assert case.tables == {"map": {"x": "fr/fs"}, "tolerance": {"C": "\u00b110 %"}}
    assert case.where("map") == "x.toml: [map]"


def test_pi_and_harmonics():
    text = variant(control__kind='"PI"', control__Ki='"3000 V/A/s"', control__Kr=None)
    assert case_from_string(text, "x.toml").design.control.Ki_V_per_As == 3000.0
    text = variant(control__harmonics="[3, 5, 7, 11, 13]")
    assert case_from_string(text, "x.toml").design.control.harmonics == (3, 5, 7, 11, 13)


# --- warnings (implausible, not impossible) ------------------------------------


@pytest.mark.parametrize(
    "changes, needle",
    [
        ({"filter__L1": "1.8"}, 'did you mean "1.8 mH"'),
        ({"filter__C": "0.0047"}, "implausibly large for a filter capacitor"),
        ({"filter__R1": '"50 Ohm"'}, "implausibly large"),
        ({"sampling__fs": '"250 kHz"'}, "unusual"),
        ({"grid__f": '"400 Hz"', "filter__C": '"1 uF"', "sampling__fs": '"40 kHz"'}, "unusual for a public grid"),
        ({"control__wc": '"5 rad/s"', "control__Kr": '"20 V/A/s"'}, "takes Kr in V/A"),
        ({"control__Kr": '"20 V/A"'}, "takes Kr in V/A/s"),
        ({"control__Ki": '"100 V/A/s"'}, "Ki: not used"),
        ({"filter__C": '"300 uF"', "filter__L1": '"5 mH"', "filter__L2": '"3 mH"'}, "below 10 times the fundamental"),
        ({"grid__Lg": '"5 mH"', "grid__Lg_range": '["0 mH", "4 mH"]'}, "outside the range"),
    ],
)
def test_implausible_values_warn(tmp_path, changes, needle):
    case = case_from_string(variant(**changes), "w.toml")
    assert any(needle in w for w in case.warnings), case.warnings
    assert all(w.startswith("w.toml: [") and "\n" not in w for w in case.warnings)


def test_warnings_reach_stderr_and_exit_0(tmp_path):
    path, result = run_cli(tmp_path, variant(filter__L2="0.6"))
    assert result.exit_code == 0, result.stderr
    assert f"warning: {path}: [filter] L2:" in result.stderr
    assert "warning" not in result.stdout.split("warnings")[0]


def test_damping_keys_not_used_warn():
    text = variant(filter__damping='{ kind = "none", Rd = "2 Ohm" }')
    assert any("Rd: not used" in w for w in case_from_string(text, "x.toml").warnings)


# --- errors: one line, file and key, exit 2, through the CLI -------------------

ERRORS = [
    # (changes, needles in the message)
    ({"filter__L3": '"1 mH"'}, ["[filter] L3: unknown key", 'did you mean "L'] ),
    ({"control__Hl": '"2 V/A"'}, ["[control] Hl: unknown key", 'did you mean "Hi"']),
    ({"top__nme": '"x"'}, ["nme: unknown key", 'did you mean "name"']),
    ({"filtre__L1": '"1 mH"'}, ["[filtre]: unknown table", "did you mean [filter]"]),
    ({"filter__L2": None}, ["[filter] L2: missing", "inductance in H"]),
    ({"control__Kp": None}, ["[control] Kp: missing"]),
    ({"control__Kr": None}, ["[control] Kr: missing"]),
    ({"control__kind": '"PI"', "control__Kr": None}, ["[control] Ki: missing"]),
    ({"filter__C": '"10 mH"'}, ['[filter] C: expected a capacitance in F (e.g. "10 uF"), got "10 mH"']),
    ({"sampling__fs": '"10 kH"'}, ["[sampling] fs: expected a frequency in Hz"]),
    ({"control__Kp": '"10 A/V"'}, ["[control] Kp: expected a gain in V/A"]),
    ({"control__Kr": '"500 Hz"'}, ["[control] Kr: expected a resonant gain in V/A/s"]),
    ({"control__wc": '"5 Hz"'}, ["[control] wc: expected an angular frequency in rad/s"]),
    ({"filter__L1": '"abc"'}, ['[filter] L1: expected an inductance in H (e.g. "1.8 mH"), got "abc"']),
    ({"filter__L1": "true"}, ["[filter] L1: expected an inductance", "got true"]),
    ({"filter__L1": "nan"}, ["[filter] L1:", "finite"]),
    ({"filter__L1": '"-1.8 mH"'}, ["[filter] L1: must be greater than zero"]),
    ({"filter__C": '"0 uF"'}, ["[filter] C: must be greater than zero"]),
    ({"filter__L2": "0"}, ["[filter] L2: must be greater than zero"]),
    ({"filter__R1": '"-1 Ohm"'}, ["[filter] R1: must not be negative"]),
    ({"grid__Lg": '"-1 mH"'}, ["[grid] Lg: must not be negative"]),
    ({"sampling__fs": '"0 Hz"'}, ["[sampling] fs: must be greater than zero"]),
    ({"control__Kp": '"0 V/A"'}, ["[control] Kp: must be greater than zero"]),
    ({"sampling__delay": "4.5"}, ["[sampling] delay: must lie between 0 and 4"]),
    ({"sampling__delay": "-0.1"}, ["[sampling] delay: must lie between 0 and 4"]),
    ({"sampling__delay": '"one"'}, ["[sampling] delay: expected the total loop delay"]),
    ({"control__feedback": '"grid-side"'}, ['[control] feedback: expected one of "grid", "converter"', 'did you mean "grid"']),
    ({"control__kind": '"PID"'}, ['[control] kind: expected one of "P", "PI", "PR"']),
    ({"control__integrator": '"euler"'}, ['[control] integrator: expected one of "forward-euler"']),
    ({"control__resonator": '"bilinear"'}, ['[control] resonator: expected one of "tustin-prewarp"']),
    ({"filter_dot_damping__kind": '"series"'}, ['[filter.damping] kind: expected one of "none", "series-R"', 'did you mean "series-R"']),
    ({"filter_dot_damping__kind": '"split-RC"', "filter_dot_damping__Rd": '"1 Ohm"'}, ["[filter.damping] Cd: missing"]),
    ({"filter_dot_damping__kind": '"series-R"', "filter_dot_damping__Rd": '"0 Ohm"'}, ["[filter.damping] Rd: must be greater than zero"]),
    ({"grid__Lg_range": '["4 mH", "1 mH"]'}, ["[grid] Lg_range: the first value must not exceed the second"]),
    ({"grid__Lg_range": '"4 mH"'}, ["[grid] Lg_range: expected a list of two values"]),
    ({"grid__scr_range": "[2, 50]"}, ["[grid] scr_range: needs the rated power S", "missing: S, V"]),
    ({"grid__scr": "10", "grid__S": '"10 kVA"', "grid__V": '"400 V"'}, ["[grid] scr: give either Lg or scr"]),
    ({"grid__S": '"10 kW"'}, ["[grid] S: expected an apparent power in VA"]),
    ({"control__harmonics": "[3, 5, 5]"}, ["[control] harmonics: lists a number twice"]),
    ({"control__harmonics": "[1, 3]"}, ["[control] harmonics: values must be at least 2"]),
    ({"control__harmonics": '["3rd"]'}, ["[control] harmonics: expected a list of whole numbers"]),
    ({"control__harmonics": "[3, 101]"}, ["[control] harmonics: the resonator at 101 x 50 Hz = 5050 Hz is at or above fs/2"]),
    ({"top__name": "3"}, ["name: expected a text in quotes"]),
    ({"top__map": "3"}, ["map: expected a table ([map])"]),
]


@pytest.mark.parametrize("changes, needles", ERRORS, ids=[str(i) for i in range(len(ERRORS))])
def test_bad_input_is_one_line_exit_2(tmp_path, changes, needles):
    path, result = run_cli(tmp_path, variant(**changes))
    assert_one_line_error(result, path, *needles)


def fr_hz(L1, C, L2):
    # Liserre, Blaabjerg and Hansen 2005 (module docstring)
    return math.sqrt((L1 + L2) / (L1 * L2 * C)) / (2 * math.pi)


def test_resonance_with_grid_at_or_above_nyquist(tmp_path):
    # fr = 3.46 kHz with Lg = 0: fs = 6 kHz puts it above fs/2 = 3 kHz
    assert fr_hz(1.8e-3, 4.7e-6, 0.6e-3) > 3e3
    path, result = run_cli(tmp_path, variant(sampling__fs='"6 kHz"'))
    assert_one_line_error(result, path, "[sampling] fs:", "resonance with Lg", "at or above fs/2 = 3000 Hz")


def test_resonance_only_without_grid_at_or_above_nyquist(tmp_path):
    # with Lg = 1 mH the resonance (2.52 kHz) is below fs/2 = 3.25 kHz, without it (3.46 kHz) above
    fs = 6.5e3
    assert fr_hz(1.8e-3, 4.7e-6, 1.6e-3) < fs / 2 <= fr_hz(1.8e-3, 4.7e-6, 0.6e-3)
    path, result = run_cli(tmp_path, variant(sampling__fs='"6.5 kHz"', grid__Lg='"1 mH"'))
    assert_one_line_error(result, path, "[sampling] fs:", "resonance without Lg", "at or above fs/2 = 3250 Hz")


def test_resonance_exactly_at_nyquist_is_an_error():
    fs = 2.0 * fr_hz(1.8e-3, 4.7e-6, 0.6e-3)
    with pytest.raises(CaseError, match="at or above fs/2"):
        case_from_string(variant(sampling__fs=repr(fs)), "x.toml")
    with pytest.raises(CaseError, match="at or above fs/2"):
        case_from_string(variant(sampling__fs=repr(fs * (1 - 1e-9))), "x.toml")
    case_from_string(variant(sampling__fs=repr(fs * (1 + 1e-9))), "x.toml")  # just below: accepted


@pytest.mark.parametrize(
    "text, needle",
    [
        ("[filter]\nL1 = \n", "line 2, column"),
        ("[filter\nL1 = 1\n", "line 1, column"),
        ('name = "a"\nname = "b"\n', "line 2, column"),
        ('[filter]\nL1 = "1.8 mH\n', "line 2, column"),
    ],
)
def test_unreadable_toml_gives_line_and_column(tmp_path, text, needle):
    path, result = run_cli(tmp_path, text)
    assert_one_line_error(result, path, "not valid TOML", needle)


def test_missing_table(tmp_path):
    t = copy.deepcopy(BASE)
    del t["control"]
    path, result = run_cli(tmp_path, render(t))
    assert_one_line_error(result, path, "[control]: missing table")


def test_missing_file_and_directory(tmp_path):
    result = runner.invoke(app, ["check", str(tmp_path / "nope.toml")], env=ENV)
    assert_one_line_error(result, tmp_path / "nope.toml", "no such file")
    result = runner.invoke(app, ["check", str(tmp_path)], env=ENV)
    assert_one_line_error(result, tmp_path, "it is a directory")


def test_not_utf8(tmp_path):
    path = tmp_path / "latin1.toml"
    path.write_bytes('name = "b\u00e4se"\n'.encode("latin-1"))
    result = runner.invoke(app, ["check", str(path)], env=ENV)
    assert_one_line_error(result, path, "not UTF-8")


def test_all_bad_files_reported_before_any_output(tmp_path):
    good = tmp_path / "good.toml"
    good.write_text(render(BASE))
    bad1 = tmp_path / "bad1.toml"
    bad1.write_text(variant(filter__C='"10 mH"'))
    bad2 = tmp_path / "bad2.toml"
    bad2.write_text(variant(sampling__delay="5"))
    result = runner.invoke(app, ["check", str(good), str(bad1), str(bad2)], env=ENV)
    assert result.exit_code == 2 and result.stdout == ""
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 2
    assert lines[0].startswith(f"error: {bad1}: [filter] C:") and lines[1].startswith(f"error: {bad2}: [sampling] delay:")


def test_read_case_reads_files(tmp_path):
    p = tmp_path / "c.toml"
    p.write_text(render(BASE), encoding="utf-8")
    assert read_case(p).path == str(p)


# --- helpers for other modules' tables -----------------------------------------


def test_helpers_use_the_same_message_form():
    w = where("cases/x.toml", "map")
    assert w == "cases/x.toml: [map]"
    table = {"x": "fr/fs", "x_range": ["0 mH", "5 mH"], "x_points": 400, "y": "Hi"}
    check_keys(table, ("x", "x_range", "x_points", "y"), w)
    with pytest.raises(CaseError, match=r'^cases/x\.toml: \[map\] y: unknown key; \(allowed: x, x_range, x_points\)$'):
        check_keys(table, ("x", "x_range", "x_points"), w)
    with pytest.raises(CaseError, match=r'^cases/x\.toml: \[map\] x_pont: unknown key; did you mean "x_points"\?'):
        check_keys({"x_pont": 3}, ("x", "x_range", "x_points"), w)
    assert read_pair(table, "x_range", "inductance", w) == (0.0, 5e-3)
    assert read_quantity(table, "x_points", "ratio", w, positive=True) == 400.0
    assert read_quantity(table, "z", "gain", w, default=None) is None
    with pytest.raises(CaseError, match=r"^cases/x\.toml: \[map\] z: missing; expected a gain in V/A"):
        read_quantity(table, "z", "gain", w, REQUIRED)
    with pytest.raises(CaseError, match=r"must be at most 300"):
        read_quantity(table, "x_points", "ratio", w, maximum=300)
    assert read_choice(table, "y", ("Hi", "Kp"), w) == "Hi"
    with pytest.raises(CaseError, match='did you mean "Kp"'):
        read_choice({"y": "kp"}, "y", ("Hi", "Kp"), w)
    assert read_int_list({"h": [3, 5]}, "h", w) == (3, 5)


def test_docs_example_parses_and_error_examples_match():
    """The example at the top of docs/case-file.md is a valid case, and the
    error lines quoted there are what the reader says."""
    import re
    from pathlib import Path

    doc = (Path(__file__).resolve().parent.parent / "docs" / "case-file.md").read_text(encoding="utf-8")
    example = re.search(r"```toml\n(.*?)```", doc, re.DOTALL).group(1)
    case = case_from_string(example, "doc.toml")
    assert case.warnings == () and case.design.filter.damping.kind == "series-R"
    quoted = re.search(r"```\n(error: .*?)```", doc, re.DOTALL).group(1).splitlines()
    produced = {
        0: variant(filter__L3='"1 mH"'),
        2: variant(filter__L2=None),
        3: variant(filter__C='"10 mH"'),
        4: variant(filter__L1='"abc"'),
        5: variant(filter__C='"0 uF"'),
        6: variant(sampling__delay="4.5"),
        7: variant(control__feedback='"grid-side"'),
    }
    for index, text in produced.items():
        with pytest.raises(CaseError) as info:
            case_from_string(text, "cases/x.toml")
        assert quoted[index] == f"error: {info.value}", index
