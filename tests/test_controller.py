"""Controller blocks (loopcheck.engine.controller) against outside references:
python-control ``sample_system``/``parallel`` and scipy ``cont2discrete``,
and the published frequency warping of the plain Tustin resonator.

Gains are invented for the tests.
"""

import math

import numpy as np
import pytest
from scipy import signal

from loopcheck.engine.controller import (
    block_response,
    controller_blocks,
    controller_response,
    integrator_block,
    parallel,
    proportional_block,
    resonator_block,
)
from loopcheck.engine.model import Control

F1 = 50.0


def ct():
    import control

    return control


def unit_circle(n=400, w_lo=1e-3, w_hi=math.pi - 1e-3, avoid=()):
    w = np.linspace(w_lo, w_hi, n)
    for a in avoid:  # keep away from poles on the circle
        w = w[np.abs(w - a) > 1e-3 * max(a, 1e-3)]
    return np.exp(1j * w)


def eval_ct(sys, z):
    return np.asarray(sys(z), dtype=complex).reshape(z.shape)


@pytest.mark.parametrize(
    "ours, theirs",
    [("forward-euler", "euler"), ("backward-euler", "backward_diff"), ("tustin", "tustin")],
)
@pytest.mark.parametrize("fs", [5e3, 40e3])
def test_integrator_matches_python_control(ours, theirs, fs):
    # python-control sample_system of Ki/s with the same method
    # (general-purpose reference library).
    Ts, Ki = 1.0 / fs, 2500.0
    blk = integrator_block(Ki, Ts, ours)
    ref = ct().sample_system(ct().tf([Ki], [1.0, 0.0]), Ts, method=theirs)
    z = unit_circle()
    got = block_response(blk, z)
    want = eval_ct(ref, z)
    assert np.max(np.abs(got - want) / np.abs(want)) < 1e-12


@pytest.mark.parametrize("fs", [10e3, 50e3])
@pytest.mark.parametrize("h", [1, 3, 5, 7, 11, 13])
@pytest.mark.parametrize("wc", [0.0, 8.0])
def test_prewarped_tustin_poles_and_response(fs, h, wc):
    # Tustin with pre-warping at w0 maps the resonance exactly onto
    # z = e^{+-j w0 Ts} (ideal resonator; A. G. Yepes et al., "Effects of
    # Discretization Methods on the Performance of Resonant Controllers",
    # IEEE Trans. Power Electron., vol. 25, no. 7, pp. 1692-1712, 2010), and
    # must equal python-control sample_system(..., 'tustin',
    # prewarp_frequency=w0) (general-purpose reference library).
    Ts, w0, Kr = 1.0 / fs, 2 * math.pi * F1 * h, 900.0 if wc == 0 else 3.0
    blk = resonator_block(Kr, w0, wc, Ts, "tustin-prewarp")
    poles = np.linalg.eigvals(blk.A)
    if wc == 0:
        np.testing.assert_allclose(np.abs(poles), 1.0, rtol=0, atol=1e-14)
        np.testing.assert_allclose(np.sort(np.abs(np.angle(poles))), [w0 * Ts] * 2, rtol=1e-12)
        num, den = [Kr, 0.0], [1.0, 0.0, w0**2]
    else:
        num, den = [2 * Kr * wc, 0.0], [1.0, 2 * wc, w0**2]
    ref = ct().sample_system(ct().tf(num, den), Ts, method="tustin", prewarp_frequency=w0)
    z = unit_circle(avoid=[w0 * Ts])
    got = block_response(blk, z)
    want = eval_ct(ref, z)
    assert np.max(np.abs(got - want) / np.abs(want)) < 1e-8
    if wc > 0:
        # damped resonator: the prewarped peak |R| = Kr sits exactly at w0 (same source)
        assert abs(block_response(blk, np.array([np.exp(1j * w0 * Ts)]))[0]) == pytest.approx(Kr, rel=1e-9)


def test_plain_tustin_moves_the_peak():
    # Plain Tustin maps the analogue resonance w0 to (2/Ts) atan(w0 Ts/2):
    # 13th harmonic of 50 Hz at fs = 10 kHz -> 641.18 Hz (derived; method per
    # Yepes et al., IEEE Trans. Power Electron. 25(7), 2010).
    fs = 10e3
    Ts, w0 = 1.0 / fs, 2 * math.pi * 13 * F1
    blk = resonator_block(700.0, w0, 0.0, Ts, "tustin")
    ang = np.abs(np.angle(np.linalg.eigvals(blk.A)))
    f_peak = ang.max() / Ts / (2 * math.pi)
    assert f_peak == pytest.approx((2 / Ts) * math.atan(w0 * Ts / 2) / (2 * math.pi), rel=1e-12)
    assert round(f_peak, 2) == 641.18
    # and it agrees with python-control's plain Tustin
    ref = ct().sample_system(ct().tf([700.0, 0.0], [1.0, 0.0, w0**2]), Ts, method="tustin")
    z = unit_circle(avoid=[w0 * Ts, ang.max()])
    assert np.max(np.abs(block_response(blk, z) - eval_ct(ref, z)) / np.abs(eval_ct(ref, z))) < 1e-8


@pytest.mark.parametrize("ours, theirs", [("zoh", "zoh"), ("impulse-invariant", "impulse")])
@pytest.mark.parametrize("wc", [0.0, 6.0])
def test_zoh_and_impulse_invariant_match_scipy(ours, theirs, wc):
    # scipy.signal.cont2discrete 'zoh' and 'impulse' (general-purpose reference
    # library); both keep the poles at e^{+-j w0 Ts} (Yepes et al. 2010).
    fs = 20e3
    Ts, w0 = 1.0 / fs, 2 * math.pi * 7 * F1
    Kr = 1200.0 if wc == 0 else 2.0
    blk = resonator_block(Kr, w0, wc, Ts, ours)
    num, den = ([Kr, 0.0], [1.0, 0.0, w0**2]) if wc == 0 else ([2 * Kr * wc, 0.0], [1.0, 2 * wc, w0**2])
    bd, ad, _ = signal.cont2discrete((num, den), Ts, method=theirs)
    z = unit_circle(avoid=[w0 * Ts])
    want = np.polyval(np.ravel(bd), z) / np.polyval(ad, z)
    got = block_response(blk, z)
    assert np.max(np.abs(got - want) / np.abs(want)) < 1e-8
    if wc == 0:
        np.testing.assert_allclose(np.abs(np.angle(np.linalg.eigvals(blk.A))), w0 * Ts, rtol=1e-12)


def test_sum_of_blocks_matches_python_control_parallel():
    # P + resonators at 1st and 5th harmonic + integrator, each discretised on
    # its own, summed: compare with python-control parallel() of the same
    # pieces, each converted to state space (the transfer-function product of
    # all four already loses ~1e-8 near z = 1, where its poles cluster).
    fs = 10e3
    Ts = 1 / fs
    c = ct()
    pieces_ours = [
        proportional_block(11.0),
        integrator_block(800.0, Ts, "tustin"),
        resonator_block(500.0, 2 * math.pi * F1, 0.0, Ts, "tustin-prewarp"),
        resonator_block(500.0, 2 * math.pi * 5 * F1, 0.0, Ts, "tustin-prewarp"),
    ]
    pieces_ref = [
        c.tf([11.0], [1.0], Ts),
        c.sample_system(c.tf([800.0], [1.0, 0.0]), Ts, method="tustin"),
        c.sample_system(c.tf([500.0, 0], [1.0, 0, (2 * math.pi * F1) ** 2]), Ts, "tustin", prewarp_frequency=2 * math.pi * F1),
        c.sample_system(
            c.tf([500.0, 0], [1.0, 0, (2 * math.pi * 5 * F1) ** 2]), Ts, "tustin", prewarp_frequency=2 * math.pi * 5 * F1
        ),
    ]
    ref = c.ss(pieces_ref[0])
    for p in pieces_ref[1:]:
        ref = c.parallel(ref, c.ss(p))
    z = unit_circle(avoid=[2 * math.pi * F1 * Ts, 2 * math.pi * 5 * F1 * Ts])
    want = eval_ct(ref, z)
    # factored evaluation (what the loop uses) and the summed state space
    got_factored = controller_response(pieces_ours, z)
    got_summed = block_response(parallel(pieces_ours), z)
    assert np.max(np.abs(got_factored - want) / np.abs(want)) < 1e-8
    assert np.max(np.abs(got_summed - want) / np.abs(want)) < 1e-8


def test_controller_blocks_follow_the_control_description():
    # The PR description: one resonator at the fundamental and one per listed
    # harmonic, each with poles at e^{+-j h w1 Ts} (prewarped Tustin).
    ctl = Control(kind="PR", Kp_V_per_A=10.0, Kr=400.0, harmonics=(3, 5, 7, 11, 13), resonator="tustin-prewarp")
    Ts = 1 / 50e3
    blocks = controller_blocks(ctl, F1, Ts)
    assert len(blocks) == 1 + 6
    angles = sorted(float(np.max(np.angle(np.linalg.eigvals(b.A)))) for b in blocks[1:])
    np.testing.assert_allclose(angles, [2 * math.pi * F1 * h * Ts for h in (1, 3, 5, 7, 11, 13)], rtol=1e-12)
    pi = controller_blocks(Control(kind="PI", Kp_V_per_A=10.0, Ki_V_per_As=3000.0, integrator="backward-euler"), F1, Ts)
    z = unit_circle(50)
    want = 10.0 + 3000.0 * Ts * z / (z - 1)  # backward Euler Ki Ts z/(z-1) (Franklin, Powell & Workman 1998; from memory)
    assert np.max(np.abs(controller_response(pi, z) - want) / np.abs(want)) < 1e-12
