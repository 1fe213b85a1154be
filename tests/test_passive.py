"""Checks of loopcheck.design.passive: damping-resistor losses against an
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

from loopcheck.harmonics.spectrum import OperatingPoint, PwmSpec, converter_sidebands, converter_voltage_phasor, modulation_index
from loopcheck.engine.model import Control, Design, Filter, Grid, PassiveDamping, Sampling
from loopcheck.design.passive import best_split_rc, compare_damping, resistor_loss, resonant_damping_ratio, rule_series_resistor_ohm

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


# ---------------------------------------------------------------------------
# issue 14: the ripple loss sums the same sidebands as the limit check, and
# the split-RC resistor is the true damping optimum
# ---------------------------------------------------------------------------

CASE_30K = "cases/commercial-30kva-weak-grid.toml"


def _case_with(extra: str):
    from pathlib import Path

    from loopcheck.io.casefile import case_from_string

    root = Path(__file__).resolve().parent.parent
    return case_from_string((root / CASE_30K).read_text() + extra, CASE_30K)


def _independent_ripple_W(kind, Rd, Cd, max_group, max_sideband):
    """Ripple loss of the damping resistor of the 30 kVA demo filter (values
    typed in from the case file), built from complex impedances (Kirchhoff,
    common practice) and the regular-sampled (single update) sideband
    expression of Holmes and Lipo (2003, from memory) evaluated with
    scipy.special.jv: |V_mn| = (2 Vdc/(q pi)) |J_n(q M pi/2) sin((q + n) pi/2)|,
    q = m + n f1/fsw, three-phase: n a multiple of 3 cancels."""
    from scipy.special import jv

    L1_, C_, L2_, R1_, R2_ = 1.5e-3, 33e-6, 0.75e-3, 0.020, 0.010
    f1, S, V, scr, Vdc, fsw = 50.0, 30e3, 400.0, 10.0, 750.0, 10e3
    Lg = V**2 / (2 * math.pi * f1 * scr * S)

    def branch(w):
        if kind == "series-R":
            Zsh = Rd + 1 / (1j * w * C_)
            return Zsh, lambda Vs: Vs / Zsh
        zc = 1 / (1j * w * (C_ - Cd))
        zd = Rd + 1 / (1j * w * Cd)
        return 1 / (1 / zc + 1 / zd), lambda Vs: Vs / zd

    # fundamental: rated current in phase with the grid voltage
    w1 = 2 * math.pi * f1
    I2 = math.sqrt(2) * S / (math.sqrt(3) * V)
    Vg = V * math.sqrt(2 / 3)
    Z2 = R2_ + 1j * w1 * (L2_ + Lg)
    Vsh = Vg + Z2 * I2
    Zsh, _ = branch(w1)
    vi = Vsh + (R1_ + 1j * w1 * L1_) * (I2 + Vsh / Zsh)
    M = abs(vi) / (Vdc / 2)
    P, freqs = 0.0, []
    for m in range(1, max_group + 1):
        for n in range(-max_sideband, max_sideband + 1):
            if n % 3 == 0:
                continue
            q = m + n * f1 / fsw
            amp = abs(2 * Vdc / (q * math.pi) * jv(n, q * M * math.pi / 2) * math.sin((q + n) * math.pi / 2))
            w = 2 * math.pi * (m * fsw + n * f1)
            freqs.append(m * fsw + n * f1)
            Zsh, i_r = branch(w)
            z2 = R2_ + 1j * w * (L2_ + Lg)
            zp = Zsh * z2 / (Zsh + z2)
            I1 = amp / (R1_ + 1j * w * L1_ + zp)
            P += Rd * abs(i_r(I1 * zp)) ** 2 / 2
    assert len(set(freqs)) == len(freqs)  # no coinciding sidebands to merge
    return P


@pytest.mark.parametrize("groups, sidebands", [(4, 12), (1, 3), (2, 7)])
def test_ripple_loss_uses_the_sidebands_of_the_limit_check(groups, sidebands):
    """Fails before issue 14: the losses always summed m <= 4, |n| <= 12."""
    from loopcheck.harmonics.spectrum import harmonic_check
    from loopcheck.io.read_pwm import operating_point_of, read_harmonics_options, read_pwm

    case = _case_with(f"\n[harmonics]\nmax_carrier_group = {groups}\nmax_sideband = {sidebands}\n")
    pwm, _ = read_pwm(case)
    opts = read_harmonics_options(case)
    op = operating_point_of(case, pwm, opts)
    chk = harmonic_check(case.design, pwm, op, opts.max_group, opts.max_sideband, opts.lg_points)
    assert max(s.m for s in chk.sidebands) <= groups and max(abs(s.n) for s in chk.sidebands) <= sidebands
    cmp_ = compare_damping(case.design, op, pwm, opts.max_group, opts.max_sideband)
    assert (cmp_.max_group, cmp_.max_sideband) == (groups, sidebands)
    assert any(f"m = 1..{groups} and sidebands |n| <= {sidebands}" in n for n in cmp_.notes)
    _, series, split = cmp_.variants
    assert series.ripple_W == pytest.approx(_independent_ripple_W("series-R", series.Rd_ohm, 0.0, groups, sidebands), rel=1e-9)
    assert split.ripple_W == pytest.approx(
        _independent_ripple_W("split-RC", split.Rd_ohm, split.Cd_F, groups, sidebands), rel=1e-9
    )


def _split_rc_zeta_scan(Rds):
    """Damping ratio of the resonant pair of the split-RC variant of the 30 kVA
    demo filter for each Rd, from the eigenvalues (numpy.linalg.eigvals) of a
    state matrix written here from the circuit (states i1, v_c1 across the
    plain C/2, v_d across the damped C/2, i2; common practice)."""
    L1_, C_, L2_, R1_, R2_ = 1.5e-3, 33e-6, 0.75e-3, 0.020, 0.010
    Lg = 400.0**2 / (2 * math.pi * 50.0 * 10.0 * 30e3)
    L2t, Ca, Cb = L2_ + Lg, C_ / 2, C_ / 2
    out = np.empty(len(Rds))
    for i, Rd in enumerate(Rds):
        # shunt node voltage v_c1; damped branch current (v_c1 - v_d)/Rd
        A = np.array([
            [-R1_ / L1_, -1 / L1_, 0.0, 0.0],
            [1 / Ca, -1 / (Rd * Ca), 1 / (Rd * Ca), -1 / Ca],
            [0.0, 1 / (Rd * Cb), -1 / (Rd * Cb), 0.0],
            [0.0, 1 / L2t, 0.0, -R2_ / L2t],
        ])
        ev = np.linalg.eigvals(A)
        p = ev[np.argmax(ev.imag)]
        out[i] = -p.real / abs(p)
    return out


def test_split_rc_resistor_is_the_damping_optimum_of_a_dense_scan():
    """Fails before issue 14: the log-grid pick fell 0.2-2 % short of the
    maximum (12.458 ohm against about 12.62 ohm here)."""
    case = _case_with("")
    spl = best_split_rc(replace_hi0(case.design))
    Rd = spl.filter.damping.Rd_ohm
    Rs = np.linspace(11.0, 14.5, 35001)  # 1e-4 ohm steps around the optimum
    z = _split_rc_zeta_scan(Rs)
    k = int(np.argmax(z))
    assert 0 < k < Rs.size - 1  # interior maximum
    assert Rd == pytest.approx(Rs[k], abs=2e-4)
    assert float(_split_rc_zeta_scan([Rd])[0]) >= z[k] - 1e-12
    assert resonant_damping_ratio(spl) == pytest.approx(z[k], abs=1e-9)


def replace_hi0(d):
    from dataclasses import replace

    return replace(d, control=replace(d.control, Hi_V_per_A=0.0))
