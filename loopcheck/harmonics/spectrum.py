"""Switching harmonics of the converter voltage, their attenuation by the LCL
filter, and the grid-current sidebands against the IEEE limits.

Converter-voltage sidebands. A carrier-based (sine-triangle) modulator with
dc-link voltage Vdc, carrier (switching) frequency fsw, modulation index M
and fundamental f1 produces components at f = m*fsw + n*f1 (carrier group
m >= 1, sideband n). For one phase leg referred to the dc-link midpoint
(peak amplitudes, q = m + n*f1/fsw):

* natural sampling (analogue comparison):
  |V_mn| = (2 Vdc / (m pi)) |J_n(m M pi/2) sin((m + n) pi/2)|
* regular sampling, one update per carrier period (symmetric, "single
  update", fs = fsw):
  |V_mn| = (2 Vdc / (q pi)) |J_n(q M pi/2) sin((q + n) pi/2)|
* regular sampling, two updates per carrier period (asymmetric, "double
  update", fs = 2 fsw):
  |V_mn| = (2 Vdc / (q pi)) |J_n(q M pi/2) sin((m + n) pi/2)|

with the leg fundamental M*Vdc/2. Schemes:

* ``three-phase`` (two-level, three legs, isolated neutral): the phase
  voltage keeps every leg component except the zero-sequence ones
  (n a multiple of 3), which cancel between the phases;
* ``half-bridge`` (single phase, output against the dc midpoint): the leg
  components as they are;
* ``full-bridge-unipolar`` (single phase, two legs with opposite
  references and one carrier): components with odd n double, even n
  cancel; the first carrier group that survives natural sampling is m = 2.
  The fundamental of the bridge voltage is M*Vdc.

Components of different (m, n) that fall on the same frequency are added in
magnitude (an upper bound).

Reference shapes (``PwmSpec.modulation``). The closed Bessel forms above
hold for a sinusoidal reference (sine-triangle PWM) inside its linear range
M <= 1. Three-phase converters can add a zero-sequence signal to the three
leg references, which the isolated neutral removes from the phase
voltages, and so extend the linear range by 2/sqrt(3) (M <= 1.1547):

* ``third-harmonic``: leg reference M (cos y - cos(3y)/6) (the optimal
  one-sixth third harmonic);
* ``space-vector``: leg reference M (cos y - (max + min)/2) over the three
  phase references, the carrier-based (min-max injection) form of
  centred space-vector modulation with equal null-vector times [1].

For these references, and for any reference beyond the linear range (the
reference clipped at the carrier peaks: over-modulation), the sidebands are
the same double-Fourier integrals evaluated numerically instead of in
closed form: with the pulse half-width a(y) = pi (1 + r(y))/2 of the leg
reference r(y) (clipped to [-1, 1]) and the periodic trapezoid rule over
y in [-pi, pi) (``REFERENCE_POINTS`` points),

* natural:  C_mn = Vdc/(4 pi^2) int e^{-jny} 2 sin(m a(y))/m dy
* single:   C_mn = Vdc/(4 pi^2) int e^{-jny} 2 sin(q a(y))/q dy
* double:   C_mn = Vdc/(4 pi^2) int e^{-jny} [1 - e^{-jqa} + e^{-jn pi f1/fsw}(e^{jqa} - 1)]/(jq) dy

and |V_mn| = 2 |C_mn|. For r = M cos y these reduce to the Bessel forms
(Jacobi-Anger expansion), which the tests confirm to rounding; for the
other references they are checked against the FFT of ideal PWM waveforms.
The zero-sequence parts (n a multiple of 3 and the injected baseband
triplen harmonics) cancel in the phase voltage as before.

Attenuation. The grid current of a sideband is the converter-voltage
component times the admittance i2/vi of the continuous filter at that
frequency (with Lg, R1, R2, Rg and any passive damping; vg = 0 there). The
loop is assumed not to act on the sidebands: the currents are sampled
synchronously with the carrier (at its peaks/valleys, where the ripple
crosses its mean), so neither the current controller nor the virtual
resistor sees the switching ripple; the sidebands lie above fs/2 and far
above the loop bandwidth anyway. For a lossless filter without damping the
admittance is |i2/vi| = 1/|w(L1+L2) - w^3 L1 L2 C| (L2 including Lg).

References
----------
.. [1] D. G. Holmes and T. A. Lipo, "Pulse Width Modulation for Power
   Converters: Principles and Practice", IEEE Press / Wiley, 2003, ch. 3
   (naturally sampled, double Fourier series) and ch. 4 (regular sampled);
   chapter numbers from memory; the third-harmonic and space-vector
   references and their linear range 2/sqrt(3) are treated there too
   (from memory). The three expressions above were checked against the
   exact Fourier series of ideal PWM waveforms (tests/test_harmonics.py).
.. [2] M. Liserre, F. Blaabjerg and S. Hansen, "Design and Control of an
   LCL-Filter-Based Three-Phase Active Rectifier", IEEE Trans. Ind. Appl.,
   vol. 41, no. 5, pp. 1281-1291, 2005 (ripple attenuation of the LCL filter).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np
from scipy.special import jv

from loopcheck.harmonics.limits import ABOVE_TABLE_LIMIT_PERCENT, TABLES, limit_percent, margin_db
from loopcheck.engine.model import Design
from loopcheck.engine.plant import OUTPUT_I2, design_plant
from loopcheck.engine.threads import limited

SCHEMES = ("three-phase", "half-bridge", "full-bridge-unipolar")
UPDATES = ("single", "double", "natural")
#: Reference shapes of the modulator (``[pwm] modulation``); the last two
#: need the three-phase scheme (isolated neutral).
MODULATIONS = ("sine", "third-harmonic", "space-vector")
#: Linear range of the modulation index with zero-sequence injection [-]
#: (Holmes and Lipo 2003, from memory): 2/sqrt(3).
ZERO_SEQUENCE_LINEAR_LIMIT = 2.0 / math.sqrt(3.0)
#: Points per fundamental period of the numerical double-Fourier integral
#: [-]; the space-vector reference has kinks, so the trapezoid rule
#: converges as 1/points^2: about 1e-7 Vdc at 4096 points.
REFERENCE_POINTS = 4096
#: Components below this fraction of Vdc are treated as absent [-] (the
#: expressions give exact zeros that rounding turns into ~1e-17).
ZERO_SIDEBAND = 1e-9


@dataclass(frozen=True)
class PwmSpec:
    """Modulator: dc-link voltage ``Vdc_V`` [V], switching (carrier)
    frequency ``fsw_hz`` [Hz], ``scheme`` (:data:`SCHEMES`), ``update``
    (:data:`UPDATES`: "single" = one reference update per carrier period,
    "double" = two, "natural" = analogue comparison), ``modulation``
    (:data:`MODULATIONS`: the reference shape; "third-harmonic" and
    "space-vector" only with the three-phase scheme)."""

    Vdc_V: float
    fsw_hz: float
    scheme: str = "three-phase"
    update: str = "single"
    modulation: str = "sine"

    @property
    def phases(self) -> int:
        """Number of phases of the converter [-]."""
        return 3 if self.scheme == "three-phase" else 1

    @property
    def linear_limit(self) -> float:
        """Largest modulation index of the linear range [-]: 1 for a
        sinusoidal reference, 2/sqrt(3) with third-harmonic or space-vector
        (min-max) zero-sequence injection (Holmes and Lipo 2003, from memory)."""
        return 1.0 if self.modulation == "sine" else ZERO_SEQUENCE_LINEAR_LIMIT


@dataclass(frozen=True)
class OperatingPoint:
    """Grid-current operating point: ``current_rms_A`` [A] (rms, per
    phase), its phase ``current_phase_deg`` [deg] relative to the grid
    voltage, ``grid_peak_V`` [V] (fundamental phase-voltage peak) and the
    ``rated_current_rms_A`` [A] the percentages refer to."""

    current_rms_A: float
    rated_current_rms_A: float
    grid_peak_V: float
    current_phase_deg: float = 0.0


def leg_sideband_amplitude(m, n, M, Vdc_V, update: str, f1_over_fsw: float):
    """Peak amplitude [V] of component (m, n) of one phase leg referred to
    the dc midpoint (see the module docstring; broadcasts over m, n, M).

    m: carrier group [-]; n: sideband [-]; M: modulation index [-];
    Vdc_V: dc-link voltage [V]; update: "natural", "single" or "double";
    f1_over_fsw: fundamental / switching frequency [-].

    References
    ----------
    .. [1] D. G. Holmes and T. A. Lipo, "Pulse Width Modulation for Power
       Converters: Principles and Practice", IEEE Press / Wiley, 2003,
       ch. 3 and 4 (chapter numbers from memory); checked against the FFT
       of ideal PWM waveforms in tests/test_harmonics.py.
    """
    m = np.asarray(m, dtype=float)
    n = np.asarray(n, dtype=float)
    M = np.asarray(M, dtype=float)
    if update == "natural":
        q = m
        s = np.sin((m + n) * np.pi / 2.0)
    else:
        q = m + n * f1_over_fsw
        s = np.sin(((q + n) if update == "single" else (m + n)) * np.pi / 2.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        amp = np.abs(2.0 * Vdc_V / (q * np.pi) * jv(n, q * M * np.pi / 2.0) * s)
    return np.where(q > 0, amp, 0.0)


def leg_reference(y, M, modulation: str = "sine"):
    """Leg reference r(y) [-] (carrier peak = 1) of a leg whose fundamental
    reference is M cos y, for the reference shapes of :data:`MODULATIONS`
    (see the module docstring), clipped to [-1, 1] (over-modulation).
    Broadcasts over y [rad] and M [-]."""
    y = np.asarray(y, dtype=float)
    M = np.asarray(M, dtype=float)
    if modulation == "sine":
        r = M * np.cos(y)
    elif modulation == "third-harmonic":
        r = M * (np.cos(y) - np.cos(3.0 * y) / 6.0)
    elif modulation == "space-vector":
        ph = np.cos(y[..., None] - np.array([0.0, 2.0 * np.pi / 3.0, -2.0 * np.pi / 3.0]))
        r = M * (ph[..., 0] - 0.5 * (ph.max(axis=-1) + ph.min(axis=-1)))
    else:
        raise ValueError(f"unknown modulation {modulation!r}")
    return np.clip(r, -1.0, 1.0)


def leg_sideband_amplitude_numeric(m, n, M, Vdc_V, update: str, f1_over_fsw: float, modulation: str = "sine",
                                   points: int = REFERENCE_POINTS):
    """Peak amplitude [V] of component (m, n) of one phase leg for any
    reference shape, from the double-Fourier integral evaluated numerically
    (see the module docstring). m, n: 1-D arrays of equal length [-];
    M: modulation index, scalar or array [...] (result [..., len(m)]).

    References
    ----------
    .. [1] D. G. Holmes and T. A. Lipo, "Pulse Width Modulation for Power
       Converters: Principles and Practice", IEEE Press / Wiley, 2003,
       ch. 3 and 4 (double Fourier integral of natural and regular sampled
       PWM; chapter numbers from memory).
    """
    m = np.atleast_1d(np.asarray(m, dtype=float))
    n = np.atleast_1d(np.asarray(n, dtype=float))
    M = np.asarray(M, dtype=float)
    y = -np.pi + 2.0 * np.pi * np.arange(points) / points
    q = m if update == "natural" else m + n * f1_over_fsw
    E = np.exp(-1j * n[:, None] * y[None, :])  # [K, P]
    out = np.empty(M.shape + (m.size,))
    for idx in np.ndindex(M.shape):
        a = 0.5 * np.pi * (1.0 + leg_reference(y, M[idx], modulation))  # [P]
        qa = q[:, None] * a[None, :]
        if update in ("natural", "single"):
            integrand = 2.0 * np.sin(qa) / q[:, None]
        else:
            shift = np.exp(-1j * n * np.pi * f1_over_fsw)[:, None]
            integrand = ((1.0 - np.exp(-1j * qa)) + shift * (np.exp(1j * qa) - 1.0)) / (1j * q[:, None])
        C = Vdc_V / (4.0 * np.pi**2) * (2.0 * np.pi / points) * np.sum(E * integrand, axis=-1)
        out[idx] = 2.0 * np.abs(C)
    return out


def converter_sidebands(pwm: PwmSpec, M, f1_hz: float, max_group: int = 4, max_sideband: int = 12):
    """Converter-voltage components of the per-phase converter voltage.

    Returns (frequency_hz [K], m [K], n [K], amplitude_V [..., K]) for the
    groups m = 1..max_group and sidebands |n| <= max_sideband that are not
    zero for the scheme (M may be an array: amplitudes get its shape in
    front). Coinciding frequencies are merged (magnitudes added). A sine
    reference inside the linear range uses the closed Bessel forms; other
    reference shapes, and any M beyond the linear range (clipped
    reference), the numerical double-Fourier integral."""
    M = np.asarray(M, dtype=float)
    ms, ns = np.meshgrid(np.arange(1, max_group + 1), np.arange(-max_sideband, max_sideband + 1), indexing="ij")
    ms, ns = ms.ravel(), ns.ravel()
    f = ms * pwm.fsw_hz + ns * f1_hz
    keep = f > 0
    if pwm.scheme == "three-phase":
        keep &= ns % 3 != 0
        factor = 1.0
    elif pwm.scheme == "full-bridge-unipolar":
        keep &= ns % 2 != 0
        factor = 2.0
    elif pwm.scheme == "half-bridge":
        factor = 1.0
    else:
        raise ValueError(f"unknown modulation scheme {pwm.scheme!r}")
    ms, ns, f = ms[keep], ns[keep], f[keep]
    eps = f1_hz / pwm.fsw_hz
    if pwm.modulation == "sine" and np.all(M <= 1.0):
        amp = factor * leg_sideband_amplitude(ms, ns, M[..., None], pwm.Vdc_V, pwm.update, eps)
    else:
        amp = factor * leg_sideband_amplitude_numeric(ms, ns, M, pwm.Vdc_V, pwm.update, eps, pwm.modulation)
    # drop the components that vanish identically (e.g. m + n even with natural sampling)
    present = np.max(amp.reshape(-1, amp.shape[-1]), axis=0) > ZERO_SIDEBAND * pwm.Vdc_V
    ms, ns, f, amp = ms[present], ns[present], f[present], amp[..., present]
    # merge coinciding frequencies (and sort by frequency)
    uniq, first, inv = np.unique(np.round(f, 6), return_index=True, return_inverse=True)
    P = np.zeros((f.size, uniq.size))
    P[np.arange(f.size), inv] = 1.0
    return f[first], ms[first], ns[first], amp @ P


def plant_response(design: Design, frequency_hz, Lg_H=None, rows=(OUTPUT_I2,), input_: str = "vi"):
    """Continuous-filter response to the converter voltage (``input_="vi"``)
    or the grid voltage (``"vg"``) at the frequencies [Hz] (1-D), for one or
    more grid inductances ``Lg_H`` [H] (array ok: result [len(Lg), K]).

    rows: output rows of :func:`loopcheck.engine.plant.lcl_state_space` (i1, i2, ic)
    or a row vector on the states. Returns complex [A/V] of shape
    (Lg batch) + (len(rows), K)."""
    f = np.atleast_1d(np.asarray(frequency_hz, dtype=float))
    Lg = design.grid.Lg_H if Lg_H is None else Lg_H
    Lg = np.asarray(Lg, dtype=float)
    p = design_plant(design, Lg_H=Lg)
    A, B, C = p.A, p.B, p.C
    n = A.shape[-1]
    if input_ == "vg":
        B = np.zeros_like(B)
        B[..., 2, 0] = -1.0 / (design.filter.L2_H + Lg)
    s = 2j * np.pi * f
    Mm = s[:, None, None] * np.eye(n) - A[..., None, :, :]
    x = np.linalg.solve(Mm, np.broadcast_to(B[..., None, :, :], Mm.shape[:-1] + (1,)))[..., 0]
    rowsC = np.stack([C[..., r, :] if isinstance(r, (int, np.integer)) else np.broadcast_to(r, C.shape[:-2] + (n,)) for r in rows], axis=-2)
    return np.einsum("...rn,...kn->...rk", rowsC, x)


def converter_voltage_phasor(design: Design, op: OperatingPoint, Lg_H=None):
    """Fundamental converter-voltage phasor [V peak] that drives the grid
    current ``op`` against the grid voltage (exact phasor solution of the
    filter at f1; array over Lg_H)."""
    f1 = design.grid.f_hz
    I2 = math.sqrt(2.0) * op.current_rms_A * np.exp(1j * math.radians(op.current_phase_deg))
    Vg = op.grid_peak_V
    g_vi = plant_response(design, [f1], Lg_H, input_="vi")[..., 0, 0]
    g_vg = plant_response(design, [f1], Lg_H, input_="vg")[..., 0, 0]
    return (I2 - g_vg * Vg) / g_vi


def modulation_index(pwm: PwmSpec, converter_peak_V):
    """Modulation index M [-] from the fundamental converter-voltage peak [V]:
    peak / (Vdc/2) for a leg (three-phase, half bridge), peak / Vdc for the
    unipolar full bridge (sine-triangle, linear range M <= 1)."""
    base = pwm.Vdc_V if pwm.scheme == "full-bridge-unipolar" else pwm.Vdc_V / 2.0
    return np.asarray(converter_peak_V) / base


@dataclass(frozen=True)
class Sideband:
    """One grid-current sideband. m, n: carrier group and sideband;
    frequency_hz [Hz]; order: frequency / f1 [-]; converter_V: converter
    voltage peak [V]; admittance_S: |i2/vi| there [A/V]; grid_current_A:
    peak [A]; percent: grid current in % of the rated current (rms/rms);
    limit_percent: strictest limit of the tables [%]; assumed_limit: True
    when the limit is loopcheck's above-table assumption; margin_db:
    20*log10(limit/actual) [dB]."""

    m: int
    n: int
    frequency_hz: float
    order: float
    converter_V: float
    admittance_S: float
    grid_current_A: float
    percent: float
    limit_percent: float
    assumed_limit: bool
    margin_db: float


@dataclass(frozen=True)
class LgPoint:
    """Worst sideband at one grid inductance Lg_H [H]: its frequency [Hz],
    grid current [% of rated], limit [%], margin [dB], the modulation
    index [-] and the rss distortion of all sidebands [% of rated];
    overmodulated: the modulation index exceeds the modulator's linear
    range there (the sidebands are then those of the clipped reference)."""

    Lg_H: float
    frequency_hz: float
    percent: float
    limit_percent: float
    margin_db: float
    modulation_index: float
    total_percent: float
    overmodulated: bool = False


@dataclass(frozen=True)
class HarmonicCheck:
    """Result of :func:`harmonic_check`.

    pwm; op (operating point); Lg_H [H]; modulation_index [-];
    converter_fundamental_V: peak [V]; sidebands (sorted by frequency);
    worst: the sideband with the smallest margin; total_percent: rss of all
    sidebands in % of rated current (informative: the standards' TDD/TRD
    covers h <= 50 only); complies: every sideband within its limit;
    lg_sweep: worst sideband over the grid-inductance range (empty when the
    design has none); worst_over_range: the LgPoint of smallest margin;
    limit_tables: editions used; assumptions: plain-text list;
    modulation: reference shape of the modulator; linear_limit: largest
    modulation index of its linear range [-]; overmodulated: the nominal
    point needs more than that; overmodulated_Lg_H: the evaluated grid
    inductances [H] (nominal and range) that need more; findings:
    plain-text statements of the over-modulation (empty when none)."""

    pwm: PwmSpec
    op: OperatingPoint
    Lg_H: float
    modulation_index: float
    converter_fundamental_V: float
    sidebands: tuple[Sideband, ...]
    worst: Sideband
    total_percent: float
    complies: bool
    lg_sweep: tuple[LgPoint, ...]
    worst_over_range: LgPoint | None
    limit_tables: tuple[str, ...]
    assumptions: tuple[str, ...]
    modulation: str = "sine"
    linear_limit: float = 1.0
    overmodulated: bool = False
    overmodulated_Lg_H: tuple[float, ...] = ()
    findings: tuple[str, ...] = ()


class OvermodulationError(ValueError):
    """The operating point needs a modulation index beyond the linear range
    (kept for callers; :func:`harmonic_check` reports over-modulation as a
    finding instead of raising)."""


MODULATION_ASSUMPTION = {
    "sine": "carrier-based sine-triangle modulation (no dead time, no zero-sequence injection); sideband "
    "amplitudes from the double-Fourier (Bessel) expressions of Holmes and Lipo (2003)",
    "third-harmonic": "carrier-based modulation with one-sixth third-harmonic injection (no dead time); the closed "
    "Bessel forms are for sine-triangle PWM only, so the sideband amplitudes are the double-Fourier integrals of "
    "Holmes and Lipo (2003) evaluated numerically for this reference",
    "space-vector": "carrier-based centred space-vector modulation (min-max zero-sequence injection, equal null "
    "vectors; no dead time); the closed Bessel forms are for sine-triangle PWM only, so the sideband amplitudes are "
    "the double-Fourier integrals of Holmes and Lipo (2003) evaluated numerically for this reference",
}

ASSUMPTIONS = (
    MODULATION_ASSUMPTION["sine"],
    "the currents are sampled synchronously with the carrier, so the current controller and the "
    "virtual resistor do not act on the switching sidebands; the sidebands are set by the filter, "
    "its losses, its passive damping and the grid inductance",
    "the grid voltage has no content at the sideband frequencies",
    f"above h = 50 the tables give no limit; each sideband is held to {ABOVE_TABLE_LIMIT_PERCENT} % of "
    "rated current (the 35 <= h limit; a conservative design target, common practice)",
    "limits in % of the rated current (IEEE 519 uses the maximum demand current I_L)",
)


def _limits(orders):
    lim = np.empty(orders.shape)
    assumed = np.zeros(orders.shape, dtype=bool)
    for i, h in enumerate(orders):
        vals = [limit_percent(float(h), t) for t in TABLES]
        j = int(np.argmin([v[0] for v in vals]))
        lim[i], assumed[i] = vals[j]
    return lim, assumed


@limited
def harmonic_check(
    design: Design,
    pwm: PwmSpec,
    op: OperatingPoint,
    max_group: int = 4,
    max_sideband: int = 12,
    lg_points: int = 9,
) -> HarmonicCheck:
    """Grid-current sidebands of ``design`` driven by ``pwm`` at ``op`` and
    their margins to the IEEE 519-2014 / IEEE 1547-2018 limits (see
    :mod:`loopcheck.harmonics.limits`), at the design's Lg and over ``Grid.Lg_range_H``
    (``lg_points`` values, linearly spaced, plus the nominal one).

    Over-modulation (a modulation index beyond ``pwm.linear_limit`` at the
    nominal or any evaluated grid inductance) is reported in
    ``overmodulated``, ``overmodulated_Lg_H`` and ``findings``, not raised;
    the sidebands there are those of the clipped reference. See the module
    docstring for the model and its references."""
    f1 = design.grid.f_hz
    Lg0 = design.grid.Lg_H
    rng = design.grid.Lg_range_H
    Lgs = np.array([Lg0])
    if rng is not None:
        Lgs = np.unique(np.concatenate([[Lg0], np.linspace(rng[0], rng[1], max(2, lg_points))]))
    Vi = converter_voltage_phasor(design, op, Lgs)
    Mi = modulation_index(pwm, np.abs(Vi))
    limit = pwm.linear_limit
    over = Mi > limit
    i0 = int(np.nonzero(Lgs == Lg0)[0][0])
    findings = _overmodulation_findings(pwm, Lgs, Vi, Mi, over, i0)
    f, ms, ns, amp = converter_sidebands(pwm, Mi, f1, max_group, max_sideband)
    Y = np.abs(plant_response(design, f, Lgs)[:, 0, :])  # [Lg, K]
    I2 = amp * Y
    rated_peak = math.sqrt(2.0) * op.rated_current_rms_A
    pct = 100.0 * I2 / rated_peak
    orders = f / f1
    lim, assumed = _limits(orders)
    with np.errstate(divide="ignore"):
        marg = 20.0 * np.log10(lim[None, :] / pct)
    total = np.sqrt(np.sum(pct**2, axis=-1))
    sidebands = tuple(
        Sideband(
            m=int(ms[k]),
            n=int(ns[k]),
            frequency_hz=float(f[k]),
            order=float(orders[k]),
            converter_V=float(amp[i0, k]),
            admittance_S=float(Y[i0, k]),
            grid_current_A=float(I2[i0, k]),
            percent=float(pct[i0, k]),
            limit_percent=float(lim[k]),
            assumed_limit=bool(assumed[k]),
            margin_db=float(marg[i0, k]),
        )
        for k in range(f.size)
    )
    worst = min(sidebands, key=lambda s: s.margin_db)
    sweep = ()
    worst_rng = None
    if rng is not None:
        pts = []
        for i, Lg in enumerate(Lgs):
            k = int(np.argmin(marg[i]))
            pts.append(
                LgPoint(float(Lg), float(f[k]), float(pct[i, k]), float(lim[k]), float(marg[i, k]), float(Mi[i]),
                        float(total[i]), bool(over[i]))
            )
        sweep = tuple(pts)
        worst_rng = min(pts, key=lambda p: p.margin_db)
    return HarmonicCheck(
        pwm=pwm,
        op=op,
        Lg_H=Lg0,
        modulation_index=float(Mi[i0]),
        converter_fundamental_V=float(abs(Vi[i0])),
        sidebands=sidebands,
        worst=worst,
        total_percent=float(total[i0]),
        complies=bool(np.all(marg[i0] >= 0.0)),
        lg_sweep=sweep,
        worst_over_range=worst_rng,
        limit_tables=tuple(t.edition for t in TABLES),
        assumptions=(MODULATION_ASSUMPTION[pwm.modulation],) + ASSUMPTIONS[1:],
        modulation=pwm.modulation,
        linear_limit=float(limit),
        overmodulated=bool(over[i0]),
        overmodulated_Lg_H=tuple(float(x) for x in Lgs[over]),
        findings=findings,
    )


def _overmodulation_findings(pwm: PwmSpec, Lgs, Vi, Mi, over, i0) -> tuple[str, ...]:
    """Plain-text findings on over-modulation (empty when none)."""
    if not np.any(over):
        return ()
    limit = pwm.linear_limit
    shape = {"sine": "sine-triangle", "third-harmonic": "third-harmonic injection",
             "space-vector": "space-vector (min-max)"}[pwm.modulation]
    j = int(np.argmax(Mi))
    out = []
    lgs = Lgs[over]
    span = (f"Lg = {lgs.min() * 1e3:.4g} mH" if lgs.size == 1
            else f"Lg = {lgs.min() * 1e3:.4g} .. {lgs.max() * 1e3:.4g} mH, {lgs.size} of {Lgs.size} values evaluated")
    where = "at the nominal grid inductance" if over[i0] else "over part of the grid-inductance range"
    nominal = "" if over[i0] else f"; the nominal point (M = {Mi[i0]:.3f}) is within the linear range"
    out.append(
        f"OVER-MODULATION {where} ({span}){nominal}: the operating point needs a modulation index up to {Mi[j]:.3f} "
        f"(converter voltage {abs(Vi[j]):.4g} V peak at Lg = {Lgs[j] * 1e3:.4g} mH), beyond the linear range "
        f"M <= {limit:.4f} of {shape} modulation with Vdc = {pwm.Vdc_V:.4g} V"
    )
    out.append(
        "there the modulator clips: the converter cannot produce the fundamental voltage the operating point "
        "needs (the grid current falls short and low-order harmonics appear, which this check does not compute); "
        "the sidebands listed there are those of the clipped reference (indicative only)"
    )
    needed = float(Mi[j]) / limit * pwm.Vdc_V
    remedy = f"raise the dc-link voltage to at least {needed:.4g} V or lower the current"
    if pwm.modulation == "sine" and pwm.phases == 3:
        M_ok = float(Mi[j]) <= ZERO_SEQUENCE_LINEAR_LIMIT
        remedy += (
            "; third-harmonic injection or space-vector modulation ([pwm] modulation) extends the linear range to "
            f"M <= {ZERO_SEQUENCE_LINEAR_LIMIT:.4f}" + (", which covers this operating point" if M_ok else ", still short here")
        )
    out.append(remedy)
    return tuple(out)


def lossless_grid_admittance(L1_H, C_F, L2_H, frequency_hz):
    """|i2/vi| = 1/|w(L1+L2) - w^3 L1 L2 C| [A/V] of the lossless LCL filter
    (derived from the circuit equations; L2 includes Lg)."""
    w = 2.0 * np.pi * np.asarray(frequency_hz, dtype=float)
    return 1.0 / np.abs(w * (L1_H + L2_H) - w**3 * L1_H * L2_H * C_F)


def operating_point(design: Design, pwm: PwmSpec, rated_current_rms_A=None, current_rms_A=None,
                    current_phase_deg: float = 0.0, grid_peak_V=None) -> OperatingPoint:
    """Operating point with defaults from the grid rating: rated current
    S/(sqrt(3) V) (three-phase) or S/V (single phase) [A rms]; grid peak
    sqrt(2/3) V (three-phase) or sqrt(2) V (single phase) [V]. Raises
    ValueError naming what is missing."""
    g = design.grid
    three = pwm.phases == 3
    if rated_current_rms_A is None:
        if g.S_VA is None or g.V_V is None:
            raise ValueError("needs the rated current: give rated_current or S and V in [grid]")
        rated_current_rms_A = g.S_VA / (math.sqrt(3.0) * g.V_V) if three else g.S_VA / g.V_V
    if grid_peak_V is None:
        if g.V_V is None:
            raise ValueError("needs the grid voltage: give V in [grid]")
        grid_peak_V = g.V_V * (math.sqrt(2.0 / 3.0) if three else math.sqrt(2.0))
    if current_rms_A is None:
        current_rms_A = rated_current_rms_A
    return OperatingPoint(float(current_rms_A), float(rated_current_rms_A), float(grid_peak_V), float(current_phase_deg))


def with_lg(design: Design, Lg_H: float) -> Design:
    """The design with another grid inductance [H]."""
    return replace(design, grid=replace(design.grid, Lg_H=Lg_H))
