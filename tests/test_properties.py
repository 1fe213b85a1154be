"""Property-based checks of ``analyse`` on random valid designs (hypothesis).

For P, PI and PR controllers (with harmonic resonators), grid- and
converter-side feedback, computation delay 0, 0.5 and 1, fs 5-40 kHz and
resonance/sampling ratios 0.02-0.45, with random capacitor-current damping:

* the closed-loop spectral radius equals that of an independent
  python-control construction (tests/reference_loop.py: ``ss``,
  ``sample_system`` zoh, explicit delay state, ``feedback`` in state space)
  to 1e-8 relative;
* the verdict from the eigenvalues equals the verdict of the Nyquist count
  (argument principle: closed-loop poles outside = open-loop poles outside
  - counter-clockwise encirclements; H. Nyquist, "Regeneration theory",
  Bell Syst. Tech. J., vol. 11, pp. 126-147, 1932), with the open-loop
  poles counted on the python-control model;
* the stable gain intervals contain the factor 1 exactly when the loop is
  stable (D-decomposition, Neimark 1948, as cited in loopcheck.engine.margins).

Random designs are generated, not taken from any source.
"""

import math

import numpy as np
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from loopcheck.engine.analysis import CONTOUR_OFFSET, analyse
from loopcheck.engine.model import Control, Design, Filter, Grid, Sampling

from reference_loop import reference_loop, spectral_radius

RESONATORS = ("tustin-prewarp", "tustin", "zoh", "impulse-invariant")
INTEGRATORS = ("forward-euler", "backward-euler", "tustin")


@st.composite
def designs(draw):
    fs = draw(st.floats(5e3, 40e3))
    Ts = 1 / fs
    ratio = draw(st.floats(0.02, 0.45))
    L1 = 10 ** draw(st.floats(math.log10(0.3e-3), math.log10(5e-3)))
    L2 = L1 * draw(st.floats(0.1, 1.0))
    Lg = draw(st.sampled_from([0.0, 0.0, L2 * draw(st.floats(0.05, 2.0))]))
    LT = L2 + Lg
    wr = 2 * math.pi * ratio * fs
    C = (L1 + LT) / (L1 * LT * wr**2)
    R = draw(st.sampled_from([0.0, 0.0, draw(st.floats(0.005, 0.3))]))
    delay = draw(st.sampled_from([0.0, 0.5, 1.0]))
    kind = draw(st.sampled_from(["P", "PI", "PR"]))
    Kp = 10 ** draw(st.floats(math.log10(0.005), math.log10(0.4))) * (L1 + LT) / Ts
    Hi = draw(st.floats(0.0, 0.8)) * L1 / Ts
    ctl = dict(Kp_V_per_A=Kp, Hi_V_per_A=Hi, feedback=draw(st.sampled_from(["grid", "converter"])), kind=kind)
    if kind == "PI":
        ctl.update(Ki_V_per_As=Kp * draw(st.floats(20.0, 600.0)), integrator=draw(st.sampled_from(INTEGRATORS)))
    elif kind == "PR":
        wc = draw(st.sampled_from([0.0, draw(st.floats(2.0, 20.0))]))
        Kr = Kp * draw(st.floats(20.0, 400.0)) if wc == 0 else Kp * draw(st.floats(0.2, 5.0))
        harm = tuple(h for h in (3, 5, 7, 11, 13) if draw(st.booleans()))
        ctl.update(Kr=Kr, wc_rad_s=wc, harmonics=harm, resonator=draw(st.sampled_from(RESONATORS)))
    return Design(Filter(L1, C, L2, R, R), Grid(50.0, Lg, R), Sampling(fs, delay), Control(**ctl), name="random")


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(designs())
def test_analyse_agrees_with_independent_state_space_and_nyquist(d):
    a = analyse(d)
    L, CL = reference_loop(d)
    # spectral radius against python-control's state-space closed loop
    ref = spectral_radius(CL)
    assert abs(a.spectral_radius - ref) <= 1e-8 * ref
    assert a.nyquist_consistent
    # the Nyquist verdict: P counted on the independent model, outside the
    # contour |z| = 1 + CONTOUR_OFFSET that analyse integrates on
    assume(a.verdict != "marginal")
    ol = np.abs(np.linalg.eigvals(L.A))
    cl = np.abs(np.linalg.eigvals(CL.A))
    # poles between the verdict tolerance and the contour are seen
    # differently by the two counts by construction: leave them out
    assume(not np.any((cl > 1 - a.tolerance) & (cl < 1 + CONTOUR_OFFSET + 1e-9)))
    assume(np.all(np.abs(ol - (1 + CONTOUR_OFFSET)) > 1e-9))
    P = int(np.sum(ol > 1 + CONTOUR_OFFSET))
    Z_nyquist = P - a.nyquist_encirclements
    assert a.stable == (Z_nyquist == 0)
    assert a.stable == bool(np.all(cl < 1 - a.tolerance))
    # the stable gain intervals contain k = 1 exactly when stable
    contains_one = any(lo <= 1.0 and (hi is None or hi >= 1.0) for lo, hi in a.stable_gain_intervals)
    assert contains_one == a.stable
    if a.stable:
        gm = a.gain_margin
        assert gm is not None
        assert gm.lower_factor < 1.0 and (gm.upper_factor is None or gm.upper_factor > 1.0)
