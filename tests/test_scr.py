"""Short-circuit ratio <-> grid inductance against the textbook definition.

Definition: SCR = S_sc / S_rated, the short-circuit apparent power at the
point of connection over the unit's rated power; with S_sc = V^2/|Zg| for a
purely inductive grid, Lg = V^2 / (2*pi*f*SCR*S) (V line-to-line for three
phases, per-phase star value). Source: NERC, "Reliability Guideline:
Integrating Inverter-Based Resources into Low Short Circuit Strength
Systems", Dec. 2017 (definition and the bands strong > 3, weak 2..3, very
weak < 2).
"""

import math

import numpy as np
import pytest

from loopcheck.io.casefile import case_from_string
from loopcheck.engine.scr import grid_strength, lg_from_scr, scr_from_lg


def test_worked_value_400V_10kVA_50Hz_scr20():
    # By hand: 400^2 / (2*pi*50*20*10000) = 160000 / 62831853.07 = 2.5465 mH
    assert lg_from_scr(20, 10e3, 400.0, 50.0) == pytest.approx(2.5465e-3, rel=1e-4)


@pytest.mark.parametrize(
    "scr, expected_mH",
    # by hand from the definition, 400 V, 10 kVA, 50 Hz: 50.93 mH / SCR
    [(10, 5.0930), (5, 10.186), (3, 16.977), (2, 25.465), (1.5, 33.953)],
)
def test_more_points_of_the_same_grid(scr, expected_mH):
    assert lg_from_scr(scr, 10e3, 400.0, 50.0) * 1e3 == pytest.approx(expected_mH, rel=2e-4)


def test_per_unit_impedance_is_one_over_scr():
    # Common practice: on the unit's own base (Zbase = V^2/S) the grid
    # impedance is 1/SCR per unit.
    V, S, f = 690.0, 2.5e6, 60.0
    z_base = V**2 / S
    for scr in (1.2, 3.0, 17.0):
        x_pu = 2 * math.pi * f * lg_from_scr(scr, S, V, f) / z_base
        assert x_pu == pytest.approx(1.0 / scr, rel=1e-12)


def test_inverse_and_arrays():
    scr = np.array([2.0, 3.0, 10.0, 50.0])
    Lg = lg_from_scr(scr, 30e3, 400.0, 50.0)
    assert np.all(np.diff(Lg) < 0)  # a stiffer grid has less inductance
    assert scr_from_lg(Lg, 30e3, 400.0, 50.0) == pytest.approx(scr, rel=1e-12)
    assert scr_from_lg(0.0, 30e3, 400.0, 50.0) == math.inf


@pytest.mark.parametrize(
    "scr, band",
    # NERC 2017 bands: strong SCR > 3, weak 2 <= SCR <= 3, very weak SCR < 2
    [(10.0, "strong"), (3.01, "strong"), (3.0, "weak"), (2.5, "weak"), (2.0, "weak"), (1.99, "very weak")],
)
def test_strength_bands(scr, band):
    assert grid_strength(scr) == band


CASE = """
[filter]
L1 = "1.8 mH"
C = "4.7 uF"
L2 = "0.6 mH"
[grid]
f = "50 Hz"
S = "10 kVA"
V = "400 V"
scr = 20
scr_range = [2, 50]
[sampling]
fs = "10 kHz"
[control]
feedback = "grid"
kind = "P"
Kp = "10 V/A"
"""


def test_case_file_scr_keys_become_inductances():
    g = case_from_string(CASE, "x.toml").design.grid
    assert g.Lg_H == pytest.approx(2.5465e-3, rel=1e-4)  # the worked value above
    lo, hi = g.Lg_range_H
    # high SCR = small inductance: SCR 50 -> 1.0186 mH, SCR 2 -> 25.465 mH
    assert lo == pytest.approx(1.01859e-3, rel=1e-4)
    assert hi == pytest.approx(25.4648e-3, rel=1e-4)
