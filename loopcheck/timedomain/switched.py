"""Switched model: carrier-based PWM with a dc-link voltage instead of the
averaged modulator, integrated exactly between switching edges.

The same sampled controller as :mod:`loopcheck.timedomain.simulate` (samples at k*Ts,
u[k] held from k*Ts + delay*Ts) now sets the references of the phase legs,
which are compared with one triangle carrier of frequency fsw (valley -1 at
t = 0, peak +1 at 1/(2 fsw)):

* ``three-phase``: three filters (balanced, identical), three controllers
  with references 120 deg apart, legs at +-Vdc/2 with references
  u_p / (Vdc/2); the phase voltage of an isolated-neutral load is
  v_p = v_leg,p - (v_leg,a + v_leg,b + v_leg,c)/3;
* ``half-bridge``: one leg, v = v_leg;
* ``full-bridge-unipolar``: two legs with references +-u/Vdc, v = v_a - v_b.

References above 1 in magnitude are clipped (overmodulation; reported).
Between consecutive events of the carrier (peaks and valleys), the update
instants and the output points, the carrier is linear and every reference
constant, so each leg's switching instant is found in closed form; between
switching instants every voltage is constant and the filter (with the grid
voltage from oscillator states) is propagated exactly with the block matrix
exponential of Van Loan (1978), as in :mod:`loopcheck.timedomain.simulate`. No dead
time, ideal switches. Grid harmonics of order h appear in phase p with the
phase shift h * p * 120 deg (the 5th is then of negative sequence).

Scenario events supported: reference-step, grid-voltage-step,
grid-phase-jump, grid-inductance-step; bursts and pulses are ignored (the
switching ripple already excites the filter), which is noted in the result.
Only phase a is returned.

References
----------
.. [1] D. G. Holmes and T. A. Lipo, "Pulse Width Modulation for Power
   Converters: Principles and Practice", IEEE Press / Wiley, 2003
   (sine-triangle modulation, regular sampling).
.. [2] C. F. Van Loan, "Computing integrals involving the matrix
   exponential", IEEE Trans. Autom. Control, vol. 23, no. 3, pp. 395-404,
   1978.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np
from scipy.linalg import expm

from loopcheck.engine.controller import controller_blocks, parallel
from loopcheck.harmonics.spectrum import PwmSpec
from loopcheck.engine.model import Design, design_resonance_hz
from loopcheck.engine.plant import OUTPUT_I1, OUTPUT_I2, OUTPUT_IC, design_plant
from loopcheck.timedomain.scenario import INJECTION_KINDS, GridHarmonic, Scenario
from loopcheck.timedomain.simulate import Waveforms, grid_peak_voltage_V, reference_peak_A, steady_loop_state


def _carrier(t, fsw):
    """Triangle carrier value at t [s] (valley -1 at multiples of 1/fsw)."""
    x = (t * fsw) % 1.0
    return 1.0 - 4.0 * abs(x - 0.5)


class _Modal:
    """Exact propagation of x' = A x + B v (v constant) in modal coordinates:
    A = V diag(lam) V^-1, z = V^-1 x, z(t+tau) = e^{lam tau} z +
    (e^{lam tau} - 1)/lam * V^-1 B v. Used when V is well conditioned
    (the eigenvector matrix of a diagonalisable A); otherwise the block
    matrix exponential is used for each interval."""

    def __init__(self, A, B, max_cond: float = 1e8):
        lam, V = np.linalg.eig(A)
        self.ok = bool(np.isfinite(np.linalg.cond(V)) and np.linalg.cond(V) < max_cond)
        self.A, self.B = A, B
        if self.ok:
            self.lam, self.V = lam, V
            self.Vinv = np.linalg.inv(V)
            self.Bm = self.Vinv @ B

    def to_modal(self, x):
        return self.Vinv @ x if self.ok else np.asarray(x, dtype=float).copy()

    def to_state(self, z):
        return (self.V @ z).real if self.ok else z

    def step(self, z, tau, v):
        if self.ok:
            lt = self.lam * tau
            small = np.abs(self.lam) < 1e-300
            phi = np.where(small, tau, np.expm1(lt) / np.where(small, 1.0, self.lam))
            return np.exp(lt) * z + phi * (self.Bm @ v)
        nx, P = self.B.shape
        blk = np.zeros((nx + P, nx + P))
        blk[:nx, :nx] = self.A * tau
        blk[:nx, nx:] = self.B * tau
        E = expm(blk)
        return E[:nx, :nx] @ z + E[:nx, nx:] @ v


def _shifted(scenario: Scenario, p: int) -> Scenario:
    """Scenario seen by phase p (0, 1, 2): everything delayed by p*120 deg of
    the fundamental (harmonic h by h*p*120 deg)."""
    d = p * 120.0
    return replace(
        scenario,
        grid_phase_deg=scenario.grid_phase_deg - d,
        grid_harmonics=tuple(GridHarmonic(h.order, h.share, h.phase_deg - h.order * d) for h in scenario.grid_harmonics),
        events=(),
    )


def simulate_switched(design: Design, pwm: PwmSpec, scenario: Scenario, Hi_V_per_A: float | None = None) -> Waveforms:
    """Simulate ``design`` with the switched converter ``pwm`` under ``scenario``.

    Returns the :class:`loopcheck.timedomain.simulate.Waveforms` of phase a; ``vi_V`` is
    the switched phase voltage, ``u_V`` the controller output. See the
    module docstring."""
    from loopcheck.timedomain.simulate import simulation_unsupported

    why = simulation_unsupported(design)
    if why is not None:
        raise ValueError(why)
    Hi = design.control.Hi_V_per_A if Hi_V_per_A is None else float(Hi_V_per_A)
    Ts = design.sampling.Ts_s
    d = design.sampling.delay
    N = int(scenario.points_per_sample)
    K = max(1, int(round(scenario.duration_s / Ts)))
    f1 = design.grid.f_hz
    w1 = 2.0 * math.pi * f1
    fsw = pwm.fsw_hz
    P = 3 if pwm.scheme == "three-phase" else 1
    Vdc = pwm.Vdc_V
    harmonics = scenario.grid_harmonics
    orders = [1] + [h.order for h in harmonics]
    G = len(orders)

    ctrl = parallel(controller_blocks(design.control, f1, Ts))
    Ac, Bc, Cc, Dc = ctrl.A, ctrl.B[:, 0], ctrl.C[0], float(ctrl.D[0, 0])
    n = design_plant(design).A.shape[-1]
    nx = P * n + 2 * G  # filter states of all phases, then the grid oscillators

    def continuous(Lg):
        p = design_plant(design, Lg_H=Lg)
        A = np.zeros((nx, nx))
        B = np.zeros((nx, P))
        for q in range(P):
            s = slice(q * n, (q + 1) * n)
            A[s, s] = p.A
            B[s, q] = p.B[:, 0]
            for g, h in enumerate(orders):
                a = P * n + 2 * g
                delta = h * q * 2.0 * math.pi / 3.0
                e = -1.0 / (design.filter.L2_H + Lg)
                A[q * n + 2, a] += e * math.cos(delta)
                A[q * n + 2, a + 1] += e * math.sin(delta)
        for g, h in enumerate(orders):
            a = P * n + 2 * g
            A[a, a + 1] = -h * w1
            A[a + 1, a] = h * w1
        return A, B, p.C

    def legs(u):
        """Leg references (clipped) and whether any was clipped, from the phase voltages u [V]."""
        if pwm.scheme == "full-bridge-unipolar":
            r = np.array([u[0], -u[0]]) / Vdc
        else:
            r = np.asarray(u, dtype=float) / (Vdc / 2.0)
        return np.clip(r, -1.0, 1.0), bool(np.any(np.abs(r) > 1.0))

    def phase_voltages(states):
        """Phase voltages [V] from leg states (+1 high, -1 low)."""
        v = 0.5 * Vdc * states
        if pwm.scheme == "three-phase":
            return v - v.mean()
        if pwm.scheme == "full-bridge-unipolar":
            return np.array([v[0] - v[1]])
        return v

    A, B, Cout = continuous(design.grid.Lg_H)
    modal = _Modal(A, B)
    grid_peak = grid_peak_voltage_V(design, scenario)
    ref_peak = reference_peak_A(design, scenario)
    gph = math.radians(scenario.grid_phase_deg)
    rph = math.radians(scenario.reference_phase_deg)

    def grid_states(xi, t, peak, phase):
        for g, h in enumerate(harmonics, 1):
            a = P * n + 2 * g
            th = h.order * (w1 * t + phase - gph) + math.radians(h.phase_deg)
            xi[a], xi[a + 1] = h.share * grid_peak * math.cos(th), h.share * grid_peak * math.sin(th)
        a = P * n
        xi[a], xi[a + 1] = peak * math.cos(w1 * t + phase), peak * math.sin(w1 * t + phase)

    xi = np.zeros(nx)
    grid_states(xi, 0.0, grid_peak, gph)
    c = np.zeros((P, Ac.shape[0]))
    u_prev = np.zeros(P)
    notes = []
    if scenario.start == "steady":
        for q in range(P):
            st = steady_loop_state(design, _shifted(scenario, q), Hi)
            if st is None:
                notes.append("no periodic steady state could be computed; the run starts from rest")
                break
            xi[q * n : (q + 1) * n], u_prev[q], c[q] = st
    if any(e.kind in INJECTION_KINDS for e in scenario.events):
        notes.append("bursts and pulses are ignored by the switched model (the switching ripple excites the filter)")

    trip = scenario.trip_current_A
    if trip is None:
        trip = max(10.0, 5.0 * ref_peak)
    cur_ref_peak, cur_ref_phase = ref_peak, rph
    cur_peak, cur_phase = grid_peak, gph
    by_k: dict[int, list] = {}
    for ev in scenario.events:
        k = int(round(ev.time_s / Ts))
        if k < K and ev.kind not in INJECTION_KINDS:
            by_k.setdefault(k, []).append(ev)

    out_t, out_x, out_v = [], [], []
    u_hist, ref_hist, fb_hist = [], [], []
    applied, clipped, tripped = [], False, None
    row_fb = OUTPUT_I2 if design.control.feedback == "grid" else OUTPUT_I1
    fine = np.arange(N) * (Ts / N)
    for k in range(K):
        t0 = k * Ts
        for ev in by_k.get(k, []):
            if ev.kind == "reference-step":
                cur_ref_peak = ev.peak_A if ev.peak_A is not None else cur_ref_peak
                cur_ref_phase = math.radians(ev.phase_deg) if ev.phase_deg is not None else cur_ref_phase
            elif ev.kind == "grid-voltage-step":
                cur_peak = ev.peak_V
                grid_states(xi, t0, cur_peak, cur_phase)
            elif ev.kind == "grid-phase-jump":
                cur_phase += math.radians(ev.angle_deg)
                grid_states(xi, t0, cur_peak, cur_phase)
            elif ev.kind == "grid-inductance-step":
                A, B, Cout = continuous(ev.Lg_H)
                modal = _Modal(A, B)
            applied.append((t0, ev.describe()))
        # controller at sample k, per phase
        u = np.empty(P)
        for q in range(P):
            x = xi[q * n : (q + 1) * n]
            iref = cur_ref_peak * math.cos(w1 * t0 + gph + cur_ref_phase - q * 2.0 * math.pi / 3.0)
            e = iref - Cout[row_fb] @ x
            u[q] = Cc @ c[q] + Dc * e - Hi * (Cout[OUTPUT_IC] @ x)
            c[q] = Ac @ c[q] + Bc * e
            if q == 0:
                ref_hist.append(iref)
                fb_hist.append(float(Cout[row_fb] @ x))
        u_hist.append(u[0])
        r_old, c1 = legs(u_prev)
        r_new, c2 = legs(u)
        clipped |= c1 or c2
        # structural breakpoints: update instant, carrier peaks/valleys, output points
        t_upd = t0 + d * Ts
        half = 0.5 / fsw
        m0 = math.floor(t0 / half) + 1
        extremes = []
        m = m0
        while m * half < t0 + Ts - 1e-15 * Ts:
            extremes.append(m * half)
            m += 1
        bps = sorted(set([t0, t0 + Ts, *(t0 + fine[1:]), *extremes] + ([t_upd] if t0 < t_upd < t0 + Ts else [])))
        # switching instants inside each structural piece
        pieces = []  # (start, stop, phase voltages)
        for a, b in zip(bps[:-1], bps[1:]):
            r = r_old if a < t_upd - 1e-15 * Ts else r_new
            ca, cb = _carrier(a, fsw), _carrier(b, fsw)
            mid = 0.5 * (a + b)
            cm = _carrier(mid, fsw)
            # the carrier is linear on [a, b]: c(t) = cm + slope (t - mid)
            slope = (cb - ca) / (b - a) if b > a else 0.0
            cuts = []
            if slope != 0.0:
                for ref in r:
                    tc = mid + (ref - cm) / slope
                    if a < tc < b:
                        cuts.append(tc)
            edges = [a] + sorted(cuts) + [b]
            for s0, s1 in zip(edges[:-1], edges[1:]):
                if s1 - s0 <= 0.0:
                    continue
                cmid = cm + slope * (0.5 * (s0 + s1) - mid)
                states = np.where(r > cmid, 1.0, -1.0)
                pieces.append((s0, s1, phase_voltages(states)))
        z = modal.to_modal(xi)
        j = 0
        for s0, s1, v in pieces:
            if j < N and abs((t0 + fine[j]) - s0) <= 1e-12 * Ts:
                out_t.append(t0 + fine[j])
                out_x.append(modal.to_state(z)[:n] if j else xi[:n].copy())
                out_v.append(v[0])
                j += 1
            z = modal.step(z, s1 - s0, v)
        xi = modal.to_state(z)
        u_prev = u
        currents = [xi[q * n + i] for q in range(P) for i in (0, 2)]  # i1 and i2 of each phase
        if not np.all(np.isfinite(xi)) or max(abs(x) for x in currents) > trip:
            tripped = t0 + Ts
            break
    K_done = len(u_hist)
    X = np.array(out_x)
    tt = np.array(out_t)
    if tripped is not None:
        notes.append(
            f"a current exceeded the trip level {trip:.4g} A at t = {tripped * 1e3:.4g} ms; the run stops there"
        )
    if clipped:
        notes.append("the modulator saturated (a leg reference beyond the carrier peak): overmodulation")
    return Waveforms(
        name=design.name,
        time_s=tt,
        i1_A=X @ Cout[OUTPUT_I1],
        i2_A=X @ Cout[OUTPUT_I2],
        ic_A=X @ Cout[OUTPUT_IC],
        vc_V=X[:, 1].copy(),
        vg_V=_grid_at(tt, grid_peak, gph, harmonics, w1, [(t, e) for t, e in _events_for_grid(scenario, Ts, K_done)]),
        vi_V=np.array(out_v),
        sample_time_s=np.arange(K_done) * Ts,
        u_V=np.array(u_hist),
        iref_A=np.array(ref_hist),
        ifb_A=np.array(fb_hist),
        Ts_s=Ts,
        delay=d,
        points_per_sample=N,
        Hi_V_per_A=Hi,
        resonance_hz=design_resonance_hz(design),
        trip_current_A=float(trip),
        events=tuple(applied),
        tripped_at_s=tripped,
        notes=tuple(notes),
        model=f"switched ({pwm.scheme}, {pwm.update} update, fsw = {fsw:g} Hz, Vdc = {Vdc:g} V)",
        feedback=design.control.feedback,
    )


def _events_for_grid(scenario: Scenario, Ts: float, K: int):
    out = []
    for ev in sorted(scenario.events, key=lambda e: e.time_s):
        k = int(round(ev.time_s / Ts))
        if k < K and ev.kind in ("grid-voltage-step", "grid-phase-jump"):
            out.append((k * Ts, ev))
    return out


def _grid_at(t, peak0, phase0, harmonics, w1, events):
    """Phase-a grid voltage [V] at the times t [s], with the grid events applied."""
    t = np.asarray(t, dtype=float)
    peak = np.full(t.shape, peak0)
    phase = np.full(t.shape, phase0)
    for te, ev in events:
        after = t >= te - 1e-15
        if ev.kind == "grid-voltage-step":
            peak = np.where(after, ev.peak_V, peak)
        else:
            phase = np.where(after, phase + math.radians(ev.angle_deg), phase)
    v = peak * np.cos(w1 * t + phase)
    for h in harmonics:
        v += h.share * peak0 * np.cos(h.order * (w1 * t + phase - phase0) + math.radians(h.phase_deg))
    return v


def sideband_amplitudes(w: Waveforms, f1_hz: float, frequencies_hz, periods: int = 2):
    """Peak amplitudes [A] of the grid current i2 at the given frequencies,
    from the last ``periods`` whole fundamental periods of the waveform
    (Fourier projection; exact for components that are harmonics of
    f1_hz/periods, e.g. sidebands when fsw/f1 is a whole number)."""
    N = w.points_per_sample
    per = int(round(1.0 / (f1_hz * w.Ts_s))) * N
    L = periods * per
    if w.time_s.size < L:
        raise ValueError("the run is shorter than the requested number of fundamental periods")
    t = w.time_s[-L:]
    y = w.i2_A[-L:]
    f = np.asarray(frequencies_hz, dtype=float)
    return 2.0 * np.abs(np.exp(-2j * np.pi * f[:, None] * t[None, :]) @ y) / L


@dataclass(frozen=True)
class SidebandComparison:
    """A grid-current sideband from the switched simulation beside the
    harmonic model (:func:`loopcheck.harmonics.spectrum.harmonic_check`): carrier
    group m, sideband n, frequency_hz [Hz], simulated_A and predicted_A
    (peak) [A], difference = simulated/predicted - 1 [-]."""

    m: int
    n: int
    frequency_hz: float
    simulated_A: float
    predicted_A: float
    difference: float


def sideband_check(design: Design, pwm: PwmSpec, w: Waveforms, scenario: Scenario, count: int = 6,
                   periods: int = 2) -> tuple[SidebandComparison, ...] | None:
    """The ``count`` largest predicted grid-current sidebands beside their
    amplitude in the switched run ``w`` (last ``periods`` fundamental
    periods). The prediction uses the operating point of the scenario
    (reference peak and phase, grid peak) at the design's Lg. Returns None
    when the comparison is not exact: fs/f1 or fsw/f1 not whole numbers,
    the run too short or tripped, or any event that changes the operating
    point (bursts and pulses are ignored by the switched model)."""
    from loopcheck.harmonics.spectrum import OperatingPoint, harmonic_check

    f1 = design.grid.f_hz
    Ts = design.sampling.Ts_s
    for ratio in (1.0 / (f1 * Ts), pwm.fsw_hz / f1):
        if abs(ratio - round(ratio)) > 1e-9 * ratio:
            return None
    if w.tripped_at_s is not None:
        return None
    t_end = w.sample_time_s[-1] + Ts
    t_start = t_end - periods / f1
    if t_start < 0 or any(t >= t_start - 1e-12 for t, _ in w.events):
        return None
    if any(e.kind not in INJECTION_KINDS for e in scenario.events):
        return None  # the prediction uses the initial operating point
    ip = reference_peak_A(design, scenario)
    op = OperatingPoint(
        current_rms_A=ip / math.sqrt(2.0),
        rated_current_rms_A=max(ip, 1e-12) / math.sqrt(2.0),
        grid_peak_V=grid_peak_voltage_V(design, scenario),
        current_phase_deg=scenario.reference_phase_deg,
    )
    d = replace(design, grid=replace(design.grid, Lg_range_H=None))
    chk = harmonic_check(d, pwm, op)
    top = sorted(chk.sidebands, key=lambda s: -s.grid_current_A)[:count]
    top = sorted(top, key=lambda s: s.frequency_hz)
    sim = sideband_amplitudes(w, f1, [s.frequency_hz for s in top], periods)
    return tuple(
        SidebandComparison(s.m, s.n, s.frequency_hz, float(a), s.grid_current_A, float(a / s.grid_current_A - 1.0))
        for s, a in zip(top, sim)
    )
