"""Parameter dataclasses of a current-loop design.

Everything inside is SI: henry, farad, ohm, hertz, seconds, volt per ampere.
The case-file reader (:mod:`loopcheck.io.casefile`) converts unit strings to these
types; the computation modules take them as they are.

The converter voltage is the controller output (the modulator gain is folded
into the gains), so every controller gain is in volts per ampere of current
error: ``Kp_V_per_A`` [V/A], ``Ki_V_per_As`` [V/(A*s)], ``Kr`` in [V/(A*s)]
for the ideal resonator or [V/A] for the damped one.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

PASSIVE_KINDS = ("none", "series-R", "split-RC", "split-RLC")
FEEDBACK_KINDS = ("grid", "converter")
CONTROLLER_KINDS = ("P", "PI", "PR")
INTEGRATOR_METHODS = ("forward-euler", "backward-euler", "tustin")
RESONATOR_METHODS = ("tustin-prewarp", "tustin", "impulse-invariant", "zoh")


@dataclass(frozen=True)
class PassiveDamping:
    """Passive damping of the filter's shunt (capacitor) branch.

    kind:
        ``"none"``: the capacitor alone.
        ``"series-R"``: resistor ``Rd_ohm`` in series with the filter capacitor.
        ``"split-RC"``: the filter capacitor ``C_F`` in parallel with a second
        branch ``Cd_F`` in series with ``Rd_ohm``.
        ``"split-RLC"``: as split-RC but the resistor is bypassed by an
        inductor ``Ld_H`` (``Rd_ohm`` parallel ``Ld_H``, in series with ``Cd_F``),
        so that little fundamental current flows in the resistor.
    """

    kind: str = "none"
    Rd_ohm: float = 0.0  # damping resistor [ohm]
    Cd_F: float = 0.0  # capacitor of the damping branch [F] (split variants)
    Ld_H: float = 0.0  # inductor across the damping resistor [H] (split-RLC)


@dataclass(frozen=True)
class Filter:
    """LCL filter, per phase.

    L1_H: converter-side inductance [H]; C_F: filter capacitance [F]
    (the undamped capacitor; split variants add ``damping.Cd_F``);
    L2_H: grid-side inductance [H] without the grid; R1_ohm, R2_ohm: series
    resistances of L1 and L2 [ohm].
    """

    L1_H: float
    C_F: float
    L2_H: float
    R1_ohm: float = 0.0
    R2_ohm: float = 0.0
    damping: PassiveDamping = field(default_factory=PassiveDamping)

    @property
    def shunt_capacitance_F(self) -> float:
        """Total capacitance of the shunt branch [F] (C plus any damping capacitor)."""
        return self.C_F + (self.damping.Cd_F if self.damping.kind in ("split-RC", "split-RLC") else 0.0)


@dataclass(frozen=True)
class Grid:
    """Grid at the point of connection: fundamental ``f_hz`` [Hz], grid
    inductance ``Lg_H`` [H] (in series with L2) and its resistance ``Rg_ohm``
    [ohm]. ``Lg_range_H`` is the (min, max) inductance range the design must
    survive [H], or None. ``S_VA`` [VA] rated power and ``V_V`` [V]
    line-to-line rms voltage are used for short-circuit-ratio conversions."""

    f_hz: float = 50.0
    Lg_H: float = 0.0
    Rg_ohm: float = 0.0
    Lg_range_H: tuple[float, float] | None = None
    S_VA: float | None = None
    V_V: float | None = None


#: Largest total loop delay the sampled model accepts [sampling periods].
MAX_DELAY_SAMPLES = 4.0


@dataclass(frozen=True)
class Sampling:
    """Sampling (= control update) frequency ``fs_hz`` [Hz] and the total
    loop delay ``delay`` in sampling periods (0..MAX_DELAY_SAMPLES, whole
    plus fractional samples: computation delay plus sensor delays). The
    modulator's zero-order hold is always part of the model."""

    fs_hz: float
    delay: float = 1.0

    @property
    def Ts_s(self) -> float:
        """Sampling period [s]."""
        return 1.0 / self.fs_hz

    @property
    def critical_hz(self) -> float:
        """Critical frequency fs/(4*delay + 2) [Hz] where measured
        capacitor-current feedback changes from damping to anti-damping
        (fs/6 for one sample, fs/10 for two), for any delay.

        References
        ----------
        .. [1] D. Pan, X. Ruan, C. Bao, W. Li and X. Wang, "Capacitor-current-
           feedback active damping with reduced computation delay for improving
           robustness of LCL-type grid-connected inverter", IEEE Trans. Power
           Electron., vol. 29, no. 7, pp. 3414-3427, 2014 (from memory).
        """
        return self.fs_hz / (4.0 * self.delay + 2.0)


#: Presets of the damping path's discrete filter H(z) ([control] damping_filter).
DAMPING_FILTERS = ("measured", "backward-euler", "tustin", "lead", "high-pass", "coefficients")
#: Signals a damping filter can take: the measured capacitor current, or the
#: sampled capacitor voltage scaled by C/Ts (a derivative estimate of ic).
DAMPING_SIGNALS = ("ic", "vc")


@dataclass(frozen=True)
class DampingFilter:
    """The damping path as a discrete filter: ``y = H(z) s`` and
    ``u = uc - Hi * y`` (Hi stays the scalar gain in front of the filter).

    kind: one of DAMPING_FILTERS; b, a: the coefficients of
    H(z) = (b0 + b1 z^-1 + ...)/(a0 + a1 z^-1 + ...) for "coefficients";
    signal: "ic" (measured capacitor current [A]) or "vc" (sampled
    capacitor voltage times C_F/Ts [A], so b = (1, -1) is the backward-Euler
    estimate C (vc[k] - vc[k-1])/Ts); C_F: the capacitance the firmware uses
    in that estimate [F] (the nominal filter C, kept when the hardware
    varies); lead_samples: prediction horizon of "lead" [sampling periods];
    cutoff_hz: corner of "high-pass" [Hz]. See :mod:`loopcheck.engine.damping_filter`."""

    kind: str = "measured"
    b: tuple[float, ...] = (1.0,)
    a: tuple[float, ...] = (1.0,)
    signal: str = "ic"
    C_F: float = 0.0
    lead_samples: float = 0.5
    cutoff_hz: float = 0.0


@dataclass(frozen=True)
class Control:
    """Current controller and the capacitor-current damping gain.

    feedback: ``"grid"`` (i2 regulated) or ``"converter"`` (i1 regulated).
    kind: ``"P"``, ``"PI"`` (Kp + Ki/s) or ``"PR"`` (Kp + resonators).
    Kp_V_per_A [V/A]; Ki_V_per_As [V/(A*s)];
    Kr: resonant gain, [V/(A*s)] for the ideal resonator Kr*s/(s^2+w0^2), [V/A]
    for the damped one 2*Kr*wc*s/(s^2+2*wc*s+w0^2) (wc_rad_s > 0);
    harmonics: extra resonators at h times the fundamental, same Kr and wc;
    integrator / resonator: discretisation methods;
    Hi_V_per_A: capacitor-current feedback gain [V/A] (virtual resistor),
    subtracted from the controller output;
    damping_filter: the damping path's discrete filter H(z) in front of Hi,
    None for the measured capacitor current (H = 1).
    """

    feedback: str = "grid"
    kind: str = "PR"
    Kp_V_per_A: float = 0.0
    Ki_V_per_As: float = 0.0
    Kr: float = 0.0
    wc_rad_s: float = 0.0
    harmonics: tuple[int, ...] = ()
    integrator: str = "forward-euler"
    resonator: str = "tustin-prewarp"
    Hi_V_per_A: float = 0.0
    damping_filter: DampingFilter | None = None


@dataclass(frozen=True)
class Design:
    """A complete current-loop design: filter, grid, sampling, control."""

    filter: Filter
    grid: Grid
    sampling: Sampling
    control: Control
    name: str = ""

    @property
    def total_grid_side_H(self) -> float:
        """L2 + Lg [H]."""
        return self.filter.L2_H + self.grid.Lg_H


def resonance_hz(L1_H, C_F, L2_H):
    """Resonance frequency of the lossless LCL filter [Hz].

    f_r = sqrt((L1 + L2) / (L1 * L2 * C)) / (2*pi); works on numpy arrays.
    Grid inductance is included by passing ``L2_H + Lg_H``.

    References
    ----------
    .. [1] M. Liserre, F. Blaabjerg and S. Hansen, "Design and Control of an
       LCL-Filter-Based Three-Phase Active Rectifier", IEEE Trans. Ind. Appl.,
       vol. 41, no. 5, pp. 1281-1291, 2005.
    """
    import numpy as np

    return np.sqrt((L1_H + L2_H) / (L1_H * L2_H * C_F)) / (2.0 * math.pi)


def design_resonance_hz(design: Design, with_grid: bool = True) -> float:
    """Resonance of the design's filter [Hz], with or without the grid inductance.

    For the split-capacitor variants the total shunt capacitance is used."""
    L2 = design.filter.L2_H + (design.grid.Lg_H if with_grid else 0.0)
    return float(resonance_hz(design.filter.L1_H, design.filter.shunt_capacitance_F, L2))


def loop_state_count(design: Design) -> int:
    """Rough number of states of the sampled loop of ``design`` (for work
    estimates): filter (3, plus 1 or 2 for split passive damping),
    delay states (one per started sample of delay), controller (1 for an integrator, 2 per
    resonator)."""
    n = 3 + {"split-RC": 1, "split-RLC": 2}.get(design.filter.damping.kind, 0)
    n += max(1, math.ceil(design.sampling.delay - 1e-12))
    c = design.control
    if c.kind == "PI":
        n += 1
    elif c.kind == "PR":
        n += 2 * (1 + len(c.harmonics))
    return n
