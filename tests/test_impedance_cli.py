"""``loopcheck impedance``: text, JSON, figure, exit codes and one-line
errors. The verdicts themselves are checked against the outside world in
tests/test_admittance.py, tests/test_impedance_network.py and
tests/test_impedance_measured.py; here the command must report them
faithfully (compared with the library called directly)."""

import json
import math
from pathlib import Path

import numpy as np
from typer.testing import CliRunner

from loopcheck.io.casefile import read_case
from loopcheck.cli.main import app
from loopcheck.design.grid_network import GridNetwork, exact_verdict, network_impedance

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "cases" / "commercial-30kva-pfc-capacitor.toml"
ENV = {"COLUMNS": "200", "NO_COLOR": "1"}


def run(*args):
    return CliRunner().invoke(app, ["impedance", *map(str, args)], env=ENV)


def test_demo_text_reports_bands_and_both_verdicts():
    r = run(DEMO)
    assert r.exit_code == 0, r.stderr
    out = r.stdout
    assert "not passive (Re Yo < 0)" in out and "1.677 kHz .. 4.48 kHz" in out
    assert "impedance-ratio verdict (Nyquist count of N Zg Yo): unstable, 2 clockwise" in out
    assert "eigenvalue verdict (network inside the exact sampled model): unstable" in out
    assert out.rstrip().splitlines()[-1].startswith("caution:")


def test_demo_json_matches_library_and_fail_on_unstable():
    r = run(DEMO, "--json")
    assert r.exit_code == 0, r.stderr
    rec = json.loads(r.stdout)
    case = read_case(DEMO)
    net = GridNetwork(case.design.grid.Lg_H, 0.05, 8e-6, 0.02)
    ev = exact_verdict(case.design, net)
    assert rec["eigenvalue"]["verdict"] == ev.verdict == "unstable"
    assert math.isclose(rec["eigenvalue"]["spectral_radius"], ev.spectral_radius, rel_tol=1e-12)
    assert rec["impedance_ratio"]["verdict"] == "unstable"
    assert rec["admittance"]["critical_hz"] == 10e3 / 6
    assert run(DEMO, "--fail-on-unstable").exit_code == 4


def test_units_key_and_figure(tmp_path):
    text = DEMO.read_text().replace('R_shunt = "20 mOhm"', 'R_shunt = "1 Ohm"\nunits = 3')
    case = tmp_path / "three.toml"
    case.write_text(text)
    fig = tmp_path / "imp.png"
    r = run(case, "-o", fig, "--json")
    assert r.exit_code == 0, r.stderr
    rec = json.loads(r.stdout)
    assert rec["grid"]["units"] == 3 and rec["eigenvalue"]["units"] == 3
    assert rec["eigenvalue"]["verdict"] == "stable"
    assert fig.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def _measured_case(tmp_path, rows: str) -> Path:
    (tmp_path / "site.csv").write_text(rows)
    text = DEMO.read_text().split("[grid_network]")[0] + '[grid_network]\nmeasured = "site.csv"\n'
    p = tmp_path / "measured.toml"
    p.write_text(text)
    return p


def test_measured_table_from_the_demo_network(tmp_path):
    case = read_case(DEMO)
    net = GridNetwork(case.design.grid.Lg_H, 0.05, 8e-6, 0.02)
    f = np.geomspace(10, 30e3, 300)
    Z = network_impedance(net, 2j * math.pi * f)
    rows = "\n".join(f"{x:.10g},{abs(z):.10g},{math.degrees(np.angle(z)):.10g}" for x, z in zip(f, Z))
    r = run(_measured_case(tmp_path, "frequency_hz,magnitude_ohm,phase_deg\n" + rows + "\n"))
    assert r.exit_code == 0, r.stderr
    assert "frequency-response Nyquist count" in r.stdout and "-> unstable" in r.stdout
    assert "[met] inverter stable on a stiff grid" in r.stdout and "[met] grid passive" in r.stdout
    assert "eigenvalue verdict: not available for a measured impedance" in r.stdout


def test_measured_bad_row_is_one_line_exit_2(tmp_path):
    p = _measured_case(tmp_path, "50, 0.5, 80\n100, 0.7, 82\n150; 0.9; 83\n")
    r = run(p)
    assert r.exit_code == 2
    assert r.stdout == ""
    err = r.stderr.strip()
    assert "\n" not in err and "Traceback" not in err
    assert err.startswith("error: ") and f"{tmp_path / 'site.csv'}:3: expected 3 columns" in err


def test_bad_table_key_and_bad_figure_suffix(tmp_path):
    p = tmp_path / "bad.toml"
    p.write_text(DEMO.read_text().replace('C_shunt = "8 uF"', 'C_shunt = "8 uF"\nC_shnt = "1 uF"'))
    r = run(p)
    assert r.exit_code == 2 and "[grid_network] C_shnt: unknown key" in r.stderr and "C_shunt" in r.stderr
    r = run(DEMO, "-o", tmp_path / "fig.txt")
    assert r.exit_code == 2 and "-o" in r.stderr and not (tmp_path / "fig.txt").exists()
    p.write_text(DEMO.read_text().replace('R_shunt = "20 mOhm"', 'R_shunt = "20 mOhm"\nunits = 0'))
    r = run(p)
    assert r.exit_code == 2 and "[grid_network] units:" in r.stderr


def test_feedforward_table_reaches_both_verdicts(tmp_path):
    """A [feedforward] table is read and used by both verdicts (compared with
    the library called directly)."""
    from loopcheck.engine.admittance import Feedforward

    p = tmp_path / "ff.toml"
    p.write_text(DEMO.read_text() + '\n[feedforward]\ngain = 1\ncutoff = "2 kHz"\n')
    r = run(p, "--json")
    assert r.exit_code == 0, r.stderr
    rec = json.loads(r.stdout)
    assert rec["feedforward"] == {"gain": 1.0, "cutoff_hz": 2000.0}
    case = read_case(DEMO)
    net = GridNetwork(case.design.grid.Lg_H, 0.05, 8e-6, 0.02)
    ev = exact_verdict(case.design, net, feedforward=Feedforward(1.0, 2000.0))
    assert math.isclose(rec["eigenvalue"]["spectral_radius"], ev.spectral_radius, rel_tol=1e-12)
    assert "grid-voltage feedforward" in run(p).stdout
    p.write_text(DEMO.read_text() + '\n[feedforward]\ngain = 1\ncutof = "2 kHz"\n')
    r = run(p)
    assert r.exit_code == 2 and "[feedforward] cutof: unknown key" in r.stderr


def test_figure_carries_bands_markers_and_caution(tmp_path):
    """The SVG figure names the non-passive band, the critical frequency,
    fs/2, the verdicts and the safety caution."""
    fig = tmp_path / "imp.svg"
    r = run(DEMO, "-o", fig)
    assert r.exit_code == 0, r.stderr
    svg = fig.read_text()
    for text in ("Re Yo &lt; 0 (not passive)", "critical frequency 1667 Hz", "fs/2 = 5000 Hz",
                 "Impedance ratio: unstable", "eigenvalues: unstable", "lethal voltages"):
        assert text in svg, text
