"""Mutated demo cases through every command (issue 11), property-based.

Hypothesis takes one of the demo cases in cases/, breaks one thing in it and
runs one of the eight commands on the result. Every mutation here is a
physical impossibility or a malformed entry that must never be analysed:

- malformed or nonsensical units: "1.5 mm" or "20 uH" where an inductance or
  a capacitance belongs, "nan H", "1e400 H", an empty string, a word;
- impossible values: a negative or zero inductance or capacitance, fs <= 0,
  a computation delay outside 0..4 samples, Kp <= 0;
- resonators: a repeated harmonic, h <= 1, a harmonic at or above fs/2, a
  harmonic that is not a whole number;
- wrong types (a boolean, a list, a table where a number belongs, a number
  where a table belongs), a missing required key, and a key with a typo
  (which must get a "did you mean" hint).

Each must give exit 2 and exactly one line ``error: FILE: [table] key: ...``
naming the file, the table and the key, with no traceback and no output
file. The demo cases are invented scenarios; hypothesis runs derandomized
with bounded examples.
"""

from __future__ import annotations

import glob
import os
import tomllib

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from loopcheck.cli.main import app

ENV = {"COLUMNS": "200", "NO_COLOR": "1"}
ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
DEMOS = sorted(glob.glob(os.path.join(ROOT, "cases", "*.toml")))

COMMANDS = {  # quick arguments, in case a mutation were (wrongly) analysed
    "check": [],
    "map": ["--x-points", "3", "--y-points", "3", "-q"],
    "grid": ["--points", "3", "-q"],
    "pick": ["--points", "5", "--lg-points", "2", "-q"],
    "export": [],
    "simulate": ["--duration", "2 ms"],
    "harmonics": [],
    "report": ["-q"],
}

INDUCTANCE_BAD = ['"1.5 mm"', '"nan H"', '"1e400 H"', '"-1 mH"', '""', '"0 H"', '"1.5 mF"', '"abc"', "true",
                  "[1, 2]", "{ a = 1 }", "-0.0015"]
# (table, key) -> values that must be refused
BAD = {
    ("filter", "L1"): INDUCTANCE_BAD,
    ("filter", "L2"): INDUCTANCE_BAD,
    ("filter", "C"): ['"0 F"', '"-1 uF"', '"nan F"', '"20 uH"', '""', '"inf uF"', "false", "0"],
    ("filter", "R1"): ['"-1 Ohm"', '"1 H"', '"nan Ohm"'],
    ("grid", "f"): ['"0 Hz"', '"-50 Hz"', '"50 kH"', '""'],
    ("sampling", "fs"): ['"0 Hz"', '"-10 kHz"', '"10 kH"', '""', '"nan Hz"', "0", "-1e4"],
    ("sampling", "delay"): ["4.5", "-0.1", '"one"', "nan", "inf", "[1]"],
    ("control", "Kp"): ['"0 V/A"', '"-5 V/A"', '"10 A/V"', '"nan V/A"', '""'],
    ("control", "Hi"): ['"5 A/V"', '"nan V/A"', '"1e400 V/A"'],
    ("control", "kind"): ['"PID"', '"p"', "1", '""'],
    ("control", "feedback"): ['"grid-side"', '""', "true"],
    ("control", "harmonics"): ["[5, 5]", "[0]", "[-3]", "[1]", "[3.5]", '["3rd"]', "[100000]", "5"],
}
REQUIRED = [("filter", "L1"), ("filter", "C"), ("filter", "L2"), ("sampling", "fs"), ("control", "Kp"),
            ("control", "kind"), ("control", "feedback")]


def _value(v) -> str:
    """TOML text of a value of the demo cases (strings, numbers, booleans,
    lists, inline tables)."""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, list):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{k} = {_value(x)}" for k, x in v.items()) + " }"
    raise TypeError(type(v))


def dump(doc: dict, raw: dict | None = None) -> str:
    """The case as TOML; ``raw`` maps (table, key) to TOML text written as is
    (the mutated value), or to None (key removed)."""
    raw = raw or {}
    top = [f"{k} = {_value(v)}" for k, v in doc.items() if not isinstance(v, dict)]
    out = top
    for table, body in doc.items():
        if not isinstance(body, dict):
            continue
        if (table, None) in raw:  # the whole table replaced by a value
            out.insert(0, f"{table} = {raw[(table, None)]}")
            continue
        out.append(f"[{table}]")
        for k, v in body.items():
            text = raw.get((table, k), _value(v))
            if text is not None:
                out.append(f"{k} = {text}")
        for (t, k), text in raw.items():
            if t == table and k is not None and k not in body and text is not None:
                out.append(f"{k} = {text}")
    return "\n".join(out) + "\n"


def _typo(key: str, draw) -> str:
    how = draw(st.sampled_from(["double", "swap", "case", "drop"]))
    if how == "double":
        return key + key[-1]
    if how == "swap" and len(key) >= 2:
        return key[1] + key[0] + key[2:]
    if how == "case" and key.lower() != key.upper():
        return key.swapcase()
    return key[:-1] + "x" if len(key) > 1 else key + "x"


@st.composite
def mutations(draw):
    """(demo path, case text, table, key, what the message must contain)."""
    path = draw(st.sampled_from(DEMOS))
    with open(path, "rb") as fh:
        doc = tomllib.load(fh)
    kind = draw(st.sampled_from(["value", "value", "value", "missing", "typo", "table"]))
    if kind == "value":
        table, key = draw(st.sampled_from(sorted(BAD)))
        bad = draw(st.sampled_from(BAD[(table, key)]))
        return path, dump(doc, {(table, key): bad}), [f"[{table}] {key}:"]
    if kind == "missing":
        table, key = draw(st.sampled_from(REQUIRED))
        return path, dump(doc, {(table, key): None}), [f"[{table}] {key}: missing"]
    if kind == "typo":
        table = draw(st.sampled_from(["filter", "grid", "sampling", "control"]))
        key = draw(st.sampled_from(sorted(doc[table])))
        wrong = _typo(key, draw)
        if wrong in doc[table]:
            wrong = key + "_"
        text = dump(doc, {(table, key): None, (table, wrong): _value(doc[table][key])})
        return path, text, [f"[{table}] {wrong}: unknown key", f'did you mean "{key}"']
    table = draw(st.sampled_from(["filter", "grid", "sampling", "control"]))
    return path, dump(doc, {(table, None): draw(st.sampled_from(["3", '"x"', "[1, 2]", "true"]))}), [f"{table}:"]


def test_the_dumper_reproduces_every_demo_case():
    for path in DEMOS:
        with open(path, "rb") as fh:
            doc = tomllib.load(fh)
        assert tomllib.loads(dump(doc)) == doc, path


@settings(derandomize=True, max_examples=60, deadline=None, database=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(m=mutations(), command=st.sampled_from(sorted(COMMANDS)))
def test_a_broken_demo_case_is_one_line_naming_the_key(tmp_path_factory, m, command):
    demo, text, needles = m
    tmp = tmp_path_factory.mktemp("mut")
    case = tmp / os.path.basename(demo)
    case.write_text(text, encoding="utf-8")
    out = ["-o", str(tmp / "out.html")] if command == "report" else []
    r = CliRunner().invoke(app, [command, str(case), *out, *COMMANDS[command]], env=ENV)
    assert r.exit_code == 2, (command, text, r.exit_code, r.stdout[-500:], r.stderr)
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1, (command, r.stderr)
    assert lines[0].startswith(f"error: {case}: "), lines[0]
    for n in needles:
        assert n in lines[0], (n, lines[0])
    assert "Traceback" not in r.stderr and r.stdout == "", (r.stdout, r.stderr)
    assert os.listdir(tmp) == [case.name]  # no output, no temporary file


def test_the_mutations_cover_every_bad_value():
    """Every listed bad value is refused by the reader with the key named
    (the property test above samples them; this runs each once)."""
    from loopcheck.io.casefile import CaseError, case_from_string

    with open(DEMOS[0], "rb") as fh:
        doc = tomllib.load(fh)
    for (table, key), values in BAD.items():
        for bad in values:
            try:
                case_from_string(dump(doc, {(table, key): bad}), "demo.toml")
            except CaseError as e:
                assert f"[{table}] {key}:" in str(e) and "\n" not in str(e), (table, key, bad, str(e))
            else:
                raise AssertionError(f"[{table}] {key} = {bad} was accepted")
