"""Output paths of every command that writes files: a path that cannot be
written (a directory given as a file, a file given as a directory, a parent
that is a file) is bad input like a bad case key: one line ``error: <option>
<path>: <why>`` on stderr, exit code 2, no traceback, nothing on stdout, and
nothing written (the check runs before the long work).

The case is invented demo data (a 10 kHz grid-side PR design with
capacitor-current damping)."""

from __future__ import annotations

import os

import pytest
from typer.testing import CliRunner

from loopcheck.cli.main import app
from loopcheck.cli.common import output_problem

ENV = {"COLUMNS": "200", "NO_COLOR": "1"}

CASE = """
name = "output-path test"
[filter]
L1 = "1.5 mH"
C  = "20 uF"
L2 = "0.6 mH"
[grid]
f = "50 Hz"
Lg = "0.5 mH"
Lg_range = ["0 mH", "2 mH"]
S = "20 kVA"
V = "400 V"
[sampling]
fs = "10 kHz"
[control]
feedback = "grid"
kind = "PR"
Kp = "5 V/A"
Kr = "300 V/A/s"
Hi = "7 V/A"
[pwm]
dc_link = "750 V"
"""

# (command, option, what the option names: "file" or "dir", extra arguments)
WRITERS = [
    ("map", "-o", "file", ["--x-points", "5", "--y-points", "5", "-q"]),
    ("map", "--csv", "file", ["--x-points", "5", "--y-points", "5", "-q"]),
    ("grid", "-o", "file", ["--points", "3", "-q"]),
    ("pick", "-o", "file", ["--points", "11", "--lg-points", "3", "-q"]),
    ("export", "-o", "dir", []),
    ("export", "--header", "file", []),
    ("export", "--json-out", "file", []),
    ("simulate", "-o", "file", ["--duration", "5 ms"]),
    ("simulate", "--csv", "file", ["--duration", "5 ms"]),
    ("harmonics", "-o", "file", []),
    ("report", "-o", "file", ["-q"]),
]


@pytest.fixture
def case(tmp_path):
    p = tmp_path / "case.toml"
    p.write_text(CASE, encoding="utf-8")
    return p


def _suffix(option: str, command: str) -> str:
    if option == "--csv":
        return ".csv"
    if option == "--header":
        return ".h"
    if option == "--json-out":
        return ".json"
    return ".html" if command == "report" else ".png"


def _assert_one_line_exit_2(result, *needles):
    assert result.exit_code == 2, (result.exit_code, result.stdout, result.stderr)
    assert result.stdout == ""
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), result.stderr
    assert "Traceback" not in result.stderr
    for needle in needles:
        assert needle in lines[0], (needle, lines[0])


def _listing(root):
    return sorted(os.path.relpath(os.path.join(d, f), root) for d, _, fs in os.walk(root) for f in fs + ["."])


@pytest.mark.parametrize("command, option, kind, extra", WRITERS, ids=[f"{c} {o}" for c, o, _, _ in WRITERS])
def test_parent_that_is_a_file(tmp_path, case, command, option, kind, extra):
    # "case.toml/out.png": the folder the output needs is a regular file
    target = tmp_path / "case.toml" / ("out" if kind == "dir" else "out" + _suffix(option, command))
    before = _listing(tmp_path)
    r = CliRunner().invoke(app, [command, str(case), option, str(target), *extra], env=ENV)
    _assert_one_line_exit_2(r, f"{option} {target}", "is a file, not a directory")
    assert _listing(tmp_path) == before  # nothing written, no temporary left


@pytest.mark.parametrize("command, option, kind, extra",
                         [w for w in WRITERS if w[2] == "file"], ids=[f"{c} {o}" for c, o, k, _ in WRITERS if k == "file"])
def test_directory_given_as_a_file(tmp_path, case, command, option, kind, extra):
    target = tmp_path / ("folder" + _suffix(option, command))
    target.mkdir()
    before = _listing(tmp_path)
    r = CliRunner().invoke(app, [command, str(case), option, str(target), *extra], env=ENV)
    _assert_one_line_exit_2(r, str(target), "is a directory")
    assert _listing(tmp_path) == before


def test_export_directory_given_as_an_existing_file(tmp_path, case):
    r = CliRunner().invoke(app, ["export", str(case), "-o", str(case)], env=ENV)
    _assert_one_line_exit_2(r, f"-o {case}", "exists and is not a directory")


def test_missing_folders_are_created(tmp_path, case):
    out = tmp_path / "a" / "b" / "grid.png"
    r = CliRunner().invoke(app, ["grid", str(case), "-o", str(out), "--points", "3", "-q"], env=ENV)
    assert r.exit_code == 0, r.stderr
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert sorted(p.name for p in out.parent.iterdir()) == ["grid.png"]


def test_output_problem_reasons(tmp_path):
    f = tmp_path / "f.txt"
    f.write_text("x")
    assert output_problem(tmp_path / "new" / "deeper" / "x.png") is None
    assert output_problem(f) is None  # an existing file is replaced
    assert output_problem(tmp_path) == "is a directory; give a file name"
    assert "is a file, not a directory" in output_problem(f / "x.png")
    assert output_problem(tmp_path, directory=True) is None
    assert output_problem(f, directory=True) == "exists and is not a directory"
