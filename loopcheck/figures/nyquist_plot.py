"""Nyquist figure of the sampled loop gain of one design.

The curve is the loop gain ``L`` (controller times plant, damping loop
closed; see :mod:`loopcheck.engine.loop`) along ``z = rho * e^{jw}``, ``w`` from 0
to pi, with ``rho = 1 + CONTOUR_OFFSET`` (the contour of the count in
:mod:`loopcheck.engine.analysis`: it passes just outside open-loop poles on the unit
circle). The mirror branch (``w`` from -pi to 0, the complex conjugate) is
dashed.

Main view: zoomed around the critical point -1 with the unit circle, the
gain crossovers (where the curve crosses the unit circle), the -180 deg
crossings (on the negative real axis) and optionally the sensitivity circle
of radius 1/Ms around -1 (the curve touches it at the sensitivity peak).
Optional second view: the whole curve compressed into the unit disc by
``L / (1 + |L|)`` (radius |L|/(1+|L|): the unit circle |L| = 1 maps to radius
1/2, infinity to radius 1), where the arcs at infinity around poles on the
unit circle are visible.

The numbers stated on the figure come from :class:`loopcheck.engine.results.Analysis`:
P (open-loop poles outside the unit circle), N (counter-clockwise
encirclements of -1) and Z (closed-loop poles outside, from the
eigenvalues), with the argument principle N = P - Z (H. Nyquist,
"Regeneration theory", Bell Syst. Tech. J., vol. 11, pp. 126-147, 1932;
K. J. Astrom and R. M. Murray, "Feedback Systems", 2nd ed., Princeton Univ.
Press, 2021, sec. 10.2). This module only draws.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from loopcheck.engine.analysis import CONTOUR_OFFSET
from loopcheck.figures.bode_plot import OKABE_ITO, circle_pole_frequencies_hz

__all__ = ["NyquistCurve", "sample_contour", "nyquist_figure", "winding_of_curve"]

#: Zoom window around -1: real part [-] and imaginary half-height [-].
ZOOM_RE = (-3.0, 1.5)
ZOOM_IM = 2.25
#: Points with |L| above this are not drawn in the zoom view (a line
#: between two huge values of opposite sign would cross the window).
_CUT = 60.0


@dataclass(frozen=True)
class NyquistCurve:
    """The loop gain on the upper half of the contour.

    w_rad: angles 0..pi [rad/sample], increasing; value: L there
    (dimensionless, complex); rho: contour radius [-]."""

    w_rad: np.ndarray
    value: np.ndarray
    rho: float


def _compress(L: np.ndarray) -> np.ndarray:
    return L / (1.0 + np.abs(L))


def sample_contour(
    loop, design, analysis=None, max_rounds: int = 14, max_points: int = 80_000, step: float = 0.01
) -> NyquistCurve:
    """Sample L on ``rho * e^{jw}``, 0 <= w <= pi, refined until the
    compressed curve ``L/(1+|L|)`` moves by less than ``step`` between
    neighbours (or the point budget is spent). With ``analysis`` the grid
    holds its crossover and -180 deg crossing frequencies exactly."""
    fs = design.sampling.fs_hz
    Ts = 1.0 / fs
    rho = 1.0 + CONTOUR_OFFSET
    parts = [np.array([0.0, math.pi]), np.geomspace(1e-7, math.pi, 1500), np.linspace(0.0, math.pi, 1500)]
    offs = np.geomspace(1e-10, 3e-2, 80)
    for f0 in circle_pole_frequencies_hz(loop, fs):
        w0 = 2.0 * math.pi * f0 * Ts
        if 0.0 < w0 < math.pi:
            parts += [w0 * (1.0 + offs), w0 * (1.0 - offs)]
    if analysis is not None:
        marks = [co.frequency_hz for co in analysis.crossovers] + [pc.frequency_hz for pc in analysis.phase_crossings]
        parts.append(2.0 * math.pi * np.asarray(marks, dtype=float) * Ts)
    w = np.unique(np.concatenate(parts))
    w = w[(w >= 0.0) & (w <= math.pi)]

    def ev(x):
        with np.errstate(all="ignore"):
            return loop.loop_response(rho * np.exp(1j * x))

    L = ev(w)
    for _ in range(max_rounds):
        c = _compress(L)
        jump = np.abs(np.diff(c))
        bad = np.nonzero(~(jump <= step))[0]
        if bad.size == 0 or w.size + bad.size > max_points:
            break
        wn = 0.5 * (w[bad] + w[bad + 1])
        w = np.concatenate([w, wn])
        L = np.concatenate([L, ev(wn)])
        order = np.argsort(w)
        w, L = w[order], L[order]
    return NyquistCurve(w, L, rho)


def winding_of_curve(curve: NyquistCurve) -> float:
    """Counter-clockwise winding number of the sampled closed curve
    (upper branch and its mirror) around -1 (float; integer when the
    sampling is fine enough). Used to check the figure against the count."""
    f = 1.0 + curve.value
    d = np.angle(f[1:] / f[:-1])
    return float(2.0 * np.sum(d) / (2.0 * math.pi))


def _arrows(ax, x, y, color, n=3, reverse=False, window=None):
    """Arrow heads along a polyline, in the direction of increasing index
    (or decreasing with ``reverse``), at points spread over its visible length."""
    ok = np.isfinite(x) & np.isfinite(y)
    if window is not None:
        (x0, x1), (y0, y1) = window
        ok &= (x > x0) & (x < x1) & (y > y0) & (y < y1)
    idx = np.nonzero(ok[:-1] & ok[1:])[0]
    if idx.size < 2:
        return
    seg = np.hypot(np.diff(x)[idx], np.diff(y)[idx])
    s = np.cumsum(seg)
    if s[-1] <= 0:
        return
    for frac in (np.arange(n) + 0.5) / n:
        j = idx[int(np.searchsorted(s, frac * s[-1]))] if s[-1] > 0 else idx[0]
        a, b = (j + 1, j) if reverse else (j, j + 1)
        if x[a] == x[b] and y[a] == y[b]:
            continue
        ax.annotate(
            "", xy=(x[b], y[b]), xytext=(x[a], y[a]),
            arrowprops=dict(arrowstyle="-|>", color=color, lw=0, mutation_scale=16, shrinkA=0, shrinkB=0),
        )


def count_text(analysis) -> str:
    """The P / N / Z statement of the figure (plain text)."""
    P = analysis.open_loop_unstable_poles
    N = analysis.nyquist_encirclements
    Z = analysis.closed_loop_unstable_poles
    lines = [
        f"P = {P}  open-loop poles outside the unit circle",
        f"N = {N}  counter-clockwise encirclements of -1",
        f"Z = {Z}  closed-loop poles outside (eigenvalues)",
    ]
    if analysis.nyquist_consistent:
        lines.append(f"N = P - Z holds: {N} = {P} - {Z}")
    else:
        lines.append("count does NOT match the eigenvalues;")
        lines.append("the verdict comes from the eigenvalues")
    if analysis.open_loop_circle_poles:
        lines.append(f"{analysis.open_loop_circle_poles} open-loop poles on the circle: contour passes outside")
    lines.append(f"verdict: {analysis.verdict.upper()} (spectral radius {analysis.spectral_radius:.5f})")
    return "\n".join(lines)


def nyquist_figure(
    design,
    analysis,
    loop=None,
    curve: NyquistCurve | None = None,
    full_view: bool = True,
    sensitivity_circle: bool = True,
    title: str | None = None,
):
    """Nyquist figure of the loop gain, zoomed around -1.

    Parameters
    ----------
    design : loopcheck.engine.model.Design
    analysis : loopcheck.engine.results.Analysis
        Source of P, N, Z, the crossovers, -180 deg crossings and the
        sensitivity peak Ms (dimensionless) stated or drawn.
    loop : loopcheck.engine.loop.Loop, optional
        Built from ``design`` when omitted.
    curve : NyquistCurve, optional
        Pre-sampled contour (``sample_contour``).
    full_view : bool
        Add the compressed view of the whole curve.
    sensitivity_circle : bool
        Draw the circle of radius 1/Ms around -1 (stable loops only: for an
        unstable loop the peak of |1/(1+L)| is no distance to instability).

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.figure import Figure
    from matplotlib.patches import Circle

    c = OKABE_ITO
    if curve is None:
        if loop is None:
            from loopcheck.engine.loop import build_loop

            loop = build_loop(design)
        curve = sample_contour(loop, design, analysis)
    L = curve.value
    fs = design.sampling.fs_hz

    if full_view:
        fig = Figure(figsize=(12.4, 6.6), layout="constrained")
        ax, axf = fig.subplots(1, 2, width_ratios=[1.25, 1.0])
    else:
        fig = Figure(figsize=(7.6, 7.2), layout="constrained")
        ax = fig.subplots(1, 1)
        axf = None

    # --- zoomed view -----------------------------------------------------
    Lz = np.where(np.abs(L) <= _CUT, L, np.nan + 0j)
    ax.plot(Lz.real, Lz.imag, color=c["blue"], lw=1.7, label="L(e^{jw}), 0 <= f <= fs/2")
    ax.plot(Lz.real, -Lz.imag, color=c["sky"], lw=1.3, ls=(0, (5, 3)), label="mirror branch, -fs/2 <= f <= 0")
    win = (ZOOM_RE, (-ZOOM_IM, ZOOM_IM))
    _arrows(ax, Lz.real, Lz.imag, c["blue"], window=win)
    _arrows(ax, Lz.real, -Lz.imag, c["sky"], reverse=True, window=win)
    t = np.linspace(0.0, 2.0 * math.pi, 361)
    ax.plot(np.cos(t), np.sin(t), color="#777777", lw=0.9, ls=(0, (2, 2)), label="unit circle |L| = 1")
    ax.axhline(0.0, color="#999999", lw=0.6)
    ax.axvline(0.0, color="#999999", lw=0.6)
    if sensitivity_circle and analysis.stable and analysis.sensitivity_peak.value > 0:
        ms = analysis.sensitivity_peak.value
        ax.add_patch(Circle((-1.0, 0.0), 1.0 / ms, fill=False, ec=c["orange"], lw=1.5, ls=(0, (1, 1.5))))
        ax.plot([], [], color=c["orange"], lw=1.5, ls=(0, (1, 1.5)),
                label=f"radius 1/Ms = {1 / ms:.3g} (Ms = {ms:.3g} at {analysis.sensitivity_peak.frequency_hz:.4g} Hz)")
    for i, co in enumerate(analysis.crossovers):
        v = loop_value_at(curve, co.frequency_hz, fs)
        ax.plot(v.real, v.imag, "o", ms=7, mfc="white", mec=c["vermillion"], mew=2.0, zorder=5,
                label=f"gain crossover {i + 1}: {co.frequency_hz:.4g} Hz, phase margin "
                f"{abs(co.phase_margin_deg):.1f} deg ({co.reaches_minus1_with})")
        ax.annotate(str(i + 1), xy=(v.real, v.imag), xytext=(7, 5 if v.imag >= 0 else -5), textcoords="offset points",
                    fontsize=8, fontweight="bold", color="#9c3f00", va="bottom" if v.imag >= 0 else "top",
                    clip_on=True)
    first = True
    for pc in analysis.phase_crossings:
        x = -1.0 / pc.factor if pc.factor != 0 else -np.inf
        if ZOOM_RE[0] <= x <= ZOOM_RE[1]:
            ax.plot(x, 0.0, "D", ms=7, mfc=c["purple"], mec=c["black"], mew=0.8, zorder=6,
                    label="-180 deg crossing (gain factor k = -1/L)" if first else None)
            ax.annotate(f"k={pc.factor:.3g}", xy=(x, 0.0), xytext=(0, -10), textcoords="offset points",
                        fontsize=7.5, rotation=90, ha="center", va="top", color="#7a3563",
                        bbox=dict(boxstyle="round,pad=0.15", fc="white", ec="none", alpha=0.8))
            first = False
    ax.plot(-1.0, 0.0, "P", ms=12, mfc=c["vermillion"], mec=c["black"], mew=1.0, zorder=7, label="critical point -1")
    ax.set_xlim(*ZOOM_RE)
    ax.set_ylim(-ZOOM_IM, ZOOM_IM)
    ax.set_aspect("equal")
    ax.set_xlabel("Re L [-]")
    ax.set_ylabel("Im L [-]")
    ax.set_title("zoomed around the critical point -1", fontsize=10)
    ax.grid(True, color="#e2e2e2", lw=0.6)
    ax.text(0.015, 0.985, count_text(analysis), transform=ax.transAxes, va="top", ha="left", fontsize=8,
            family="monospace", bbox=dict(boxstyle="round,pad=0.4", fc="white", ec="#555555", alpha=0.93), zorder=8)
    fig.legend(*ax.get_legend_handles_labels(), loc="outside lower center", ncols=2, fontsize=8, frameon=False)

    # --- compressed full view ---------------------------------------------
    if axf is not None:
        Cz = _compress(L)
        axf.plot(Cz.real, Cz.imag, color=c["blue"], lw=1.3)
        axf.plot(Cz.real, -Cz.imag, color=c["sky"], lw=1.1, ls=(0, (5, 3)))
        _arrows(axf, Cz.real, Cz.imag, c["blue"], n=4)
        _arrows(axf, Cz.real, -Cz.imag, c["sky"], n=4, reverse=True)
        axf.plot(np.cos(t), np.sin(t), color="#444444", lw=1.0, label="|L| = infinity")
        axf.plot(0.5 * np.cos(t), 0.5 * np.sin(t), color="#777777", lw=0.9, ls=(0, (2, 2)), label="|L| = 1")
        axf.plot(-0.5, 0.0, "P", ms=11, mfc=c["vermillion"], mec=c["black"], mew=1.0, zorder=7, label="-1")
        axf.axhline(0.0, color="#999999", lw=0.6)
        axf.axvline(0.0, color="#999999", lw=0.6)
        axf.set_xlim(-1.08, 1.08)
        axf.set_ylim(-1.08, 1.08)
        axf.set_aspect("equal")
        axf.set_xlabel("Re of L/(1+|L|) [-]")
        axf.set_ylabel("Im of L/(1+|L|) [-]")
        axf.set_title("whole curve, radius compressed |L| -> |L|/(1+|L|)", fontsize=10)
        axf.grid(True, color="#e2e2e2", lw=0.6)
        axf.legend(loc="lower left", fontsize=7.5, framealpha=0.93)

    if title is None:
        title = f"Nyquist plot of the loop gain: {design.name or 'design'}  ({analysis.verdict.upper()})"
    fig.suptitle(title, fontsize=11)
    return fig


def loop_value_at(curve: NyquistCurve, frequency_hz: float, fs_hz: float) -> complex:
    """L at the sample of ``curve`` nearest to ``frequency_hz`` [Hz]."""
    w = 2.0 * math.pi * frequency_hz / fs_hz
    i = int(np.argmin(np.abs(curve.w_rad - w)))
    return complex(curve.value[i])
