"""Bode figure of the sampled loop gain of one design.

The loop is broken at the current controller with the damping loop closed
(see :mod:`loopcheck.engine.loop`); the curve is the factored frequency response
``Loop.loop_response`` evaluated on ``z = rho * e^{j 2 pi f Ts}`` with
``rho = 1 + CONTOUR_OFFSET`` (the same contour the Nyquist count of
:mod:`loopcheck.engine.analysis` uses, so poles on the unit circle from ideal
resonators, integrators or a lossless filter give a finite peak and a phase
that falls by 180 deg in the direction the count assumes). The frequency
axis is in Hz, logarithmic, and ends at the Nyquist frequency fs/2.

Every marked number comes from :class:`loopcheck.engine.results.Analysis`:
gain crossovers with their phase margins (lag or lead), every -180 deg
crossing with the controller-gain factor k = -1/L that puts a closed-loop
pole on the unit circle there (the Nyquist frequency included), the LCL
resonance and the critical frequency fs/(4*delay + 2). This module only
draws; it computes no margins.

matplotlib is imported inside the functions (object-oriented
``matplotlib.figure.Figure`` with the Agg canvas; pyplot is never used).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from loopcheck.engine.analysis import CONTOUR_OFFSET
from loopcheck.engine.damping_text import is_filtered

__all__ = ["LoopCurve", "OKABE_ITO", "sample_loop", "bode_figure", "critical_label", "figure_png_bytes"]

#: Okabe-Ito colour-blind-safe palette (M. Okabe and K. Ito, "Color Universal
#: Design", 2002/2008; common practice in scientific figures).
OKABE_ITO = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky": "#56B4E9",
    "green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "purple": "#CC79A7",
}

#: Displayed magnitude range is clipped to this band [dB] (ideal resonators
#: and integrators are unbounded on the unit circle).
_DB_CLIP = (-140.0, 120.0)


@dataclass(frozen=True)
class LoopCurve:
    """Loop gain sampled along the contour.

    frequency_hz: increasing frequencies in (0, fs/2] [Hz];
    value: complex loop gain L at ``rho * e^{j 2 pi f Ts}`` (dimensionless);
    rho: contour radius (1 + a tiny offset) [dimensionless]."""

    frequency_hz: np.ndarray
    value: np.ndarray
    rho: float

    @property
    def magnitude_db(self) -> np.ndarray:
        """20*log10|L| [dB] (inf where L is infinite)."""
        with np.errstate(divide="ignore", invalid="ignore"):
            return 20.0 * np.log10(np.abs(self.value))

    @property
    def phase_unwrapped_deg(self) -> np.ndarray:
        """Phase of L unwrapped along increasing frequency [deg]."""
        ph = np.angle(self.value)
        ph = np.where(np.isfinite(ph), ph, 0.0)
        return np.degrees(np.unwrap(ph))


def circle_pole_frequencies_hz(loop, fs_hz: float) -> list[float]:
    """Frequencies [Hz] of open-loop poles on or near the unit circle
    (|p| > 0.5, Im p > 0): resonators, the LCL resonance."""
    A, _, _ = loop.open_loop()
    p = np.linalg.eigvals(A)
    near = p[(np.abs(p) > 0.5) & (p.imag > 1e-12)]
    return sorted(float(np.angle(x)) * fs_hz / (2.0 * math.pi) for x in near)


def sample_loop(loop, design, analysis=None, n_points: int = 2500, f_min_hz: float | None = None) -> LoopCurve:
    """Sample the loop gain for plotting.

    A log-spaced grid from ``f_min_hz`` (default: a decade below a tenth of
    the fundamental, rounded down to a power of ten) to fs/2, refined
    around open-loop poles near the unit circle and holding every
    frequency the analysis reports (crossovers, -180 deg crossings,
    sensitivity peak) so markers sit exactly on the curve."""
    fs = design.sampling.fs_hz
    f_ny = 0.5 * fs
    if f_min_hz is None:
        f_min_hz = 10.0 ** math.floor(math.log10(design.grid.f_hz / 20.0))
    parts = [np.geomspace(f_min_hz, f_ny, n_points)]
    offs = np.geomspace(1e-9, 3e-2, 50)
    specials = circle_pole_frequencies_hz(loop, fs)
    if analysis is not None:
        specials.append(analysis.resonance_hz)
        parts.append(np.array([c.frequency_hz for c in analysis.crossovers], dtype=float))
        parts.append(np.array([c.frequency_hz for c in analysis.phase_crossings], dtype=float))
        parts.append(np.array([analysis.sensitivity_peak.frequency_hz], dtype=float))
    for f0 in specials:
        if 0.0 < f0 < f_ny:
            parts.append(f0 * (1.0 + offs))
            parts.append(f0 * (1.0 - offs))
    f = np.unique(np.concatenate(parts))
    f = f[(f >= f_min_hz * (1 - 1e-12)) & (f <= f_ny)]
    rho = 1.0 + CONTOUR_OFFSET
    z = rho * np.exp(2j * math.pi * f / fs)
    with np.errstate(all="ignore"):
        L = loop.loop_response(z)
    return LoopCurve(f, L, rho)


def critical_label(delay: float) -> str:
    """Text of the critical frequency for a computation delay [samples]."""
    if abs(delay - 1.0) < 1e-12:
        return "fs/6"
    if abs(delay - 0.5) < 1e-12:
        return "fs/4"
    if abs(delay) < 1e-12:
        return "fs/2"
    return f"fs/(4*{delay:g}+2)"


def _hz(x: float) -> str:
    return f"{x / 1000:.3g} kHz" if x >= 1000 else f"{x:.3g} Hz"


def _factor_text(k: float) -> str:
    if k < 0:
        return f"k={k:.3g}"
    return f"k={k:.3g} ({20 * math.log10(k):+.1f} dB)" if k > 0 else "k=0"


def _nearest_odd180(phase_deg: float) -> float:
    """The odd multiple of 180 deg closest to ``phase_deg``."""
    return 180.0 * (2.0 * round((phase_deg - 180.0) / 360.0) + 1.0)


def bode_figure(design, analysis, loop=None, curve: LoopCurve | None = None, title: str | None = None):
    """Bode figure (magnitude [dB], unwrapped phase [deg]) of the loop gain.

    Parameters
    ----------
    design : loopcheck.engine.model.Design
    analysis : loopcheck.engine.results.Analysis
        Source of every marked number (crossovers, phase margins, -180 deg
        crossings with their gain factors, resonance, critical frequency).
    loop : loopcheck.engine.loop.Loop, optional
        Built from ``design`` when omitted.
    curve : LoopCurve, optional
        Pre-sampled response (``sample_loop``) to share with the Nyquist figure.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.figure import Figure
    from matplotlib.ticker import MultipleLocator, NullLocator

    if curve is None:
        if loop is None:
            from loopcheck.engine.loop import build_loop

            loop = build_loop(design)
        curve = sample_loop(loop, design, analysis)
    c = OKABE_ITO
    fs = design.sampling.fs_hz
    f_ny = 0.5 * fs
    f = curve.frequency_hz
    mag = curve.magnitude_db
    phase = curve.phase_unwrapped_deg
    finite = np.isfinite(mag)
    mag_plot = np.clip(np.where(finite, mag, _DB_CLIP[1]), *_DB_CLIP)

    fig = Figure(figsize=(9.6, 7.6), layout="constrained")
    ax_m, ax_p = fig.subplots(2, 1, sharex=True, height_ratios=[1.0, 1.0])

    ax_m.semilogx(f, mag_plot, color=c["blue"], lw=1.6, label="loop gain L (controller x plant, damping loop closed)")
    ax_p.semilogx(f, phase, color=c["blue"], lw=1.6)

    # magnitude range: the curve, 0 dB and the marked points, padded
    lo = max(float(np.nanmin(mag_plot)), -100.0)
    hi = min(float(np.nanmax(mag_plot)), 80.0)
    lo, hi = min(lo, -20.0), max(hi, 20.0)
    ax_m.set_ylim(lo - 5.0, hi + 12.0)
    ax_m.axhline(0.0, color=c["black"], lw=0.9)

    # phase range and the -180 deg (mod 360) lines
    p_lo, p_hi = float(np.min(phase)), float(np.max(phase))
    p_lo, p_hi = min(p_lo, -200.0), max(p_hi, 10.0)
    pad = 0.06 * (p_hi - p_lo)
    ax_p.set_ylim(p_lo - pad, p_hi + pad)
    span = p_hi - p_lo
    step = 90.0 if span <= 900 else 180.0 * math.ceil(span / 1800.0)
    ax_p.yaxis.set_major_locator(MultipleLocator(step))
    k0 = math.floor((p_lo - pad - 180.0) / 360.0)
    k1 = math.ceil((p_hi + pad - 180.0) / 360.0)
    first_line = True
    for k in range(k0, k1 + 1):
        y = 180.0 + 360.0 * k
        if p_lo - pad <= y <= p_hi + pad:
            ax_p.axhline(
                y, color=c["black"], lw=0.9, ls=(0, (6, 3)),
                label="-180 deg (mod 360 deg)" if first_line else None,
            )
            first_line = False

    # resonance, critical frequency, Nyquist frequency
    fr = analysis.resonance_hz
    fc = analysis.critical_hz
    crit = critical_label(design.sampling.delay) if not is_filtered(design.control) else "numeric, damping filter"
    for ax in (ax_m, ax_p):
        # behind the curve (zorder 1.5 < 2): a lightly damped resonance is a spike
        # a few hertz wide that the marker line must not hide
        if fr < f_ny:
            ax.axvline(fr, color=c["green"], lw=1.4, ls="-.", zorder=1.5)
        if fc < f_ny:
            ax.axvline(fc, color=c["orange"], lw=1.4, ls=":", zorder=1.5)
        ax.axvline(f_ny, color=c["black"], lw=2.0, ls="--", zorder=1.5)
    # named ticks on a top axis (no text over the curve)
    top = ax_m.secondary_xaxis("top")
    ticks, names = [], []
    if fr < f_ny:
        ticks.append(fr)
        names.append("f_res")
    if fc < f_ny:
        ticks.append(fc)
        names.append(crit)
    ticks.append(f_ny)
    names.append("fs/2")
    top.set_xticks(ticks, names, fontsize=8, rotation=40, ha="left")
    top.xaxis.set_minor_locator(NullLocator())
    top.tick_params(axis="x", length=4)
    # proxies for the legend
    ax_m.plot([], [], color=c["green"], lw=1.4, ls="-.", label=f"LCL resonance with Lg ({_hz(fr)})")
    ax_m.plot([], [], color=c["orange"], lw=1.4, ls=":", label=f"critical frequency {crit} ({_hz(fc)})")
    ax_m.plot([], [], color=c["black"], lw=2.0, ls="--", label=f"Nyquist frequency fs/2 ({_hz(f_ny)})")

    def unwrapped_at(fx: float) -> float:
        return float(np.interp(fx, f, phase))

    # gain crossovers with phase margins
    # gain crossovers: numbered markers, an arrow to the nearest -180 deg line,
    # and the phase margin of each in the legend (no text over the curves)
    for i, co in enumerate(analysis.crossovers):
        ph = unwrapped_at(co.frequency_hz)
        ref = _nearest_odd180(ph)
        mk = dict(marker="o", ms=7, mfc="white", mec=c["vermillion"], mew=2.0, ls="none", zorder=5)
        ax_m.plot(co.frequency_hz, 0.0, **mk,
                  label=f"gain crossover {i + 1}: {_hz(co.frequency_hz)}, phase margin "
                  f"{abs(co.phase_margin_deg):.1f} deg ({co.reaches_minus1_with})")
        ax_p.plot(co.frequency_hz, ph, **mk)
        ax_p.annotate(
            "", xy=(co.frequency_hz, ref), xytext=(co.frequency_hz, ph),
            arrowprops=dict(arrowstyle="->", color=c["vermillion"], lw=1.3),
        )
        for ax, y in ((ax_m, 0.0), (ax_p, ph)):
            ax.annotate(str(i + 1), xy=(co.frequency_hz, y), xytext=(0, 7), textcoords="offset points",
                        ha="center", va="bottom", fontsize=8, fontweight="bold", color="#9c3f00")

    # -180 deg crossings with the gain factor k = -1/L
    for i, pc in enumerate(analysis.phase_crossings):
        fx = min(pc.frequency_hz, f_ny)
        ph = _nearest_odd180(unwrapped_at(fx))
        gdb = float(np.clip(pc.gain_db, *_DB_CLIP))
        kw = dict(ms=7, mfc=c["purple"], mec=c["black"], mew=0.8, zorder=6)
        ax_p.plot(fx, ph, "D", label="-180 deg crossing (gain factor k = -1/L)" if i == 0 else None, **kw)
        ax_m.plot(fx, gdb, "D", **kw)
        y0, y1 = ax_m.get_ylim()
        above = gdb < 0.5 * (y0 + y1)  # label towards the middle of the axes
        at_edge = fx >= f_ny * (1.0 - 1e-9)
        # beside the marker, not on its vertical: a -180 deg crossing often sits on the tip of
        # a narrow resonance spike, which a centred label would cover
        ax_m.annotate(
            _factor_text(pc.factor), xy=(fx, gdb), xytext=(-6 if at_edge else 6, 9 if above else -9),
            textcoords="offset points", rotation=90, fontsize=7.5, va="bottom" if above else "top",
            ha="right" if at_edge else "left", color="#7a3563",
            bbox=dict(boxstyle="round,pad=0.15", fc="white", ec="none", alpha=0.8),
        )

    ax_m.set_ylabel("magnitude |L| [dB]")
    ax_p.set_ylabel("phase of L, unwrapped [deg]")
    ax_p.set_xlabel("frequency [Hz] (log scale, up to the Nyquist frequency fs/2)")
    f_lo = float(f[0])
    ax_p.set_xlim(f_lo, f_ny * 1.0)
    for ax in (ax_m, ax_p):
        ax.grid(True, which="major", color="#c8c8c8", lw=0.7)
        ax.grid(True, which="minor", color="#ececec", lw=0.5)
    handles, labels = [], []
    for ax in (ax_m, ax_p):
        h, lab = ax.get_legend_handles_labels()
        handles += h
        labels += lab
    fig.legend(handles, labels, loc="outside lower center", ncols=2, fontsize=8, frameon=False)
    if not analysis.crossovers:
        ax_m.text(0.99, 0.03, "no gain crossover", transform=ax_m.transAxes, ha="right", fontsize=8)
    if title is None:
        name = design.name or "design"
        title = f"Bode plot of the loop gain: {name}  ({analysis.verdict.upper()})"
    fig.suptitle(title, fontsize=11)
    return fig


def figure_png_bytes(fig, dpi: int = 110) -> bytes:
    """The figure as PNG bytes (Agg canvas, no timestamp metadata)."""
    import io

    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, metadata={"Software": None})
    return buf.getvalue()
