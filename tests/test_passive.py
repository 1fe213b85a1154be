"""Checks of loopcheck.passive: damping-resistor losses against an
independent phasor calculation written here (series and parallel
impedances, Kirchhoff's laws; common practice), and the variant rules.

The Rd = 1/(3 w_r C) rule is from M. Liserre, A. Dell'Aquila and
F. Blaabjerg, "Genetic algorithm-based design of the active damping for an
LCL-filter three-phase active rectifier", IEEE Trans. Power Electron.,
vol. 19, no. 1, 2004. Design values are invented for the tests.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from loopcheck.harmonics import OperatingPoint, PwmSpec, converter_sidebands, converter_voltage_phasor, modulation_index
from loopcheck.model import Control, Design, Filter, Grid, PassiveDamping, Sampling
from loopcheck.passive import best_split_rc, compare_damping, resistor_loss, resonant_damping_ratio, rule_series_resistor_ohm

F1 = 50.0
L1, C, L2, LG = 1.5e-3, 15e-6, 0.8e-3, 0.6e-3
R1, R2, RG = 0.04, 0.03, 0.02


def design(damping):
    return Design(
        Filter(L1_H=L1, C_F=C, L2_H=L2, R1_ohm=R1, R2_ohm=R2, damping=damping),
        Grid(f_hz=F1, Lg_H=LG, Rg_ohm=RG, S_VA=12e3, V_V=400.0),
        Sampling(fs_hz=16e3),
        Control(kind="PR", Kp_V_per_A=11.0, Kr=1500.0, Hi_V_per_A=0.0),
    )


def branch(damping, w):
    """Hand phasor model of the shunt branch at w [rad/s]: (Z_shunt, f) with
    I_R = f(V_shunt) the damping-resistor current for a shunt voltage V."""
    zc = 1 / (1j * w * C)
    k = damping.kind
    if k == "series-R":
        Z = damping.Rd_ohm + zc
        return Z, lambda V: V / Z
    zcd = 1 / (1j * w * damping.Cd_F)
    if k == "split-RC":
        zd = damping.Rd_ohm + zcd
        return 1 / (1 / zc + 1 / zd), lambda V: V / zd
    zl = 1j * w * damping.Ld_H
    zpar = damping.Rd_ohm * zl / (damping.Rd_ohm + zl)
    zd = zcd + zpar
    return 1 / (1 / zc + 1 / zd), lambda V: (V / zd) * zpar / damping.Rd_ohm


VARIANTS = [
    PassiveDamping(kind="series-R", Rd_ohm=2.0),
    PassiveDamping(kind="split-RC", Rd_ohm=12.0, Cd_F=8e-6),
    PassiveDamping(kind="split-RLC", Rd_ohm=12.0, Cd_F=8e-6, Ld_H=0.5e-3),
]


@pytest.mark.parametrize("damping", VARIANTS, ids=lambda d: d.kind)
def test_fundamental_loss_matches_phasor_calculation(damping):
    d = design(damping)
    op = OperatingPoint(current_rms_A=16.0, rated_current_rms_A=17.3, grid_peak_V=326.6, current_phase_deg=-25.0)
    w = 2 * math.pi * F1
    I2 = math.sqrt(2) * 16.0 * np.exp(-1j * math.radians(25.0))
    Vsh = 326.6 + (R2 + RG + 1j * w * (L2 + LG)) * I2  # shunt-branch voltage (series-R: across C and Rd)
    _, i_r = branch(damping, w)
    IR = i_r(Vsh)
    expect = damping.Rd_ohm * abs(IR) ** 2 / 2
    got = resistor_loss(d, op)
    assert got.fundamental_W == pytest.approx(expect, rel=1e-9)
    assert got.fundamental_rms_A == pytest.approx(abs(IR) / math.sqrt(2), rel=1e-9)
    assert got.total_W == pytest.approx(3 * got.per_phase_W)  # three phases by default


@pytest.mark.parametrize("damping", VARIANTS, ids=lambda d: d.kind)
def test_ripple_loss_matches_phasor_calculation(damping):
    d = design(damping)
    pwm = PwmSpec(Vdc_V=700.0, fsw_hz=6e3, scheme="half-bridge", update="single")
    op = OperatingPoint(current_rms_A=10.0, rated_current_rms_A=10.0, grid_peak_V=230 * math.sqrt(2))
    M = float(modulation_index(pwm, abs(complex(np.squeeze(converter_voltage_phasor(d, op))))))
    f, _, _, amp = converter_sidebands(pwm, M, F1)
    P = 0.0
    for fk, vk in zip(f, amp):
        w = 2 * math.pi * fk
        zsh, i_r = branch(damping, w)
        z2 = R2 + RG + 1j * w * (L2 + LG)
        zp = zsh * z2 / (zsh + z2)
        I1 = vk / (R1 + 1j * w * L1 + zp)
        P += damping.Rd_ohm * abs(i_r(I1 * zp)) ** 2 / 2
    got = resistor_loss(d, op, pwm)
    assert got.ripple_W == pytest.approx(P, rel=1e-9)
    assert got.phases == 1 and got.total_W == pytest.approx(got.fundamental_W + got.ripple_W)


def test_active_design_has_no_resistor_loss_and_variants_follow_the_rules():
    d = Design(
        Filter(L1_H=L1, C_F=C, L2_H=L2),
        Grid(f_hz=F1, S_VA=12e3, V_V=400.0),
        Sampling(fs_hz=16e3),
        Control(kind="PR", Kp_V_per_A=11.0, Kr=1500.0, Hi_V_per_A=10.0),
    )
    op = OperatingPoint(17.32, 17.32, 326.6)
    cmp_ = compare_damping(d, op, PwmSpec(Vdc_V=700.0, fsw_hz=8e3))
    active, series, split = cmp_.variants
    assert active.total_W == 0.0 and active.kind == "none"
    wr = math.sqrt((L1 + L2) / (L1 * L2 * C))
    assert series.Rd_ohm == pytest.approx(1 / (3 * wr * C))  # Liserre et al. 2004 rule
    assert rule_series_resistor_ohm(d) == pytest.approx(1 / (3 * wr * C))
    assert series.total_W > 0 and split.total_W > 0
    # split-RC keeps the total shunt capacitance and its Rd is a damping optimum
    assert split.C_F + split.Cd_F == pytest.approx(C)
    base = best_split_rc(d)
    z0 = resonant_damping_ratio(base)
    for k in (0.8, 1.25):
        other = base.filter.damping.__class__(kind="split-RC", Rd_ohm=base.filter.damping.Rd_ohm * k, Cd_F=C / 2)
        alt = Design(base.filter.__class__(L1_H=L1, C_F=C / 2, L2_H=L2, damping=other), base.grid, base.sampling, base.control)
        assert resonant_damping_ratio(alt) < z0
