"""One design in, verdict and margins out: :func:`analyse`."""

from __future__ import annotations

import math

import numpy as np

from loopcheck.engine import margins as mg
from loopcheck.engine.damping_filter import damping_critical_hz
from loopcheck.engine.loop import Loop, build_loop
from loopcheck.engine.model import Design, design_resonance_hz
from loopcheck.engine.results import Analysis, Crossover, GainMargin, PhaseCrossing, SensitivityPeak
from loopcheck.engine.threads import limited
from loopcheck.engine.verdict import TOLERANCE, classify, count_on_circle, count_outside

#: Radius offset of the Nyquist contour outside the unit circle.
CONTOUR_OFFSET = 1e-7


def _special_angles(loop: Loop, design: Design) -> list[float]:
    """Angles [rad/sample] around which the frequency grid is refined: the
    open-loop poles near the circle (resonances, resonators)."""
    A, B, C = loop.open_loop()
    p = np.linalg.eigvals(A)
    near = p[(np.abs(p) > 0.5) & (np.abs(p.imag) > 1e-12)]
    # lightly damped closed-loop poles make sharp sensitivity peaks
    pc = np.linalg.eigvals(A - B @ C)
    near_cl = pc[(np.abs(pc) > 0.9) & (np.abs(pc.imag) > 1e-12)]
    ang = [abs(float(np.angle(x))) for x in np.concatenate([near, near_cl])]
    f1 = design.grid.f_hz
    Ts = design.sampling.Ts_s
    if design.control.kind == "PR":
        for h in (1,) + tuple(design.control.harmonics):
            ang.append(2 * math.pi * f1 * h * Ts)
    return sorted(set(ang))


def analyse(design: Design, tol: float = TOLERANCE) -> Analysis:
    """Verdict (closed-loop eigenvalues) and margins of a design.

    The loop is broken at the current controller with the damping loop
    closed; see :mod:`loopcheck.engine.loop` and :mod:`loopcheck.engine.margins`."""
    return analyse_loop(design, build_loop(design), tol)


@limited
def analyse_loop(design: Design, loop: Loop, tol: float = TOLERANCE) -> Analysis:
    """Verdict and margins of ``loop``, a loop of ``design`` whose controller
    or damping gain may differ from the design's own (e.g. the controller
    rebuilt from quantised firmware coefficients). ``design`` supplies the
    sampling, the resonance and the resonator frequencies."""
    Ts = design.sampling.Ts_s
    A_ol, B_ol, C_ol = loop.open_loop()
    cl_poles = np.linalg.eigvals(A_ol - B_ol @ C_ol)
    radius = float(np.max(np.abs(cl_poles)))
    verdict = classify(radius, tol)
    ol_poles = np.linalg.eigvals(A_ol)

    def L(z):
        with np.errstate(all="ignore"):
            return loop.loop_response(np.asarray(z, dtype=complex))

    def Lw(w):
        return L(np.exp(1j * np.asarray(w)))

    special = _special_angles(loop, design)
    w = mg.frequency_grid(Ts, special)
    Lv = Lw(w)
    to_hz = 1.0 / (2.0 * math.pi * Ts)

    # gain crossovers and phase margins
    crossovers = []
    for wc in mg.gain_crossovers(L, w, Lv):
        v = Lw([wc])[0]
        ph = mg.wrap_deg(math.degrees(math.atan2(v.imag, v.real)))
        pm = mg.wrap_deg(180.0 + ph)
        crossovers.append(Crossover(wc * to_hz, ph, pm, "lag" if pm >= 0 else "lead"))

    # real-axis crossings, -180 deg crossings and the stable gain intervals
    crossings = mg.real_axis_crossings(L, w, Lv, open_loop_poles=ol_poles)
    phase_crossings = sorted(
        (PhaseCrossing(wx * to_hz, 20 * math.log10(abs(v)), -1.0 / v) for wx, v in crossings if v < 0),
        key=lambda c: c.frequency_hz,
    )

    def is_stable(ks):
        Acl = A_ol[None] - np.asarray(ks)[:, None, None] * (B_ol @ C_ol)[None]
        r = np.abs(np.linalg.eigvals(Acl)).max(axis=-1)
        return r < 1.0 - tol

    intervals = mg.stable_intervals(mg.interval_candidates(crossings), is_stable)
    gm = None
    if verdict == "stable":
        for a, b in intervals:
            if a <= 1.0 and (b is None or b >= 1.0):
                gm = GainMargin(
                    a,
                    b,
                    None if a == 0.0 else 20 * math.log10(a),
                    None if b is None else 20 * math.log10(b),
                )

    S, wS = mg.sensitivity_peak(L, w, Lv)

    # Nyquist count on |z| = 1 + delta against the eigenvalue counts
    rho = 1.0 + CONTOUR_OFFSET
    P_out = int(np.sum(np.abs(ol_poles) > rho))
    Z_out = int(np.sum(np.abs(cl_poles) > rho))
    wind, _resid = mg.winding_number(lambda z: L(z), w, rho)
    consistent = wind == P_out - Z_out

    pm = None
    if verdict == "stable" and crossovers:
        pm = min(abs(c.phase_margin_deg) for c in crossovers)

    fc = damping_critical_hz(design)
    fr = design_resonance_hz(design, with_grid=True)
    return Analysis(
        name=design.name,
        stable=verdict == "stable",
        verdict=verdict,
        spectral_radius=radius,
        tolerance=tol,
        closed_loop_poles=tuple(complex(p) for p in sorted(cl_poles, key=lambda p: -abs(p))),
        resonance_hz=fr,
        resonance_no_grid_hz=design_resonance_hz(design, with_grid=False),
        critical_hz=fc,
        resonance_side="below" if fr < fc else "above",
        open_loop_unstable_poles=count_outside(ol_poles, tol),
        open_loop_circle_poles=count_on_circle(ol_poles, tol),
        crossovers=tuple(crossovers),
        phase_margin_deg=pm,
        phase_crossings=tuple(phase_crossings),
        gain_margin=gm,
        stable_gain_intervals=tuple(intervals),
        sensitivity_peak=SensitivityPeak(S, wS * to_hz),
        nyquist_encirclements=wind,
        nyquist_consistent=bool(consistent),
        closed_loop_unstable_poles=count_outside(cl_poles, tol),
    )
