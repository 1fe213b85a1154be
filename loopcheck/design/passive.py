"""Passive versus active damping, argued in watts.

For a passively damped filter the damping resistor carries part of the
fundamental current of the shunt branch and part of the switching ripple;
its loss is

    P_R = Rd * ( |I_R(f1)|^2 + sum_k |I_R(f_k)|^2 ) / 2     (peak phasors)

per phase (three-phase converters: times 3). The fundamental phasor follows
from the operating point: with the grid voltage Vg and the grid current I2
given, the converter voltage is vi = (I2 - G_i2,vg Vg) / G_i2,vi and the
resistor current I_R = G_R,vi vi + G_R,vg Vg, all transfer functions taken
from the continuous filter model at f1 (state space, so Lg, R1, R2, Rg and
the damping branch are included exactly). The ripple phasors are the
converter-voltage sidebands of :mod:`loopcheck.harmonics.spectrum` times G_R,vi at
each sideband frequency. Active damping by capacitor-current feedback (the
virtual resistor Hi) dissipates nothing in a resistor; what it costs is
control bandwidth and robustness to the sampling delay, which the stability
analysis (``loopcheck check``) quantifies. Losses of the filter inductors
and of the capacitor's series resistance are not included.

Comparison variants. Besides the design itself, loopcheck evaluates two
passive variants of the same filter when the design has none:

* series-R: Rd in series with C, Rd = 1/(3 w_r C), the rule of Liserre,
  Dell'Aquila and Blaabjerg [1] (also used in [2]);
* split-RC: the capacitance split into C/2 (plain) and C/2 in series with
  Rd (total shunt capacitance kept), Rd chosen to give the largest damping
  ratio of the resonant pole pair of the continuous filter (a log-grid
  scan over Rd refined by a bounded scalar optimisation to a relative Rd
  accuracy of about 1e-7; loopcheck's own choice, no published rule is
  implied).

References
----------
.. [1] M. Liserre, A. Dell'Aquila and F. Blaabjerg, "Genetic algorithm-based
   design of the active damping for an LCL-filter three-phase active
   rectifier", IEEE Trans. Power Electron., vol. 19, no. 1, pp. 76-86, 2004
   (the Rd = 1/(3 w_r C) rule; page numbers from memory).
.. [2] R. Pena-Alzola, M. Liserre, F. Blaabjerg, R. Sebastian, J. Dannehl
   and F. W. Fuchs, "Analysis of the passive damping losses in
   LCL-filter-based grid converters", IEEE Trans. Power Electron., vol. 28,
   no. 6, pp. 2642-2646, 2013 (from memory).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from loopcheck.harmonics.spectrum import (
    OperatingPoint,
    PwmSpec,
    converter_sidebands,
    converter_voltage_phasor,
    modulation_index,
    plant_response,
)
from loopcheck.engine.model import Design, PassiveDamping, design_resonance_hz
from loopcheck.engine.plant import design_plant
from loopcheck.engine.threads import limited


@dataclass(frozen=True)
class DampingLoss:
    """Resistor loss of one damping variant.

    label: short text; kind: passive-damping kind ("none" for active);
    Rd_ohm [ohm], Cd_F [F], Ld_H [H], C_F: plain filter capacitance [F];
    Hi_V_per_A: capacitor-current feedback gain [V/A] (active variant);
    resonance_hz: LCL resonance of the variant [Hz]; damping_ratio: of the
    resonant pole pair of the continuous filter (no control) [-];
    fundamental_rms_A / ripple_rms_A: resistor current at f1 / over the
    sidebands [A rms]; fundamental_W / ripple_W / per_phase_W: resistor loss
    per phase [W] (ripple None without a modulator description);
    phases: 1 or 3; total_W: per_phase_W times phases [W]."""

    label: str
    kind: str
    Rd_ohm: float
    Cd_F: float
    Ld_H: float
    C_F: float
    Hi_V_per_A: float
    resonance_hz: float
    damping_ratio: float
    fundamental_rms_A: float
    ripple_rms_A: float | None
    fundamental_W: float
    ripple_W: float | None
    per_phase_W: float
    phases: int
    total_W: float


@dataclass(frozen=True)
class DampingComparison:
    """Passive variants beside the active design. variants: the rows;
    op: operating point used; notes: plain-text remarks; max_group,
    max_sideband: the sidebands summed for the ripple loss (carrier groups
    m = 1..max_group, |n| <= max_sideband) [-], the same set as the limit
    check of :func:`loopcheck.harmonics.spectrum.harmonic_check` when the caller
    passes the same values."""

    variants: tuple[DampingLoss, ...]
    op: OperatingPoint
    notes: tuple[str, ...]
    max_group: int = 4
    max_sideband: int = 12


def resistor_row(design: Design) -> np.ndarray | None:
    """Row vector on the filter states giving the damping-resistor current
    [A per state unit], or None when the design has no resistor."""
    d = design.filter.damping
    n = design_plant(design).A.shape[-1]
    row = np.zeros(n)
    if d.kind == "series-R":
        row[0], row[2] = 1.0, -1.0  # i1 - i2
    elif d.kind in ("split-RC", "split-RLC"):
        row[1], row[3] = 1.0 / d.Rd_ohm, -1.0 / d.Rd_ohm  # (vc - vd) / Rd
    else:
        return None
    return row


def resonant_damping_ratio(design: Design) -> float:
    """Damping ratio [-] of the highest-frequency complex pole pair of the
    continuous filter (with Lg, no control): -Re(s)/|s|."""
    A = design_plant(design).A
    ev = np.linalg.eigvals(A)
    cx = ev[np.abs(ev.imag) > 1e-9 * np.abs(ev).max()]
    if cx.size == 0:
        return 1.0
    p = cx[np.argmax(np.abs(cx.imag))]
    return float(-p.real / abs(p)) + 0.0  # + 0.0 turns -0.0 into 0.0


def resistor_loss(design: Design, op: OperatingPoint, pwm: PwmSpec | None = None, label: str = "",
                  max_group: int = 4, max_sideband: int = 12) -> DampingLoss:
    """Loss of the design's damping resistor at ``op`` (and with the ripple
    of ``pwm`` when given). See the module docstring."""
    d = design.filter.damping
    phases = pwm.phases if pwm is not None else 3
    f1 = design.grid.f_hz
    row = resistor_row(design)
    fr = design_resonance_hz(design)
    zeta = resonant_damping_ratio(design)
    common = dict(
        label=label or (d.kind if d.kind != "none" else "no resistor"),
        kind=d.kind,
        Rd_ohm=d.Rd_ohm,
        Cd_F=d.Cd_F,
        Ld_H=d.Ld_H,
        C_F=design.filter.C_F,
        Hi_V_per_A=design.control.Hi_V_per_A,
        resonance_hz=fr,
        damping_ratio=zeta,
        phases=phases,
    )
    if row is None:
        return DampingLoss(fundamental_rms_A=0.0, ripple_rms_A=0.0 if pwm else None, fundamental_W=0.0,
                           ripple_W=0.0 if pwm else None, per_phase_W=0.0, total_W=0.0, **common)
    vi = converter_voltage_phasor(design, op)
    g_vi = plant_response(design, [f1], rows=(row,), input_="vi")[0, 0]
    g_vg = plant_response(design, [f1], rows=(row,), input_="vg")[0, 0]
    IR1 = g_vi * vi + g_vg * op.grid_peak_V
    P1 = d.Rd_ohm * abs(IR1) ** 2 / 2.0
    ripple_rms = ripple_W = None
    Pr = 0.0
    if pwm is not None:
        M = float(modulation_index(pwm, abs(vi)))
        f, _, _, amp = converter_sidebands(pwm, M, f1, max_group, max_sideband)
        gr = plant_response(design, f, rows=(row,), input_="vi")[0]
        IR = np.abs(gr) * amp
        Pr = float(d.Rd_ohm * np.sum(IR**2) / 2.0)
        ripple_W = Pr
        ripple_rms = float(math.sqrt(np.sum(IR**2) / 2.0))
    return DampingLoss(
        fundamental_rms_A=float(abs(IR1) / math.sqrt(2.0)),
        ripple_rms_A=ripple_rms,
        fundamental_W=float(P1),
        ripple_W=ripple_W,
        per_phase_W=float(P1 + Pr),
        total_W=float(phases * (P1 + Pr)),
        **common,
    )


def rule_series_resistor_ohm(design: Design) -> float:
    """Rd = 1/(3 w_r C) [ohm] with the LCL resonance w_r of the undamped
    filter (total shunt capacitance C).

    References
    ----------
    .. [1] M. Liserre, A. Dell'Aquila and F. Blaabjerg, "Genetic
       algorithm-based design of the active damping for an LCL-filter
       three-phase active rectifier", IEEE Trans. Power Electron., vol. 19,
       no. 1, 2004.
    """
    fr = design_resonance_hz(design)
    return 1.0 / (3.0 * 2.0 * math.pi * fr * design.filter.shunt_capacitance_F)


#: Tolerance of the split-RC resistor search on ln(Rd) [-]: the optimum
#: Rd is found to a relative accuracy of about this.
SPLIT_RC_XTOL = 1e-7


def split_rc_damping_ratios(design: Design, Rd_ohm, share: float = 0.5) -> np.ndarray:
    """Damping ratio [-] of the resonant pole pair of the split-RC variant
    of ``design`` (shunt capacitance split into (1-share)*C plain and
    share*C in series with Rd) for each resistance in ``Rd_ohm`` [ohm]
    (1-D array; vectorised eigenvalues)."""
    from loopcheck.engine.plant import lcl_state_space

    f = design.filter
    C = f.shunt_capacitance_F
    Rs = np.atleast_1d(np.asarray(Rd_ohm, dtype=float))
    p = lcl_state_space(f.L1_H, (1 - share) * C, f.L2_H + design.grid.Lg_H, f.R1_ohm, f.R2_ohm + design.grid.Rg_ohm,
                        "split-RC", Rs, share * C, 0.0)
    ev = np.linalg.eigvals(p.A)
    zeta = np.ones(Rs.size)
    for i in range(Rs.size):
        e = ev[i]
        cx = e[np.abs(e.imag) > 1e-9 * np.abs(e).max()]
        if cx.size:
            q = cx[np.argmax(np.abs(cx.imag))]
            zeta[i] = -q.real / abs(q)
    return zeta


def best_split_rc(design: Design, share: float = 0.5, points: int = 241) -> Design:
    """Split-RC variant: the shunt capacitance split into (1-share)*C plain
    and share*C in series with Rd, Rd [ohm] chosen for the largest damping
    ratio of the resonant pole pair of the continuous filter.

    The search: a log grid of ``points`` values from 0.01 to 100 times
    sqrt(L1/C) brackets the maximum, then a bounded scalar optimisation
    (Brent's method, scipy.optimize.minimize_scalar, bounded) on ln(Rd)
    between the grid neighbours of the best grid point refines it to
    ``SPLIT_RC_XTOL`` on ln(Rd) (relative Rd accuracy about 1e-7). Returns
    the variant design."""
    from scipy.optimize import minimize_scalar

    f = design.filter
    C = f.shunt_capacitance_F
    Z0 = math.sqrt(f.L1_H / C)
    Rs = Z0 * np.logspace(-2, 2, points)
    zeta = split_rc_damping_ratios(design, Rs, share)
    i = int(np.argmax(zeta))
    Rd = float(Rs[i])
    if 0 < i < points - 1:
        res = minimize_scalar(lambda x: -float(split_rc_damping_ratios(design, [math.exp(x)], share)[0]),
                              bounds=(math.log(Rs[i - 1]), math.log(Rs[i + 1])), method="bounded",
                              options={"xatol": SPLIT_RC_XTOL})
        if -res.fun >= zeta[i]:
            Rd = float(math.exp(res.x))
    damping = PassiveDamping(kind="split-RC", Rd_ohm=Rd, Cd_F=share * C)
    return replace(design, filter=replace(f, C_F=(1 - share) * C, damping=damping))


@limited
def compare_damping(design: Design, op: OperatingPoint, pwm: PwmSpec | None = None,
                    max_group: int = 4, max_sideband: int = 12) -> DampingComparison:
    """The design's damping beside the alternatives (see module docstring):
    for an actively damped design (no passive resistor) the series-R and
    split-RC variants of the same filter; for a passively damped design its
    resistor loss and the undamped filter with the virtual resistor. The
    ripple loss sums the sidebands of carrier groups m = 1..``max_group``
    and |n| <= ``max_sideband`` (pass the values of the limit check so that
    both use one set)."""
    sb = dict(max_group=max_group, max_sideband=max_sideband)
    rows = []
    notes = []
    kind = design.filter.damping.kind
    Hi = design.control.Hi_V_per_A
    if kind == "none":
        rows.append(resistor_loss(design, op, pwm, label=f"active: virtual resistor Hi = {Hi:.4g} V/A", **sb))
        Rd = rule_series_resistor_ohm(design)
        ser = replace(design, filter=replace(design.filter, damping=PassiveDamping(kind="series-R", Rd_ohm=Rd)),
                      control=replace(design.control, Hi_V_per_A=0.0))
        rows.append(resistor_loss(ser, op, pwm, label=f"passive series-R, Rd = 1/(3 wr C) = {Rd:.4g} ohm", **sb))
        spl = best_split_rc(replace(design, control=replace(design.control, Hi_V_per_A=0.0)))
        rows.append(resistor_loss(spl, op, pwm,
                                  label=f"passive split-RC, C/2 + C/2 with Rd = {spl.filter.damping.Rd_ohm:.4g} ohm", **sb))
    else:
        rows.append(resistor_loss(design, op, pwm, label=f"design: passive {kind}, Rd = {design.filter.damping.Rd_ohm:.4g} ohm",
                                  **sb))
        und = replace(design, filter=replace(design.filter, damping=PassiveDamping()))
        rows.append(resistor_loss(und, op, pwm, label="active alternative: no resistor (choose and check Hi)", **sb))
    if pwm is None:
        notes.append("no [pwm] table: ripple losses not computed (fundamental only)")
    else:
        notes.append(f"ripple loss summed over carrier groups m = 1..{max_group} and sidebands |n| <= {max_sideband} "
                     "(the same sidebands as the limit check)")
    phases = pwm.phases if pwm is not None else 3
    notes.append(f"totals are for {phases} phase{'s' if phases > 1 else ''} (per-phase loss x {phases})")
    notes.append("inductor and capacitor losses are not included; the resonance damping ratio is of the filter alone")
    return DampingComparison(tuple(rows), op, tuple(notes), max_group, max_sideband)
