"""The headline verdict over the case's declared Lg range (issue 12 item 4)
against an independent eigenvalue scan.

Oracle: the closed loop rebuilt with python-control for each grid
inductance (tests/reference_loop.py: circuit equations, ``sample_system``
ZOH, the delay as an explicit state, ``feedback`` in state space); its
spectral radius decides stability. The bench case is an invented demo
scenario whose resonance lies above fs/6 without damping: stable on a stiff
grid, and the resonance falls below the critical frequency as Lg grows, where
an undamped grid-current loop with one sample of delay loses stability
(common practice; the critical frequency fs/(4*delay + 2): e.g. Parker,
McGrath, Holmes, "Regions of active damping control for LCL filters", IEEE
Trans. Ind. Appl. 50(1), 2014, from memory).
"""

from __future__ import annotations

import dataclasses
import json
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from reference_loop import reference_loop, spectral_radius

from loopcheck.io.casefile import read_case
from loopcheck.cli.main import app
from loopcheck.design.range_verdict import range_verdict

CASES = Path(__file__).resolve().parent.parent / "cases"
BENCH = CASES / "bench-15kva-no-damping.toml"
ENV = {"COLUMNS": "200", "NO_COLOR": "1"}


def _ref_stable(design, Lg) -> bool:
    d = dataclasses.replace(design, grid=dataclasses.replace(design.grid, Lg_H=float(Lg)))
    _, cl = reference_loop(d)
    return spectral_radius(cl) < 1.0 - 1e-9


def test_unstable_part_of_the_range_matches_reference_scan():
    design = read_case(str(BENCH)).design
    rv = range_verdict(design)
    lo, hi = design.grid.Lg_range_H
    assert rv.nominal_stable and _ref_stable(design, design.grid.Lg_H)
    assert rv.declared and not rv.stable_everywhere
    assert len(rv.unstable_Lg_H) == 1
    a, b = rv.unstable_Lg_H[0]
    assert b == hi and lo < a < hi
    d = 1e-6 * (hi - lo)
    assert _ref_stable(design, a - d) and not _ref_stable(design, a + d)
    for lg in np.linspace(lo, hi, 25):
        if abs(lg - a) < 1e-3 * (hi - lo):
            continue
        assert _ref_stable(design, lg) == (lg < a), lg
    assert rv.unstable_share == pytest.approx((hi - a) / (hi - lo), rel=1e-12)


def test_a_design_stable_over_its_range_says_so():
    design = read_case(str(CASES / "commercial-30kva-weak-grid.toml")).design
    rv = range_verdict(design)
    assert rv.stable_everywhere and rv.unstable_Lg_H == ()
    for lg in np.linspace(*design.grid.Lg_range_H, 9):
        assert _ref_stable(design, lg)


def test_check_headline_text_and_json_state_the_range_result():
    r = CliRunner().invoke(app, ["check", str(BENCH)], env=ENV)
    assert r.exit_code == 0, r.stderr
    head = r.stdout.splitlines()[1]
    assert head.startswith("  VERDICT: NOT STABLE") and "stable at the nominal Lg" in head and "% of the Lg range" in head
    r = CliRunner().invoke(app, ["check", str(BENCH), "--json"], env=ENV)
    rec = json.loads(r.stdout)
    assert rec["verdict"] == "stable"  # the nominal verdict keeps its meaning
    assert rec["range_verdict"]["stable_everywhere"] is False
    assert rec["headline"].startswith("NOT STABLE")
    r = CliRunner().invoke(app, ["check", str(BENCH), "--fail-on-unstable"], env=ENV)
    assert r.exit_code == 4


def test_report_banner_is_not_stable_for_a_range_failure(tmp_path):
    out = tmp_path / "r.html"
    r = CliRunner().invoke(app, ["report", str(BENCH), "-o", str(out), "--quiet"], env=ENV)
    assert r.exit_code == 0, r.stderr
    html = out.read_text()
    assert "class='banner banner-unstable'" in html and "class='banner banner-stable'" not in html
    assert "NOT STABLE OVER ITS RANGE" in html
    assert "NOT STABLE" in r.stdout


@pytest.mark.skipif(shutil.which("gcc") is None, reason="gcc not installed")
def test_export_header_warns_and_opt_in_error_stops_the_build(tmp_path):
    h = tmp_path / "c.h"
    r = CliRunner().invoke(app, ["export", str(BENCH), "--header", str(h)], env=ENV)
    assert r.exit_code == 0, r.stderr
    text = h.read_text()
    assert "RANGE declared by the case" in text and "NOT STABLE over" in text
    c = tmp_path / "m.c"
    c.write_text('#include "c.h"\nint main(void) { return 0; }\n')
    ok = subprocess.run(["gcc", "-fsyntax-only", "-I", str(tmp_path), str(c)], capture_output=True, text=True)
    assert ok.returncode == 0, ok.stderr
    r = CliRunner().invoke(app, ["export", str(BENCH), "--header", str(h), "--range-error"], env=ENV)
    assert r.exit_code == 0, r.stderr
    bad = subprocess.run(["gcc", "-fsyntax-only", "-I", str(tmp_path), str(c)], capture_output=True, text=True)
    assert bad.returncode != 0 and "NOT STABLE over" in bad.stderr
    prefix = next(ln.split()[1] for ln in h.read_text().splitlines() if ln.startswith("#ifndef") and "ALLOW_RANGE" in ln)
    ok = subprocess.run(["gcc", "-fsyntax-only", f"-D{prefix}", "-I", str(tmp_path), str(c)], capture_output=True, text=True)
    assert ok.returncode == 0, ok.stderr


def test_map_states_the_case_verdict_over_its_range():
    r = CliRunner().invoke(app, ["map", str(BENCH), "--x-points", "10", "--y-points", "10", "--quiet"], env=ENV)
    assert r.exit_code == 0, r.stderr
    assert r.stdout.splitlines()[1].startswith("  case verdict: NOT STABLE")
    r = CliRunner().invoke(app, ["map", str(BENCH), "--x-points", "10", "--y-points", "10", "--quiet", "--json"], env=ENV)
    assert json.loads(r.stdout)["range_verdict"]["stable_everywhere"] is False


@pytest.mark.parametrize("command", ["simulate", "harmonics"])
def test_simulate_and_harmonics_state_the_case_verdict(command):
    r = CliRunner().invoke(app, [command, str(BENCH)], env=ENV)
    assert r.exit_code == 0, r.stderr
    assert r.stdout.splitlines()[1].startswith("  case verdict: NOT STABLE")
    rec = json.loads(CliRunner().invoke(app, [command, str(BENCH), "--json"], env=ENV).stdout)
    assert rec["range_verdict"]["stable_everywhere"] is False and rec["headline"].startswith("NOT STABLE")


def test_a_declared_grid_network_decides_the_headline():
    # The PFC-capacitor demo: stable on its inductive grid, unstable with the
    # capacitor bank. Oracle: the closed loop rebuilt independently with the
    # bank's states in the continuous plant, sampled by python-control
    # (circuit equations: Kirchhoff's laws, common practice; ZOH with one
    # sample of delay as an explicit state), eigenvalues decide.
    import control as ct

    case = read_case(str(CASES / "commercial-30kva-pfc-capacitor.toml"))
    d = case.design
    f, g, c = d.filter, d.grid, d.control
    net = case.tables["grid_network"]
    from loopcheck.engine.units import parse_quantity

    Cs = parse_quantity(net["C_shunt"], "capacitance")
    Rs = parse_quantity(net["R_shunt"], "resistance")
    Rg = parse_quantity(net["Rg"], "resistance")
    # states: i1, vc, i2, vs (shunt capacitor), ig (grid inductor); input vi
    L1, C, L2, R1, R2, Lg = f.L1_H, f.C_F, f.L2_H, f.R1_ohm, f.R2_ohm, g.Lg_H
    # PCC voltage vp = vs + Rs (i2 - ig)
    A = np.array([
        [-R1 / L1, -1 / L1, 0, 0, 0],
        [1 / C, 0, -1 / C, 0, 0],
        [0, 1 / L2, -(R2 + Rs) / L2, -1 / L2, Rs / L2],
        [0, 0, 1 / Cs, 0, -1 / Cs],
        [0, 0, Rs / Lg, 1 / Lg, -(Rg + Rs) / Lg],
    ])
    B = np.array([[1 / L1], [0], [0], [0], [0]])
    Cm = np.array([[0, 0, 1, 0, 0], [1, 0, -1, 0, 0]])  # i2, ic
    Ts = d.sampling.Ts_s
    Pd = ct.series(ct.ss(ct.tf([1.0], [1.0, 0.0], Ts)), ct.sample_system(ct.ss(A, B, Cm, np.zeros((2, 1))), Ts, "zoh"))
    inner = ct.feedback(Pd, ct.ss([], [], [], [[0.0, c.Hi_V_per_A]], Ts))
    from reference_loop import controller

    cl = ct.feedback(ct.series(controller(ct, d), inner[0, 0]), 1)
    assert spectral_radius(cl) > 1.0 and _ref_stable(d, g.Lg_H)
    rv = range_verdict(d)  # the inductive grid alone: stable
    assert rv.stable_everywhere
    r = CliRunner().invoke(app, ["check", str(CASES / "commercial-30kva-pfc-capacitor.toml"), "--json"], env=ENV)
    rec = json.loads(r.stdout)
    assert rec["verdict"] == "stable" and rec["range_verdict"]["network_verdict"] == "unstable"
    assert rec["headline"].startswith("NOT STABLE")
