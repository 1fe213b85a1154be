"""Closed-loop bandwidth and dominant poles (loopcheck.engine.closed_loop, shown by
``check``) against python-control.

Oracles: the closed loop rebuilt independently with python-control
(tests/reference_loop.py), its frequency response (``StateSpace.__call__``
on a discrete system) for the -3 dB bandwidth, and ``control.damp`` for the
natural frequency and damping ratio of discrete poles (python-control maps
z to s = ln(z)/dt; Franklin, Powell, Workman, "Digital Control of Dynamic
Systems", 3rd ed., 1998, from memory). Case files are invented demos.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import control as ct
import numpy as np
import pytest
from typer.testing import CliRunner

from reference_loop import reference_loop

from loopcheck.engine.analysis import analyse
from loopcheck.io.casefile import read_case
from loopcheck.cli.main import app
from loopcheck.engine.closed_loop import characterise

CASES = Path(__file__).resolve().parent.parent / "cases"
ENV = {"COLUMNS": "200", "NO_COLOR": "1"}


@pytest.mark.parametrize("name", ["commercial-30kva-weak-grid.toml", "residential-5kva-1ph.toml",
                                  "central-250kva-converter-side.toml"])
def test_bandwidth_and_poles_match_python_control(name):
    design = read_case(str(CASES / name)).design
    a = analyse(design)
    cl = characterise(design, a)
    _, T = reference_loop(design)
    fs = design.sampling.fs_hz
    bw = cl.bandwidth_hz
    assert bw is not None and 0 < bw < fs / 2
    mag = lambda f: abs(complex(T(np.exp(2j * math.pi * f / fs))))  # noqa: E731
    assert mag(bw) == pytest.approx(1 / math.sqrt(2), rel=1e-6)
    f_low = np.geomspace(fs * 1e-5, bw * 0.999, 400)
    assert min(mag(f) for f in f_low) > 1 / math.sqrt(2) - 1e-9  # the first crossing
    f1 = design.grid.f_hz
    t1 = complex(T(np.exp(2j * math.pi * f1 / fs)))
    assert cl.tracking.gain == pytest.approx(abs(t1), rel=1e-9)
    assert cl.tracking.error == pytest.approx(abs(1 - t1), rel=1e-6, abs=1e-12)
    assert cl.tracking.phase_deg == pytest.approx(math.degrees(np.angle(t1)), abs=1e-7)
    wn, zeta, poles = ct.damp(T, doprint=False)
    for p in cl.poles:
        k = int(np.argmin(np.abs(poles - p.z)))
        assert abs(poles[k] - p.z) < 1e-7
        assert p.frequency_hz == pytest.approx(wn[k] / (2 * math.pi), rel=1e-6)
        assert p.damping_ratio == pytest.approx(zeta[k], rel=1e-6, abs=1e-9)


def test_check_prints_closed_loop_and_writes_standalone_figures(tmp_path):
    case = str(CASES / "commercial-30kva-weak-grid.toml")
    b, n = tmp_path / "bode.png", tmp_path / "nyq.svg"
    r = CliRunner().invoke(app, ["check", case, "-o", str(b), "--nyquist", str(n)], env=ENV)
    assert r.exit_code == 0, r.stderr
    assert "closed loop  bandwidth" in r.stdout and "damping ratio" in r.stdout
    assert b.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and n.read_text().lstrip().startswith("<?xml")
    rec = json.loads(CliRunner().invoke(app, ["check", case, "--json"], env=ENV).stdout)
    assert rec["closed_loop"]["bandwidth_hz"] > 0 and rec["closed_loop"]["dominant_poles"]
    r = CliRunner().invoke(app, ["check", case, case, "-o", str(tmp_path / "x.png")], env=ENV)
    assert r.exit_code == 2 and len(r.stderr.strip().splitlines()) == 1 and not (tmp_path / "x.png").exists()


def test_grid_voltage_rejection_at_the_fundamental():
    # Internal-model principle (common practice; Francis & Wonham,
    # "The internal model principle of control theory", Automatica 12(5),
    # 1976, from memory): an ideal resonator at the grid frequency on the grid
    # current rejects a grid-voltage component there completely, so the
    # closed-loop output admittance |i2/vg| at f1 is (numerically) zero; a
    # damped resonator or converter-side feedback leaves a finite admittance.
    ideal = read_case(str(CASES / "commercial-30kva-weak-grid.toml")).design
    cl = characterise(ideal, analyse(ideal))
    assert abs(cl.grid_voltage_admittance_S) < 1e-4
    y0 = 1.0 / abs(2j * math.pi * ideal.grid.f_hz * (ideal.filter.L1_H + ideal.filter.L2_H + ideal.grid.Lg_H))
    assert abs(cl.grid_voltage_admittance_S) < 1e-4 * y0  # versus the bare filter's admittance at f1
    damped = read_case(str(CASES / "central-250kva-converter-side.toml")).design
    cl = characterise(damped, analyse(damped))
    assert abs(cl.grid_voltage_admittance_S) > 1e-3
    rec = json.loads(CliRunner().invoke(app, ["check", str(CASES / "central-250kva-converter-side.toml"), "--json"],
                                        env=ENV).stdout)
    re_, im_ = rec["closed_loop"]["grid_voltage_admittance_at_grid_frequency_S"]
    assert complex(re_, im_) == pytest.approx(cl.grid_voltage_admittance_S, rel=1e-12)
