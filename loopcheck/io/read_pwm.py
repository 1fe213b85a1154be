"""The ``[pwm]`` and ``[harmonics]`` tables of a case file (read by
``loopcheck harmonics`` and ``loopcheck simulate``).

``[pwm]``
    ``dc_link``              dc-link voltage, e.g. ``"750 V"`` (required)
    ``switching_frequency``  carrier (switching) frequency, e.g. ``"8 kHz"``;
                             default fs for ``update = "single"`` and
                             ``"natural"``, fs/2 for ``"double"``
    ``scheme``               ``"three-phase"`` (two-level, default),
                             ``"half-bridge"`` or ``"full-bridge-unipolar"``
    ``update``               ``"single"`` (one reference update per carrier
                             period, default), ``"double"`` (two) or
                             ``"natural"`` (analogue comparison)
    ``modulation``           reference shape: ``"sine"`` (sine-triangle,
                             default; linear up to M = 1),
                             ``"third-harmonic"`` (one-sixth third-harmonic
                             injection) or ``"space-vector"`` (min-max
                             zero-sequence injection); the last two only
                             with ``scheme = "three-phase"``, linear up to
                             M = 2/sqrt(3)

``[harmonics]`` (all optional)
    ``rated_current``        rated current, rms per phase, e.g. ``"43 A"``;
                             default S/(sqrt(3) V) three-phase, S/V single phase
    ``current``              operating grid current, rms (default: rated)
    ``current_phase_deg``    its phase relative to the grid voltage [deg]
                             (default 0: unity power factor, exporting)
    ``grid_peak``            fundamental grid phase-voltage peak (default
                             sqrt(2/3) V three-phase, sqrt(2) V single phase)
    ``max_carrier_group``    carrier groups m = 1..this (1..10, default 4)
    ``max_sideband``         sidebands |n| <= this (1..40, default 12)
    ``lg_points``            grid inductances evaluated over ``Lg_range``
                             (2..201, default 9)

Bad input raises :class:`loopcheck.io.casefile.CaseError` (one line naming the
file, table and key); doubtful but possible input gives warnings.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from loopcheck.io.casefile import CaseError, check_keys, read_choice, read_quantity

PWM_KEYS = ("dc_link", "switching_frequency", "scheme", "update", "modulation")
HARMONICS_KEYS = ("rated_current", "current", "current_phase_deg", "grid_peak", "max_carrier_group", "max_sideband", "lg_points")


@dataclass(frozen=True)
class HarmonicsOptions:
    """Options of the harmonic check (SI units; None = from the grid rating).

    rated_current_rms_A [A]; current_rms_A [A]; current_phase_deg [deg];
    grid_peak_V [V]; max_group, max_sideband, lg_points [-]."""

    rated_current_rms_A: float | None = None
    current_rms_A: float | None = None
    current_phase_deg: float = 0.0
    grid_peak_V: float | None = None
    max_group: int = 4
    max_sideband: int = 12
    lg_points: int = 9


def _whole(t, key, w, default, lo, hi) -> int:
    if key not in t:
        return default
    v = t[key]
    if isinstance(v, bool) or not isinstance(v, int) or not lo <= v <= hi:
        from loopcheck.engine.units import shown

        raise CaseError(f"{w} {key}: expected a whole number from {lo} to {hi}, got {shown(v)}")
    return v


def read_pwm(case, required: bool = True):
    """The :class:`loopcheck.harmonics.spectrum.PwmSpec` of ``case`` and a list of
    warnings, or (None, []) when there is no ``[pwm]`` table and it is not
    ``required``."""
    from loopcheck.harmonics.spectrum import MODULATIONS, SCHEMES, UPDATES, PwmSpec

    t = case.tables.get("pwm")
    w = case.where("pwm")
    if t is None:
        if required:
            raise CaseError(
                f"{w}: missing table; the harmonic check needs [pwm] with dc_link (e.g. \"750 V\") "
                "and optionally switching_frequency, scheme and update"
            )
        return None, []
    check_keys(t, PWM_KEYS, w)
    Vdc = read_quantity(t, "dc_link", "voltage", w, positive=True, minimum=1.0, maximum=1e6)
    scheme = read_choice(t, "scheme", SCHEMES, w, "three-phase")
    update = read_choice(t, "update", UPDATES, w, "single")
    modulation = read_choice(t, "modulation", MODULATIONS, w, "sine")
    if modulation != "sine" and scheme != "three-phase":
        raise CaseError(
            f"{w} modulation: {modulation!r} needs scheme = \"three-phase\" (the injected zero-sequence signal "
            f"cancels only at an isolated three-phase neutral); use \"sine\" with {scheme!r}"
        )
    fs = case.design.sampling.fs_hz
    default_fsw = fs / 2.0 if update == "double" else fs
    fsw = read_quantity(t, "switching_frequency", "frequency", w, default_fsw, positive=True, minimum=100.0, maximum=10e6)
    warnings = []
    expect = {"single": fsw, "double": 2.0 * fsw}.get(update)
    if expect is not None and abs(expect - fs) > 1e-6 * fs:
        warnings.append(
            f"{w} switching_frequency: with {update} update the sampling frequency is usually "
            f"{expect:g} Hz, but [sampling] fs = {fs:g} Hz; the loop model uses fs, the sidebands use fsw"
        )
    if fsw < 10.0 * case.design.grid.f_hz:
        raise CaseError(f"{w} switching_frequency: {fsw:g} Hz is below ten times the fundamental; not a PWM carrier")
    return PwmSpec(Vdc_V=Vdc, fsw_hz=fsw, scheme=scheme, update=update, modulation=modulation), warnings


def read_harmonics_options(case) -> HarmonicsOptions:
    """The ``[harmonics]`` options of ``case`` (defaults when absent)."""
    t = case.tables.get("harmonics") or {}
    w = case.where("harmonics")
    check_keys(t, HARMONICS_KEYS, w)
    ph = t.get("current_phase_deg", 0.0)
    from loopcheck.engine.units import to_float

    if isinstance(ph, bool) or not isinstance(ph, (int, float)) or not math.isfinite(to_float(ph)):
        from loopcheck.engine.units import shown

        raise CaseError(f"{w} current_phase_deg: expected an angle in degrees as a plain number (e.g. -30), got {shown(ph)}")
    return HarmonicsOptions(
        rated_current_rms_A=read_quantity(t, "rated_current", "current", w, None, positive=True, minimum=1e-3, maximum=1e6),
        current_rms_A=read_quantity(t, "current", "current", w, None, nonnegative=True, maximum=1e6),
        current_phase_deg=float(ph),
        grid_peak_V=read_quantity(t, "grid_peak", "voltage", w, None, positive=True, maximum=1e7),
        max_group=_whole(t, "max_carrier_group", w, 4, 1, 10),
        max_sideband=_whole(t, "max_sideband", w, 12, 1, 40),
        lg_points=_whole(t, "lg_points", w, 9, 2, 201),
    )


def operating_point_of(case, pwm, opts: HarmonicsOptions):
    """Operating point from the options and the grid rating; a missing
    rating becomes a :class:`CaseError` naming the key to add."""
    from loopcheck.harmonics.spectrum import operating_point

    try:
        return operating_point(
            case.design, pwm, opts.rated_current_rms_A, opts.current_rms_A, opts.current_phase_deg, opts.grid_peak_V
        )
    except ValueError as exc:
        key = "rated_current" if "rated current" in str(exc) else "grid_peak"
        raise CaseError(f"{case.where('harmonics')} {key}: {exc}") from None
