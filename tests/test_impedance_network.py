"""Impedance-ratio stability on a grid network against the exact eigenvalue
verdict (loopcheck.design.grid_network).

Outside references:

* J. Sun, "Impedance-based stability criterion for grid-connected
  inverters", IEEE Trans. Power Electron., vol. 26, no. 11, 2011 (from
  memory): inverter stable on a stiff grid, grid stable, then the Nyquist
  criterion on Zg Yo decides;
* the closed-loop eigenvalues of the sampled loop with the network's states
  inside the exact ZOH discretisation (common practice: the exact
  discretisation of a continuous LTI plant is exact at the samples);
* for a purely inductive grid, 1 + Zg Yo = 0 is the characteristic equation
  of the filter with L2 + Lg (common practice), so the verdict must agree
  with the engine's `analyse` on the design with that Lg;
* J. L. Agorreta, M. Borrega, J. Lopez and L. Marroyo, "Modeling and
  control of N-paralleled grid-connected inverters with LCL filter coupled
  due to grid impedance in PV plants", IEEE Trans. Power Electron., vol. 26,
  no. 3, 2011 (citation seen, content from memory): N identical units on Zg
  behave as one unit on N Zg plus N - 1 units on a stiff grid.

Designs and networks are invented for the tests.
"""

import math
from dataclasses import replace

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, event, given, settings
from hypothesis import strategies as st

from loopcheck.engine.admittance import Feedforward
from loopcheck.engine.analysis import analyse
from loopcheck.design.grid_network import (
    GridNetwork,
    coupled_closed_loop_matrix,
    exact_verdict,
    impedance_ratio_verdict,
    network_impedance,
)
from loopcheck.engine.loop import build_loop
from loopcheck.engine.model import Control, Design, Filter, Grid, Sampling

#: Cases closer than this to the unit circle (exact spectral radius) are
#: near-marginal and excluded where a verdict is compared. (The 50 Hz
#: resonator keeps slow poles about 2e-3 inside the circle in these designs.)
MARGIN = 1.5e-3


def design(fs=20e3, L1=1.5e-3, C=10e-6, L2=0.5e-3, kind="PR", Kp=10.0, Hi=10.0, Kr=300.0, delay=1.0, R1=0.02, R2=0.01,
           feedback="grid"):
    return Design(Filter(L1, C, L2, R1, R2), Grid(50.0), Sampling(fs, delay),
                  Control(feedback, kind, Kp, Ki_V_per_As=200 * Kp, Kr=Kr, Hi_V_per_A=Hi))


def test_network_impedance_formula():
    """Zg = (Rg + s Lg) || (Rs + 1/(s Cs)) (common practice), and N Zg by scaling."""
    net = GridNetwork(1e-3, 0.1, 20e-6, 0.3)
    s = 2j * math.pi * np.array([50.0, 1000.0, 7000.0])
    zl, zc = 0.1 + s * 1e-3, 0.3 + 1 / (s * 20e-6)
    assert np.allclose(network_impedance(net, s), 1 / (1 / zl + 1 / zc), rtol=1e-12)
    assert np.allclose(network_impedance(net.scaled(3), s), 3 * network_impedance(net, s), rtol=1e-12)


@pytest.mark.parametrize("Lg", [0.0, 0.4e-3, 2e-3, 6e-3])
def test_coupled_plant_one_unit_inductive_equals_engine(Lg):
    """One unit on Rg + s Lg: the coupled model's closed loop has the engine's
    spectrum (L2 -> L2 + Lg), spectral radius to 1e-12."""
    d = design()
    net = GridNetwork(Lg, 0.05)
    engine = build_loop(replace(d, grid=replace(d.grid, Lg_H=Lg, Rg_ohm=0.05)))
    r_engine = np.max(np.abs(np.linalg.eigvals(engine.closed_loop_matrix(1.0))))
    assert exact_verdict(d, net).spectral_radius == pytest.approx(r_engine, rel=1e-12)


def test_shunt_network_known_cases():
    """A lossless cable capacitance whose resonance with the grid falls in
    the non-passive band destabilises the loop; the same with a damping
    resistor in series with the capacitor does not. Both verdicts agree."""
    d = design()
    bad = GridNetwork(1e-3, 0.0, 5e-6, 0.0)
    good = GridNetwork(1e-3, 0.0, 5e-6, 0.5)
    assert exact_verdict(d, bad).verdict == "unstable"
    ib = impedance_ratio_verdict(d, bad)
    assert ib.verdict == "unstable" and ib.encirclements_cw == 2
    assert exact_verdict(d, good).verdict == "stable"
    assert impedance_ratio_verdict(d, good).verdict == "stable"


def test_not_applicable_when_unstable_on_stiff_grid():
    """Sun's criterion needs the inverter stable on a stiff grid: with the
    resonance above fs/6 and positive Hi it is not (critical frequency,
    Parker, McGrath & Holmes 2014, from memory)."""
    d = design(fs=10e3)
    iv = impedance_ratio_verdict(d, GridNetwork(1e-3, 0.0))
    assert iv.stiff_verdict == "unstable" and not iv.applicable and iv.verdict == "not applicable"


@pytest.mark.parametrize("Lg_over_L2", [0.5, 1.0, 3.0, 8.0])
@pytest.mark.parametrize("kw", [dict(), dict(fs=10e3, Hi=-3.0, Kp=8.0), dict(fs=10e3, C=20e-6, Hi=5.0, Kp=8.0),
                                dict(fs=12e3, L2=0.4e-3, C=10e-6, L1=1.2e-3, Hi=0.0, Kp=4.0)])
def test_inductive_grid_equals_engine_with_L2_plus_Lg(kw, Lg_over_L2):
    """Common practice: for Zg = Rg + s Lg, 1 + Zg Yo = 0 is the filter with
    L2 + Lg, so the impedance-ratio verdict equals analyse() on that design
    (near-marginal cases excluded)."""
    d = design(**kw)
    Lg = Lg_over_L2 * d.filter.L2_H
    a = analyse(replace(d, grid=replace(d.grid, Lg_H=Lg, Rg_ohm=0.02)))
    iv = impedance_ratio_verdict(d, GridNetwork(Lg, 0.02))
    if iv.stiff_verdict != "stable" or abs(a.spectral_radius - 1) < MARGIN:
        pytest.skip("not applicable or near-marginal")
    assert iv.verdict == a.verdict


def _random_case(draw):
    fs = draw(st.sampled_from([8e3, 10e3, 16e3, 20e3]))
    L1 = draw(st.floats(0.5e-3, 3e-3))
    L2 = draw(st.floats(0.1e-3, 1.5e-3))
    fr = draw(st.floats(0.08, 0.45)) * fs
    C = (L1 + L2) / (L1 * L2 * (2 * math.pi * fr) ** 2)
    lam = draw(st.sampled_from([1.0, 0.75, 0.5]))
    kind = draw(st.sampled_from(["P", "PI", "PR"]))
    Kp = draw(st.floats(0.05, 0.5)) * (L1 + L2) * fs
    Hi = draw(st.floats(-0.5, 1.0)) * Kp
    d = Design(Filter(L1, C, L2, draw(st.floats(0, 0.1)), draw(st.floats(0, 0.05))), Grid(50.0), Sampling(fs, lam),
               Control("grid", kind, Kp, Ki_V_per_As=200 * Kp, Kr=50 * Kp, Hi_V_per_A=Hi))
    Lg = draw(st.floats(0.05, 4.0)) * L2
    Cs = draw(st.sampled_from([0.0, 1.0])) * draw(st.floats(0.1, 5.0)) * C
    Rs = draw(st.floats(0.0, 2.0)) if Cs > 0 else 0.0
    net = GridNetwork(Lg, draw(st.floats(0.0, 0.3)), Cs, Rs)
    return d, net


@settings(max_examples=40, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
@given(st.data())
def test_property_impedance_ratio_equals_eigenvalues(data):
    """Random designs and networks (R-L with or without a shunt R-C): the
    impedance-ratio verdict equals the exact eigenvalue verdict. Excluded:
    cases where the criterion does not apply (unstable on a stiff grid),
    near-marginal cases (|rho - 1| < MARGIN), and cases whose closest approach
    to -1 lies above 0.4 fs, where the baseband admittance leaves out aliases
    as large as what it keeps (a limit of the model, docs/method.md)."""
    d, net = _random_case(data.draw)
    iv = impedance_ratio_verdict(d, net)
    assume(iv.applicable)
    ev = exact_verdict(d, net)
    assume(abs(ev.spectral_radius - 1) >= MARGIN)
    assume(iv.min_distance_hz < 0.4 * d.sampling.fs_hz)
    event(ev.verdict)
    assert iv.verdict == ev.verdict, (iv, ev)


# the bench-like design (resonance above fs/6, no damping) loses stability as
# the grid inductance each unit sees grows; the second one stays stable
DESIGNS = [
    dict(fs=12e3, L1=1.2e-3, C=10e-6, L2=0.4e-3, Hi=0.0, Kp=4.0, R1=0.03, R2=0.01),
    dict(),
]
NETWORKS = [GridNetwork(0.25e-3, 0.02), GridNetwork(0.25e-3, 0.01, 5e-6, 0.1)]
#: radius band excluded from the verdict comparison of the N-unit test
MARGIN_N = MARGIN


@pytest.mark.parametrize("kw", DESIGNS)
@pytest.mark.parametrize("net", NETWORKS)
@pytest.mark.parametrize("N", [1, 2, 3, 4, 5])
def test_n_units_full_coupled_model(kw, net, N):
    """Agorreta et al. 2011: the coupled model of N identical units on Zg has
    the spectrum of one unit on N Zg plus N - 1 units on a stiff grid (exact,
    eigenvalues matched to 1e-7), and the impedance-ratio verdict with N Zg
    equals the full coupled model's eigenvalue verdict."""
    d = design(**kw)
    full = np.linalg.eigvals(coupled_closed_loop_matrix(d, net, N))
    common = np.linalg.eigvals(coupled_closed_loop_matrix(d, net.scaled(N), 1))
    stiff = np.linalg.eigvals(coupled_closed_loop_matrix(d, GridNetwork(), 1))
    parts = np.concatenate([common] + [stiff] * (N - 1))
    assert full.size == parts.size
    # match each eigenvalue of the parts to the nearest unused one of the full model
    left = list(full)
    for p in sorted(parts, key=lambda x: (-abs(x), x.imag)):
        j = int(np.argmin([abs(p - q) for q in left]))
        assert abs(p - left[j]) < 1e-7 * max(1.0, abs(p)), (p, left[j])
        left.pop(j)
    ev = exact_verdict(d, net, N)
    iv = impedance_ratio_verdict(d, net, N)
    assert iv.units == N
    assert iv.applicable
    if abs(ev.spectral_radius - 1) >= MARGIN_N:
        assert iv.verdict == ev.verdict


def test_n_units_flip_the_bench_design():
    """The bench-like design is stable with 1 and 2 units on 0.25 mH and
    unstable with 3 or more (both verdicts): the N-unit rule has teeth."""
    d = design(**DESIGNS[0])
    net = NETWORKS[0]
    got = [(exact_verdict(d, net, N).verdict, impedance_ratio_verdict(d, net, N).verdict) for N in (1, 2, 3, 5)]
    assert got == [("stable", "stable")] * 2 + [("unstable", "unstable")] * 2


@settings(max_examples=25, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
@given(st.data())
def test_property_with_feedforward_impedance_ratio_equals_eigenvalues(data):
    """As above with grid-voltage feedforward (gain 0..1, with or without a
    low-pass): the feedforward's states and the PCC voltage it samples are
    inside the exact model; the verdicts agree away from the circle."""
    d, net = _random_case(data.draw)
    cutoff = data.draw(st.sampled_from([None, 1.0]))
    ffw = Feedforward(data.draw(st.floats(0.0, 1.0)),
                      None if cutoff is None else data.draw(st.floats(0.02, 0.4)) * d.sampling.fs_hz)
    iv = impedance_ratio_verdict(d, net, feedforward=ffw)
    assume(iv.applicable)
    ev = exact_verdict(d, net, feedforward=ffw)
    assume(abs(ev.spectral_radius - 1) >= MARGIN)
    assume(iv.min_distance_hz < 0.4 * d.sampling.fs_hz)
    event(ev.verdict)
    assert iv.verdict == ev.verdict, (iv, ev)


def test_feedforward_on_stiff_and_inductive_grids():
    """On a stiff PCC vg = 0, so feedforward leaves the spectrum alone apart
    from its own filter pole at 1 - a (exact). On the bench-like design's
    inductive grid the verdict moves with the feedforward (unstable without
    it at Lg = 1 mH, stable with full feedforward: vg = Lg di2/dt fed
    forward cancels part of the grid inductance in this model [derived
    observation for this design, not a general rule]); the impedance-ratio
    verdict follows the exact one in both cases."""
    d = design(**DESIGNS[0])
    ffw = Feedforward(1.0, 2000.0)
    base = np.sort_complex(np.linalg.eigvals(coupled_closed_loop_matrix(d, GridNetwork(), 1)))
    withff = np.sort_complex(np.linalg.eigvals(coupled_closed_loop_matrix(d, GridNetwork(), 1, ffw)))
    a = 1 - math.exp(-2 * math.pi * 2000.0 / d.sampling.fs_hz)
    assert np.allclose(np.sort_complex(np.append(base, 1 - a)), withff, atol=1e-9)
    net = GridNetwork(1e-3, 0.02)
    assert exact_verdict(d, net).verdict == "unstable" == impedance_ratio_verdict(d, net).verdict
    full = Feedforward(1.0)
    assert exact_verdict(d, net, feedforward=full).verdict == "stable"
    assert impedance_ratio_verdict(d, net, feedforward=full).verdict == "stable"
