"""Figure of the impedance view: the inverter's output admittance against
the grid, and the Nyquist curve of N Zg Yo around -1.

Draws a :class:`loopcheck.design.grid_network.ImpedanceStudy`; computes nothing.
Panels:

1. |Yo| [S] of the inverter and |1/(N Zg)| [S] of the grid, log-log; the
   non-passive bands (Re Yo < 0) shaded, the critical frequency
   fs/(4 delay + 2) and fs/2 marked;
2. phase of Yo and of 1/(N Zg) [deg] with the passivity limits +-90 deg
   (beyond them the real part is negative), same bands;
3. N Zg Yo in the complex plane near -1 (positive frequencies solid,
   the mirror image dashed), -1 marked, the verdict in the title.

Colours: Okabe-Ito (colour-blind safe) with different line styles.
matplotlib is imported inside the function (object-oriented Figure, Agg
canvas; pyplot is never used).
"""

from __future__ import annotations

import math

import numpy as np

from loopcheck.figures.bode_plot import OKABE_ITO

__all__ = ["impedance_figure", "CAUTION"]

CAUTION = (
    "Model result only: grid-connected converters carry lethal voltages and an unstable loop can destroy "
    "hardware. Verify on hardware with protection; local codes, the utility's interconnection rules and a "
    "licensed engineer's sign-off take precedence."
)


def impedance_figure(design, result, *, title: str = ""):
    """Figure of ``result`` (:class:`loopcheck.design.grid_network.ImpedanceStudy`)
    for ``design``. Returns a ``matplotlib.figure.Figure``."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.patches import Patch

    c = OKABE_ITO
    cu = result.curves
    p = result.passivity
    f = cu.frequency_hz
    N = result.units
    fig = Figure(figsize=(8.0, 10.5), constrained_layout=True)
    FigureCanvasAgg(fig)
    gs = fig.add_gridspec(3, 1, height_ratios=[1.0, 0.8, 1.2])
    ax_m = fig.add_subplot(gs[0])
    ax_p = fig.add_subplot(gs[1], sharex=ax_m)
    ax_n = fig.add_subplot(gs[2])
    with np.errstate(all="ignore"):
        Yg = 1.0 / cu.Zg_ohm
    grid_label = f"grid 1/({N} Zg)" if N > 1 else "grid 1/Zg"
    if result.measured is not None:
        grid_label += " (measured)"
    elif not np.any(np.abs(cu.Zg_ohm) > 0):
        grid_label += " (Zg = 0: stiff grid, off the scale)"
    for ax in (ax_m, ax_p):
        for b in p.bands:
            ax.axvspan(b.low_hz, b.high_hz, color=c["vermillion"], alpha=0.12, lw=0)
        ax.axvline(p.critical_hz, color=c["purple"], ls="-.", lw=1.0)
        ax.axvline(p.nyquist_hz, color=c["black"], ls=":", lw=1.0)
        ax.grid(True, which="both", alpha=0.3)
    ax_m.loglog(f, np.abs(cu.Yo_S), color=c["blue"], lw=1.6, label="inverter Yo = -i2/vg")
    ax_m.loglog(f, np.abs(Yg), color=c["orange"], lw=1.4, ls="--", label=grid_label)
    ax_m.set_ylabel("|Y| [S]")
    handles, labels = ax_m.get_legend_handles_labels()
    handles += [Patch(color=c["vermillion"], alpha=0.25), ax_m.lines[0].__class__([], [], color=c["purple"], ls="-."),
                ax_m.lines[0].__class__([], [], color=c["black"], ls=":")]
    labels += ["Re Yo < 0 (not passive)", f"critical frequency {p.critical_hz:.0f} Hz", f"fs/2 = {p.nyquist_hz:.0f} Hz"]
    ax_m.legend(handles, labels, fontsize=8, loc="best")
    ax_m.set_title(title or "Output admittance and grid")
    ax_p.semilogx(f, np.degrees(np.angle(cu.Yo_S)), color=c["blue"], lw=1.6, label="Yo")
    ax_p.semilogx(f, np.degrees(np.angle(Yg)), color=c["orange"], lw=1.4, ls="--", label=grid_label)
    for y in (-90.0, 90.0):
        ax_p.axhline(y, color=c["black"], lw=0.8, alpha=0.6)
    ax_p.set_ylim(-200, 200)
    ax_p.set_yticks([-180, -90, 0, 90, 180])
    ax_p.set_ylabel("phase [deg]")
    ax_p.set_xlabel("frequency [Hz]  (above fs/2 the baseband model is indicative only)")
    ax_p.legend(fontsize=8, loc="lower left")

    # Nyquist of N Zg Yo near -1
    L = cu.loop
    ok = np.isfinite(L)
    ax_n.plot(L[ok].real, L[ok].imag, color=c["blue"], lw=1.4, label=f"{N} Zg Yo, f > 0" if N > 1 else "Zg Yo, f > 0")
    ax_n.plot(L[ok].real, -L[ok].imag, color=c["blue"], lw=1.0, ls="--", alpha=0.7, label="f < 0 (mirror)")
    ax_n.plot([-1], [0], marker="x", color=c["vermillion"], ms=10, mew=2, ls="none", label="-1")
    t = np.linspace(0, 2 * math.pi, 200)
    ax_n.plot(-1 + 0.5 * np.cos(t), 0.5 * np.sin(t), color=c["vermillion"], lw=0.6, ls=":", label="|1 + N Zg Yo| = 0.5")
    ax_n.set_xlim(-3.0, 1.5)
    ax_n.set_ylim(-2.0, 2.0)
    ax_n.set_aspect("equal", adjustable="box")
    ax_n.axhline(0, color=c["black"], lw=0.6)
    ax_n.axvline(0, color=c["black"], lw=0.6)
    ax_n.set_xlabel("real part [-]")
    ax_n.set_ylabel("imaginary part [-]")
    r = result.ratio
    ax_n.set_title(f"Impedance ratio: {r.verdict}, {r.encirclements_cw} clockwise encirclement(s) of -1"
                   + ("" if result.exact is None else f"; eigenvalues: {result.exact.verdict}"), fontsize=10)
    ax_n.legend(fontsize=8, loc="upper left")
    ax_n.grid(True, alpha=0.3)
    notes = [
        "Yo: baseband component of the exact sampled-data loop (ZOH, computation delay "
        f"{design.sampling.delay:g} Ts); i2 positive into the grid; Re Yo < 0 shaded.",
        CAUTION,
    ]
    fig.text(0.01, -0.005, "\n".join(notes), ha="left", va="top", fontsize=7.5, wrap=True)
    return fig
