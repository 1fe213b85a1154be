"""Output admittance Yo = -i2/vg of the sampled current loop and its
non-passive bands (loopcheck.engine.admittance).

Outside references:

* the baseband formula is checked against an independent, simulation-free
  computation of the exact periodic steady state (Floquet form
  x(t) = e^{st} p(t), p periodic in Ts) of the sampled-data loop driven by a
  grid voltage e^{st}, built here with scipy.linalg.expm and quadrature:
  the component of i2 at the driving frequency must equal -Yo vg
  (P. Pirsto, J. Kukkola, M. Hinkkanen, L. Harnefors, IEEE Trans. Ind.
  Electron., vol. 68, no. 11, 2021, abstract read: a sampled-data
  admittance is a frequency component of a periodically time-varying
  response, not an LTI object);
* a second route with python-control (continuous state space, `c2d` with
  'zoh', the computation delay as z^-1, the controller as a
  python-control transfer function), sign-scanned on a fine grid;
* the published statement that with one sample of delay the current loop's
  output admittance is non-passive from the critical frequency fs/6 up to
  the Nyquist frequency (L. Harnefors, X. Wang, A. G. Yepes and
  F. Blaabjerg, "Passivity-based stability assessment of grid-connected
  VSCs - an overview", IEEE J. Emerg. Sel. Topics Power Electron., 2016;
  abstract read, the band fs/6..fs/2 from memory);
* capacitor-current feedback as the virtual admittance (Hi C/L1) e^{-jw Td}
  across C, Td = 1.5 Ts (W. Pan, X. Ruan, C. Bao, W. Li, X. Wang, IEEE
  Trans. Power Electron., vol. 29, no. 7, 2014, from memory), which gives
  the first-order closed form used below [derived in the test].

Filter and gain values are invented for the tests.
"""

import math

import control as ct
import numpy as np
import pytest
from scipy.integrate import simpson
from scipy.linalg import expm

from loopcheck.engine.admittance import Feedforward, design_admittance, hold_response, passivity_bands
from loopcheck.engine.model import Control, Design, Filter, Grid, Sampling

L1, C, L2 = 1.5e-3, 10e-6, 0.5e-3
FS = 10e3
TS = 1 / FS


def design(Kp=10.0, Hi=10.0, kind="P", Kr=0.0, delay=1.0, R1=0.0, R2=0.0, feedback="grid"):
    return Design(
        Filter(L1, C, L2, R1, R2),
        Grid(50.0),
        Sampling(FS, delay),
        Control(feedback, kind, Kp, Kr=Kr, Hi_V_per_A=Hi),
    )


def floquet_admittance(d, f_hz, n_quad=801, ff_gain=0.0, ff_cutoff_hz=None):
    """Exact component at f of -i2/vg for vg = e^{jwt}, by the periodic
    steady state of the sampled-data loop (independent of the module)."""
    s = 2j * math.pi * f_hz
    lam = d.sampling.delay
    Ts = d.sampling.Ts_s
    f = d.filter
    # continuous filter: x = [i1, vc, i2]
    A = np.array([[-f.R1_ohm / f.L1_H, -1 / f.L1_H, 0], [1 / f.C_F, 0, -1 / f.C_F], [0, 1 / f.L2_H, -f.R2_ohm / f.L2_H]])
    Bu = np.array([1 / f.L1_H, 0, 0])
    Bv = np.array([0, 0, -1 / f.L2_H])
    n = 3
    xp = np.linalg.solve(s * np.eye(n) - A, Bv)  # particular solution per unit vg

    def flow(tau):  # (e^{A tau}, int_0^tau e^{A r} dr Bu)
        M = np.zeros((n + 1, n + 1))
        M[:n, :n] = A * tau
        M[:n, n] = Bu * tau
        E = expm(M)
        return E[:n, :n], E[:n, n]

    Phi, _ = flow(Ts)
    E1, g1 = flow((1 - lam) * Ts)
    E0, g0 = flow(lam * Ts)
    G_old = E1 @ g0
    G_new = g1
    # controller: P (+ one Tustin-prewarped 50 Hz resonator), as a discrete ss
    z = np.exp(s * Ts)
    ctrl = d.control
    if ctrl.kind == "PR":
        w0 = 2 * math.pi * d.grid.f_hz
        Tw = 2 * math.tan(w0 * Ts / 2) / w0
        res = ct.c2d(ct.tf([ctrl.Kr, 0], [1, 0, w0**2]), Tw, "tustin")
        Kz = ctrl.Kp_V_per_A + complex(res(z))
    else:
        Kz = ctrl.Kp_V_per_A
    # unknowns W (deviation from xp at samples, per unit) and U (update)
    # z W = Phi W + G_old U / z + G_new U ;  U = -Kz i2[k] - Hi ic[k],  x[k] = W + xp
    c2 = np.array([0, 0, 1.0])
    cic = np.array([1.0, 0, -1.0])
    row = -Kz * c2 - ctrl.Hi_V_per_A * cic  # U = row @ (W + xp)
    Msys = np.zeros((n + 1, n + 1), dtype=complex)
    rhs = np.zeros(n + 1, dtype=complex)
    Msys[:n, :n] = z * np.eye(n) - Phi
    Msys[:n, n] = -(G_old / z + G_new)
    Msys[n, :n] = -row
    Msys[n, n] = 1.0
    # grid-voltage feedforward of the sample vg[k] = e^{jw k Ts} (amplitude 1)
    # through y[k] = y[k-1] + a (vg[k] - y[k-1]), written out here
    if ff_cutoff_hz is None:
        ff = ff_gain
    else:
        a = 1 - math.exp(-2 * math.pi * ff_cutoff_hz * Ts)
        ff = ff_gain * a / (1 - (1 - a) / z)
    rhs[n] = row @ xp + ff
    sol = np.linalg.solve(Msys, rhs)
    W, U = sol[:n], sol[n]
    # w(tau) on [0, Ts): held U/z before lam Ts, U after; each piece on its
    # own uniform grid (the integrand is smooth inside a piece)
    def piece(w0, u, length, m=n_quad):
        h = length / (m - 1)
        Eh, gh = flow(h)
        out = np.empty((m, n), dtype=complex)
        out[0] = w0
        for k in range(1, m):
            out[k] = Eh @ out[k - 1] + gh * u
        return np.linspace(0, length, m), out

    comp = c2 @ xp
    t0 = 0.0
    w0 = W
    for u, length in ((U / z, lam * Ts), (U, (1 - lam) * Ts)):
        if length > 0:
            t, wv = piece(w0, u, length)
            comp += simpson((wv @ c2) * np.exp(-s * (t0 + t)), x=t) / Ts
            w0 = wv[-1]
            t0 += length
    return -comp


@pytest.mark.parametrize(
    "kw",
    [dict(Kp=10.0, Hi=10.0), dict(Kp=20.0, Hi=5.0, delay=0.6, R1=0.05, R2=0.02),
     dict(kind="PR", Kp=12.0, Kr=400.0, Hi=8.0, delay=1.0)],
)
def test_baseband_formula_equals_exact_floquet_component(kw):
    """Yo equals the exact frequency component of the periodic steady state,
    below and above fs/2 (the model is exact for what it keeps)."""
    d = design(**kw)
    freqs = [130.0, 1234.0, 1900.0, 4700.0, 6200.0, 13100.0]
    got = design_admittance(d, freqs)
    for f, y in zip(freqs, got):
        ref = floquet_admittance(d, f)
        assert abs(y - ref) <= 1e-6 * abs(ref) + 1e-9, (f, y, ref)


def python_control_admittance(d, f_hz):
    """Second route (lambda = 1 only): python-control continuous model, c2d
    'zoh', one sample of delay as z^-1, P controller."""
    A = np.array([[0, -1 / L1, 0], [1 / C, 0, -1 / C], [0, 1 / L2, 0]])
    B = np.array([[1 / L1, 0], [0, 0], [0, -1 / L2]])
    Cm = np.array([[0, 0, 1.0], [1.0, 0, -1.0]])  # i2, ic
    sysc = ct.ss(A, B, Cm, np.zeros((2, 2)))
    sysd = ct.c2d(ct.ss(A, B[:, :1], Cm, np.zeros((2, 1))), TS, "zoh")
    w = 2 * math.pi * np.asarray(f_hz)
    G = sysc(1j * w)  # [2 out, 2 in, N]
    z = np.exp(1j * w * TS)
    Pd = sysd(z)[:, 0, :] / z  # one sample of delay
    K = np.array([d.control.Kp_V_per_A, d.control.Hi_V_per_A])
    KP = K @ Pd
    KG = K @ G[:, 1, :]
    H = np.exp(-1j * w * TS) * (1 - np.exp(-1j * w * TS)) / (1j * w)
    i2 = G[0, 1, :] + G[0, 0, :] * H / TS * (-KG / (1 + KP))
    return -i2


def test_against_python_control_route_and_band_edges():
    d = design(Kp=20.0, Hi=10.0)
    f = np.linspace(10.0, 0.999 * FS, 20001)
    ref = python_control_admittance(d, f)
    got = design_admittance(d, f)
    assert np.allclose(got, ref, rtol=1e-7, atol=1e-12)
    # band edges from a sign scan of the python-control route
    neg = ref.real < 0
    flips = f[1:][neg[1:] != neg[:-1]]
    res = passivity_bands(d, f_max_hz=0.999 * FS)
    edges = sorted({b.low_hz for b in res.bands} | {b.high_hz for b in res.bands if not b.high_open})
    assert len(edges) == len(flips)
    step = f[1] - f[0]
    for e, g in zip(edges, flips):
        assert abs(e - g) <= step


@pytest.mark.parametrize("Kp,Hi", [(1.0, 1.0), (5.0, 10.0), (10.0, 10.0), (10.0, 25.0)])
def test_nonpassive_from_fs6_to_nyquist_one_sample_delay(Kp, Hi):
    """Published statement (Harnefors et al. 2016, band from memory): with one
    sample of delay the non-passive band starts at the critical frequency fs/6
    and reaches the Nyquist frequency. For the lossless filter with
    proportional control the edge is exactly fs/6 [derived: there
    H(jw)/Ts = -j sinc and Pd is real, so Re Yo = 0]."""
    d = design(Kp=Kp, Hi=Hi)
    res = passivity_bands(d)
    assert len(res.bands) == 1
    b = res.bands[0]
    assert b.low_hz == pytest.approx(FS / 6, rel=1e-8)
    assert b.high_hz == pytest.approx(FS / 2, rel=1e-8)
    assert res.critical_hz == pytest.approx(FS / 6)


def test_band_near_fs6_with_losses_and_resonator():
    """With losses and a 50 Hz resonator the band still begins near fs/6
    (within 3 %) and is non-passive just above it, passive just below."""
    d = design(kind="PR", Kp=10.0, Kr=300.0, Hi=12.0, R1=0.05, R2=0.02)
    res = passivity_bands(d)
    lows = [b.low_hz for b in res.bands]
    assert any(abs(x - FS / 6) < 0.03 * FS / 6 for x in lows)
    y = design_admittance(d, [0.9 * FS / 6, 1.2 * FS / 6])
    assert y[0].real > 0 > y[1].real


def test_reduced_delay_moves_edge_to_fs_over_4lambda_plus_2():
    """Pan et al. 2014 (from memory): a reduced delay moves the critical
    frequency to fs/(4 lambda + 2); small gains, lossless: the edge follows."""
    for lam in (0.5, 0.75):
        d = design(Kp=0.5, Hi=0.5, delay=lam)
        res = passivity_bands(d)
        assert res.bands[0].low_hz == pytest.approx(FS / (4 * lam + 2), rel=1e-3)


def test_first_order_closed_form_small_gains():
    """Small gains, first order in Kp and Hi [derived in the docstring of the test module]:
    Yo ~ Yp + (Hi C L1 + Kp (1 - w^2 L1 C)/w^2) / D^2 * e^{-jw Td} sinc(w Ts/2),
    D = L1 + L2 - w^2 L1 L2 C, Td = 1.5 Ts, Yp = 1/(Z2 + Z1 || Zc)."""
    Kp, Hi = 1e-4, 2e-4
    d = design(Kp=Kp, Hi=Hi)
    f = np.array([300.0, 900.0, 2500.0, 3700.0])
    w = 2 * math.pi * f
    s = 1j * w
    Yp = 1 / (s * L2 + 1 / (1 / (s * L1) + s * C))
    D = L1 + L2 - w**2 * L1 * L2 * C
    first = (Hi * C * L1 + Kp * (1 - w**2 * L1 * C) / w**2) / D**2 * np.exp(-1.5j * w * TS) * np.sinc(w * TS / 2 / math.pi)
    got = design_admittance(d, f)
    assert np.allclose(got - Yp, first, rtol=1e-3)
    # and the hold helper itself: e^{-s lam Ts} (1 - e^{-s Ts})/s
    assert np.allclose(hold_response(s, TS, 1.0), np.exp(-s * TS) * (1 - np.exp(-s * TS)) / s)


def test_bare_inductor_limit_is_passive_rl():
    """Zero gains: the inverter is the passive filter seen from the PCC,
    Yo = 1/(Z2 + Z1 || Zc) (common practice), Re Yo >= 0 everywhere."""
    d = design(Kp=0.0, Hi=0.0, R1=0.1, R2=0.05)
    f = np.linspace(10, 2 * FS, 500)
    s = 2j * math.pi * f
    Yp = 1 / (0.05 + s * L2 + 1 / (1 / (0.1 + s * L1) + s * C))
    assert np.allclose(design_admittance(d, f), Yp, rtol=1e-9)
    assert passivity_bands(d).passive


@pytest.mark.parametrize("gain,cutoff", [(1.0, None), (0.8, 800.0)])
def test_feedforward_admittance_equals_exact_floquet_component(gain, cutoff):
    """With grid-voltage feedforward of the sampled PCC voltage (gain,
    first-order low-pass) the baseband formula still equals the exact
    component of the periodic steady state."""
    d = design(kind="PR", Kp=12.0, Kr=400.0, Hi=8.0, R1=0.05)
    ffw = Feedforward(gain, cutoff)
    freqs = [7.0, 130.0, 1900.0, 4700.0]
    got = design_admittance(d, freqs, feedforward=ffw)
    for f, y in zip(freqs, got):
        ref = floquet_admittance(d, f, ff_gain=gain, ff_cutoff_hz=cutoff)
        assert abs(y - ref) <= 1e-6 * abs(ref) + 1e-9, (f, y, ref)


def test_full_feedforward_removes_the_low_frequency_admittance():
    """Common practice: full grid-voltage feedforward makes the converter
    voltage follow the grid voltage, so at low frequency the current no
    longer responds to it: with P control |Yo| falls from about 1/Kp to a
    value proportional to f (ratio of 1 Hz to 2 Hz about 1/2)."""
    d = design(Kp=10.0, Hi=5.0)
    plain = design_admittance(d, [1.0])
    ff = design_admittance(d, [1.0, 2.0], feedforward=Feedforward(1.0))
    assert abs(plain[0]) == pytest.approx(1 / 10.0, rel=0.02)
    assert abs(ff[0]) < 2e-3 * abs(plain[0])
    assert abs(ff[0] / ff[1]) == pytest.approx(0.5, rel=0.01)
