"""The critical frequency fs/(4*delay + 2) and capacitor-current damping,
checked on the engine's sampled model.

Published statements (all from memory):

* S. G. Parker, B. P. McGrath and D. G. Holmes, "Regions of Active Damping
  Control for LCL Filters", IEEE Trans. Ind. Appl., vol. 50, no. 1,
  pp. 424-432, 2014: with one sample of computation delay, grid-current
  feedback without damping is stable only for a resonance above fs/6, and
  fs/6 itself cannot be damped; converter-current feedback is the mirror
  case (stable only below fs/6).
* W. Pan, X. Ruan, C. Bao, W. Li and X. Wang, "Capacitor-Current-Feedback
  Active Damping With Reduced Computation Delay for Improving Robustness of
  LCL-Type Grid-Connected Inverter", IEEE Trans. Power Electron., vol. 29,
  no. 7, pp. 3414-3427, 2014: capacitor-current feedback is equivalent to an
  impedance in parallel with C, Req = Rn/cos(w Td), Xeq = Rn/sin(w Td),
  Rn = L1/(Hi C), Td = (delay + 1/2) Ts; Req turns negative above
  fs/(4 delay + 2) (fs/6 for one sample).

The filter and sampling values are invented for the tests.
"""

import math

import numpy as np
import pytest
from scipy.optimize import brentq

from loopcheck.engine import symbolic
from loopcheck.engine.analysis import analyse
from loopcheck.engine.loop import build_loop
from loopcheck.engine.model import Control, Design, Filter, Grid, Sampling
from loopcheck.engine.plant import OUTPUT_IC
from loopcheck.engine.verdict import spectral_radius

# invented scenario: 1.5 mH converter side, 0.5 mH grid side, fs = 12 kHz
L1, L2 = 1.5e-3, 0.5e-3
FS = 12e3
TS = 1.0 / FS


def design(ratio, feedback="grid", kp=0.0, Hi=0.0, delay=1.0, Lg=0.0, kind="P"):
    """Lossless design whose resonance (with Lg) is ``ratio * fs``; the
    proportional gain is ``kp * (L1 + L2 + Lg)/Ts`` [V/A]."""
    LT = L2 + Lg
    wr = 2 * math.pi * ratio * FS
    C = (L1 + LT) / (L1 * LT * wr**2)
    return Design(
        Filter(L1, C, L2),
        Grid(50.0, Lg),
        Sampling(FS, delay),
        Control(feedback, kind, kp * (L1 + LT) / TS, Hi_V_per_A=Hi),
    )


def closed_radius(d):
    return float(spectral_radius(build_loop(d).closed_loop_matrix(1.0)))


BELOW = [0.05, 0.10, 0.15, 0.16]
ABOVE = [0.175, 0.20, 0.30, 0.40, 0.45]


@pytest.mark.parametrize("ratio", BELOW + ABOVE)
def test_undamped_grid_and_converter_feedback_sides_of_fs_over_6(ratio):
    # Parker, McGrath & Holmes 2014 (from memory): small P gain, no damping,
    # one sample of delay. Grid-side: stable only above fs/6; converter-side:
    # stable only below.
    above = ratio > 1 / 6
    g = analyse(design(ratio, "grid", kp=0.005))
    c = analyse(design(ratio, "converter", kp=0.005))
    assert g.verdict == ("stable" if above else "unstable")
    assert c.verdict == ("unstable" if above else "stable")
    assert g.resonance_side == ("above" if above else "below")
    assert g.critical_hz == pytest.approx(FS / 6, rel=1e-15)


@pytest.mark.parametrize("feedback", ["grid", "converter"])
def test_undamped_boundary_tends_to_fs_over_6(feedback):
    # The same statement as a limit (Parker et al. 2014, from memory): the
    # stability boundary in fr/fs found by bisection on the engine's
    # eigenvalues approaches 1/6 as the proportional gain shrinks
    # (|boundary - 1/6| < 0.1 * kp for the normalised gain kp = Kp Ts/(L1+L2)).
    for kp in (0.01, 0.002):
        b = brentq(lambda r: closed_radius(design(r, feedback, kp=kp)) - 1.0, 0.12, 0.2, xtol=1e-12)
        assert abs(b - 1 / 6) < 0.1 * kp, (kp, b)


def resonant_shift_per_hi(d):
    """d s / d Hi of the resonant pole of the engine's sampled plant at Hi = 0
    (s = ln(z)/Ts), from the eigenvalue derivative of A - Hi B C_ic:
    dz/dHi = -(w B)(C_ic v) with left/right eigenvectors w v = 1."""
    p = build_loop(d).plant
    A, B, Cic = p.A, p.B, p.C[OUTPUT_IC : OUTPUT_IC + 1]
    ev, V = np.linalg.eig(A)
    W = np.linalg.inv(V)
    i = int(np.argmax(ev.imag))
    dz = -(W[i] @ B)[0] * (Cic @ V[:, i])[0]
    return dz / (ev[i] * TS), ev[i]


@pytest.mark.parametrize("delay", [0.0, 0.25, 0.5, 0.75, 1.0])
def test_virtual_admittance_of_capacitor_current_feedback(delay):
    # Equivalent admittance the damping loop adds in parallel with C, taken
    # from the engine's sampled model: a parallel admittance Y across C moves
    # the resonant poles by ds = -Y/(2C) (energy balance of the resonant mode;
    # derived), so Y_eq = -2 C ds per unit Hi, from the exact eigenvalue
    # derivative. Pan et al. 2014 (from memory): Y = 1/Req - j/Xeq
    # = (Hi C/L1) e^{-j w Td}, Td = (delay + 1/2) Ts. On the exact ZOH model
    # the two differ only by the positive hold factor sin(th/2)/(th/2),
    # th = w Ts (derived here from the modified-z closed form of ic/vi: its
    # residue at e^{j th} is (sin(th/2)/(th/2)) e^{-j (delay + 1/2) th} Ts z/(2 L1)).
    for ratio in (0.03, 0.08, 0.15, 0.2, 0.26, 0.33, 0.41, 0.47):
        d = design(ratio, delay=delay)
        ds, _ = resonant_shift_per_hi(d)
        C = d.filter.C_F
        Y_engine = -2 * C * ds
        th = 2 * math.pi * ratio
        Y_pan = (C / L1) * np.exp(-1j * (delay + 0.5) * th)
        ratio_zoh = Y_engine / Y_pan
        assert abs(ratio_zoh.imag) < 1e-9 * abs(ratio_zoh)
        assert ratio_zoh.real == pytest.approx(math.sin(th / 2) / (th / 2), rel=1e-9)


@pytest.mark.parametrize("delay", [0.25, 0.5, 0.75, 1.0])
def test_equivalent_resistance_changes_sign_at_critical_frequency(delay):
    # Req > 0 below fs/(4 delay + 2) and < 0 above (Pan et al. 2014, from
    # memory; fs/6 for one sample), located on the engine's model by root
    # finding on Re(Y_eq); Xeq changes sign at fs/(2 delay + 1) (same source;
    # fs/3 for one sample).
    def g(r):
        return -resonant_shift_per_hi(design(r, delay=delay))[0].real

    def b(r):
        return -resonant_shift_per_hi(design(r, delay=delay))[0].imag

    f_crit = brentq(g, 0.02, 0.49, xtol=1e-14)
    assert f_crit == pytest.approx(1 / (4 * delay + 2), rel=1e-9)
    assert design(0.5 / (4 * delay + 2), delay=delay).sampling.critical_hz == pytest.approx(FS / (4 * delay + 2), rel=1e-15)
    if 1 / (2 * delay + 1) < 0.49:
        f_x = brentq(b, 0.02, 0.49, xtol=1e-14)
        assert f_x == pytest.approx(1 / (2 * delay + 1), rel=1e-9)


@pytest.mark.parametrize("delay", [0.25, 0.5, 0.75])
def test_fractional_delay_sides_by_eigenvalues(delay):
    # Verdicts on both sides of fs/(4 delay + 2) (Pan et al. 2014, from
    # memory): a small positive Hi damps below it and not above it;
    # undamped grid-current feedback is stable only above it (Parker et al.
    # 2014 for delay 1, from memory; the same residue argument for any delay,
    # derived: the resonant residue of the loop changes sign at the same
    # frequency as the delay-plus-hold phase -(delay + 1/2) w Ts reaches -90 deg).
    fc = 1 / (4 * delay + 2)
    for ratio, below in ((0.93 * fc, True), (1.07 * fc, False)):
        hi_small = 0.01 * L1 / TS
        d_ccf = design(ratio, "grid", kp=0.0005, Hi=hi_small, delay=delay)
        # tiny grid-current gain only to keep the plant integrator inside; its
        # own resonant effect is ~100x weaker than the damping gain's
        assert analyse(d_ccf).stable is below
        assert analyse(design(ratio, "grid", kp=0.005, delay=delay)).stable is (not below)


@pytest.mark.parametrize("ratio", [0.05, 0.08, 0.12, 0.15, 0.2, 0.3, 0.4])
def test_exact_inner_bound_against_engine_eigenvalues(ratio):
    # Exact bound of the capacitor-current damping loop alone, one sample of
    # delay: characteristic polynomial z^3 - 2c z^2 + (1 + k) z - k, Jury
    # conditions => 0 < k < 2c - 1 below fs/6 (derived with sympy in
    # loopcheck.engine.symbolic; the region statement after Parker et al. 2014 and
    # Pan et al. 2014, from memory). Checked against the engine's inner-loop
    # eigenvalues by bisection on Hi; the plant integrator z = 1 is not in the
    # damping loop (ic/vi has a zero there) and is set aside.
    d0 = design(ratio)
    lo, hi = symbolic.ccf_inner_hi_range(L1, d0.filter.C_F, L2, TS)

    def inner_radius(Hi):
        loop = build_loop(d0, Hi_V_per_A=Hi)
        ev = np.linalg.eigvals(loop.inner_A)
        i = int(np.argmin(np.abs(ev - 1.0)))
        assert abs(ev[i] - 1.0) < 1e-9
        return float(np.max(np.abs(np.delete(ev, i))))

    scale = L1 / TS
    for end in (lo, hi):
        if end == 0.0:
            continue
        found = brentq(lambda h: inner_radius(h) - 1.0, end - 0.05 * scale, end + 0.05 * scale, xtol=1e-13 * scale)
        assert found == pytest.approx(end, rel=1e-6)
    mid = 0.5 * (lo + hi)
    assert inner_radius(mid) < 1.0
    for end, inside in ((lo, 1), (hi, -1)):
        if end == 0.0:
            continue
        assert inner_radius(end * (1 + inside * 1e-6 * np.sign(end))) < 1.0
        assert inner_radius(end * (1 - inside * 1e-6 * np.sign(end))) > 1.0
    if ratio < 1 / 6:
        assert lo == 0.0 and hi > 0.0
        assert inner_radius(-1e-4 * scale) > 1.0  # negative damping gain: unstable
    else:
        assert hi == 0.0 and lo < 0.0
        assert inner_radius(1e-4 * scale) > 1.0


def test_inner_bound_table_values():
    # Normalised exact bound kd = Hi_max Ts / L1 at fr/fs = 0.05 ... 0.15
    # (derived values, not published: computed when the project was planned
    # by an independent root scan of z^3 - 2cz^2 + (1+k)z - k): 0.9171, 0.7853, 0.6607, 0.5044, 0.2045.
    got = []
    for ratio in (0.05, 0.08, 0.10, 0.12, 0.15):
        d = design(ratio)
        got.append(symbolic.ccf_inner_hi_range(L1, d.filter.C_F, L2, TS)[1] * TS / L1)
    np.testing.assert_allclose(got, [0.9171, 0.7853, 0.6607, 0.5044, 0.2045], atol=6e-5)
    # no damping gain works at fs/6 exactly (Parker et al. 2014, from memory)
    d = design(1 / 6)
    assert symbolic.ccf_inner_hi_range(L1, d.filter.C_F, L2, TS) is None


@pytest.mark.parametrize(
    "ratio, delay, Lg",
    [(0.10, 1.0, 0.0), (0.12, 1.0, 0.8e-3), (0.2, 0.5, 0.3e-3), (0.26, 1.0, 2.0e-3), (0.3, 0.5, 0.0)],
)
def test_grid_current_plus_ccf_boundary(ratio, delay, Lg):
    # Grid-current P control plus capacitor-current damping: the resonant
    # terms of Kp*G_i2 and Hi*G_ic cancel exactly at Hi = Kp L1/(L1 + L2 + Lg)
    # (derived: both share the factor of the
    # resonant mode, with weights -Kp/(L1+L2+Lg) and Hi/L1), so the resonant
    # poles sit on the unit circle there; below the critical frequency larger
    # Hi is stable, above it smaller Hi is.
    kp = 0.02
    d = design(ratio, "grid", kp=kp, delay=delay, Lg=Lg)
    Kp = d.control.Kp_V_per_A
    b = Kp * L1 / (L1 + L2 + Lg)
    below = ratio < 1 / (4 * delay + 2)

    def radius(Hi):
        return closed_radius(design(ratio, "grid", kp=kp, Hi=Hi, delay=delay, Lg=Lg))

    assert abs(radius(b) - 1.0) < 1e-9
    assert (radius(b * (1 + 1e-3)) < 1.0) is below
    assert (radius(b * (1 - 1e-3)) < 1.0) is (not below)
    assert analyse(design(ratio, "grid", kp=kp, Hi=b, delay=delay, Lg=Lg)).verdict == "marginal"
