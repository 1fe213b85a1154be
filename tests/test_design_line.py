"""The design point's stable interval on a map (loopcheck.design.design_line and the
``map`` summary) against an independent eigenvalue scan.

Oracle: the closed loop rebuilt with python-control (tests/reference_loop.py:
circuit equations, ``sample_system`` ZOH, the delay as an explicit state,
``feedback`` in state space), whose spectral radius decides stability at
each gain; nothing of loopcheck's plant, discretisation or loop assembly is
used. Each reported interval end must be a real boundary of that reference
(unstable just outside, stable just inside), and a dense reference scan of
the gain must find no stable gain outside the reported intervals and no
unstable one inside them (D-decomposition: the stable set of a gain line is
a finite union of bounded intervals; Gryazina & Polyak, "Stability regions
in the parameter space: D-decomposition revisited", Automatica 42(1), 2006).

The case files are invented demo scenarios.
"""

from __future__ import annotations

import dataclasses
import json
import math
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from reference_loop import reference_loop, spectral_radius

from loopcheck.io.casefile import read_case as load_case
from loopcheck.cli.main import app
from loopcheck.design.design_line import design_line
from loopcheck.io.map_table import Overrides, map_spec

CASES = Path(__file__).resolve().parent.parent / "cases"
ENV = {"COLUMNS": "200", "NO_COLOR": "1"}
FIELD = {"Kp": "Kp_V_per_A", "Hi": "Hi_V_per_A"}


def _with(design, name, value):
    return dataclasses.replace(design, control=dataclasses.replace(design.control, **{FIELD[name]: float(value)}))


def _ref_stable(design, name, value) -> bool:
    _, cl = reference_loop(_with(design, name, value))
    return spectral_radius(cl) < 1.0 - 1e-9


def _check_against_reference(design, line, scan):
    name = line.name
    for iv in line.intervals:
        for end, inside, outside in ((iv.low, 1, -1), (iv.high, -1, 1)):
            assert math.isfinite(end)
            d = 1e-5 * max(abs(end), 1.0)
            assert _ref_stable(design, name, end + inside * d), (name, end)
            assert not _ref_stable(design, name, end + outside * d), (name, end)
    for y in scan:
        near = any(abs(y - e) < 1e-3 * max(abs(e), 1.0) for iv in line.intervals for e in (iv.low, iv.high))
        if near:
            continue
        inside = any(iv.low < y < iv.high for iv in line.intervals)
        assert _ref_stable(design, name, y) == inside, (name, y)


def _line(case_path, **over):
    case = load_case(str(case_path))
    spec = map_spec(case, Overrides(**over))
    return case.design, design_line(case.design, spec)


def test_multi_resonator_kp_interval_matches_reference():
    # issue 12 item 1: with 3/5/7/9 resonators the design-point Kp interval
    # started at Kp = 0 although Kp = 1 or 2 V/A is unstable
    design, line = _line(CASES / "residential-5kva-1ph.toml", y="Kp")
    iv = line.containing
    assert line.stable and iv is not None
    assert iv.low > 1.0  # not the range end at 0
    assert not _ref_stable(design, "Kp", 1.0) and not _ref_stable(design, "Kp", 2.0)
    _check_against_reference(design, line, np.linspace(-10.0, 40.0, 51))


def test_interval_is_not_clipped_to_the_drawn_range():
    # issue 12 item 2: a y range of 0..3 V/A below the design's Hi = 6.5 V/A
    design, line = _line(CASES / "commercial-30kva-weak-grid.toml", y_range=("0 V/A", "3 V/A"))
    iv = line.containing
    assert iv is not None and iv.high > 6.5 and iv.high_kind == "boundary"
    _check_against_reference(design, line, np.linspace(-5.0, 20.0, 41))


def test_negative_hi_design_interval_reaches_below_zero():
    # issue 12 item 2: a negative design Hi with the default axis starting at 0
    case = load_case(str(CASES / "bench-15kva-no-damping.toml"))
    design = _with(case.design, "Hi", -0.3)
    spec = map_spec(case, Overrides())
    line = design_line(design, spec)
    iv = line.containing
    assert line.stable and iv is not None and iv.low < -0.3
    _check_against_reference(design, line, np.linspace(-20.0, 10.0, 41))


def test_unstable_design_gets_nearest_stable_interval():
    # issue 12 item 3: the undamped design (Hi = 0) is unstable; what it needs
    # is the nearest stable Hi interval
    design, line = _line(CASES / "commercial-30kva-undamped.toml")
    assert not line.stable and line.containing is None
    assert not _ref_stable(design, "Hi", 0.0)
    assert line.nearest and line.nearest[0].low > 0.0
    _check_against_reference(design, line, np.linspace(-5.0, 20.0, 41))


def test_map_text_and_json_report_the_whole_line(tmp_path):
    r = CliRunner().invoke(app, ["map", str(CASES / "commercial-30kva-weak-grid.toml"), "--y-range", "0 V/A", "3 V/A",
                                 "--x-points", "20", "--y-points", "20", "--quiet"], env=ENV)
    assert r.exit_code == 0, r.stderr
    assert "range end" not in r.stdout
    line = next(ln for ln in r.stdout.splitlines() if ln.strip().startswith("stable Hi"))
    assert "(boundary) .." in line and line.rstrip().count("(boundary)") == 2
    r = CliRunner().invoke(app, ["map", str(CASES / "commercial-30kva-undamped.toml"), "--x-points", "20",
                                 "--y-points", "20", "--quiet", "--json"], env=ENV)
    assert r.exit_code == 0, r.stderr
    dp = json.loads(r.stdout)["design_point"]
    assert dp["stable"] is False and dp["stable_y_interval"] is None
    near = dp["line"]["nearest_stable_intervals"]
    assert near and near[0]["from"] > 0 and near[0]["from_kind"] == "boundary"
    assert "nearest stable Hi" in CliRunner().invoke(
        app, ["map", str(CASES / "commercial-30kva-undamped.toml"), "--x-points", "20", "--y-points", "20", "--quiet"],
        env=ENV).stdout


@pytest.mark.parametrize("y", ["Lg", "C"])
def test_physical_axis_interval_ends_are_boundaries_or_scan_ends(y):
    # a physical y parameter: eigenvalue bisection in a window wider than the map
    case = load_case(str(CASES / "commercial-30kva-weak-grid.toml"))
    spec = map_spec(case, Overrides(x="Kp", y=y))
    line = design_line(case.design, spec)
    assert line.method == "refined"
    assert line.stable and line.containing is not None
    lo, hi = line.searched
    assert lo <= spec.y.start and hi >= spec.y.stop
    for iv in line.intervals:
        assert (iv.low_kind == "scan end") == (iv.low == lo)
        assert (iv.high_kind == "scan end") == (iv.high == hi)


def test_default_hi_axis_shows_negative_hi_where_it_can_damp():
    # issue 12 item 7. Above the critical frequency fs/(4*delay + 2)
    # capacitor-current feedback damps with the opposite sign (common
    # practice; Parker, McGrath, Holmes, "Regions of active damping control
    # for LCL filters", IEEE Trans. Ind. Appl. 50(1), 2014, from memory), so
    # the default axis of a map that reaches above it includes negative Hi;
    # the reference confirms a stable negative Hi for the bench design, whose
    # resonance lies above fs/6.
    case = load_case(str(CASES / "bench-15kva-no-damping.toml"))
    spec = map_spec(case, Overrides())
    assert spec.y.name == "Hi" and spec.y.start < 0 < spec.y.stop
    assert _ref_stable(case.design, "Hi", spec.y.start / 4)
    # resonance below fs/6 and no fr/fs axis: the axis starts at 0
    case = load_case(str(CASES / "commercial-30kva-weak-grid.toml"))
    spec = map_spec(case, Overrides(x="Kp"))
    assert spec.y.start == 0.0
