"""`loopcheck grid` and `loopcheck pick` on case files: JSON contract,
human output, figures, SCR ranges, Monte Carlo reproducibility, and
one-line errors with exit code 2 and nothing half-written."""

import json
import math

import pytest
import scipy.stats as st
from typer.testing import CliRunner

from loopcheck.cli.main import app

ENV = {"COLUMNS": "200", "NO_COLOR": "1"}
runner = CliRunner()

# Invented scenario: 20 kHz sampling, resonance 2.7 kHz below fs/6, PR
# control of the grid current with capacitor-current damping.
CASE = """
name = "test 20 kHz"
[filter]
L1 = "1.2 mH"
C = "10 uF"
L2 = "0.5 mH"
[grid]
f = "50 Hz"
Lg = "1 mH"
Lg_range = ["0 mH", "6 mH"]
[sampling]
fs = "20 kHz"
delay = 1
[control]
feedback = "grid"
kind = "PR"
Kp = "2.5 V/A"
Kr = "200 V/A/s"
Hi = "6 V/A"
"""

TOL = """
[tolerance]
C = "\u00b15 %"
L1 = { band = "-10 %", distribution = "normal" }
"""

# Invented bench scenario: no damping, resonance above fs/6 on a stiff grid.
BENCH = """
[filter]
L1 = "1.2 mH"
C = "10 uF"
L2 = "0.4 mH"
R1 = "30 mOhm"
[grid]
f = "50 Hz"
S = "15 kVA"
V = "400 V"
scr_range = [17, 200]
[sampling]
fs = "12 kHz"
[control]
feedback = "grid"
kind = "PR"
Kp = "4 V/A"
Kr = "300 V/A/s"
"""


def _write(tmp_path, text, name="case.toml"):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def _run(*args):
    return runner.invoke(app, [str(a) for a in args], env=ENV)


def test_grid_json_contract(tmp_path):
    case = _write(tmp_path, CASE + TOL)
    r = _run("grid", case, "--json", "--points", "5", "-q")
    assert r.exit_code == 0, r.stderr
    doc = json.loads(r.stdout)
    assert doc["Lg_range_H"] == [0.0, 0.006]
    iv = doc["stable_Lg_intervals"]
    assert isinstance(iv, list) and all(len(x) == 2 and 0.0 <= x[0] <= x[1] <= 0.006 for x in iv)
    assert iv == [[0.0, 0.006]]
    w = doc["worst"]
    assert 0.0 <= w["Lg_H"] <= 0.006
    for key in ("phase_margin_deg", "gain_margin_lower_db", "gain_margin_upper_db", "sensitivity_peak", "verdict"):
        assert key in w
    assert len(doc["table"]) == 5 and len(doc["corners"]) == 4
    assert doc["tolerances"][0] == {"component": "L1", "low": -0.1, "high": 0.0, "distribution": "normal"}
    assert "licensed" in doc["caution"]


def test_grid_human_output(tmp_path):
    case = _write(tmp_path, CASE)
    r = _run("grid", case, "--points", "4")
    assert r.exit_code == 0, r.stderr
    out = r.stdout
    assert "stable for" in out and "worst point" in out and "critical freq." in out
    assert "0 .. 6 mH (the whole range)" in out
    assert "caution:" in out


def test_scr_range_uses_the_textbook_definition(tmp_path):
    """SCR = S_sc / S_rated with S_sc = V^2 / (2 pi f Lg) for an inductive
    grid (NERC, "Reliability Guideline: Integrating Inverter-Based
    Resources into Low Short Circuit Strength Systems", 2017), written out
    here: the grid range and the reported SCRs must follow it."""
    case = _write(tmp_path, BENCH)
    r = _run("grid", case, "--json", "--points", "3", "-q")
    assert r.exit_code == 0, r.stderr
    doc = json.loads(r.stdout)

    def lg(scr):
        return 400.0**2 / (2 * math.pi * 50.0 * scr * 15e3)

    assert doc["Lg_range_H"] == pytest.approx([lg(200), lg(17)], rel=1e-12)
    assert doc["scr_range"] == pytest.approx([17, 200], rel=1e-12)
    for row in doc["table"]:
        assert row["scr"] == pytest.approx(400.0**2 / (2 * math.pi * 50.0 * row["Lg_H"] * 15e3), rel=1e-12)
    # this undamped bench design loses stability inside the range
    assert doc["stable_over_range"] is False
    assert doc["worst"]["verdict"] == "unstable"
    assert _run("grid", case, "-q", "--fail-on-unstable").exit_code == 4


def test_figures_are_written(tmp_path):
    case = _write(tmp_path, BENCH)
    png = tmp_path / "out" / "grid.png"
    r = _run("grid", case, "-o", png, "--vs-scr", "-q")
    assert r.exit_code == 0, r.stderr
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    case2 = _write(tmp_path, CASE, "c2.toml")
    svg = tmp_path / "pick.svg"
    r = _run("pick", case2, "-o", svg, "--points", "21", "--lg-points", "5", "-q")
    assert r.exit_code == 0, r.stderr
    assert b"<svg" in svg.read_bytes()[:400]
    assert not [p for p in tmp_path.rglob("*.tmp*")]  # no temporary files left


def test_monte_carlo_json_is_reproducible_and_interval_is_exact(tmp_path):
    case = _write(tmp_path, BENCH)
    args = ("grid", case, "--json", "--points", "3", "--monte-carlo", "300", "--seed", "4", "-q")
    a = json.loads(_run(*args).stdout)["monte_carlo"]
    b = json.loads(_run(*args).stdout)["monte_carlo"]
    assert a == b and a["units"] == 300 and a["seed"] == 4
    k = a["unstable"]
    assert 0 < k < 300
    ci = st.binomtest(k, 300).proportion_ci(confidence_level=0.95, method="exact")  # Clopper-Pearson 1934
    assert a["unstable_interval"] == pytest.approx([ci.low, ci.high], abs=1e-12)
    c = json.loads(_run("grid", case, "--json", "--points", "3", "--monte-carlo", "300", "--seed", "5", "-q").stdout)
    assert c["monte_carlo"]["unstable"] != k or c["monte_carlo"]["worst_unit"] != a["worst_unit"]


def test_pick_json_contract(tmp_path):
    case = _write(tmp_path, CASE)
    r = _run("pick", case, "--json", "--points", "31", "--lg-points", "7", "-q")
    assert r.exit_code == 0, r.stderr
    doc = json.loads(r.stdout)
    assert isinstance(doc["Hi"], float)
    (lo, hi), = doc["Hi_interval"]
    assert lo < doc["Hi"] < hi
    assert doc["meets_targets"] is True and doc["verified_stable"] is True
    assert {e["side"] for e in doc["interval_ends"]} == {"lower", "upper"}
    assert doc["units"]["Hi"] == "V/A"


def test_pick_impossible_targets_empty_interval_and_message(tmp_path):
    case = _write(tmp_path, CASE)
    r = _run("pick", case, "--json", "--phase-margin", "85", "--points", "21", "--lg-points", "5", "-q")
    assert r.exit_code == 0, r.stderr
    doc = json.loads(r.stdout)
    assert doc["Hi_interval"] == [] and doc["meets_targets"] is False
    assert "phase margin" in doc["message"] and "Lg =" in doc["message"]
    r2 = _run("pick", case, "--phase-margin", "85", "--points", "21", "--lg-points", "5", "-q", "--fail-if-none")
    assert r2.exit_code == 4
    assert "No damping gain" in r2.stdout


def test_targets_table_is_used(tmp_path):
    case = _write(tmp_path, CASE + '\n[targets]\nphase_margin = "45 deg"\ngain_margin = "6 dB"\n')
    doc = json.loads(_run("grid", case, "--json", "--points", "3", "-q").stdout)
    assert doc["targets"]["phase_margin_deg"] == 45.0 and doc["targets"]["gain_margin_db"] == 6.0


@pytest.mark.parametrize("text,args,needle", [
    (CASE.replace('Lg_range = ["0 mH", "6 mH"]\n', ""), [], "[grid] Lg_range: missing"),
    (CASE + '\n[tolerance]\nC = "10 mH"\n', [], "[tolerance] C:"),
    (CASE + '\n[tolerance]\nCf = "10 %"\n', [], "[tolerance] Cf: unknown key"),
    (CASE + '\n[targets]\nphase_margin = "abc"\n', [], "[targets] phase_margin"),
    (CASE, ["--lg-range", "0 mH", "6 uF"], "--lg-range"),
    (CASE, ["-o", "fig.txt"], "-o"),
])
@pytest.mark.parametrize("command", ["grid", "pick"])
def test_bad_input_one_line_exit_2(tmp_path, text, args, needle, command):
    case = _write(tmp_path, text)
    r = _run(command, case, *args, "-q")
    assert r.exit_code == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error:") and needle in lines[0]
    assert "Traceback" not in r.stderr and r.stdout == ""
    assert not (tmp_path / "fig.txt").exists()


def test_kp_range_needs_also_kp(tmp_path):
    case = _write(tmp_path, CASE)
    r = _run("pick", case, "--kp-range", "1", "5", "-q")
    assert r.exit_code == 2 and "--also-kp" in r.stderr


def test_help_lists_both_commands():
    r = runner.invoke(app, ["--help"], env=ENV)
    assert r.exit_code == 0 and "grid" in r.stdout and "pick" in r.stdout
    for cmd in ("grid", "pick"):
        h = runner.invoke(app, [cmd, "--help"], env=ENV)
        assert h.exit_code == 0 and "--json" in h.stdout
