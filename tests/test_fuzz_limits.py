"""Fuzzing the work limits (issue 15, class 7), property-based.

Requests beyond the documented limits (docs/bad-input.md) are refused with
one line saying what to reduce, before any long computation: map grid
sizes (with and without --metric, and against the loop order), pick grids
against the tolerance corners, simulation length x rate x points per
sample, the number of harmonic resonators and the length of ``name``.
Requests inside the limits are accepted by the same checks. If a refusal
came after the work, these tests would run for minutes or exhaust memory
instead of passing.

Sizes are generated (hypothesis, fixed seed, bounded examples); the case
is invented demo data.
"""

from __future__ import annotations

import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from loopcheck.io.casefile import MAX_HARMONICS, NAME_MAX_CHARS, CaseError, case_from_string
from loopcheck.cli.main import app
from loopcheck.cli.common import MAX_PICK_EVALUATIONS, MAX_SIMULATION_WORK
from loopcheck.io.map_table import MAX_MAP_METRIC_POINTS, MAX_MAP_POINTS, MAX_MAP_WORK, Overrides, map_spec
from loopcheck.engine.model import loop_state_count

ENV = {"COLUMNS": "200", "NO_COLOR": "1"}
FUZZ = settings(derandomize=True, max_examples=25, deadline=None,
                suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
CLI_FUZZ = settings(FUZZ, max_examples=8)


def case_text(harmonics=(3, 5), name="limits fuzz", tolerance=""):
    return f"""
name = "{name}"
[filter]
L1 = "1.5 mH"
C  = "10 uF"
L2 = "0.6 mH"
[grid]
f = "50 Hz"
Lg = "0.5 mH"
Lg_range = ["0 mH", "2 mH"]
[sampling]
fs = "20 kHz"
[control]
feedback = "grid"
kind = "PR"
Kp = "5 V/A"
Kr = "300 V/A/s"
harmonics = {list(harmonics)}
Hi = "7 V/A"
{tolerance}
"""


def one_line_exit_2(r, *needles):
    assert r.exit_code == 2, (r.exit_code, r.stdout, r.stderr)
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), r.stderr
    for n in needles:
        assert n in lines[0], (n, lines[0])


@FUZZ
@given(nx=st.integers(2, 5000), ny=st.integers(2, 5000), metric=st.booleans(),
       n_harm=st.integers(0, MAX_HARMONICS))
def test_map_size_limits(nx, ny, metric, n_harm):
    case = case_from_string(case_text(harmonics=tuple(range(2, 2 + n_harm))), "fuzz.toml")
    states = loop_state_count(case.design)
    too_big = (nx * ny > (MAX_MAP_METRIC_POINTS if metric else MAX_MAP_POINTS)
               or nx * ny * states**3 > MAX_MAP_WORK)
    ov = Overrides(x_points=nx, y_points=ny, metrics=("all",) if metric else None)
    if too_big:
        with pytest.raises(CaseError) as e:
            map_spec(case, ov)
        assert "--x-points" in str(e.value) and "\n" not in str(e.value)
    else:
        spec = map_spec(case, ov)
        assert spec.x.points * spec.y.points == nx * ny


@CLI_FUZZ
@given(nx=st.integers(1001, 5000), ny=st.integers(1001, 5000))
def test_map_refuses_before_the_work(tmp_path_factory, nx, ny):
    p = tmp_path_factory.mktemp("map") / "case.toml"
    p.write_text(case_text(), encoding="utf-8")
    r = CliRunner().invoke(app, ["map", str(p), "--x-points", str(nx), "--y-points", str(ny), "--metric", "all",
                                 "-q"], env=ENV)
    one_line_exit_2(r, "--x-points")


@CLI_FUZZ
@given(points=st.integers(400, 1001), lg_points=st.integers(150, 401), n_tol=st.integers(1, 4),
       also_kp=st.booleans())
def test_pick_grid_limit(tmp_path_factory, points, lg_points, n_tol, also_kp):
    tol = "[tolerance]\n" + "".join(f'{k} = "5 %"\n' for k in ("L1", "C", "L2", "R1")[:n_tol])
    evaluations = points * lg_points * (2**n_tol + 1) * (7 if also_kp else 1)
    assume(evaluations > MAX_PICK_EVALUATIONS)  # accepted sizes run the search (tests/test_pick.py)
    p = tmp_path_factory.mktemp("pick") / "case.toml"
    p.write_text(case_text(tolerance=tol), encoding="utf-8")
    args = ["pick", str(p), "--points", str(points), "--lg-points", str(lg_points), "-q"]
    r = CliRunner().invoke(app, args + (["--also-kp"] if also_kp else []), env=ENV)
    one_line_exit_2(r, "--points", "--lg-points")


@CLI_FUZZ
@given(duration_ms=st.integers(2_000, 10_000), pps=st.integers(40, 200), compare=st.booleans())
def test_simulation_size_limit(tmp_path_factory, duration_ms, pps, compare):
    case = case_from_string(case_text(), "fuzz.toml")
    points = duration_ms * 1e-3 * 20e3 * pps
    work = points * (loop_state_count(case.design) + 2) * (2 if compare else 1)
    assume(work > MAX_SIMULATION_WORK)  # accepted lengths are simulated in tests/test_simulate_cli.py
    p = tmp_path_factory.mktemp("sim") / "case.toml"
    p.write_text(case_text() + f'[scenario]\nduration = "{duration_ms} ms"\npoints_per_sample = {pps}\n',
                 encoding="utf-8")
    r = CliRunner().invoke(app, ["simulate", str(p)] + (["--compare", "Hi=0"] if compare else []), env=ENV)
    one_line_exit_2(r, "--duration", "points_per_sample")


@FUZZ
@given(n=st.integers(0, 60))
def test_number_of_resonators(n):
    harmonics = tuple(range(2, 2 + n))
    text = case_text(harmonics=harmonics).replace('fs = "20 kHz"', 'fs = "1 MHz"')
    if n <= MAX_HARMONICS:
        assert case_from_string(text, "fuzz.toml").design.control.harmonics == harmonics
    else:
        with pytest.raises(CaseError) as e:
            case_from_string(text, "fuzz.toml")
        assert "[control] harmonics" in str(e.value)


@FUZZ
@given(length=st.integers(1, 20_000), char=st.sampled_from(["x", "\u00e9", "W", " "]))
def test_name_length(length, char):
    name = "n" + char * (length - 1)
    text = case_text(name=name)
    if length <= NAME_MAX_CHARS:
        assert case_from_string(text, "fuzz.toml").design.name == name
    else:
        with pytest.raises(CaseError) as e:
            case_from_string(text, "fuzz.toml")
        assert "name" in str(e.value) and str(NAME_MAX_CHARS) in str(e.value)


@CLI_FUZZ
@given(units=st.integers(200_001, 10**7))
def test_monte_carlo_limit(units):
    r = CliRunner().invoke(app, ["grid", "cases/commercial-30kva-weak-grid.toml", "--monte-carlo", str(units)],
                           env=ENV)
    one_line_exit_2(r, "--monte-carlo")
