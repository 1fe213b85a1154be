"""Warnings that more than one output must carry (pure string building).

The commands print these and the report shows them; one function per
finding keeps the wording and the condition the same everywhere.
"""

from __future__ import annotations


def unstable_loop_note(analysis) -> str | None:
    """For an analysis whose loop is not stable: why a ripple or sideband
    estimate (which presumes a stable loop) means nothing yet; else None."""
    if analysis.stable:
        return None
    return (
        f"the current loop of this design is {analysis.verdict.upper()} (spectral radius "
        f"{analysis.spectral_radius:.6f}, closed-loop eigenvalues): the sideband estimate assumes a stable loop "
        "and means nothing until that is fixed"
    )


def modulator_limit_V(pwm) -> float:
    """Peak converter voltage of the modulator's linear range [V]: Vdc for a
    unipolar full bridge, Vdc/2 per phase leg otherwise (sine-triangle
    carrier PWM; common practice), times the modulation's linear-range
    factor (2/sqrt(3) for third-harmonic injection or space-vector
    modulation; Holmes & Lipo, "Pulse Width Modulation for Power
    Converters", IEEE Press/Wiley, 2003, from memory)."""
    base = pwm.Vdc_V if pwm.scheme == "full-bridge-unipolar" else pwm.Vdc_V / 2.0
    return getattr(pwm, "linear_limit", 1.0) * base


def saturation_note(vi_peak_V: float, pwm) -> str | None:
    """When the simulated converter voltage ``vi_peak_V`` [V] exceeds the
    modulator's linear range: the note that the averaged linear model ignores
    that saturation; else None."""
    limit = modulator_limit_V(pwm)
    if not vi_peak_V > limit:
        return None
    return (
        f"the converter voltage reaches {vi_peak_V:.4g} V peak, beyond the linear range of the modulator "
        f"({limit:.4g} V with Vdc = {pwm.Vdc_V:.4g} V); the averaged linear model ignores this saturation"
    )
