"""Result dataclasses of the loop analysis (SI units, unit in every name)."""

from __future__ import annotations

from dataclasses import asdict, dataclass


@dataclass(frozen=True)
class Crossover:
    """A gain crossover |L(e^{jwTs})| = 1.

    phase_deg: loop phase there, wrapped to (-180, 180] [deg].
    phase_margin_deg: 180 + phase_deg wrapped to (-180, 180] [deg]; positive:
    that much extra *lag* brings this crossover to -1, negative: that much
    extra *lead* does (``reaches_minus1_with``)."""

    frequency_hz: float
    phase_deg: float
    phase_margin_deg: float
    reaches_minus1_with: str  # "lag" or "lead"


@dataclass(frozen=True)
class PhaseCrossing:
    """A point where the loop gain L is real and negative (loop phase -180 deg
    modulo 360), including the Nyquist frequency. ``factor`` = -1/L is the
    controller-gain factor that puts a closed-loop pole on the unit circle at
    this frequency; ``gain_db`` = 20*log10|L|."""

    frequency_hz: float
    gain_db: float
    factor: float


@dataclass(frozen=True)
class GainMargin:
    """Interval of controller-gain factors k (controller scaled by k, damping
    gain unchanged) that keeps the closed loop stable, containing k = 1.

    lower_factor: 0 when the loop stays stable down to k -> 0.
    upper_factor: None when no upper limit exists. *_db = 20*log10(factor)
    (lower_db None when lower_factor is 0)."""

    lower_factor: float
    upper_factor: float | None
    lower_db: float | None
    upper_db: float | None


@dataclass(frozen=True)
class SensitivityPeak:
    """max over frequency of |1/(1+L)| (value, dimensionless) and where [Hz]."""

    value: float
    frequency_hz: float


@dataclass(frozen=True)
class Analysis:
    """Verdict and margins of one design.

    verdict: "stable", "marginal" or "unstable" from the closed-loop
    eigenvalues; ``marginal`` means the largest pole magnitude lies within
    ``tolerance`` of 1. spectral_radius: max |closed-loop pole|.
    resonance_hz: LCL resonance with the grid inductance [Hz];
    resonance_no_grid_hz: without it [Hz]; critical_hz: fs/(4*delay+2) [Hz];
    resonance_side: "below" or "above" the critical frequency.
    open_loop_unstable_poles: poles of the loop gain (damping loop closed)
    outside the unit circle; open_loop_circle_poles: on it (integrators,
    ideal resonators, lossless filter).
    nyquist_encirclements: counter-clockwise encirclements of -1 by L(z) on
    the unit circle (indented outside the circle poles);
    nyquist_consistent: encirclements == open-loop unstable poles - closed-loop
    unstable poles (argument principle), checked against the eigenvalues.
    stable_gain_intervals: every interval of controller-gain factor k > 0 that
    is stable ([from, to], to None for unbounded).
    """

    name: str
    stable: bool
    verdict: str
    spectral_radius: float
    tolerance: float
    closed_loop_poles: tuple[complex, ...]
    resonance_hz: float
    resonance_no_grid_hz: float
    critical_hz: float
    resonance_side: str
    open_loop_unstable_poles: int
    open_loop_circle_poles: int
    crossovers: tuple[Crossover, ...]
    phase_margin_deg: float | None
    phase_crossings: tuple[PhaseCrossing, ...]
    gain_margin: GainMargin | None
    stable_gain_intervals: tuple[tuple[float, float | None], ...]
    sensitivity_peak: SensitivityPeak
    nyquist_encirclements: int
    nyquist_consistent: bool
    closed_loop_unstable_poles: int

    def to_dict(self) -> dict:
        """Plain JSON-ready dict (complex poles as [re, im] pairs)."""
        d = asdict(self)
        d["closed_loop_poles"] = [[p.real, p.imag] for p in self.closed_loop_poles]
        d["stable_gain_intervals"] = [list(iv) for iv in self.stable_gain_intervals]
        return d
