"""Figure of the grid-current switching sidebands against the limits
(:mod:`loopcheck.harmonics.spectrum`, :mod:`loopcheck.harmonics.limits`).

Left: every sideband at the design's grid inductance in % of rated current
(log scale) against frequency, with the limit each one is held to (the
above-table assumption drawn dashed) and the worst sideband marked. Right
(when the design has a grid-inductance range): the worst sideband over that
range, with the design's Lg marked.

Okabe-Ito colours; matplotlib imported inside the function (object-oriented
``Figure``, Agg canvas).
"""

from __future__ import annotations

import numpy as np

from loopcheck.figures.bode_plot import OKABE_ITO
from loopcheck.harmonics.limits import TABLE_MAX_ORDER, limit_percent_all


def harmonics_figure(check, title: str | None = None, name: str = ""):
    """Sideband spectrum and limits of a :class:`loopcheck.harmonics.spectrum.HarmonicCheck`.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.figure import Figure

    c = OKABE_ITO
    has_range = bool(check.lg_sweep)
    fig = Figure(figsize=(10.5 if has_range else 8.0, 5.2), layout="constrained")
    if has_range:
        ax, ax2 = fig.subplots(1, 2, width_ratios=[1.6, 1.0])
    else:
        ax, ax2 = fig.subplots(1, 1), None

    sb = check.sidebands
    f = np.array([s.frequency_hz for s in sb]) / 1e3
    pct = np.array([s.percent for s in sb])
    lim = np.array([s.limit_percent for s in sb])
    floor = float(np.min(lim)) * 1e-3  # sidebands below this are not drawn
    vis = pct >= floor
    ax.vlines(f[vis], floor, pct[vis], color=c["blue"], lw=1.4)
    ax.plot(f[vis], pct[vis], "o", color=c["blue"], ms=4,
            label=f"grid-current sideband at Lg = {check.Lg_H * 1e3:.3g} mH")
    # the limit as a function of frequency across the plotted range
    f1_khz = float(f[0] / sb[0].order) if sb else 0.05
    lo, hi = float(f.min()), float(f.max())
    pad = 0.03 * (hi - lo) + 0.1
    grid = np.linspace(max(lo - pad, f1_khz), hi + pad, 2000)
    lim_grid = np.array([limit_percent_all(x / f1_khz) for x in grid])
    table = grid / f1_khz <= TABLE_MAX_ORDER
    if np.any(table):
        ax.plot(np.where(table, grid, np.nan), lim_grid, color=c["vermillion"], lw=2.0,
                label="limit, IEEE 519-2014 / 1547-2018 tables (h <= 50)")
    if np.any(~table):
        ax.plot(np.where(~table, grid, np.nan), lim_grid, color=c["vermillion"], lw=2.0, ls="--",
                label="h > 50: 0.3 % per sideband (design target, assumption)")
    w = check.worst
    ax.plot(w.frequency_hz / 1e3, w.percent, "D", ms=9, mfc="none", mec=c["black"], mew=1.6,
            label=f"worst: {w.frequency_hz / 1e3:.4g} kHz, {w.percent:.3g} % (margin {w.margin_db:+.1f} dB)")
    ax.set_yscale("log")
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

    ax.yaxis.set_major_locator(LogLocator(base=10.0))
    ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))  # 0.001 %, not 10^-3
    ax.yaxis.set_minor_formatter(NullFormatter())
    ax.set_ylim(floor, max(float(np.max(pct)), float(np.max(lim))) * 4.0)
    ax.set_xlabel("frequency [kHz]")
    ax.set_ylabel("grid current [% of rated current]")
    p = check.pwm
    ax.set_title(
        f"{p.scheme}, {p.update} update, fsw = {p.fsw_hz / 1e3:.4g} kHz, Vdc = {p.Vdc_V:.4g} V, "
        f"M = {check.modulation_index:.3f}", fontsize=9,
    )
    ax.grid(True, which="major", color="#d0d0d0", lw=0.6)
    ax.grid(True, which="minor", color="#eeeeee", lw=0.4)
    ax.legend(fontsize=7.5, loc="upper right")

    if ax2 is not None:
        Lg = np.array([q.Lg_H for q in check.lg_sweep]) * 1e3
        wp = np.array([q.percent for q in check.lg_sweep])
        wl = np.array([q.limit_percent for q in check.lg_sweep])
        ax2.plot(Lg, wp, "-o", color=c["blue"], ms=4, label="worst sideband over the Lg range")
        ax2.plot(Lg, wl, color=c["vermillion"], lw=2.0, ls="--", label="its limit")
        i = int(np.argmin(np.abs(Lg - check.Lg_H * 1e3)))
        ax2.plot(Lg[i], wp[i], "*", ms=13, color=c["orange"], mec=c["black"], label="design point (nominal Lg)")
        wr = check.worst_over_range
        ax2.annotate(f"smallest margin {wr.margin_db:+.1f} dB\nat Lg = {wr.Lg_H * 1e3:.3g} mH",
                     xy=(wr.Lg_H * 1e3, wr.percent), xytext=(0.30, 0.74), textcoords="axes fraction", fontsize=8,
                     va="bottom", bbox=dict(boxstyle="round,pad=0.25", fc="white", ec="#999999", alpha=0.9),
                     arrowprops=dict(arrowstyle="->", color="#555555"))  # text clear of the curve and the star
        ax2.set_yscale("log")
        # ticks at 1, 2, 5 x 10^k in plain numbers (0.02, not 2x10^-2)
        ax2.yaxis.set_major_locator(LogLocator(base=10.0, subs=(1.0, 2.0, 5.0)))
        ax2.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
        ax2.yaxis.set_minor_formatter(NullFormatter())
        ax2.set_xlabel("grid inductance Lg [mH]")
        ax2.set_ylabel("worst sideband [% of rated current]")
        ax2.grid(True, which="major", color="#d0d0d0", lw=0.6)
        ax2.legend(fontsize=7.5, loc="center right")
    if title is None:
        title = f"Switching sidebands of the grid current vs limits{': ' + name if name else ''}"
    fig.suptitle(title, fontsize=11)
    return fig
