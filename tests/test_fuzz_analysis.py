"""Fuzzing the analysis with extreme accepted values (issue 15, classes 3,
4 and 6), property-based.

Class 3: any finite value of a core key, from denormals to 1e308 and either
sign, is either refused by the reader with one line naming the table and
key (the plausibility ranges of docs/case-file.md) or analysed to a finite
spectral radius; the simulator runs on any accepted damping gain.
Class 4: a PI with Ki = 0 (a PR with Kr = 0) has the verdict and spectral
radius of kind = "P" with the same gains, and both equal the closed loop
built independently with python-control (tests/reference_loop.py) for the
P controller; python-control's minimal realisation (``minreal``) of the
zero-gain integrator or resonator has no state, which is why its pole must
not count.
Command-line sweep ends and overrides get the same ranges; [firmware]
scalings anywhere in the double range are refused or exported.
Class 6: no numpy warning reaches stderr (grid figure with every tolerance
corner unstable; simulation of a violently unstable loop).

Designs and cases are generated (invented), hypothesis with a fixed seed.
"""

from __future__ import annotations

import dataclasses
import math
import re

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from loopcheck.engine.analysis import analyse
from loopcheck.io.casefile import (C_LIMITS_F, FS_LIMITS_HZ, GAIN_SPAN, L_LIMITS_H, CaseError, case_from_string,
                                gain_scale_V_per_A)
from loopcheck.cli.main import app
from loopcheck.engine.model import Control, Design, Filter, Grid, Sampling

from reference_loop import reference_loop, spectral_radius

ENV = {"COLUMNS": "200", "NO_COLOR": "1"}
FUZZ = settings(derandomize=True, max_examples=30, deadline=None,
                suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])

BASE = {
    "filter": {"L1": "1.5e-3", "C": "20e-6", "L2": "0.6e-3", "R1": "0.02", "R2": "0.01"},
    "grid": {"f": "50", "Lg": "0.5e-3", "Rg": "0"},
    "sampling": {"fs": "10e3", "delay": "1"},
    "control": {"feedback": '"grid"', "kind": '"PR"', "Kp": "5", "Kr": "300", "Hi": "7"},
}


def case_text(table=None, key=None, raw=None, extra=""):
    lines = ['name = "analysis fuzz"']
    for t, kv in BASE.items():
        lines.append(f"[{t}]")
        for k, v in kv.items():
            lines.append(f"{k} = {raw if (t, k) == (table, key) else v}")
    return "\n".join(lines) + "\n" + extra


KEYS = [(t, k) for t, kv in BASE.items() for k, v in kv.items() if not v.startswith('"') and k != "delay"]
magnitudes = st.one_of(
    st.floats(-323.5, 308.2).map(lambda e: 10.0**e),  # log-uniform over the whole double range
    st.sampled_from([5e-324, 2.2250738585072014e-308, 1.7976931348623157e308]),
)


@FUZZ
@given(tk=st.sampled_from(KEYS), mag=magnitudes, negative=st.booleans())
def test_extreme_values_are_refused_or_analysed(tk, mag, negative):
    value = -mag if negative else mag
    try:
        case = case_from_string(case_text(*tk, raw=repr(value)), "fuzz.toml")
    except CaseError as e:
        msg = str(e)
        assert "\n" not in msg and msg.startswith("fuzz.toml:")
        # the key itself, or a check it feeds (the resonance against fs/2, the resonators against fs/2)
        assert f"[{tk[0]}] {tk[1]}" in msg or re.search(r"\[(sampling|control)\] (fs|kind):", msg), msg
        return
    d = case.design
    f = d.filter
    assert L_LIMITS_H[0] <= f.L1_H <= L_LIMITS_H[1] and L_LIMITS_H[0] <= f.L2_H <= L_LIMITS_H[1]
    assert C_LIMITS_F[0] <= f.C_F <= C_LIMITS_F[1]
    assert FS_LIMITS_HZ[0] <= d.sampling.fs_hz <= FS_LIMITS_HZ[1]
    z = gain_scale_V_per_A(d)
    assert abs(d.control.Hi_V_per_A) <= GAIN_SPAN[1] * z and d.control.Kp_V_per_A <= GAIN_SPAN[1] * z
    a = analyse(d)
    assert math.isfinite(a.spectral_radius) and a.verdict in ("stable", "marginal", "unstable")


@settings(derandomize=True, max_examples=3, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(share=st.floats(-1.0, 1.0), tmp=st.just(None))
def test_simulation_runs_on_any_accepted_damping_gain(tmp_path_factory, share, tmp):
    """Hi anywhere in the accepted range (up to 100 x 2 pi fs (L1 + L2)),
    including gains that make the loop violently unstable."""
    L1, L2, fs = 1.5e-3, 0.6e-3, 10e3
    Hi = share * GAIN_SPAN[1] * 2 * math.pi * fs * (L1 + L2)
    p = tmp_path_factory.mktemp("sim") / "case.toml"
    p.write_text(case_text("control", "Hi", repr(Hi)), encoding="utf-8")
    r = CliRunner().invoke(app, ["simulate", str(p), "--duration", "3 ms"], env=ENV)
    assert r.exit_code == 0, (r.stdout, r.stderr, r.exception)
    assert "Warning" not in r.stderr and "Traceback" not in r.stderr, r.stderr


@st.composite
def zero_gain_designs(draw):
    fs = draw(st.floats(5e3, 40e3))
    Ts = 1 / fs
    ratio = draw(st.floats(0.03, 0.4))
    L1 = 10 ** draw(st.floats(math.log10(0.3e-3), math.log10(5e-3)))
    L2 = L1 * draw(st.floats(0.1, 1.0))
    wr = 2 * math.pi * ratio * fs
    C = (L1 + L2) / (L1 * L2 * wr**2)
    R = draw(st.sampled_from([0.0, draw(st.floats(0.005, 0.3))]))
    Kp = 10 ** draw(st.floats(math.log10(0.005), math.log10(0.4))) * (L1 + L2) / Ts
    Hi = draw(st.floats(0.0, 0.8)) * L1 / Ts
    kind = draw(st.sampled_from(["PI", "PR"]))
    ctl = dict(Kp_V_per_A=Kp, Hi_V_per_A=Hi, feedback=draw(st.sampled_from(["grid", "converter"])), kind=kind)
    if kind == "PI":
        ctl.update(Ki_V_per_As=0.0, integrator=draw(st.sampled_from(["forward-euler", "backward-euler", "tustin"])))
    else:
        ctl.update(Kr=0.0, wc_rad_s=draw(st.sampled_from([0.0, 5.0])),
                   harmonics=tuple(h for h in (3, 5, 7) if draw(st.booleans())),
                   resonator=draw(st.sampled_from(["tustin-prewarp", "tustin", "zoh", "impulse-invariant"])))
    delay = draw(st.sampled_from([0.0, 0.5, 1.0]))
    return Design(Filter(L1, C, L2, R, R), Grid(50.0, 0.0, 0.0), Sampling(fs, delay), Control(**ctl), name="zero")


@settings(FUZZ, max_examples=10)
@given(zero_gain_designs())
def test_zero_gain_integrator_or_resonator_gives_the_p_verdict(d):
    p = dataclasses.replace(d, control=dataclasses.replace(d.control, kind="P", Ki_V_per_As=0.0, Kr=0.0,
                                                           harmonics=()))
    a, b = analyse(d), analyse(p)
    assert a.verdict == b.verdict
    assert abs(a.spectral_radius - b.spectral_radius) <= 1e-12 * b.spectral_radius
    _, CL = reference_loop(p)  # independent python-control closed loop of the P controller
    ref = spectral_radius(CL)
    assert abs(a.spectral_radius - ref) <= 1e-8 * ref


@settings(derandomize=True, max_examples=10, deadline=None)
@given(zero_gain_designs())
def test_python_control_minimal_realisation_drops_the_zero_gain_mode(d):
    """With the inert mode kept (keep_inert=True) python-control's
    observability matrix (``obsv``) has rank 0: the mode is unobservable,
    the minimal realisation has no state (Kalman 1963, from memory), which
    is the order of the controller analyse uses."""
    import control as ct
    import numpy as np

    from loopcheck.engine.controller import controller_blocks, parallel

    Ts = d.sampling.Ts_s
    kept = parallel(controller_blocks(d.control, d.grid.f_hz, Ts, keep_inert=True))
    used = parallel(controller_blocks(d.control, d.grid.f_hz, Ts))
    assert kept.order >= 1
    rank = np.linalg.matrix_rank(ct.obsv(kept.A, kept.C))
    assert rank == used.order == 0
    assert np.allclose(used.D, kept.D)


UNDAMPED = case_text("control", "Hi", "0", extra="")


@settings(derandomize=True, max_examples=2, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(bands=st.lists(st.sampled_from(["5 %", "10 %", "-20 %", "+15 %"]), min_size=1, max_size=2))
def test_grid_figure_with_every_corner_unstable_warns_nothing(tmp_path_factory, bands):
    tmp = tmp_path_factory.mktemp("nan")
    tol = "\n[tolerance]\n" + "".join(f'{k} = "{b}"\n' for k, b in zip(("L1", "C"), bands))
    text = UNDAMPED.replace('Lg = 0.5e-3', 'Lg = 0.5e-3\nLg_range = ["0 mH", "1 mH"]') + tol
    p = tmp / "case.toml"
    p.write_text(text, encoding="utf-8")
    r = CliRunner().invoke(app, ["grid", str(p), "--points", "3", "-q", "-o", str(tmp / "g.png")], env=ENV)
    assert r.exit_code in (0, 4), (r.stdout, r.stderr)
    assert "unstable" in r.stdout.lower()
    assert "Warning" not in r.stderr and "All-NaN" not in r.stderr, r.stderr


IN_RANGE = {  # key -> (low, high) of the documented ranges (docs/case-file.md), log-uniform draws
    ("filter", "L1"): L_LIMITS_H, ("filter", "L2"): L_LIMITS_H, ("filter", "C"): C_LIMITS_F,
    ("grid", "Lg"): (1e-9, L_LIMITS_H[1]), ("sampling", "fs"): FS_LIMITS_HZ,
    ("control", "Kp"): (GAIN_SPAN[0] * 2 * math.pi * 10e3 * 2.1e-3, GAIN_SPAN[1] * 2 * math.pi * 10e3 * 2.1e-3),
    ("control", "Hi"): (1e-6, GAIN_SPAN[1] * 2 * math.pi * 10e3 * 2.1e-3),
    ("filter", "R1"): (1e-6, 1e3), ("grid", "Rg"): (1e-6, 1e3),
}


@FUZZ
@given(tk=st.sampled_from(sorted(IN_RANGE)), u=st.floats(0.001, 0.999), negative=st.booleans())
def test_values_inside_the_ranges_are_analysed(tk, u, negative):
    lo, hi = IN_RANGE[tk]
    value = lo * (hi / lo) ** u
    if negative and tk == ("control", "Hi"):
        value = -value
    try:
        case = case_from_string(case_text(*tk, raw=repr(value)), "fuzz.toml")
    except CaseError as e:  # only the resonance or resonator checks against fs/2 may refuse
        assert re.search(r"\[(sampling|control)\] (fs|kind):", str(e)) and "\n" not in str(e), str(e)
        return
    a = analyse(case.design)
    assert math.isfinite(a.spectral_radius) and a.verdict in ("stable", "marginal", "unstable")


OPTION_RUNS = [  # (arguments before the value(s), how many values, arguments after)
    (["map", "{case}", "--y", "Hi", "--y-range", "0"], 1, ["--x-points", "3", "--y-points", "3", "-q"], "--y-range"),
    (["map", "{case}", "--x", "Kp", "--x-range", "1"], 1, ["--x-points", "3", "--y-points", "3", "-q"], "--x-range"),
    (["grid", "{case}", "--lg-range", "0"], 1, ["--points", "3", "-q"], "--lg-range"),
    (["pick", "{case}", "--hi-range", "0"], 1, ["--points", "5", "--lg-points", "2", "-q"], "--hi-range"),
]


@settings(FUZZ, max_examples=12)
@given(run=st.sampled_from(OPTION_RUNS), exp=st.integers(6, 308), negative=st.booleans())
def test_extreme_sweep_ends_on_the_command_line_are_refused(tmp_path_factory, run, exp, negative):
    before, _, after, option = run
    p = tmp_path_factory.mktemp("opt") / "case.toml"
    p.write_text(case_text().replace("Lg = 0.5e-3", "Lg = 0.5e-3\nLg_range = [0, 1e-3]"), encoding="utf-8")
    value = f"{'-' if negative and option == '--hi-range' else ''}1e{exp}"
    if option == "--lg-range":
        value += " H"
    args = [a.format(case=p) for a in before] + [value] + after
    if option == "--hi-range" and negative:  # FROM < TO: the negative end first
        args[args.index("--hi-range") + 1: args.index("--hi-range") + 3] = [value, "0"]
    r = CliRunner().invoke(app, args, env=ENV)
    assert r.exit_code == 2, (r.stdout, r.stderr)
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and option in lines[0] and "outside the range" in lines[0], r.stderr


@FUZZ
@given(mag=magnitudes, key=st.sampled_from(["current_counts_per_A", "modulator_counts_per_V", "ic_counts_per_A"]))
def test_firmware_scalings_are_refused_or_exported(mag, key):
    from loopcheck.design.firmware import export_controller
    from loopcheck.io.read_firmware import read_firmware_settings

    values = {"current_counts_per_A": 40.96, "modulator_counts_per_V": 6.0, "ic_counts_per_A": 40.96}
    values[key] = mag
    table = "\n[firmware]\n" + "".join(f"{k} = {v!r}\n" for k, v in values.items())
    case = case_from_string(case_text(extra=table), "fuzz.toml")
    try:
        settings_, _ = read_firmware_settings(case.tables["firmware"], case.where("firmware"), damping_gain_used=True)
    except CaseError as e:
        assert f"[firmware] {key}" in str(e) and "\n" not in str(e)
        return
    ex = export_controller(case.design, settings_)
    assert ex.recheck.before is not None
