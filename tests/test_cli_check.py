"""``loopcheck check``: JSON keys, JSON Lines, exit codes, --help, --version,
and the verdict against an independent sampled-data model.

Independent model: the LCL state space discretised with the zero-order hold
by scipy.signal.cont2discrete (reference library), the one-sample
computation delay added as one extra state holding the previous controller
output (the standard augmentation for a computation delay; G. F. Franklin,
J. D. Powell and M. L. Workman, "Digital Control of Dynamic Systems",
3rd ed., Addison-Wesley, 1998; chapter from memory), closed with
v = -Kp*i_fb - Hi*ic and judged by numpy eigenvalues.
"""

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy.signal import cont2discrete
from typer.testing import CliRunner

from loopcheck import __version__
from loopcheck.cli.main import app

ENV = {"COLUMNS": "200", "NO_COLOR": "1"}
runner = CliRunner()
CASES = Path(__file__).resolve().parent.parent / "cases"

P_CASE = """
name = "{name}"
[filter]
L1 = "1.8 mH"
C  = "4.7 uF"
L2 = "0.6 mH"
R1 = "50 mOhm"
R2 = "20 mOhm"
[grid]
f  = "50 Hz"
[sampling]
fs = "10 kHz"
delay = {delay}
[control]
feedback = "{feedback}"
kind = "P"
Kp = "{Kp} V/A"
Hi = "{Hi} V/A"
"""


def write_case(tmp_path, name="p", delay=1, feedback="grid", Kp=10, Hi=6):
    path = tmp_path / f"{name}.toml"
    path.write_text(P_CASE.format(name=name, delay=delay, feedback=feedback, Kp=Kp, Hi=Hi))
    return path


def invoke(*args):
    return runner.invoke(app, [str(a) for a in args], env=ENV)


def strict_json(line: str):
    def reject(token):
        raise ValueError(f"non-standard JSON token {token}")

    return json.loads(line, parse_constant=reject)


def independent_spectral_radius(L1, C, L2, R1, R2, fs, Kp, Hi, delay, feedback):
    A = np.array([[-R1 / L1, -1 / L1, 0], [1 / C, 0, -1 / C], [0, 1 / L2, -R2 / L2]])
    B = np.array([[1 / L1], [0.0], [0.0]])
    Ad, Bd, *_ = cont2discrete((A, B, np.eye(3), np.zeros((3, 1))), 1 / fs, "zoh")
    i_fb = np.array([0, 0, 1.0]) if feedback == "grid" else np.array([1.0, 0, 0])
    K = -(Kp * i_fb + Hi * np.array([1.0, 0, -1.0]))  # ic = i1 - i2
    if delay == 0:
        M = Ad + Bd @ K[None, :]
    else:
        M = np.block([[Ad, Bd], [K[None, :], np.zeros((1, 1))]])
    return float(np.max(np.abs(np.linalg.eigvals(M))))


REQUIRED_KEYS = {
    "name", "case", "stable", "verdict", "spectral_radius", "resonance_hz", "open_loop_unstable_poles",
    "crossovers", "phase_margin_deg", "gain_margin", "sensitivity_peak",
}


def test_json_has_the_documented_keys(tmp_path):
    path = write_case(tmp_path)
    result = invoke("check", path, "--json")
    assert result.exit_code == 0, result.stderr
    lines = result.stdout.strip().splitlines()
    assert len(lines) == 1
    d = strict_json(lines[0])
    assert REQUIRED_KEYS <= set(d)
    assert d["name"] == "p" and d["case"] == str(path)
    assert isinstance(d["stable"], bool) and d["verdict"] in ("stable", "marginal", "unstable")
    assert isinstance(d["open_loop_unstable_poles"], int)
    for c in d["crossovers"]:
        assert {"frequency_hz", "phase_deg", "phase_margin_deg"} <= set(c)
    assert set(d["gain_margin"]) >= {"lower_factor", "upper_factor", "lower_db", "upper_db"}
    assert set(d["sensitivity_peak"]) >= {"value", "frequency_hz"}
    # resonance from the closed form (Liserre, Blaabjerg and Hansen, IEEE TIA 2005)
    fr = math.sqrt((1.8e-3 + 0.6e-3) / (1.8e-3 * 0.6e-3 * 4.7e-6)) / (2 * math.pi)
    assert d["resonance_hz"] == pytest.approx(fr, rel=1e-12)


@pytest.mark.parametrize(
    "delay, feedback, Kp, Hi",
    [(1, "grid", 10, 6), (1, "grid", 10, 0), (0, "grid", 10, 6), (1, "converter", 3, 0), (0, "converter", 6, 2)],
)
def test_verdict_matches_independent_scipy_model(tmp_path, delay, feedback, Kp, Hi):
    path = write_case(tmp_path, delay=delay, feedback=feedback, Kp=Kp, Hi=Hi)
    d = strict_json(invoke("check", path, "--json").stdout)
    rho = independent_spectral_radius(1.8e-3, 4.7e-6, 0.6e-3, 0.05, 0.02, 10e3, Kp, Hi, delay, feedback)
    assert d["spectral_radius"] == pytest.approx(rho, rel=1e-9)
    assert d["stable"] == (rho < 1.0)


def test_json_lines_for_two_cases_in_order(tmp_path):
    a = write_case(tmp_path, name="first", Hi=6)
    b = write_case(tmp_path, name="second", Hi=0, delay=0)
    result = invoke("check", a, b, "--json")
    assert result.exit_code == 0, result.stderr
    lines = result.stdout.strip().split("\n")
    assert len(lines) == 2
    records = [strict_json(line) for line in lines]
    assert [r["name"] for r in records] == ["first", "second"]
    assert [r["case"] for r in records] == [str(a), str(b)]


def test_json_never_contains_nan_or_infinity(tmp_path):
    # an unstable loop: phase margin and gain margin are null, not NaN
    path = write_case(tmp_path, delay=0, Hi=6)
    result = invoke("check", path, "--json")
    d = strict_json(result.stdout)
    assert d["stable"] is False and d["gain_margin"] is None and d["phase_margin_deg"] is None
    for token in ("NaN", "Infinity"):
        assert token not in result.stdout


def test_exit_codes(tmp_path):
    stable = write_case(tmp_path, name="s", Hi=6)
    unstable = write_case(tmp_path, name="u", delay=0, Hi=6)
    assert invoke("check", stable).exit_code == 0
    assert invoke("check", unstable).exit_code == 0  # the analysis ran
    assert invoke("check", stable, "--fail-on-unstable").exit_code == 0
    assert invoke("check", stable, unstable, "--fail-on-unstable").exit_code == 4
    assert invoke("check", unstable, "--json", "--fail-on-unstable").exit_code == 4
    bad = tmp_path / "bad.toml"
    bad.write_text("[filter]\nL1 = \n")
    assert invoke("check", bad).exit_code == 2
    assert invoke("check", stable, "--no-such-option").exit_code == 2
    assert invoke().exit_code == 2  # no arguments: help, usage exit code


def test_human_summary_has_units_and_sections(tmp_path):
    path = write_case(tmp_path, Hi=6)
    result = invoke("check", path)
    assert result.exit_code == 0
    out = result.stdout
    for needle in (
        "resonance", "with Lg", "without Lg", "critical frequency fs/(4*delay+2) = 1.667 kHz",
        "verdict", "STABLE", "spectral radius", "open loop", "crossovers", "phase margin", "gain margin",
        "-180 deg", "(Nyquist frequency)", "sensitivity", "nyquist", "consistent",
    ):
        assert needle in out, needle
    assert " Hz" in out and " deg" in out and " dB" in out
    assert "L1 = 1.8 mH" in out and "C = 4.7 uF" in out
    # the closing caution of the human output (not in --json)
    caution = out.strip().splitlines()[-1]
    assert caution.startswith("caution:") and "lethal voltages" in caution and "interconnection" in caution
    assert "caution" not in invoke("check", path, "--json").stdout


def test_version():
    result = invoke("--version")
    assert result.exit_code == 0 and result.stdout.strip() == f"loopcheck {__version__}"


def test_help_lists_check():
    result = invoke("--help")
    assert result.exit_code == 0 and "check" in result.stdout
    result = invoke("check", "--help")
    assert result.exit_code == 0 and "--json" in result.stdout and "--fail-on-unstable" in result.stdout


HEAVY = ("numpy", "scipy", "control", "matplotlib", "sympy")


def test_help_does_not_import_heavy_libraries():
    code = (
        "import sys\n"
        "sys.argv = ['loopcheck', '--help']\n"
        "from loopcheck.cli.main import app\n"
        "try:\n"
        "    app()\n"
        "except SystemExit:\n"
        "    pass\n"
        f"print(sorted({{m.split('.')[0] for m in sys.modules}} & set({HEAVY!r})))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip().splitlines()[-1] == "[]"


def test_python_dash_m_help_is_quick():
    # A cold interpreter start plus typer: well under the seconds that numpy,
    # scipy and control would add (measured ~0.2 s; generous bound for a busy machine).
    import time

    t0 = time.perf_counter()
    out = subprocess.run([sys.executable, "-m", "loopcheck", "--help"], capture_output=True, text=True, timeout=60)
    elapsed = time.perf_counter() - t0
    assert out.returncode == 0 and "check" in out.stdout
    assert elapsed < 5.0


def test_demo_case_summary_runs():
    result = invoke("check", CASES / "commercial-30kva-weak-grid.toml")
    assert result.exit_code == 0, result.stderr
    assert "BELOW" in result.stdout


# --- shared CLI plumbing (loopcheck.cli.common) --------------------------------


def test_atomic_path_renames_on_success_and_cleans_up_on_failure(tmp_path):
    from loopcheck.cli.common import atomic_path, atomic_write_text

    target = tmp_path / "sub" / "out.png"
    with atomic_path(target) as tmp:
        assert tmp.endswith(".png") and Path(tmp).parent == target.parent
        Path(tmp).write_bytes(b"first")
    assert target.read_bytes() == b"first"
    with pytest.raises(RuntimeError):
        with atomic_path(target) as tmp:
            Path(tmp).write_bytes(b"half")
            raise RuntimeError("failed half-way")
    assert target.read_bytes() == b"first"  # the old file is untouched
    assert sorted(p.name for p in target.parent.iterdir()) == ["out.png"]  # no temporary left
    atomic_write_text(tmp_path / "a.json", '{"x": 1}\n')
    assert (tmp_path / "a.json").read_text() == '{"x": 1}\n'
    import os

    umask = os.umask(0)
    os.umask(umask)
    # the same permissions open(path, "w") would give, not mkstemp's 0600
    assert (tmp_path / "a.json").stat().st_mode & 0o777 == 0o666 & ~umask


def test_json_line_is_strict():
    from loopcheck.cli.common import json_line

    line = json_line({"a": float("nan"), "b": [float("inf"), 1.5], "c": (1, 2), "d": complex(1, -2), "e": np.float64(2.5)})
    assert strict_json(line) == {"a": None, "b": [None, 1.5], "c": [1, 2], "d": [1.0, -2.0], "e": 2.5}


def test_progress_is_silent_off_a_terminal(capsys):
    from loopcheck.cli.common import progress

    with progress(3, "work") as advance:
        for _ in range(3):
            advance(1)
    captured = capsys.readouterr()
    assert captured.out == "" and captured.err == ""
