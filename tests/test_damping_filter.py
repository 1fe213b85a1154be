"""The damping path as a discrete filter H(z) ([control] damping_filter).

Checks against the outside world:

* verdicts and closed-loop spectral radii against an independent
  python-control model built here: the plant sampled with python-control
  (tests/test_long_delay.py), the estimator / filter as its own discrete
  transfer-function block written from its difference equation (backward
  Euler y = C (vc[k] - vc[k-1])/Ts; Tustin y = 2C (vc[k] - vc[k-1])/Ts -
  y[k-1]; linear prediction y = (1 + a) ic[k] - a ic[k-1]; the high-pass
  s/(s + wc) sampled by python-control's 'tustin'), connected with
  python-control ``series``/``feedback`` (common practice for the
  difference equations);
* the critical frequency: with ic estimated by backward Euler the damping
  path has half a sample more lag, so the boundary between damping and
  anti-damping moves from fs/(4 lambda + 2) to fs/(4 (lambda + 1/2) + 2)
  (W. Pan, X. Ruan, C. Bao, W. Li and X. Wang, IEEE Trans. Power Electron.,
  vol. 29, no. 7, 2014, for the virtual impedance with delay; Z. Xin,
  X. Wang, P. C. Loh and F. Blaabjerg, "Realization of Digital
  Differentiator Using Generalized Integrator for Power Converters", IEEE
  Trans. Power Electron., vol. 30, no. 12, 2015, for the half-sample lag of
  the backward-Euler derivative and the phase-exact Tustin derivative; both
  from memory). Located numerically on the engine's model and compared with
  the shifted formula.

The filter and controller values are invented for the tests.
"""

import dataclasses
import math

import numpy as np
import pytest
import scipy.linalg
from scipy.optimize import brentq

from loopcheck.design import maps
from loopcheck.engine.analysis import analyse
from loopcheck.io.casefile import CaseError, case_from_string
from loopcheck.engine.damping_filter import critical_frequency_hz
from loopcheck.engine.loop import build_loop
from loopcheck.engine.model import Control, DampingFilter, Design, Filter, Grid, Sampling
from loopcheck.engine.plant import OUTPUT_IC
from reference_loop import controller, lcl_matrices, spectral_radius
from test_long_delay import sampled_plant_long

ct = pytest.importorskip("control")

L1, L2, CF = 1.5e-3, 0.5e-3, 10e-6
FS = 12e3
TS = 1.0 / FS


def filt(kind, **kw):
    signal = "vc" if kind in ("backward-euler", "tustin") else "ic"
    return DampingFilter(kind=kind, signal=kw.pop("signal", signal), C_F=CF, **kw)


def pr_design(delay, Hi, f, Kp=4.0, Lg=0.3e-3, feedback="grid"):
    return Design(
        Filter(L1, CF, L2, R1_ohm=0.02, R2_ohm=0.02),
        Grid(50.0, Lg),
        Sampling(FS, delay),
        Control(feedback, "PR", Kp, Kr=300.0, wc_rad_s=5.0, Hi_V_per_A=Hi, damping_filter=f),
    )


def reference_filter(f, Ts):
    """(selector row on [i1, i2, ic, vc], python-control H(z)) from the
    filter's difference equation, not from loopcheck's coefficients."""
    if f.kind == "backward-euler":
        return [0, 0, 0, f.C_F / Ts], ct.tf([1.0, -1.0], [1.0, 0.0], Ts)
    if f.kind == "tustin":
        return [0, 0, 0, f.C_F / Ts], ct.tf([2.0, -2.0], [1.0, 1.0], Ts)
    if f.kind == "lead":
        g = f.lead_samples
        return [0, 0, 1, 0], ct.tf([1.0 + g, -g], [1.0, 0.0], Ts)
    if f.kind == "high-pass":
        wc = 2 * math.pi * f.cutoff_hz
        return [0, 0, 1, 0], ct.sample_system(ct.tf([1.0, 0.0], [1.0, wc]), Ts, method="tustin")
    if f.kind == "coefficients":
        n = max(len(f.b), len(f.a))
        b = list(f.b) + [0.0] * (n - len(f.b))
        a = list(f.a) + [0.0] * (n - len(f.a))
        row = [0, 0, 0, f.C_F / Ts] if f.signal == "vc" else [0, 0, 1, 0]
        return row, ct.tf(b, a, Ts)
    raise ValueError(f.kind)


def reference_closed_loop(design):
    fl, g = design.filter, design.grid
    A, B, Cm = lcl_matrices(fl.L1_H, fl.C_F, fl.L2_H + g.Lg_H, fl.R1_ohm, fl.R2_ohm + g.Rg_ohm)
    Cm = np.vstack([Cm, [0.0, 1.0, 0.0]])  # vc as a fourth output
    Ts = design.sampling.Ts_s
    Pd = sampled_plant_long(A, B, Cm, Ts, design.sampling.delay)
    row, H = reference_filter(design.control.damping_filter, Ts)
    sel = ct.ss([], [], [], [row], Ts)
    damping = ct.series(sel, ct.ss(H), ct.ss([], [], [], [[design.control.Hi_V_per_A]], Ts))
    inner = ct.feedback(Pd, damping)  # u = uc - Hi * H(z) s
    r = 1 if design.control.feedback == "grid" else 0
    L = ct.series(controller(ct, design), inner[r, 0])
    return ct.feedback(L, 1)


FILTERS = [
    filt("backward-euler"),
    filt("tustin"),
    filt("lead", lead_samples=0.5),
    filt("high-pass", cutoff_hz=300.0),
    DampingFilter(kind="coefficients", b=(0.6, 0.4), a=(1.0, -0.2), signal="ic", C_F=CF),
]


@pytest.mark.parametrize("delay", [1.0, 1.5])
@pytest.mark.parametrize("f", FILTERS, ids=[f.kind for f in FILTERS])
def test_verdicts_against_python_control_with_filter_block(f, delay):
    outcomes = set()
    for Hi in (0.0, 3.0, 8.0, 15.0, -6.0):
        for feedback in ("grid", "converter"):
            d = pr_design(delay, Hi, f, feedback=feedback)
            a = analyse(d)
            rho = spectral_radius(reference_closed_loop(d))
            assert a.spectral_radius == pytest.approx(rho, rel=1e-7, abs=1e-9), (Hi, feedback)
            if abs(rho - 1.0) > 1e-6:
                assert a.stable is (rho < 1.0)
                outcomes.add(a.stable)
    assert True in outcomes or False in outcomes


def test_the_set_of_cases_has_both_outcomes():
    seen = set()
    for f in FILTERS:
        for Hi in (3.0, 15.0, -6.0):
            seen.add(analyse(pr_design(1.0, Hi, f)).stable)
    assert seen == {True, False}


def lossless(ratio, delay, f, Hi=0.0, kp=0.0):
    wr = 2 * math.pi * ratio * FS
    C = (L1 + L2) / (L1 * L2 * wr**2)
    f = dataclasses.replace(f, C_F=C) if f is not None else None
    return Design(Filter(L1, C, L2), Grid(50.0, 0.0), Sampling(FS, delay),
                  Control("grid", "P", kp * (L1 + L2) / TS, Hi_V_per_A=Hi, damping_filter=f))


def resonant_conductance_per_hi(d):
    """-Re(ds/dHi) of the resonant pole of the engine's sampled plant at Hi = 0
    (positive: the damping path damps), from the exact eigenvalue derivative
    with left eigenvectors from their own solve."""
    p = build_loop(d).plant
    A, B, Cy = p.A, p.B, p.C[OUTPUT_IC : OUTPUT_IC + 1]
    ev, Wl, V = scipy.linalg.eig(A, left=True, right=True)
    i = int(np.argmax(ev.imag))
    w = Wl[:, i].conj()
    v = V[:, i] / (w @ V[:, i])
    dz = -(w @ B)[0] * (Cy @ v)[0]
    return -(dz / (ev[i] * TS)).real


@pytest.mark.parametrize("delay", [0.5, 1.0, 1.5])
def test_backward_euler_moves_the_critical_frequency_by_half_a_sample(delay):
    # Pan et al. 2014 + Xin et al. 2015 (from memory): fs/(4 (lambda + 1/2) + 2)
    shifted = 1.0 / (4.0 * (delay + 0.5) + 2.0)
    f = filt("backward-euler")
    found = brentq(lambda r: resonant_conductance_per_hi(lossless(r, delay, f)), 0.6 * shifted, 1.3 * shifted, xtol=1e-13)
    assert found == pytest.approx(shifted, rel=1e-6)
    # the measured ic keeps fs/(4 lambda + 2) on the same model
    plain = brentq(lambda r: resonant_conductance_per_hi(lossless(r, delay, None)), 0.02, 0.49, xtol=1e-13) \
        if delay < 1.2 else None
    if plain is not None:
        assert plain == pytest.approx(1.0 / (4.0 * delay + 2.0), rel=1e-6)
    # the engine's own critical frequency (item 3) agrees
    assert critical_frequency_hz(lossless(0.1, delay, f)) / FS == pytest.approx(shifted, rel=1e-9)


@pytest.mark.parametrize("delay", [0.5, 1.0])
def test_tustin_derivative_keeps_the_critical_frequency(delay):
    # Xin et al. 2015 (from memory): the Tustin derivative has no phase error
    fc = 1.0 / (4.0 * delay + 2.0)
    f = filt("tustin")
    found = brentq(lambda r: resonant_conductance_per_hi(lossless(r, delay, f)), 0.7 * fc, 1.3 * fc, xtol=1e-13)
    assert found == pytest.approx(fc, rel=1e-6)
    assert critical_frequency_hz(lossless(0.1, delay, f)) / FS == pytest.approx(fc, rel=1e-9)


def test_lead_moves_the_critical_frequency_up_and_matches_the_engine():
    # a lead in the damping path widens the damped band (delay compensation,
    # common practice); the engine's numeric critical frequency (the phase of
    # the virtual admittance at -90 deg, Pan et al. 2014, from memory) is
    # where the engine's resonant conductance changes sign
    f = filt("lead", lead_samples=0.5)
    fc_num = critical_frequency_hz(lossless(0.1, 1.0, f)) / FS
    assert fc_num > 1 / 6 + 0.005
    found = brentq(lambda r: resonant_conductance_per_hi(lossless(r, 1.0, f)), 0.12, 0.3, xtol=1e-13)
    assert found == pytest.approx(fc_num, rel=1e-6)


@pytest.mark.parametrize("delay", [1.0, 1.5])
def test_small_gain_verdicts_on_both_sides_of_the_shifted_boundary(delay):
    # Pan et al. 2014, Xin et al. 2015 (from memory): a small positive Hi
    # damps below fs/(4 (lambda + 1/2) + 2) with the backward-Euler estimate
    # and not above it (closed-loop eigenvalues)
    fc = 1.0 / (4.0 * (delay + 0.5) + 2.0)
    f = filt("backward-euler")
    for ratio, below in ((0.93 * fc, True), (1.07 * fc, False)):
        d = lossless(ratio, delay, f, Hi=0.01 * L1 / TS, kp=0.0005)
        assert analyse(d).stable is below, ratio


def test_map_with_a_filter_matches_pointwise_eigenvalues():
    # the maps' rank-one fast paths (D-decomposition along Hi) against the
    # eigenvalues of the assembled loop at every grid point
    d = pr_design(1.0, 8.0, filt("backward-euler"))
    spec = maps.MapSpec(maps.Axis("Lg", 0.0, 3e-3, 7), maps.Axis("Hi", -10.0, 40.0, 21))
    m = maps.compute_map(d, spec)
    for iy, hi in enumerate(m.y_values):
        for ix, lg in enumerate(m.x_values):
            dd = dataclasses.replace(d, grid=dataclasses.replace(d.grid, Lg_H=lg),
                                     control=dataclasses.replace(d.control, Hi_V_per_A=hi))
            rho = spectral_radius(reference_closed_loop(dd))
            if abs(rho - 1.0) > 1e-4:
                assert bool(m.stable[iy, ix]) is (rho < 1.0), (lg, hi)
    assert m.stable.any() and not m.stable.all()
    assert m.critical_ratio == pytest.approx(1.0 / 8.0, rel=1e-9)


CASE = """
[filter]
L1 = "1.5 mH"
C = "10 uF"
L2 = "0.5 mH"
[grid]
f = "50 Hz"
[sampling]
fs = "12 kHz"
[control]
feedback = "grid"
kind = "P"
Kp = "4 V/A"
Hi = "5 V/A"
{extra}
"""


@pytest.mark.parametrize("extra, needle", [
    ('damping_filter = "bogus"', "[control] damping_filter: expected one of"),
    ("damping_filter = { b = [1, -1], a = [0] }", "[control] damping_filter: a: the first coefficient"),
    ("damping_filter = { b = [1], a = [1, -1.5] }", "[control] damping_filter: a: the filter is unstable"),
    ('damping_filter = { b = "x" }', "[control] damping_filter: b: expected a non-empty list"),
    ('damping_filter = { b = [1, "y"] }', "[control] damping_filter: b: expected finite numbers"),
    ("damping_filter = { b = [0, 0] }", "[control] damping_filter: b: all zero"),
    ("damping_filter = { a = [1] }", "[control] damping_filter: b: missing"),
    ('damping_filter = { b = [1], signal = "i2" }', "[control] damping_filter: signal: expected one of"),
    ("damping_filter = { b = [1], c = [1] }", "damping_filter: c: unknown key"),
    ("damping_filter = 3", "[control] damping_filter: expected a preset name"),
    ("damping_filter = true", "[control] damping_filter: expected a preset name"),
    ('damping_filter = "high-pass"', "[control] damping_cutoff: missing"),
    ('damping_filter = "high-pass"\ndamping_cutoff = "7 kHz"', "[control] damping_cutoff: must lie below fs/2"),
    ('damping_filter = "lead"\ndamping_lead = 3', "[control] damping_lead:"),
    ("damping_lead = 0.5", "[control] damping_lead: only used with"),
])
def test_bad_filter_specifications_are_one_line_errors(extra, needle):
    with pytest.raises(CaseError) as info:
        case_from_string(CASE.format(extra=extra), "x.toml")
    msg = str(info.value)
    assert needle in msg and "\n" not in msg, msg


def test_presets_read_from_the_case_file():
    c = case_from_string(CASE.format(extra='damping_filter = "backward-euler"'), "x.toml").design.control
    assert c.damping_filter.kind == "backward-euler" and c.damping_filter.signal == "vc"
    assert c.damping_filter.C_F == pytest.approx(10e-6)
    c = case_from_string(CASE.format(extra='damping_filter = "measured"'), "x.toml").design.control
    assert c.damping_filter is None


# --- the demo cases through the commands (one-line refusals where a part cannot model them)

from pathlib import Path  # noqa: E402

from typer.testing import CliRunner  # noqa: E402

from loopcheck.cli.main import app  # noqa: E402

CASES = Path(__file__).resolve().parent.parent / "cases"
ENV = {"COLUMNS": "200", "NO_COLOR": "1"}


@pytest.mark.parametrize("name, refuses", [
    ("aa-filter-15-sample-delay.toml", {"simulate": "[sampling] delay"}),
    ("ab-ic-estimated-from-vc.toml", {"simulate": "[control] damping_filter", "export": "[control] damping_filter"}),
    ("ac-lead-compensated-damping.toml", {"simulate": "[control] damping_filter", "export": "[control] damping_filter"}),
])
def test_demo_cases_run_or_refuse_in_one_line(name, refuses, tmp_path):
    path = str(CASES / name)
    runner = CliRunner()
    for cmd in (["grid", path], ["pick", path, "--quiet"], ["export", path, "-o", str(tmp_path / "fw")],
                ["simulate", path]):
        r = runner.invoke(app, cmd, env=ENV)
        if cmd[0] in refuses:
            assert r.exit_code == 2, (cmd, r.stderr)
            err = r.stderr.strip()
            assert "\n" not in err and refuses[cmd[0]] in err and "Traceback" not in r.output, err
        else:
            assert r.exit_code in (0, 4), (cmd, r.stderr)
    # the check command prints the critical frequency of the actual damping path
    r = runner.invoke(app, ["check", path], env=ENV)
    assert r.exit_code == 0
    expect = {"aa": "= 1.25 kHz", "ab": "= 2.5 kHz", "ac": "= 2.432 kHz"}[name[:2]]
    assert expect in r.stdout
