"""Independent construction of the sampled current loop with python-control,
for comparison with loopcheck's engine in the tests.

Nothing here calls loopcheck's plant, discretisation, damping-loop or
assembly code: the continuous filter is written from the circuit equations
(common practice), sampled with python-control ``sample_system`` ('zoh'),
the computation delay is an explicit state, the damping and current loops
are closed with python-control ``feedback`` in state space, and the
controller pieces are sampled one by one with ``sample_system``.
"""

from __future__ import annotations

import math

import numpy as np


def lcl_matrices(L1, C, LT, R1=0.0, RT=0.0):
    """Continuous LCL filter, states [i1, vc, i2], input vi, outputs
    [i1, i2, ic] (Kirchhoff's laws; common practice). SI units."""
    A = np.array(
        [
            [-R1 / L1, -1.0 / L1, 0.0],
            [1.0 / C, 0.0, -1.0 / C],
            [0.0, 1.0 / LT, -RT / LT],
        ]
    )
    B = np.array([[1.0 / L1], [0.0], [0.0]])
    Cm = np.array([[1.0, 0.0, 0.0], [0.0, 0.0, 1.0], [1.0, 0.0, -1.0]])
    return A, B, Cm


def sampled_plant(ct, A, B, Cm, Ts, delay):
    """python-control discrete plant with computation delay 0, 0.5 or 1 sample."""
    sysc = ct.ss(A, B, Cm, np.zeros((3, 1)))
    n = A.shape[0]
    if delay == 0.0:
        return ct.sample_system(sysc, Ts, method="zoh")
    if delay == 1.0:
        zinv = ct.ss(ct.tf([1.0], [1.0, 0.0], Ts))
        return ct.series(zinv, ct.sample_system(sysc, Ts, method="zoh"))
    if delay == 0.5:
        # two ZOH half steps: u[k-1] held over the first half, u[k] over the second
        h = ct.sample_system(sysc, Ts / 2, method="zoh")
        Ph, Gh = h.A, h.B
        Ad = np.zeros((n + 1, n + 1))
        Ad[:n, :n] = Ph @ Ph
        Ad[:n, n:] = Ph @ Gh
        Bd = np.zeros((n + 1, 1))
        Bd[:n] = Gh
        Bd[n, 0] = 1.0
        Cd = np.hstack([Cm, np.zeros((3, 1))])
        return ct.ss(Ad, Bd, Cd, np.zeros((3, 1)), Ts)
    raise ValueError("reference supports delay 0, 0.5 and 1")


def controller(ct, design):
    """Sum of the controller pieces, each sampled by python-control."""
    c = design.control
    Ts = design.sampling.Ts_s
    parts = [ct.ss([], [], [], [[c.Kp_V_per_A]], Ts)]
    if c.kind == "PI":
        method = {"forward-euler": "euler", "backward-euler": "backward_diff", "tustin": "tustin"}[c.integrator]
        parts.append(ct.ss(ct.sample_system(ct.tf([c.Ki_V_per_As], [1.0, 0.0]), Ts, method=method)))
    elif c.kind == "PR":
        for h in (1,) + tuple(c.harmonics):
            w0 = 2 * math.pi * design.grid.f_hz * h
            if c.wc_rad_s > 0:
                num, den = [2 * c.Kr * c.wc_rad_s, 0.0], [1.0, 2 * c.wc_rad_s, w0**2]
            else:
                num, den = [c.Kr, 0.0], [1.0, 0.0, w0**2]
            if c.resonator == "tustin-prewarp":
                r = ct.sample_system(ct.ss(ct.tf(num, den)), Ts, method="tustin", prewarp_frequency=w0)
            elif c.resonator == "tustin":
                r = ct.sample_system(ct.ss(ct.tf(num, den)), Ts, method="tustin")
            else:  # "zoh" or "impulse-invariant" (scipy's "impulse")
                method = {"zoh": "zoh", "impulse-invariant": "impulse"}[c.resonator]
                r = ct.sample_system(ct.ss(ct.tf(num, den)), Ts, method=method)
            parts.append(ct.ss(r))
    out = parts[0]
    for p in parts[1:]:
        out = ct.parallel(out, p)
    return out


def reference_loop(design):
    """(L, closed_loop) python-control state-space systems of the design's
    loop broken at the controller (damping loop closed)."""
    import control as ct

    f, g = design.filter, design.grid
    if f.damping.kind != "none":
        raise ValueError("reference covers the undamped filter only")
    A, B, Cm = lcl_matrices(f.L1_H, f.C_F, f.L2_H + g.Lg_H, f.R1_ohm, f.R2_ohm + g.Rg_ohm)
    Ts = design.sampling.Ts_s
    Pd = sampled_plant(ct, A, B, Cm, Ts, design.sampling.delay)
    damping = ct.ss([], [], [], [[0.0, 0.0, design.control.Hi_V_per_A]], Ts)
    inner = ct.feedback(Pd, damping)  # u = uc - Hi * ic
    row = 1 if design.control.feedback == "grid" else 0
    P = inner[row, 0]
    L = ct.series(controller(ct, design), P)
    return L, ct.feedback(L, 1)


def spectral_radius(sys) -> float:
    return float(np.max(np.abs(np.linalg.eigvals(sys.A))))
