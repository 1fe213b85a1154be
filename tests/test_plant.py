"""The continuous LCL plant (loopcheck.engine.plant) against an independent route.

The state-space matrices of ``plant.py`` are written from the circuit's
differential equations; ``symbolic.py`` derives the same transfer functions
with sympy by nodal analysis of the impedances. The two must agree for every
passive-damping variant, with series resistances and grid inductance.

Filter values below are invented for the tests (a few-kW scenario).
"""

import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import sympy as sp

from loopcheck.engine import symbolic
from loopcheck.engine.model import resonance_hz
from loopcheck.engine.plant import OUTPUT_I1, OUTPUT_I2, OUTPUT_IC, lcl_state_space, plant_order

# invented demo filter: 1.2 mH / 6.8 uF / 0.45 mH, grid 0.3 mH
P = dict(
    L1_H=1.2e-3, C_F=6.8e-6, L2_H=0.45e-3, Lg_H=0.3e-3,
    R1_ohm=0.025, R2_ohm=0.04, Rg_ohm=0.015,
    Rd_ohm=3.3, Cd_F=4.7e-6, Ld_H=0.5e-3,
)
KINDS = ("none", "series-R", "split-RC", "split-RLC")


def ss_response(ss, s):
    """[i1, i2, ic]/vi of a PlantSS at the Laplace points s (unbatched)."""
    n = ss.A.shape[-1]
    M = s[:, None, None] * np.eye(n) - ss.A
    x = np.linalg.solve(M, np.broadcast_to(ss.B, (s.size, n, 1)))
    return (ss.C @ x)[..., 0]  # (len(s), 3)


def build(kind, p=P):
    return lcl_state_space(
        p["L1_H"], p["C_F"], p["L2_H"] + p["Lg_H"], p["R1_ohm"], p["R2_ohm"] + p["Rg_ohm"],
        kind, p["Rd_ohm"], p["Cd_F"], p["Ld_H"],
    )


@pytest.mark.parametrize("kind", KINDS)
def test_state_space_matches_sympy_nodal_analysis(kind):
    # Independent route: sympy nodal analysis (loopcheck.engine.symbolic) vs the
    # state-space model; circuit laws are common practice (Kirchhoff).
    s = 2j * math.pi * np.geomspace(1.0, 50e3, 400)
    ss = build(kind)
    assert ss.order == plant_order(kind)
    num = ss_response(ss, s)
    ref = symbolic.plant_evaluator(kind)(s, **P)
    for row, r in zip((OUTPUT_I1, OUTPUT_I2, OUTPUT_IC), ref):
        err = np.abs(num[:, row] - r) / np.abs(r)
        assert err.max() < 1e-9, (kind, row, err.max())


@pytest.mark.parametrize("kind", KINDS)
def test_state_space_batched_matches_sympy(kind):
    # Batched construction (a small grid of L1 and Lg) against the sympy
    # transfer functions point by point.
    L1 = np.array([0.8e-3, 1.2e-3, 2.5e-3])[:, None]
    Lg = np.array([0.0, 1.0e-3])[None, :]
    ss = lcl_state_space(L1, P["C_F"], P["L2_H"] + Lg, P["R1_ohm"], P["R2_ohm"], kind, P["Rd_ohm"], P["Cd_F"], P["Ld_H"])
    assert ss.A.shape == (3, 2, plant_order(kind), plant_order(kind))
    s = 2j * math.pi * np.geomspace(10.0, 20e3, 60)
    f = symbolic.plant_evaluator(kind)
    for i in range(3):
        for j in range(2):
            one = type(ss)(ss.A[i, j], ss.B[i, j], ss.C[i, j])
            num = ss_response(one, s)
            p = dict(P, L1_H=float(L1[i, 0]), Lg_H=float(Lg[0, j]), Rg_ohm=0.0)
            ref = f(s, **p)
            for row, r in zip((OUTPUT_I1, OUTPUT_I2, OUTPUT_IC), ref):
                assert np.max(np.abs(num[:, row] - r) / np.abs(r)) < 1e-9


def test_lossless_transfer_functions_match_textbook_forms():
    # Lossless LCL transfer functions as printed in the LCL literature:
    # i2/vi = 1/(L1 L2 C s^3 + (L1 + L2) s), i1/vi = (L2 C s^2 + 1)/(s (L1 L2 C s^2 + L1 + L2))
    # M. Liserre, F. Blaabjerg and S. Hansen, "Design and Control of an
    # LCL-Filter-Based Three-Phase Active Rectifier", IEEE Trans. Ind. Appl.,
    # vol. 41, no. 5, pp. 1281-1291, 2005 (from memory). Lg adds to L2.
    ex = symbolic.derive_plant("none")
    y = ex.symbols
    s = ex.s
    lossless = {y["R1_ohm"]: 0, y["R2_ohm"]: 0, y["Rg_ohm"]: 0}
    L1, C, LT = y["L1_H"], y["C_F"], y["L2_H"] + y["Lg_H"]
    den = s * (L1 * LT * C * s**2 + L1 + LT)
    assert sp.simplify(ex.i2.subs(lossless) - 1 / den) == 0
    assert sp.simplify(ex.i1.subs(lossless) - (LT * C * s**2 + 1) / den) == 0
    assert sp.simplify(ex.ic.subs(lossless) - LT * C * s**2 / den) == 0
    # ic is the shunt-branch current i1 - i2 for every variant (Kirchhoff)
    for kind in KINDS:
        e = symbolic.derive_plant(kind)
        assert sp.simplify(e.i1 - e.i2 - e.ic) == 0


def test_resonance_and_antiresonance_closed_forms():
    # w_r = sqrt((L1 + L2)/(L1 L2 C)), w_z = 1/sqrt(L2 C) with Lg added to L2:
    # Liserre, Blaabjerg & Hansen, IEEE Trans. Ind. Appl. 41(5), 2005 (from memory).
    r = symbolic.derive_resonances()
    y = r.symbols
    L1, C, LT = y["L1_H"], y["C_F"], y["L2_H"] + y["Lg_H"]
    assert sp.simplify(r.resonance - sp.sqrt((L1 + LT) / (L1 * LT * C))) == 0
    assert sp.simplify(r.antiresonance - 1 / sp.sqrt(LT * C)) == 0
    # model.resonance_hz uses the same formula
    LTn = P["L2_H"] + P["Lg_H"]
    wr = float(r.resonance.subs({y["L1_H"]: P["L1_H"], y["C_F"]: P["C_F"], y["L2_H"]: P["L2_H"], y["Lg_H"]: P["Lg_H"]}))
    assert resonance_hz(P["L1_H"], P["C_F"], LTn) == pytest.approx(wr / (2 * math.pi), rel=1e-14)


def test_state_space_poles_and_zero_at_the_closed_forms():
    # Lossless plant: eigenvalues 0 and +-j w_r; i1/vi vanishes at s = j w_z
    # (Liserre et al. 2005, from memory; closed forms checked symbolically above).
    LT = P["L2_H"] + P["Lg_H"]
    ss = lcl_state_space(P["L1_H"], P["C_F"], LT)
    wr = 2 * math.pi * resonance_hz(P["L1_H"], P["C_F"], LT)
    wz = 1.0 / math.sqrt(LT * P["C_F"])
    eig = np.sort_complex(np.linalg.eigvals(ss.A))
    np.testing.assert_allclose(eig.imag, [-wr, 0.0, wr], rtol=1e-12, atol=1e-9 * wr)
    np.testing.assert_allclose(eig.real, 0.0, atol=1e-9 * wr)
    at_zero = ss_response(ss, np.array([1j * wz]))[0, OUTPUT_I1]
    nearby = ss_response(ss, np.array([0.9j * wz]))[0, OUTPUT_I1]
    assert abs(at_zero) < 1e-9 * abs(nearby)


def test_split_capacitor_resonance_tends_to_total_capacitance():
    # With the damping resistor shorted (Rd -> 0) the split branch is C + Cd in
    # parallel, so the resonance tends to the lossless formula with C + Cd
    # (derived); this is the capacitance design_resonance_hz uses.
    LT = P["L2_H"] + P["Lg_H"]
    ss = lcl_state_space(P["L1_H"], P["C_F"], LT, damping_kind="split-RC", Rd_ohm=1e-7, Cd_F=P["Cd_F"])
    eig = np.linalg.eigvals(ss.A)
    wr = 2 * math.pi * resonance_hz(P["L1_H"], P["C_F"] + P["Cd_F"], LT)
    assert np.max(np.abs(eig.imag)) == pytest.approx(wr, rel=1e-6)


def test_analysis_code_paths_do_not_import_sympy():
    # Project rule: sympy is imported only by loopcheck.engine.symbolic (slow import,
    # reference route only). A fresh interpreter runs an analysis and must
    # not have loaded it.
    code = (
        "import sys\n"
        "from loopcheck.engine.model import Control, Design, Filter, Grid, Sampling\n"
        "from loopcheck.engine.analysis import analyse\n"
        "analyse(Design(Filter(1e-3, 1e-5, 5e-4), Grid(), Sampling(1e4), Control('grid', 'P', 5.0, Hi_V_per_A=3.0)))\n"
        "print('sympy' in sys.modules)\n"
    )
    root = Path(__file__).resolve().parents[1]
    out = subprocess.run(
        [sys.executable, "-c", code], cwd=root, capture_output=True, text=True,
        env={**os.environ, "PYTHONPATH": str(root)},
    )
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "False"
