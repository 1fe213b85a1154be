"""``loopcheck simulate`` and ``loopcheck harmonics`` through the CLI: the
printed rates against the engine's closed-loop poles (z = e^{sTs}: K. J.
Astrom and B. Wittenmark, "Computer-Controlled Systems", 3rd ed., 1997),
output files, one-line errors with exit code 2, nothing half-written.
Case values are invented for the tests."""

from __future__ import annotations

import json
import math
import subprocess
import sys

import pytest
from typer.testing import CliRunner

from loopcheck.engine.analysis import analyse
from loopcheck.io.casefile import read_case
from loopcheck.cli.main import app

ENV = {"COLUMNS": "200", "NO_COLOR": "1"}
runner = CliRunner()

CASE = """
name = "cli demo"
[filter]
L1 = "1.5 mH"
C  = "15 uF"
L2 = "0.8 mH"
[grid]
f = "50 Hz"
S = "12 kVA"
V = "400 V"
Lg_range = ["0 mH", "3 mH"]
[sampling]
fs = "16 kHz"
[control]
feedback = "grid"
kind = "PR"
Kp = "11 V/A"
Kr = "1500 V/A/s"
Hi = "10 V/A"
{extra}
"""

SCENARIO = """
[pwm]
dc_link = "700 V"
switching_frequency = "8 kHz"
update = "double"
[scenario]
duration = "30 ms"
[[scenario.events]]
at = "10 ms"
kind = "resonance-burst"
peak = "12 V"
"""


def write(tmp_path, extra=SCENARIO, name="demo.toml"):
    p = tmp_path / name
    p.write_text(CASE.format(extra=extra))
    return p


def invoke(*args):
    return runner.invoke(app, [str(a) for a in args], env=ENV)


def test_simulate_json_rates_match_closed_loop_poles(tmp_path):
    case = write(tmp_path)
    r = invoke("simulate", case, "--compare", "Hi=0", "--json")
    assert r.exit_code == 0, r.stderr
    rec = json.loads(r.stdout)
    design = read_case(case).design
    Ts = 1 / 16e3
    # the damped design: decays at its pole's rate; the undamped: grows
    for key, stable in (("design", True), ("comparison", False)):
        rc = rec[key]["rate_check"]
        assert rec[key]["verdict"] == ("stable" if stable else "unstable")
        assert (rc["simulated_rate_per_s"] < 0) == stable
        assert abs(rc["simulated_rate_per_s"] - rc["predicted_rate_per_s"]) <= 0.02 * abs(rc["predicted_rate_per_s"])
        assert abs(rc["simulated_frequency_hz"] - rc["predicted_frequency_hz"]) <= 0.01 * rc["predicted_frequency_hz"]
    # the comparison's growth is the engine's dominant pole (verdict of `check` with Hi = 0)
    from dataclasses import replace

    a0 = analyse(replace(design, control=replace(design.control, Hi_V_per_A=0.0)))
    z = a0.closed_loop_poles[0]
    assert rec["comparison"]["rate_check"]["simulated_rate_per_s"] == pytest.approx(math.log(abs(z)) / Ts, rel=0.02)
    assert rec["design"]["verdict"] == analyse(design).verdict


def test_simulate_text_figure_and_csv(tmp_path):
    case = write(tmp_path)
    fig = tmp_path / "out" / "wave.png"
    csv = tmp_path / "wave.csv"
    r = invoke("simulate", case, "--compare", "Hi=0", "-o", fig, "--csv", csv, "--duration", "25 ms")
    assert r.exit_code == 0, r.stderr
    out = r.stdout
    assert "rate sigma = ln|z|/Ts [1/s]" in out and "closed-loop pole" in out
    assert "engine verdict stable" in out and "engine verdict unstable" in out
    assert fig.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    lines = csv.read_text().splitlines()
    assert lines[0].startswith("# loopcheck simulation")
    assert lines[1] == "time_s,i1_A,i2_A,ic_A,vc_V,vg_V,vi_V,u_V,iref_A"
    n = 25e-3 * 16e3 * 20
    assert len(lines) == 2 + n
    assert (tmp_path / "wave.compare.csv").exists()
    # the CSV holds the library's waveform (wiring check)
    from loopcheck.io.read_scenario import parse_scenario
    from loopcheck.timedomain.simulate import simulate

    c = read_case(case)
    sc = parse_scenario(c.tables["scenario"], "x")
    from dataclasses import replace

    w = simulate(c.design, replace(sc, duration_s=25e-3))
    row = [float(x) for x in lines[2 + 4000].split(",")]
    assert row[2] == pytest.approx(w.i2_A[4000], rel=1e-8, abs=1e-9)


@pytest.mark.parametrize(
    "extra, needle",
    [
        ('[scenario]\nduration = "30 mH"', "[scenario] duration: expected a time in s"),
        ('[scenario]\n[[scenario.events]]\nat = "5 ms"\nkind = "grid-jump"', 'did you mean "grid-phase-jump"'),
        ('[scenario]\n[[scenario.events]]\nat = "5 ms"\nkind = "grid-inductance-step"\nLg = "3 uF"',
         "events[1] Lg: expected an inductance"),
        ('[scenario]\nduration = "20 ms"\n[[scenario.events]]\nat = "25 ms"\nkind = "voltage-pulse"',
         "events[1] at: 0.025 s is not before the end"),
        ('[scenario]\ngrid_harmonics = [{order = 5, share = "3 V"}]', "grid_harmonics[1] share: expected a percentage"),
        ('[scenario]\nstrat = "rest"', 'did you mean "start"'),
    ],
)
def test_bad_scenario_one_line_exit_2_nothing_written(tmp_path, extra, needle):
    case = write(tmp_path, extra=extra)
    fig = tmp_path / "never.png"
    r = invoke("simulate", case, "-o", fig)
    assert r.exit_code == 2
    assert r.stdout == ""
    err = r.stderr.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error: ") and str(case) in err[0] and needle in err[0]
    assert "Traceback" not in r.stderr
    assert not fig.exists()


@pytest.mark.parametrize(
    "args, needle",
    [
        (["--compare", "Kp=3"], "expected Hi=<gain>"),
        (["--compare", "Hi=3 mH"], "expected a gain in V/A"),
        (["--event", "resonance-burst at=5ms peak=2A"], "peak: expected a voltage"),
        (["--event", "voltage-pulse at=50ms"], "not before the end of the run"),
        (["--duration", "12"], "must lie between 0 and 10 s"),
        (["-o", "fig.jpg"], "must end in .png, .svg or .pdf"),
    ],
)
def test_bad_options_exit_2(tmp_path, args, needle):
    case = write(tmp_path)
    r = invoke("simulate", case, *args)
    assert r.exit_code == 2
    assert needle in r.stderr and len(r.stderr.strip().splitlines()) == 1


def test_simulate_without_scenario_uses_default_burst(tmp_path):
    case = write(tmp_path, extra="")
    r = invoke("simulate", case, "--json")
    assert r.exit_code == 0, r.stderr
    rec = json.loads(r.stdout)
    assert rec["duration_s"] == pytest.approx(0.06)
    assert rec["events"][0]["event"].startswith("burst")


def test_short_duration_keeps_the_default_burst_inside_the_run(tmp_path):
    # no [scenario] and no --event: the default burst (20 ms) moves to a third
    # of a shorter run instead of failing with "not before the end of the run"
    case = write(tmp_path, extra="")
    rec = json.loads(invoke("simulate", case, "--duration", "9 ms", "--json").stdout)
    assert rec["duration_s"] == pytest.approx(9e-3)
    assert rec["events"][0]["time_s"] == pytest.approx(3e-3) and rec["events"][0]["event"].startswith("burst")
    # an explicit event keeps its time and is still checked
    r = invoke("simulate", case, "--duration", "9 ms", "--event", "voltage-pulse at=20ms")
    assert r.exit_code == 2 and "not before the end of the run" in r.stderr


def test_harmonics_command(tmp_path):
    case = write(tmp_path)
    fig = tmp_path / "h.svg"
    r = invoke("harmonics", case, "--json", "-o", fig)
    assert r.exit_code == 0, r.stderr
    rec = json.loads(r.stdout)
    h = rec["harmonics"]
    worst = h["worst"]
    assert worst["margin_db"] == min(s["margin_db"] for s in h["sidebands"])
    assert worst["frequency_hz"] in (7900.0, 8100.0)  # fsw -+ 2 f1 dominate double-update three-phase PWM
    assert len(h["lg_sweep"]) >= 9 and h["worst_over_range"]["Lg_H"] == 0.0
    labels = [v["label"] for v in rec["damping_losses"]["variants"]]
    assert labels[0].startswith("active") and rec["damping_losses"]["variants"][0]["total_W"] == 0.0
    assert fig.read_text().lstrip().startswith("<?xml")
    text = invoke("harmonics", case)
    assert text.exit_code == 0
    assert "worst sideband" in text.stdout and "IEEE Std 519-2014" in text.stdout and "1547-2018" in text.stdout
    assert "interconnection rules govern" in text.stdout


def test_harmonics_warns_when_the_loop_is_unstable(tmp_path):
    # Hi = 0 leaves this filter (resonance below fs/6, grid-current feedback)
    # unstable; the sidebands presume a stable loop, so the command must say so
    extra = '[pwm]\ndc_link = "700 V"\nupdate = "double"'
    stable = write(tmp_path, extra=extra)
    unstable_text = CASE.format(extra=extra).replace('Hi = "10 V/A"', 'Hi = "0 V/A"')
    unstable = tmp_path / "undamped.toml"
    unstable.write_text(unstable_text)
    assert not analyse(read_case(unstable).design).stable  # eigenvalue verdict of the engine
    r = invoke("harmonics", unstable)
    assert r.exit_code == 0 and "WARNING: the current loop of this design is UNSTABLE" in r.stdout
    rec = json.loads(invoke("harmonics", unstable, "--json").stdout)
    assert rec["loop_verdict"] == "unstable" and any("UNSTABLE" in w for w in rec["warnings"])
    rec = json.loads(invoke("harmonics", stable, "--json").stdout)
    assert rec["loop_verdict"] == "stable" and not any("UNSTABLE" in w for w in rec["warnings"])
    assert "WARNING" not in invoke("harmonics", stable).stdout


def test_harmonics_errors(tmp_path):
    r = invoke("harmonics", write(tmp_path, extra=""))
    assert r.exit_code == 2 and "[pwm]: missing table" in r.stderr
    r = invoke("harmonics", write(tmp_path, extra='[pwm]\ndc_link = "700 V"\nscheme = "half-bridge"\n'
                                            'modulation = "space-vector"', name="m.toml"))
    assert r.exit_code == 2 and "[pwm] modulation" in r.stderr and "three-phase" in r.stderr
    r = invoke("harmonics", write(tmp_path, extra='[pwm]\ndc_link = "700 V"\nmodulation = "svpwm"', name="m2.toml"))
    assert r.exit_code == 2 and "[pwm] modulation" in r.stderr


def test_harmonics_overmodulation_is_a_finding(tmp_path):
    """Issue 12 item 6: over-modulation is reported with the result (exit 0),
    or exit 3 with --fail-on-overmodulation; the modulation index is checked
    against a hand phasor calculation of the converter voltage (series and
    shunt impedances, common practice)."""
    low = write(tmp_path, extra='[pwm]\ndc_link = "400 V"', name="low.toml")
    w = 2 * math.pi * 50.0
    I2 = math.sqrt(2) * 12e3 / (math.sqrt(3) * 400)
    Vc = 400 * math.sqrt(2 / 3) + 1j * w * 0.8e-3 * I2  # nominal Lg = 0 in this case
    M = abs(Vc + 1j * w * 1.5e-3 * (I2 + 1j * w * 15e-6 * Vc)) / 200.0
    assert M > 1.0
    r = invoke("harmonics", low)
    assert r.exit_code == 0, r.stderr
    assert "FINDING: OVER-MODULATION at the nominal grid inductance" in r.stdout
    assert f"M = {M:.3f}" in r.stdout and "worst sideband" in r.stdout
    rec = json.loads(invoke("harmonics", low, "--json").stdout)
    assert rec["overmodulation"]["nominal"] is True and rec["overmodulation"]["findings"]
    assert rec["harmonics"]["modulation_index"] == pytest.approx(M, rel=1e-9)
    assert invoke("harmonics", low, "--fail-on-overmodulation").exit_code == 3
    ok = write(tmp_path, extra='[pwm]\ndc_link = "700 V"', name="ok.toml")
    r = invoke("harmonics", ok, "--fail-on-overmodulation")
    assert r.exit_code == 0 and "FINDING" not in r.stdout
    assert json.loads(invoke("harmonics", ok, "--json").stdout)["overmodulation"]["findings"] == []
    r = invoke("harmonics", write(tmp_path, extra='[pwm]\ndc_link = "700 V"\nscheme = "h-bridge"', name="s.toml"))
    assert r.exit_code == 2 and "[pwm] scheme" in r.stderr


def test_commands_import_lazily():
    # `loopcheck --help` stays instant: the command modules load no numpy/matplotlib
    code = "import sys, loopcheck.cli.main; print(any(m in sys.modules for m in ('numpy', 'matplotlib', 'scipy')))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "False"
    r = invoke("--help")
    assert "simulate" in r.stdout and "harmonics" in r.stdout


def test_switched_option(tmp_path):
    extra = '[pwm]\ndc_link = "700 V"\nupdate = "double"\n[scenario]\nduration = "60 ms"\n'
    case = write(tmp_path, extra=extra)
    r = invoke("simulate", case, "--switched", "--json")
    assert r.exit_code == 0, r.stderr
    rec = json.loads(r.stdout)
    assert rec["model"].startswith("switched (three-phase, double update, fsw = 8000 Hz")
    sbs = rec["switched_sidebands"]
    assert sbs and all(abs(s["difference"]) < 0.01 for s in sbs)
    r = invoke("simulate", write(tmp_path, extra="", name="nopwm.toml"), "--switched")
    assert r.exit_code == 2 and "[pwm]: missing table; --switched needs" in r.stderr
