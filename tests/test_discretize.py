"""Exact sampled plant (loopcheck.engine.discretize) against outside references.

* delay 0: scipy.signal.cont2discrete(..., 'zoh') and python-control
  sample_system(..., 'zoh') on the same continuous matrices;
* delay 1: the ZOH equivalent times z^-1;
* fractional delays: the modified-z closed forms derived with sympy
  (loopcheck.engine.symbolic), and a time-domain simulation with
  scipy.signal.lsim of the delayed, held input;
* batched construction equals the unbatched one.

Filter values are invented for the tests.
"""

import math

import numpy as np
import pytest
import sympy as sp
from scipy import signal

from loopcheck.engine import symbolic
from loopcheck.engine.discretize import discretize_plant
from loopcheck.engine.plant import lcl_state_space

# invented scenario: 2.0 mH / 4.7 uF / 0.7 mH, grid 0.4 mH, fs = 8 kHz
L1, C, L2, LG = 2.0e-3, 4.7e-6, 0.7e-3, 0.4e-3
TS = 1.0 / 8e3
KINDS = ("none", "series-R", "split-RC", "split-RLC")


def lossy(kind):
    return lcl_state_space(L1, C, L2 + LG, 0.03, 0.05, kind, 4.0, 2.2e-6, 0.3e-3)


def dresponse(A, B, C_, z):
    """C (zI - A)^-1 B at the points z (rows of C_ are outputs)."""
    n = A.shape[-1]
    M = z[:, None, None] * np.eye(n) - A
    x = np.linalg.solve(M, np.broadcast_to(B, (z.size, n, B.shape[-1])))
    return (C_ @ x)[..., 0]


def zgrid(n=300):
    # Unit circle from about 6 Hz up to just below the Nyquist frequency. Much
    # closer to z = 1 the ic row loses digits in the test's own evaluation
    # C (zI - A)^-1 B (ic = i1 - i2, both ~ 1/(z - 1)), not in the models.
    return np.exp(1j * np.linspace(5e-3, math.pi - 1e-3, n))


@pytest.mark.parametrize("kind", KINDS)
def test_zoh_matches_scipy_cont2discrete(kind):
    # scipy.signal.cont2discrete 'zoh' (general-purpose reference library)
    p = lossy(kind)
    d = discretize_plant(p.A, p.B, p.C, TS, 0.0)
    Ad, Bd, Cd, Dd, _ = signal.cont2discrete((p.A, p.B, p.C, np.zeros((3, 1))), TS, method="zoh")
    np.testing.assert_allclose(d.A, Ad, rtol=1e-12, atol=1e-12 * np.abs(Ad).max())
    np.testing.assert_allclose(d.B, Bd, rtol=1e-12, atol=1e-12 * np.abs(Bd).max())
    np.testing.assert_array_equal(d.C, Cd)


@pytest.mark.parametrize("kind", KINDS)
def test_zoh_matches_python_control_sample_system(kind):
    # python-control sample_system(..., 'zoh') (general-purpose reference library)
    import control as ct

    p = lossy(kind)
    d = discretize_plant(p.A, p.B, p.C, TS, 0.0)
    sysd = ct.sample_system(ct.ss(p.A, p.B, p.C, np.zeros((3, 1))), TS, method="zoh")
    np.testing.assert_allclose(d.A, sysd.A, rtol=1e-12, atol=1e-12 * np.abs(sysd.A).max())
    np.testing.assert_allclose(d.B, sysd.B, rtol=1e-12, atol=1e-12 * np.abs(sysd.B).max())
    z = zgrid(50)
    ours = dresponse(d.A, d.B, d.C, z)
    theirs = np.array([[sysd(zz)[i, 0] for i in range(3)] for zz in z])
    assert np.max(np.abs(ours - theirs) / np.abs(theirs)) < 1e-10


@pytest.mark.parametrize("kind", KINDS)
def test_delay_one_is_zoh_times_inverse_z(kind):
    # One sample of computation delay = ZOH equivalent followed by z^-1
    # (K. J. Astrom and B. Wittenmark, "Computer-Controlled Systems", 3rd ed.,
    # Prentice Hall, 1997, ch. 2; from memory).
    p = lossy(kind)
    d1 = discretize_plant(p.A, p.B, p.C, TS, 1.0)
    Ad, Bd, Cd, _, _ = signal.cont2discrete((p.A, p.B, p.C, np.zeros((3, 1))), TS, method="zoh")
    z = zgrid()
    ours = dresponse(d1.A, d1.B, d1.C, z)
    ref = dresponse(Ad, Bd, Cd, z) / z[:, None]
    assert np.max(np.abs(ours - ref) / np.abs(ref)) < 1e-10
    # the extra state is a pure delay pole at z = 0
    assert np.min(np.abs(np.linalg.eigvals(d1.A))) < 1e-14


def test_closed_forms_reduce_to_the_published_delay_one_form():
    # G_i2(z) for one sample of delay, as given by Parker, McGrath & Holmes,
    # "Regions of Active Damping Control for LCL Filters", IEEE Trans. Ind.
    # Appl. 50(1), 2014 (from memory; the form is re-derived here with sympy):
    #   G_i2(z) = z^-1 (1/(L1+L2)) [Ts/(z-1) - (sin(th)/wr) (z-1)/(z^2 - 2 z cos(th) + 1)]
    #   G_ic(z) = z^-1 (1/L1) (sin(th)/wr) (z-1)/(z^2 - 2 z cos(th) + 1),  th = wr Ts
    d = symbolic.derive_discrete_lossless()
    z, th = d.z, d.wr * d.Ts
    delta = z**2 - 2 * z * sp.cos(th) + 1
    res = (sp.sin(th) / d.wr) * (z - 1) / delta
    gi2 = (d.Ts / (z - 1) - res) / (d.L1 + d.LT) / z
    gi1 = (d.Ts / (z - 1) + (d.LT / d.L1) * res) / (d.L1 + d.LT) / z
    gic = res / d.L1 / z
    for got, want in ((d.i2, gi2), (d.i1, gi1), (d.ic, gic)):
        assert sp.simplify(got.subs(d.lam, 1) - want) == 0
        assert sp.simplify(got.subs(d.lam, 0) - want * z) == 0  # delay 0: the ZOH equivalent


@pytest.mark.parametrize("delay", [0.0, 0.25, 0.5, 0.75, 1.0])
def test_fractional_delay_matches_modified_z_closed_forms(delay):
    # Modified z-transform of the lossless plant (E. I. Jury, "Theory and
    # Application of the z-Transform Method", Wiley, 1964; from memory),
    # derived with sympy in loopcheck.engine.symbolic; relative error < 1e-9.
    LT = L2 + LG
    p = lcl_state_space(L1, C, LT)
    d = discretize_plant(p.A, p.B, p.C, TS, delay)
    z = zgrid(400)
    ours = dresponse(d.A, d.B, d.C, z)
    ref = np.stack(symbolic.discrete_lossless_evaluator()(z, L1, C, LT, TS, delay), axis=-1)
    err = np.abs(ours - ref) / np.abs(ref)
    assert err.max() < 1e-9, err.max()


@pytest.mark.parametrize("delay", [0.25, 0.5, 0.75])
@pytest.mark.parametrize("kind", ["series-R", "split-RLC"])
def test_fractional_delay_matches_time_domain_simulation(kind, delay):
    # Time-domain check with scipy.signal.lsim (piecewise-constant input, exact
    # for a held input): the value computed at sample k is applied from
    # (k + delay) Ts to (k + 1 + delay) Ts. Sampled outputs must equal the
    # discrete model's response to the same sequence.
    p = lossy(kind)
    d = discretize_plant(p.A, p.B, p.C, TS, delay)
    rng = np.random.default_rng(7)
    N = 40
    u = rng.standard_normal(N)
    # fine time grid with the switching instants on it (delay is a multiple of 1/4)
    sub = 4
    t = np.arange(N * sub + 1) * TS / sub
    shift = int(round(delay * sub))
    ufine = np.zeros(t.size)
    for k in range(N):
        a = k * sub + shift
        ufine[a : a + sub] = u[k]
    sysc = signal.StateSpace(p.A, p.B, p.C, np.zeros((3, 1)))
    _, y, _ = signal.lsim(sysc, ufine, t, interp=False)
    y_samples = y[::sub][:N]
    # discrete simulation
    xd = np.zeros(d.A.shape[0])
    yd = []
    for k in range(N):
        yd.append(d.C @ xd)
        xd = d.A @ xd + d.B[:, 0] * u[k]
    yd = np.array(yd)
    scale = np.abs(y_samples).max()
    assert np.max(np.abs(yd - y_samples)) < 1e-9 * scale


def test_batched_equals_unbatched():
    # Engine invariant: a batch of plants and sampling periods gives exactly
    # the per-point results (no cross-talk between batch elements).
    L1s = np.array([1.0e-3, 2.0e-3, 3.5e-3])[:, None]
    Lgs = np.array([0.0, 0.5e-3])[None, :]
    Ts = np.array([1 / 5e3, 1 / 20e3])[None, :]
    p = lcl_state_space(L1s, C, L2 + Lgs, 0.02, 0.03, "split-RC", 5.0, 2.0e-6)
    for delay in (0.0, 0.4, 1.0):
        db = discretize_plant(p.A, p.B, p.C, Ts, delay)
        for i in range(3):
            for j in range(2):
                q = lcl_state_space(float(L1s[i, 0]), C, L2 + float(Lgs[0, j]), 0.02, 0.03, "split-RC", 5.0, 2.0e-6)
                one = discretize_plant(q.A, q.B, q.C, float(Ts[0, j]), delay)
                np.testing.assert_allclose(db.A[i, j], one.A, rtol=1e-13, atol=1e-15)
                np.testing.assert_allclose(db.B[i, j], one.B, rtol=1e-13, atol=1e-18)
                np.testing.assert_array_equal(db.C[i, j], one.C)


def test_delay_outside_range_is_rejected():
    # Engine contract (issue 13: the total delay is any value 0..4 samples).
    p = lossy("none")
    for bad in (-0.1, 4.5):
        with pytest.raises(ValueError):
            discretize_plant(p.A, p.B, p.C, TS, bad)
