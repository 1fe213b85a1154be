"""Checks of the sampled-data simulator (loopcheck.timedomain.simulate) against
independent references.

* An independent closed-loop simulation written here: the filter's circuit
  equations typed in by hand (Kirchhoff's laws, common practice), integrated
  by scipy.integrate.solve_ivp (DOP853, a general-purpose reference
  library) between the switching instants of the held converter voltage,
  with the controller stepped here from its state space (P. Virtanen et al.,
  "SciPy 1.0: fundamental algorithms for scientific computing in Python",
  Nature Methods, vol. 17, pp. 261-272, 2020).
* The rate and frequency of the simulated resonance against the closed-loop
  eigenvalues of the z-domain engine: sigma = ln|z|/Ts and
  f = angle(z)/(2 pi Ts) (mapping z = e^{sTs}: K. J. Astrom and
  B. Wittenmark, "Computer-Controlled Systems", 3rd ed., 1997, ch. 2).
* Zero steady-state error of a PR controller at its tuned frequency
  (D. N. Zmood and D. G. Holmes, IEEE Trans. Power Electron., vol. 18,
  no. 3, pp. 814-822, 2003).

The design values below are invented for the tests.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from loopcheck.engine.analysis import analyse
from loopcheck.engine.controller import controller_blocks, parallel
from loopcheck.engine.model import Control, Design, Filter, Grid, PassiveDamping, Sampling
from loopcheck.timedomain.scenario import Event, GridHarmonic, Scenario
from loopcheck.timedomain.simulate import (
    envelope_estimate,
    matrix_pencil,
    resonance_rate_check,
    sampled_system_matrix,
    simulate,
)


def make_design(Hi=10.0, Lg=0.0, delay=1.0, damping=None, R1=0.0, R2=0.0, Rg=0.0, kind="PR", fs=16e3):
    """Invented demo filter: L1 1.5 mH, C 15 uF, L2 0.8 mH, fs 16 kHz (fr = 1.80 kHz < fs/6)."""
    return Design(
        Filter(L1_H=1.5e-3, C_F=15e-6, L2_H=0.8e-3, R1_ohm=R1, R2_ohm=R2, damping=damping or PassiveDamping()),
        Grid(f_hz=50.0, Lg_H=Lg, Rg_ohm=Rg, S_VA=12e3, V_V=400.0),
        Sampling(fs_hz=fs, delay=delay),
        Control(feedback="grid", kind=kind, Kp_V_per_A=11.0, Ki_V_per_As=2000.0, Kr=1500.0, Hi_V_per_A=Hi),
        name="test",
    )


# --------------------------------------------------------------------------
# independent reference: hand-written circuit + solve_ivp + controller loop
# --------------------------------------------------------------------------


def circuit_rhs(design: Design, Lg: float):
    """dx/dt for x = [i1, vc, i2, (vd), (iL)] from Kirchhoff's laws, written
    out here independently of loopcheck.engine.plant; inputs vi(t), vg(t)."""
    f = design.filter
    L1, C, R1 = f.L1_H, f.C_F, f.R1_ohm
    L2 = f.L2_H + Lg
    R2 = f.R2_ohm + design.grid.Rg_ohm
    d = f.damping

    def rhs(x, vi, vg):
        i1, vc, i2 = x[0], x[1], x[2]
        if d.kind == "series-R":
            v = vc + d.Rd_ohm * (i1 - i2)  # voltage across the shunt branch
            dvc = (i1 - i2) / C
            extra = []
        elif d.kind == "split-RC":
            vd = x[3]
            idamp = (vc - vd) / d.Rd_ohm
            v = vc
            dvc = (i1 - i2 - idamp) / C
            extra = [idamp / d.Cd_F]
        elif d.kind == "split-RLC":
            vd, iL = x[3], x[4]
            idamp = (vc - vd) / d.Rd_ohm + iL
            v = vc
            dvc = (i1 - i2 - idamp) / C
            extra = [idamp / d.Cd_F, (vc - vd) / d.Ld_H]
        else:
            v = vc
            dvc = (i1 - i2) / C
            extra = []
        di1 = (vi - R1 * i1 - v) / L1
        di2 = (v - R2 * i2 - vg) / L2
        return np.array([di1, dvc, di2] + extra)

    n = {"none": 3, "series-R": 3, "split-RC": 4, "split-RLC": 5}[d.kind]
    return rhs, n


def reference_run(design: Design, n_samples: int, N: int, vg_fn, iref_fn, burst=None):
    """Closed loop stepped here: samples at kTs, u[k] held from (k+delay)Ts.
    burst = (k_on, k_off, peak_V, f_hz) adds peak*cos(2 pi f (t - t_on)) to vi.
    Returns fine times and [i1, vc, i2] at N points per period."""
    Ts = design.sampling.Ts_s
    dly = design.sampling.delay
    rhs, n = circuit_rhs(design, design.grid.Lg_H)
    ctrl = parallel(controller_blocks(design.control, design.grid.f_hz, Ts))
    Ac, Bc, Cc, Dc = ctrl.A, ctrl.B[:, 0], ctrl.C[0], ctrl.D[0, 0]
    Hi = design.control.Hi_V_per_A
    x = np.zeros(n)
    c = np.zeros(Ac.shape[0])
    u_prev = 0.0
    out_t, out_x = [], []

    def vb(t):
        if burst is None:
            return 0.0
        k_on, k_off, peak, fb = burst
        return peak * math.cos(2 * math.pi * fb * (t - k_on * Ts)) if k_on * Ts <= t < k_off * Ts else 0.0

    for k in range(n_samples):
        t0 = k * Ts
        i1, i2 = x[0], x[2]
        e = iref_fn(t0) - i2
        u = Cc @ c + Dc * e - Hi * (i1 - i2)
        c = Ac @ c + Bc * e
        t_upd = t0 + dly * Ts
        pieces = [(t0, t_upd, u_prev), (t_upd, t0 + Ts, u)]
        fine = t0 + np.arange(N) * Ts / N
        for a, b, uh in pieces:
            if b - a <= 1e-15:
                continue
            sel = fine[(fine >= a - 1e-15) & (fine < b - 1e-15)]
            sol = solve_ivp(
                lambda t, y: rhs(y, uh + vb(t), vg_fn(t)),
                (a, b), x, method="DOP853", rtol=1e-12, atol=1e-12, t_eval=np.r_[sel, b], dense_output=False,
            )
            for tt, yy in zip(sol.t[:-1], sol.y[:, :-1].T):
                out_t.append(tt)
                out_x.append(yy[:3].copy())
            x = sol.y[:, -1]
        u_prev = u
    return np.array(out_t), np.array(out_x)


@pytest.mark.parametrize(
    "damping, delay",
    [
        (PassiveDamping(kind="series-R", Rd_ohm=1.5), 0.5),
        (PassiveDamping(kind="split-RLC", Rd_ohm=12.0, Cd_F=6e-6, Ld_H=0.4e-3), 1.0),
    ],
)
def test_exact_integration_matches_solve_ivp(damping, delay):
    # Same circuit, same controller, same held voltage: loopcheck's exact
    # matrix-exponential stepping against solve_ivp (DOP853, rtol 1e-12).
    d = make_design(Hi=6.0, Lg=0.4e-3, delay=delay, damping=damping, R1=0.05, R2=0.03, Rg=0.02)
    Ts = d.sampling.Ts_s
    K, N = 64, 8
    vpk, ipk, f1 = 300.0, 20.0, 50.0
    harm = GridHarmonic(order=5, share=0.04, phase_deg=30.0)
    burst_f = 1900.0
    sc = Scenario(
        duration_s=K * Ts,
        points_per_sample=N,
        start="rest",
        grid_peak_V=vpk,
        grid_phase_deg=10.0,
        grid_harmonics=(harm,),
        reference_peak_A=ipk,
        reference_phase_deg=-20.0,
        trip_current_A=math.inf,
        events=(Event(time_s=16 * Ts, kind="resonance-burst", peak_V=25.0, cycles=2, frequency_hz=burst_f),),
    )
    w = simulate(d, sc)
    w1 = 2 * math.pi * f1
    ph = math.radians(10.0)

    def vg(t):
        return vpk * math.cos(w1 * t + ph) + 0.04 * vpk * math.cos(5 * w1 * t + math.radians(30.0))

    def iref(t):
        return ipk * math.cos(w1 * t + ph - math.radians(20.0))

    k_off = 16 + int(round(2 / burst_f / Ts))
    t, x = reference_run(d, K, N, vg, iref, burst=(16, k_off, 25.0, burst_f))
    assert np.allclose(t, w.time_s, rtol=0, atol=1e-12)
    for col, sim in ((0, w.i1_A), (1, w.vc_V), (2, w.i2_A)):
        scale = np.max(np.abs(x[:, col]))
        assert np.max(np.abs(sim - x[:, col])) <= 1e-9 * scale
    # the grid voltage produced by the oscillator states is the sinusoid itself
    assert np.max(np.abs(w.vg_V - np.array([vg(tt) for tt in t]))) <= 1e-9 * vpk


def test_sampled_recursion_has_the_engine_closed_loop_poles():
    # The simulator's one-period map contains the engine's closed-loop poles
    # (build_loop/analyse) plus the grid and reference oscillators at e^{+-j w1 Ts}.
    for Hi in (0.0, 10.0):
        d = make_design(Hi=Hi, delay=0.7, Lg=1e-3)
        ev = np.linalg.eigvals(sampled_system_matrix(d))
        cl = analyse(d).closed_loop_poles
        for p in cl:
            assert np.min(np.abs(ev - p)) < 1e-9
        z1 = np.exp(2j * math.pi * 50.0 * d.sampling.Ts_s)
        assert np.sum(np.abs(ev - z1) < 1e-9) >= 2


def test_pr_controller_tracks_reference_in_steady_state():
    # Zmood & Holmes 2003: an ideal resonator at f1 gives zero steady-state
    # error at f1. fs/f1 = 320 is an integer, so the sampled steady state
    # repeats exactly after one fundamental period.
    d = make_design(Hi=10.0)
    sc = Scenario(duration_s=0.02, start="steady", events=())
    w = simulate(d, sc)
    assert np.max(np.abs(w.ifb_A - w.iref_A)) < 1e-9 * np.max(np.abs(w.iref_A))
    w2 = simulate(d, replace(sc, duration_s=0.04))
    n = w.time_s.size
    assert np.max(np.abs(w2.i1_A[n:] - w2.i1_A[:n])) < 1e-8 * np.max(np.abs(w2.i1_A))


def dominant_resonance_pole(d):
    """Independent choice for the test: the closed-loop pole (upper half
    plane) of largest magnitude among those above 1 kHz."""
    Ts = d.sampling.Ts_s
    poles = [p for p in analyse(d).closed_loop_poles if p.imag > 0]
    hi = [p for p in poles if math.atan2(p.imag, p.real) / (2 * math.pi * Ts) > 1000.0]
    return max(hi, key=abs)


@pytest.mark.parametrize("Hi, verdict", [(0.0, "unstable"), (5.0, "unstable"), (10.0, "stable")])
def test_resonance_rate_matches_pole(Hi, verdict):
    d = make_design(Hi=Hi)
    a = analyse(d)
    assert a.verdict == verdict
    Ts = d.sampling.Ts_s
    z = dominant_resonance_pole(d)
    sigma = math.log(abs(z)) / Ts
    freq = math.atan2(z.imag, z.real) / (2 * math.pi * Ts)
    rc = resonance_rate_check(d, window_samples=240)
    # growth for an unstable verdict, decay for a stable one
    assert (rc.simulated_rate_per_s > 0) == (verdict == "unstable")
    assert abs(rc.simulated_rate_per_s - sigma) <= 0.02 * abs(sigma)
    assert abs(rc.simulated_frequency_hz - freq) <= 0.01 * freq
    # model-free estimate from the fine waveform (logarithmic decrement)
    assert rc.envelope_rate_per_s is not None
    assert abs(rc.envelope_rate_per_s - sigma) <= 0.02 * abs(sigma)
    assert abs(rc.envelope_frequency_hz - freq) <= 0.01 * freq
    if verdict == "unstable":
        assert abs(rc.dominant_pole - z) < 1e-9


def test_rate_check_uses_grid_inductance_after_a_step():
    # The fitted oscillation after an Lg step must be a closed-loop pole of
    # the loop *with* the new Lg (engine eigenvalues), not of the old one.
    d = make_design(Hi=10.0)
    sc = Scenario(
        duration_s=0.03,
        events=(
            Event(0.005, "grid-inductance-step", Lg_H=2e-3),
            Event(0.01, "resonance-burst", peak_V=10.0),
        ),
    )
    rc = resonance_rate_check(d, sc, window_samples=200)
    Ts = d.sampling.Ts_s
    assert rc.Lg_H == 2e-3
    s_new = [complex(math.log(abs(p)) / Ts, math.atan2(p.imag, p.real)) for p in analyse(make_design(10.0, Lg=2e-3)).closed_loop_poles]
    s_old = [complex(math.log(abs(p)) / Ts, math.atan2(p.imag, p.real)) for p in analyse(make_design(10.0)).closed_loop_poles]
    fit = complex(rc.simulated_rate_per_s, 2 * math.pi * Ts * rc.simulated_frequency_hz)

    def best(ss):  # relative mismatch in rate and frequency to the nearest pole
        return min(max(abs(fit.real - x.real) / abs(x.real), abs(fit.imag - x.imag) / abs(x.imag)) for x in ss if x.imag > 0)

    assert best(s_new) <= 0.02
    assert best(s_old) > 0.10


def test_matrix_pencil_recovers_known_modes():
    # Y. Hua and T. K. Sarkar, "Matrix pencil method for estimating parameters of
    # exponentially damped/undamped sinusoids in noise", IEEE Trans. Acoust., Speech,
    # Signal Process., vol. 38, no. 5, 1990 (from memory): a noise-free sum of damped
    # sinusoids is recovered exactly.
    k = np.arange(120)
    z1 = 0.97 * np.exp(1j * 0.6)
    z2 = 0.9 * np.exp(1j * 1.7)
    y = (2.0 * z1**k + 0.5 * z2**k).real
    z, a = matrix_pencil(y)
    for zt in (z1, z2, z1.conjugate(), z2.conjugate()):
        assert np.min(np.abs(z - zt)) < 1e-8


def test_envelope_estimate_of_a_damped_sine():
    # Logarithmic decrement of exp(-300 t) cos(2 pi 1000 t) (common practice).
    t = np.linspace(0, 0.01, 20001)
    y = np.exp(-300 * t) * np.cos(2 * np.pi * 1000 * t + 0.3)
    s, f = envelope_estimate(t, y)
    assert abs(s + 300) < 3 and abs(f - 1000) < 2
    # two comparable modes: no single oscillation, no estimate
    y2 = np.cos(2 * np.pi * 1000 * t) + 0.9 * np.cos(2 * np.pi * 1370 * t)
    assert envelope_estimate(t, y2) == (None, None)


def test_events_change_the_waveform_as_stated():
    d = make_design(Hi=10.0)
    Ts = d.sampling.Ts_s
    sc = Scenario(
        duration_s=0.04,
        reference_peak_A=10.0,
        events=(
            Event(0.01, "reference-step", peak_A=20.0),
            Event(0.02, "grid-phase-jump", angle_deg=30.0),
            Event(0.03, "grid-voltage-step", peak_V=200.0),
        ),
    )
    w = simulate(d, sc)
    k = np.searchsorted(w.sample_time_s, [0.01, 0.02, 0.03])
    assert np.max(np.abs(w.iref_A[: k[0]])) == pytest.approx(10.0, rel=1e-3)
    assert np.max(np.abs(w.iref_A[k[0] :])) == pytest.approx(20.0, rel=1e-3)
    # grid voltage: phase jump by 30 deg at 20 ms, amplitude 200 V after 30 ms
    N = w.points_per_sample
    i = k[1] * N
    t = w.time_s[i]
    vpk = 400 * math.sqrt(2 / 3)
    assert w.vg_V[i] == pytest.approx(vpk * math.cos(2 * math.pi * 50 * t + math.radians(30)), abs=1e-6)
    assert np.max(np.abs(w.vg_V[k[2] * N :])) == pytest.approx(200.0, rel=1e-3)
    assert len(w.events) == 3


def test_unstable_loop_trips_and_stops():
    d = make_design(Hi=0.0)
    w = simulate(d, Scenario(duration_s=0.05, events=(Event(0.005, "voltage-pulse", peak_V=20.0),)))
    assert w.tripped_at_s is not None and w.tripped_at_s < 0.05
    assert w.sample_time_s[-1] == pytest.approx(w.tripped_at_s)


def test_tripped_waveform_and_csv_end_at_the_trip_sample():
    """Fails before issue 14: the fine waveform (and the CSV) held one more
    sampling period after the trip sample. The trip level is checked here
    on the waveform itself: the last point exceeds it, the sample before
    does not (common practice for an overcurrent trip)."""
    import io

    from loopcheck.timedomain.simulate import write_csv

    d = make_design(Hi=0.0)
    w = simulate(d, Scenario(duration_s=0.05, events=(Event(0.005, "voltage-pulse", peak_V=20.0),)))
    assert w.tripped_at_s is not None
    assert w.time_s[-1] == pytest.approx(w.tripped_at_s, abs=1e-12)
    peak = np.maximum(np.abs(w.i1_A), np.abs(w.i2_A))
    N = w.points_per_sample
    assert peak[-1] > w.trip_current_A and peak[-1 - N] <= w.trip_current_A
    buf = io.StringIO()
    write_csv(w, buf)
    lines = buf.getvalue().splitlines()
    assert lines[1].startswith("# tripped:")
    rows = np.loadtxt(lines[3:], delimiter=",")
    assert rows.shape[0] == w.time_s.size and rows[-1, 0] == pytest.approx(w.tripped_at_s, abs=1e-12)


def test_rate_check_window_starts_where_the_rounded_pulse_ends():
    """Fails before issue 14: the fit window used the event time before it
    was rounded to the sampling instant. The pulse start is read here from
    the simulated converter voltage of a run from rest (zero until the
    pulse arrives), independent of the events list."""
    d = make_design(Hi=10.0)
    Ts = d.sampling.Ts_s
    t_ev = 0.02004  # 0.64 Ts after the sampling instant 20.0 ms (fs = 16 kHz: Ts = 62.5 us)
    width = 2 * Ts
    sc = Scenario(duration_s=0.03, start="rest", grid_peak_V=0.0, reference_peak_A=0.0,
                  events=(Event(t_ev, "voltage-pulse", peak_V=15.0, width_s=width),))
    w = simulate(d, sc)
    start = w.time_s[np.nonzero(w.vi_V != 0.0)[0][0]]
    assert abs(start - t_ev) > 0.1 * Ts  # the rounding matters for this case
    assert w.events[0][0] == pytest.approx(start, abs=1e-12)
    rc = resonance_rate_check(d, sc)
    assert rc.window_s[0] == pytest.approx(start + width, abs=1e-12)
    assert rc.window_s[1] - rc.window_s[0] == pytest.approx(rc.samples * Ts, abs=1e-12)


@pytest.mark.parametrize("feedback, panel", [("grid", 0), ("converter", 1)])
def test_reference_is_drawn_on_the_panel_of_the_regulated_current(feedback, panel):
    # issue 12: the reference belongs beside the current the loop regulates
    # (i2 for grid-side feedback, i1 for converter-side; common practice)
    from loopcheck.figures.sim_plot import waveform_figure

    d = Design(Filter(1.2e-3, 10e-6, 0.5e-3), Grid(50.0, 0.2e-3), Sampling(20e3, 1.0),
               Control(feedback, "PR", Kp_V_per_A=8.0, Kr=300.0, Hi_V_per_A=6.0))
    w = simulate(d, Scenario(duration_s=0.02))
    fig = waveform_figure(w, None, None, None)
    owners = [i for i, ax in enumerate(fig.axes[:4]) for ln in ax.get_lines()
              if ln.get_label().startswith("current reference")]
    assert owners == [panel]
    assert np.allclose(w.ifb_A, (w.i2_A if feedback == "grid" else w.i1_A)[:: w.points_per_sample][: w.ifb_A.size])
