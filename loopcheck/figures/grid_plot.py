"""Figure of a weak-grid sweep: resonance and margins against the grid
inductance (or the short-circuit ratio).

Draws a :class:`loopcheck.design.weakgrid.GridResult`; computes nothing. Panels,
sharing the horizontal axis:

1. LCL resonance [Hz] of the nominal filter, the spread over the tolerance
   corners, the critical frequency fs/(4*delay + 2) and the Lg where the
   nominal resonance crosses it (closed form, see
   :func:`loopcheck.design.weakgrid.critical_crossing_lg`);
2. phase margin [deg], nominal and worst corner, with the target;
3. gain margin [dB]: room for the controller gain to fall and to rise,
   nominal and worst corner, with the target;
4. sensitivity peak [dB], nominal and worst corner (with the limit if set).

Stable Lg intervals of the nominal filter are shaded; where the nominal
loop is unstable the background is hatched. The case's own Lg (the design
point) and the worst point are marked. Colours: Okabe-Ito (colour-blind
safe); line styles also differ, so the figure reads in grey scale.

matplotlib is imported inside the function (object-oriented
``matplotlib.figure.Figure``, Agg canvas; pyplot is never used).
"""

from __future__ import annotations

import math
import warnings

import numpy as np

from loopcheck.figures.bode_plot import OKABE_ITO

__all__ = ["grid_figure"]


def _x(Lg_H, scr_of):
    Lg = np.asarray(Lg_H, dtype=float)
    if scr_of is None:
        return Lg * 1e3
    with np.errstate(divide="ignore"):
        return scr_of(Lg)


def grid_figure(result, *, design_Lg_H: float | None = None, scr_of=None, title: str = ""):
    """Figure of :class:`loopcheck.design.weakgrid.GridResult` ``result``.

    design_Lg_H: the case's nominal grid inductance [H], marked as the
    design point; scr_of: when given, a function Lg [H] -> SCR [-] and the
    horizontal axis shows the short-circuit ratio (log scale, stiff grid
    on the left) instead of Lg [mH]. Returns a ``matplotlib.figure.Figure``."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.patches import Patch

    c = OKABE_ITO
    nom = result.nominal
    corners = result.corners
    t = result.targets
    fig = Figure(figsize=(8.0, 10.0), constrained_layout=True)
    FigureCanvasAgg(fig)
    axs = fig.subplots(4, 1, sharex=True)
    x = np.asarray(_x(nom.Lg_H, scr_of), dtype=float)
    lo, hi = result.Lg_range_H
    # on an SCR axis Lg = 0 is an infinitely stiff grid: draw it at a finite
    # left edge (twice the largest finite SCR) and leave it out of the curves
    finite = x[np.isfinite(x)]
    x_edge = 2.0 * float(finite.max()) if finite.size else 1e3
    x = np.where(np.isfinite(x), x, np.nan)

    def X(lg):
        v = float(_x(np.array([lg]), scr_of)[0])
        return v if math.isfinite(v) else x_edge

    # background: stable intervals shaded, the rest hatched
    for ax in axs:
        for a, b in nom.scan.stable_intervals_H:
            ax.axvspan(X(a), X(b), color=c["green"], alpha=0.10, lw=0)
        prev = lo
        for a, b in list(nom.scan.stable_intervals_H) + [(hi, hi)]:
            if a > prev:
                ax.axvspan(X(prev), X(a), facecolor="none", edgecolor=c["vermillion"], hatch="//", alpha=0.35, lw=0)
            prev = b
        ax.grid(True, which="both", alpha=0.3)

    # 1. resonance
    ax = axs[0]
    ax.plot(x, nom.resonance_hz, color=c["blue"], lw=2, label="resonance, nominal filter")
    if corners:
        fr = np.array([f.resonance_hz for f in corners])
        ax.fill_between(x, fr.min(axis=0), fr.max(axis=0), color=c["sky"], alpha=0.35, lw=0,
                        label="resonance, tolerance corners")
    ax.axhline(result.critical_hz, color=c["vermillion"], ls="--", lw=1.5,
               label=f"critical frequency {result.critical_hz:.4g} Hz")
    if result.Lg_critical_H is not None and lo <= result.Lg_critical_H <= hi:
        xs = X(result.Lg_critical_H)
        for a in axs:
            a.axvline(xs, color=c["vermillion"], ls=":", lw=1.5)
        ax.plot([xs], [result.critical_hz], "o", color=c["vermillion"], ms=7,
                label=f"crossing at Lg = {result.Lg_critical_H * 1e3:.4g} mH")
    ax.set_ylabel("resonance [Hz]")

    def worst_corner(arr_name, fn):
        if not corners:
            return None
        vals = np.array([getattr(f.margins, arr_name) for f in corners], dtype=float)
        with np.errstate(all="ignore"), warnings.catch_warnings():
            # a column where every corner is undefined (e.g. all unstable) is NaN: drawn as a gap
            warnings.filterwarnings("ignore", "All-NaN slice", RuntimeWarning)
            return fn(vals)

    # 2. phase margin
    ax = axs[1]
    pm = np.asarray(nom.margins.phase_margin_deg, float)
    ax.plot(x, np.where(np.isfinite(pm), pm, np.nan), color=c["blue"], lw=2, label="nominal")
    w = worst_corner("phase_margin_deg", lambda v: np.nanmin(np.where(np.isinf(v), np.nan, v), axis=0))
    if w is not None:
        ax.plot(x, w, color=c["orange"], lw=1.8, ls="--", label="worst tolerance corner")
    ax.axhline(t.phase_margin_deg, color=c["black"], ls="-.", lw=1, label=f"target {t.phase_margin_deg:g} deg")
    ax.set_ylabel("phase margin [deg]")

    # 3. gain margins
    ax = axs[2]
    with np.errstate(all="ignore"):
        fall = -np.asarray(nom.margins.gm_lower_db, float)
        rise = np.asarray(nom.margins.gm_upper_db, float)
    cap = 40.0
    ax.plot(x, np.clip(fall, None, cap), color=c["blue"], lw=2, label="gain may fall (nominal)")
    ax.plot(x, np.clip(rise, None, cap), color=c["purple"], lw=2, ls=(0, (5, 1.5)), label="gain may rise (nominal)")
    if corners:
        with np.errstate(all="ignore"):
            wf = worst_corner("gm_lower_factor", lambda v: np.nanmin(-20 * np.log10(v), axis=0))
            wr = worst_corner("gm_upper_factor", lambda v: np.nanmin(20 * np.log10(v), axis=0))
        ax.plot(x, np.clip(wf, None, cap), color=c["orange"], lw=1.5, ls="--", label="fall, worst corner")
        ax.plot(x, np.clip(wr, None, cap), color=c["yellow"], lw=1.5, ls=":", label="rise, worst corner")
    ax.axhline(t.gain_margin_db, color=c["black"], ls="-.", lw=1, label=f"target {t.gain_margin_db:g} dB")
    ax.set_ylabel(f"gain margin [dB]\n(clipped at {cap:g} dB)")

    # 4. sensitivity peak
    ax = axs[3]
    with np.errstate(all="ignore"):
        sp = 20 * np.log10(np.asarray(nom.margins.sensitivity_peak, float))
    ax.plot(x, sp, color=c["blue"], lw=2, label="nominal")
    if corners:
        with np.errstate(all="ignore"):
            ws = worst_corner("sensitivity_peak", lambda v: np.nanmax(20 * np.log10(v), axis=0))
        ax.plot(x, ws, color=c["orange"], lw=1.8, ls="--", label="worst tolerance corner")
    if t.sensitivity_peak_max is not None:
        ax.axhline(20 * math.log10(t.sensitivity_peak_max), color=c["black"], ls="-.", lw=1,
                   label=f"limit {20 * math.log10(t.sensitivity_peak_max):.3g} dB")
    ax.set_ylabel("sensitivity peak [dB]")

    # design point and worst point
    for a in axs:
        if design_Lg_H is not None and lo <= design_Lg_H <= hi:
            a.axvline(X(design_Lg_H), color=c["black"], lw=1.2, ls="-")
        a.axvline(X(result.worst.Lg_H), color=c["vermillion"], lw=1.2, ls="--")
    handles, labels = axs[0].get_legend_handles_labels()
    # legend entries only for the backgrounds actually drawn
    intervals = list(nom.scan.stable_intervals_H)
    covered = sum(b - a for a, b in intervals)
    extra = []
    if intervals:
        extra.append(Patch(facecolor=c["green"], alpha=0.25, label="stable (nominal)"))
    if covered < (hi - lo) * (1 - 1e-12) or not intervals:
        extra.append(Patch(facecolor="none", edgecolor=c["vermillion"], hatch="//", label="unstable (nominal)"))
    from matplotlib.lines import Line2D

    if design_Lg_H is not None and lo <= design_Lg_H <= hi:
        extra.append(Line2D([], [], color=c["black"], lw=1.2, label="design point (case Lg)"))
    extra.append(Line2D([], [], color=c["vermillion"], lw=1.2, ls="--",
                        label=f"worst point ({result.worst.variant})"))
    axs[0].legend(handles + extra, labels + [h.get_label() for h in extra], fontsize=7, loc="best")
    for a in axs[1:]:
        a.legend(fontsize=7, loc="best")
    if not nom.scan.stable_intervals_H:
        # nothing to draw in the margin panels: say so instead of empty axes
        for a in axs[1:]:
            a.text(0.5, 0.5, "no margins: the nominal loop is unstable over the whole range", transform=a.transAxes,
                   ha="center", va="center", fontsize=9, bbox=dict(boxstyle="round", fc="white", ec=c["vermillion"]))
            a.set_yticks([])
    if scr_of is None:
        axs[-1].set_xlabel("grid inductance Lg [mH]")
    else:
        from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

        axs[-1].set_xscale("log")
        axs[-1].set_xlabel("short-circuit ratio SCR [-] (stiff grid on the left)")
        # plain numbers (2, 5, 10, 20, ...) rather than powers of ten
        axs[-1].xaxis.set_major_locator(LogLocator(base=10.0, subs=(1.0, 2.0, 5.0)))
        axs[-1].xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
        axs[-1].xaxis.set_minor_formatter(NullFormatter())
        x0, x1 = X(lo), X(hi)
        axs[-1].set_xlim(max(x0, x1), min(x0, x1))
    sub = "margins over the grid-inductance range" + (f", nominal and {len(corners)} tolerance corners" if corners else "")
    fig.suptitle(f"{title}\n{sub}" if title else sub, fontsize=10)
    return fig
