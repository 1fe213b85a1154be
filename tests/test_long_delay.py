"""Total loop delays above one sample (whole plus fractional samples).

Checks against the outside world:

* verdicts and closed-loop spectral radii against an independent
  python-control model built here: the filter from Kirchhoff's laws
  (common practice, tests/reference_loop.py), sampled with python-control
  ``sample_system`` ('zoh') over the two parts of the split interval, the
  whole samples of delay as a chain of z^-1 blocks (explicit extra states),
  damping and current loops closed with python-control ``feedback``
  (K. J. Astrom and B. Wittenmark, "Computer-Controlled Systems", 3rd ed.,
  1997, ch. 2: sampling a system with a time delay longer than a period);
* the critical frequency fs/(4*lambda + 2) where capacitor-current feedback
  turns from damping to anti-damping, for lambda = 1.5 and 2 (W. Pan,
  X. Ruan, C. Bao, W. Li and X. Wang, "Capacitor-Current-Feedback Active
  Damping With Reduced Computation Delay for Improving Robustness of
  LCL-Type Grid-Connected Inverter", IEEE Trans. Power Electron., vol. 29,
  no. 7, pp. 3414-3427, 2014, from memory: Req = Rn/cos(w Td) with
  Td = (lambda + 1/2) Ts, so Req changes sign where w Td = 90 deg, and again
  at 270 deg, 450 deg, ... i.e. at (2m + 1) fs/(4 lambda + 2): the higher
  crossings are derived from the same formula).

The filter and controller values are invented for the tests.
"""

import math

import numpy as np
import pytest
import scipy.linalg
from scipy.optimize import brentq

from loopcheck.engine.analysis import analyse
from loopcheck.io.casefile import CaseError, case_from_string
from loopcheck.engine.loop import build_loop
from loopcheck.engine.model import Control, Design, Filter, Grid, Sampling
from loopcheck.engine.plant import OUTPUT_IC
from reference_loop import controller, lcl_matrices, spectral_radius

ct = pytest.importorskip("control")

L1, L2 = 1.5e-3, 0.5e-3
FS = 12e3
TS = 1.0 / FS


def sampled_plant_long(A, B, Cm, Ts, delay):
    """python-control discrete plant with a total delay ``delay`` = N + d
    samples: u[k-N] held over the last (1-d) Ts of each period, u[k-N-1] over
    the first d Ts; the N whole samples as z^-1 blocks in series."""
    N = int(math.floor(delay + 1e-12))
    d = delay - N
    p = Cm.shape[0]
    sysc = ct.ss(A, B, Cm, np.zeros((p, 1)))
    n = A.shape[0]
    if d < 1e-12:
        base = ct.sample_system(sysc, Ts, method="zoh")
    else:
        first = ct.sample_system(sysc, d * Ts, method="zoh")  # over [k Ts, k Ts + d Ts)
        second = ct.sample_system(sysc, (1 - d) * Ts, method="zoh")
        Ad = np.zeros((n + 1, n + 1))
        Ad[:n, :n] = second.A @ first.A
        Ad[:n, n:] = second.A @ first.B
        Bd = np.zeros((n + 1, 1))
        Bd[:n] = second.B
        Bd[n, 0] = 1.0
        base = ct.ss(Ad, Bd, np.hstack([Cm, np.zeros((p, 1))]), np.zeros((p, 1)), Ts)
    zinv = ct.ss(ct.tf([1.0], [1.0, 0.0], Ts))
    for _ in range(N):
        base = ct.series(zinv, base)
    return base


def reference_closed_loop(design):
    f, g = design.filter, design.grid
    A, B, Cm = lcl_matrices(f.L1_H, f.C_F, f.L2_H + g.Lg_H, f.R1_ohm, f.R2_ohm + g.Rg_ohm)
    Pd = sampled_plant_long(A, B, Cm, design.sampling.Ts_s, design.sampling.delay)
    inner = ct.feedback(Pd, ct.ss([], [], [], [[0.0, 0.0, design.control.Hi_V_per_A]], design.sampling.Ts_s))
    row = 1 if design.control.feedback == "grid" else 0
    L = ct.series(controller(ct, design), inner[row, 0])
    return ct.feedback(L, 1)


def pr_design(delay, Hi, Kp=4.0, Lg=0.3e-3, feedback="grid"):
    return Design(
        Filter(L1, 10e-6, L2, R1_ohm=0.02, R2_ohm=0.02),
        Grid(50.0, Lg),
        Sampling(FS, delay),
        Control(feedback, "PR", Kp, Kr=300.0, wc_rad_s=5.0, Hi_V_per_A=Hi),
    )


@pytest.mark.parametrize("delay", [1.5, 2.0, 2.25])
def test_verdicts_against_python_control_model(delay):
    verdicts = set()
    for Hi in (0.0, 4.0, 12.0, -5.0):
        for Kp in (1.0, 4.0):
            for feedback in ("grid", "converter"):
                d = pr_design(delay, Hi, Kp=Kp, feedback=feedback)
                a = analyse(d)
                rho_ref = spectral_radius(reference_closed_loop(d))
                assert a.spectral_radius == pytest.approx(rho_ref, rel=1e-8, abs=1e-10), (Hi, Kp, feedback)
                if abs(rho_ref - 1.0) > 1e-6:
                    assert a.stable is (rho_ref < 1.0), (Hi, Kp, feedback)
                    verdicts.add(a.stable)
    assert verdicts == {True, False}  # the set covers both outcomes


def test_eigenvalues_match_reference_exactly():
    d = pr_design(1.5, 6.0)
    ev = np.sort_complex(np.linalg.eigvals(build_loop(d).closed_loop_matrix(1.0)))
    ref = np.sort_complex(np.linalg.eigvals(reference_closed_loop(d).A))
    assert ev.shape == ref.shape
    np.testing.assert_allclose(ev, ref, rtol=1e-8, atol=1e-10)


def lossless(ratio, delay, Hi=0.0, kp=0.0, feedback="grid"):
    wr = 2 * math.pi * ratio * FS
    C = (L1 + L2) / (L1 * L2 * wr**2)
    return Design(Filter(L1, C, L2), Grid(50.0, 0.0), Sampling(FS, delay),
                  Control(feedback, "P", kp * (L1 + L2) / TS, Hi_V_per_A=Hi))


def resonant_shift_per_hi(d):
    """d s / d Hi of the resonant pole of the engine's sampled plant at Hi = 0
    (exact eigenvalue derivative, as in tests/test_critical.py; the left
    eigenvector from its own solve, since the delay chain is a Jordan block
    at z = 0 and the eigenvector matrix is singular)."""
    p = build_loop(d).plant
    A, B, Cic = p.A, p.B, p.C[OUTPUT_IC : OUTPUT_IC + 1]
    ev, Wl, V = scipy.linalg.eig(A, left=True, right=True)
    i = int(np.argmax(ev.imag))
    w = Wl[:, i].conj()
    v = V[:, i] / (w @ V[:, i])
    dz = -(w @ B)[0] * (Cic @ v)[0]
    return dz / (ev[i] * TS)


@pytest.mark.parametrize("delay", [1.5, 2.0])
def test_equivalent_resistance_sign_changes_at_odd_multiples_of_critical(delay):
    # Pan et al. 2014 (from memory): Re(Y_eq) ~ cos((lambda + 1/2) w Ts)
    # changes sign at (2m + 1) fs/(4 lambda + 2); located on the engine's
    # model by root finding on Re(ds/dHi).
    fc = 1 / (4 * delay + 2)
    assert lossless(0.1, delay).sampling.critical_hz == pytest.approx(FS * fc, rel=1e-15)

    def g(r):
        return -resonant_shift_per_hi(lossless(r, delay)).real

    m = 0
    while (2 * m + 1) * fc < 0.48:
        target = (2 * m + 1) * fc
        found = brentq(g, target * 0.9, min(target * 1.1, 0.49), xtol=1e-14)
        assert found == pytest.approx(target, rel=1e-9)
        m += 1
    assert m >= 2  # lambda >= 1.5 puts a second crossing below fs/2


@pytest.mark.parametrize("delay", [1.5, 2.0])
def test_sides_of_critical_frequency_by_eigenvalues(delay):
    # Pan et al. 2014 (from memory): a small positive Hi damps the resonance
    # below fs/(4 lambda + 2) and not above it; without damping, grid-current
    # feedback is stable just above it and not below (Parker, McGrath and
    # Holmes, "Regions of Active Damping Control for LCL Filters", IEEE
    # Trans. Ind. Appl., 2014, for one sample; from memory).
    fc = 1 / (4 * delay + 2)
    for ratio, below in ((0.93 * fc, True), (1.07 * fc, False)):
        hi_small = 0.01 * L1 / TS
        assert analyse(lossless(ratio, delay, Hi=hi_small, kp=0.0005)).stable is below
        assert analyse(lossless(ratio, delay, kp=0.002)).stable is (not below)


def test_critical_boundary_of_undamped_loop_tends_to_formula():
    # the stability boundary in fr/fs of undamped grid-current feedback,
    # located by bisection on the engine's eigenvalues, approaches
    # 1/(4 lambda + 2) as the gain shrinks (Parker et al. 2014 for lambda = 1,
    # from memory; the same residue argument for any lambda)
    for delay in (1.5, 2.0):
        fc = 1 / (4 * delay + 2)
        kp = 0.001

        def rho(r):
            return float(np.max(np.abs(np.linalg.eigvals(build_loop(lossless(r, delay, kp=kp)).closed_loop_matrix(1.0))))) - 1.0

        b = brentq(rho, 0.8 * fc, 1.2 * fc, xtol=1e-12)
        assert abs(b - fc) < 0.2 * kp, (delay, b)


CASE = """
[filter]
L1 = "1.5 mH"
C = "10 uF"
L2 = "0.5 mH"
[grid]
f = "50 Hz"
[sampling]
fs = "12 kHz"
delay = {delay}
[control]
feedback = "grid"
kind = "P"
Kp = "4 V/A"
"""


def test_case_file_accepts_long_delay_and_rejects_beyond_maximum():
    assert case_from_string(CASE.format(delay=2.5), "x.toml").design.sampling.delay == 2.5
    with pytest.raises(CaseError, match=r"\[sampling\] delay: must lie between 0 and 4"):
        case_from_string(CASE.format(delay=4.5), "x.toml")
