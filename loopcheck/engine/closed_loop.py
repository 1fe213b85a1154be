"""What the closed current loop does: its dominant poles with their
frequency and damping ratio, and its tracking bandwidth.

Dominant poles: every closed-loop eigenvalue z of the sampled loop is
mapped to the equivalent continuous-time pole s = ln(z)/Ts (z = e^{s Ts}),
which gives its natural frequency |s|/(2 pi), its damping ratio
zeta = -Re(s)/|s| and its decay (or growth) rate Re(s). A pole on the
negative real axis maps to an oscillation at the Nyquist frequency. The
poles are listed by decreasing |z| (the slowest first), one per complex
pair.

Bandwidth: the lowest frequency at which the reference-to-current closed
loop T = L/(1 + L) (the loop broken at the current controller with unity
feedback, the same factored loop gain as the margins) falls to
1/sqrt(2) (-3 dB), located on a frequency grid and refined by bisection.

References
----------
G. F. Franklin, J. D. Powell, M. L. Workman, "Digital Control of Dynamic
Systems", 3rd ed., Addison-Wesley, 1998, ch. 4 (the mapping z = e^{sT} and
the damping ratio of discrete poles; from memory).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class ClosedLoopPole:
    """One closed-loop pole (one per complex pair, Im z >= 0).

    z: the discrete pole [-]; magnitude: |z| [-]; frequency_hz: natural
    frequency |s|/(2 pi) of s = ln(z)/Ts [Hz]; damped_frequency_hz:
    |Im s|/(2 pi) [Hz]; damping_ratio: -Re(s)/|s| [-] (negative: growing);
    rate_per_s: Re(s) [1/s] (negative: decays)."""

    z: complex
    magnitude: float
    frequency_hz: float
    damped_frequency_hz: float
    damping_ratio: float
    rate_per_s: float

    def to_dict(self) -> dict:
        return {"z_real": self.z.real, "z_imag": self.z.imag, "magnitude": self.magnitude,
                "frequency_hz": self.frequency_hz, "damped_frequency_hz": self.damped_frequency_hz,
                "damping_ratio": self.damping_ratio, "rate_per_s": self.rate_per_s}


def pole_of(z: complex, Ts_s: float) -> ClosedLoopPole | None:
    """The :class:`ClosedLoopPole` of a discrete pole z (None for z = 0)."""
    z = complex(z)
    if abs(z) == 0.0:
        return None
    s = complex(np.log(z)) / Ts_s
    mag_s = abs(s)
    zeta = -s.real / mag_s if mag_s > 0 else 1.0
    return ClosedLoopPole(z, abs(z), mag_s / (2 * math.pi), abs(s.imag) / (2 * math.pi), zeta, s.real)


def dominant_poles(poles, Ts_s: float, count: int = 4) -> tuple[ClosedLoopPole, ...]:
    """The ``count`` slowest closed-loop poles (largest |z|), one per
    complex pair, as :class:`ClosedLoopPole` (see the module docstring)."""
    p = np.asarray(list(poles), dtype=complex)
    p = p[(p.imag >= -1e-12 * np.maximum(1.0, np.abs(p))) & (np.abs(p) > 0)]
    p = p[np.argsort(-np.abs(p), kind="stable")]
    out = []
    for z in p:
        if any(abs(z - q.z) <= 1e-9 * max(1.0, abs(z)) for q in out):
            continue
        pole = pole_of(z, Ts_s)
        if pole is not None:
            out.append(pole)
        if len(out) >= count:
            break
    return tuple(out)


def tracking_bandwidth_hz(loop, fs_hz: float, n_points: int = 4000) -> float | None:
    """Lowest frequency [Hz] at which |T| = |L/(1+L)| falls to 1/sqrt(2),
    for ``loop`` a :class:`loopcheck.engine.loop.Loop`; None when |T| stays above it
    up to fs/2 or is below it from the lowest frequency on (no meaningful
    bandwidth). Meaningful for a stable loop only."""
    target = 1.0 / math.sqrt(2.0)
    f = np.unique(np.concatenate([np.geomspace(fs_hz * 1e-5, fs_hz / 2, n_points),
                                  np.linspace(fs_hz * 1e-5, fs_hz / 2, n_points)]))

    def mag(freq):
        z = np.exp(2j * np.pi * np.asarray(freq) / fs_hz)
        L = loop.loop_response(z)
        with np.errstate(all="ignore"):
            return np.abs(L / (1.0 + L))

    m = mag(f)
    finite = np.isfinite(m)
    below = np.nonzero(finite & (m < target))[0]
    if below.size == 0 or below[0] == 0:
        return None
    i = below[0]
    a, b = f[i - 1], f[i]
    for _ in range(60):
        c = 0.5 * (a + b)
        if mag(np.array([c]))[0] < target:
            b = c
        else:
            a = c
        if b - a <= 1e-10 * b:
            break
    return float(0.5 * (a + b))


@dataclass(frozen=True)
class Tracking:
    """Steady-state tracking of a sinusoidal reference at ``frequency_hz``
    [Hz]: T = L/(1+L) there; gain |T| [-]; phase_deg: angle of T [deg]
    (negative: the current lags its reference); error: |1 - T| [-], the
    amplitude of the tracking error relative to the reference amplitude."""

    frequency_hz: float
    gain: float
    phase_deg: float
    error: float

    def to_dict(self) -> dict:
        return {"frequency_hz": self.frequency_hz, "gain": self.gain, "phase_deg": self.phase_deg,
                "error": self.error}


def tracking_at(loop, fs_hz: float, f_hz: float) -> Tracking:
    """:class:`Tracking` of the closed loop at ``f_hz`` [Hz] from the
    factored loop gain (``loop``: a :class:`loopcheck.engine.loop.Loop`). An
    ideal resonator tuned there makes |L| infinite: T = 1, no error."""
    z = np.exp(2j * np.pi * np.array([f_hz]) / fs_hz)
    with np.errstate(all="ignore"):
        L = complex(loop.loop_response(z)[0])
    if not np.isfinite(L) or abs(L) > 1e15:
        T = 1.0 + 0j
    else:
        T = L / (1.0 + L)
    return Tracking(float(f_hz), abs(T), math.degrees(math.atan2(T.imag, T.real)), abs(1.0 - T))


@dataclass(frozen=True)
class ClosedLoopSummary:
    """Bandwidth [Hz] (None when undefined or the loop is not stable), the
    dominant poles (:class:`ClosedLoopPole`, slowest first) and the tracking
    at the grid frequency (:class:`Tracking`, None when not stable);
    grid_voltage_admittance_S: the output admittance Yo = -i2/vg at the
    grid frequency [S] (:func:`loopcheck.engine.admittance.design_admittance`): the
    grid current a grid-voltage component at the fundamental drives through
    the closed loop (rejection of the grid voltage; None when not stable)."""

    bandwidth_hz: float | None
    poles: tuple[ClosedLoopPole, ...]
    tracking: Tracking | None = None
    grid_voltage_admittance_S: complex | None = None

    def to_dict(self) -> dict:
        y = self.grid_voltage_admittance_S
        return {"bandwidth_hz": self.bandwidth_hz, "dominant_poles": [p.to_dict() for p in self.poles],
                "tracking_at_grid_frequency": None if self.tracking is None else self.tracking.to_dict(),
                "grid_voltage_admittance_at_grid_frequency_S": None if y is None else [y.real, y.imag]}


def characterise(design, analysis, loop=None, count: int = 4) -> ClosedLoopSummary:
    """Bandwidth and dominant poles of the design's closed loop (``analysis``:
    its :class:`loopcheck.engine.results.Analysis`; ``loop``: the built loop, made
    here when not given)."""
    from loopcheck.engine.loop import build_loop

    fs = design.sampling.fs_hz
    poles = dominant_poles(analysis.closed_loop_poles, design.sampling.Ts_s, count)
    bw = tr = None
    if analysis.stable:
        loop = loop if loop is not None else build_loop(design)
        bw = tracking_bandwidth_hz(loop, fs)
        tr = tracking_at(loop, fs, design.grid.f_hz)
        from loopcheck.engine.admittance import design_admittance

        yg = complex(design_admittance(design, np.array([design.grid.f_hz]))[0])
    return ClosedLoopSummary(bw, poles, tr, yg if analysis.stable else None)
