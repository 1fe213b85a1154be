"""Figure of the damping-gain pick: worst-case margins against Hi.

Draws a :class:`loopcheck.design.pick.PickResult`; computes nothing. Panels,
sharing the Hi axis [V/A]:

1. worst-case robustness index [-] (1 = exactly on target), with the
   intervals that meet the targets shaded, the recommended Hi and the
   case's own Hi (the design point) marked, and the gains that are unstable
   somewhere in the Lg range or at a tolerance corner hatched;
2. worst-case phase margin [deg] with its target;
3. worst-case gain margin [dB], room to fall and to rise, with the target.

Colours: Okabe-Ito (colour-blind safe), with different line styles.
matplotlib is imported inside the function (object-oriented
``matplotlib.figure.Figure``, Agg canvas; pyplot is never used).
"""

from __future__ import annotations

import numpy as np

from loopcheck.figures.bode_plot import OKABE_ITO

__all__ = ["pick_figure"]


def _runs(mask: np.ndarray):
    """(start, end) index pairs of the True runs of ``mask``."""
    out, k = [], 0
    while k < mask.size:
        if mask[k]:
            j = k
            while j + 1 < mask.size and mask[j + 1]:
                j += 1
            out.append((k, j))
            k = j + 1
        else:
            k += 1
    return out


def unstable_bands(Hi_V_per_A: np.ndarray, all_stable: np.ndarray) -> list[tuple[float, float]]:
    """Hi bands [V/A] to hatch as unstable: every run of unstable samples of
    the scan (which may mix a coarse and a zoomed grid, so it is sorted
    first), widened to halfway to the neighbouring stable samples and to the
    ends of the scan."""
    order = np.argsort(Hi_V_per_A, kind="stable")
    H = np.asarray(Hi_V_per_A, float)[order]
    bad = ~np.asarray(all_stable, bool)[order]
    out = []
    for i, j in _runs(bad):
        a = H[0] if i == 0 else 0.5 * (H[i - 1] + H[i])
        b = H[-1] if j == H.size - 1 else 0.5 * (H[j] + H[j + 1])
        out.append((float(a), float(b)))
    return out


def pick_figure(result, *, design_Hi_V_per_A: float | None = None, title: str = ""):
    """Figure of :class:`loopcheck.design.pick.PickResult` ``result``;
    ``design_Hi_V_per_A`` [V/A] marks the case's own damping gain. Returns a
    ``matplotlib.figure.Figure``."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    c = OKABE_ITO
    s = result.scan
    t = result.targets
    H = np.asarray(s.Hi_V_per_A, float)
    fig = Figure(figsize=(8.0, 8.0), constrained_layout=True)
    FigureCanvasAgg(fig)
    axs = fig.subplots(3, 1, sharex=True)
    bands = unstable_bands(H, np.asarray(s.all_stable, bool))
    # beyond a zoomed scan every coarse sample was unstable somewhere: hatch
    # out to the axis ends (the case's Hi may lie there), within the searched range
    far = (result.Hi_range_V_per_A if getattr(result, "zoomed", False) else (H.min(), H.max()))
    view = [H.min(), H.max()] + ([design_Hi_V_per_A] if design_Hi_V_per_A is not None else [])
    lo_end, hi_end = max(min(view), far[0]), min(max(view), far[1])
    bands = [(lo_end if a <= H.min() and not s.all_stable[np.argmin(H)] else a,
              hi_end if b >= H.max() and not s.all_stable[np.argmax(H)] else b) for a, b in bands]

    for ax in axs:
        for a, b in result.Hi_interval_V_per_A:
            ax.axvspan(a, b, color=c["green"], alpha=0.15, lw=0)
        for a, b in bands:
            ax.axvspan(a, b, facecolor="none", edgecolor=c["vermillion"], hatch="//", alpha=0.35, lw=0)
        ax.grid(True, alpha=0.3)
        if result.Hi_V_per_A is not None:
            ax.axvline(result.Hi_V_per_A, color=c["blue"], lw=1.8)
        if design_Hi_V_per_A is not None:
            ax.axvline(design_Hi_V_per_A, color=c["black"], lw=1.2, ls=":")

    idx = np.asarray(s.index, float)
    shown = np.where(np.isfinite(idx), idx, np.nan)
    top = np.nanmax(shown) if np.isfinite(shown).any() else 1.5
    ax = axs[0]
    ax.plot(H, np.clip(shown, None, max(3.0, 1.2)), color=c["blue"], lw=2, label="worst-case robustness index")
    ax.axhline(1.0, color=c["black"], ls="-.", lw=1, label="on target (index 1)")
    if result.Hi_V_per_A is not None:
        ax.plot([result.Hi_V_per_A], [min(result.grid_index, 3.0)], "o", color=c["blue"], ms=7)
    ax.set_ylim(min(0.0, np.nanmin(shown) if np.isfinite(shown).any() else 0.0) - 0.05,
                min(max(top, 1.0), 3.0) * 1.1 + 0.05)  # the target line stays in view
    ax.set_ylabel("worst-case index [-]\n(margin / target)")
    handles, labels = ax.get_legend_handles_labels()
    extra = []
    if result.Hi_interval_V_per_A:
        extra.append(Patch(facecolor=c["green"], alpha=0.3, label="meets the targets"))
    if not np.all(s.all_stable):
        extra.append(Patch(facecolor="none", edgecolor=c["vermillion"], hatch="//", label="unstable somewhere"))
    if result.Hi_V_per_A is not None:
        extra.append(Line2D([], [], color=c["blue"], lw=1.8, label=f"{'recommended' if result.meets_targets else 'most robust (misses a target)'} Hi = {result.Hi_V_per_A:.4g} V/A"))
    if design_Hi_V_per_A is not None:
        extra.append(Line2D([], [], color=c["black"], lw=1.2, ls=":", label=f"case Hi = {design_Hi_V_per_A:.4g} V/A"))
    ax.legend(handles + extra, labels + [h.get_label() for h in extra], fontsize=7, loc="best")

    ax = axs[1]
    ax.plot(H, s.phase_margin_deg, color=c["blue"], lw=2, label="worst-case phase margin")
    ax.axhline(t.phase_margin_deg, color=c["black"], ls="-.", lw=1, label=f"target {t.phase_margin_deg:g} deg")
    ax.set_ylabel("phase margin [deg]")
    ax.legend(fontsize=7, loc="best")

    ax = axs[2]
    cap = 40.0
    ax.plot(H, np.clip(s.gm_lower_room_db, None, cap), color=c["orange"], lw=2, label="gain may fall")
    ax.plot(H, np.clip(s.gm_upper_room_db, None, cap), color=c["purple"], lw=2, ls="--", label="gain may rise")
    ax.axhline(t.gain_margin_db, color=c["black"], ls="-.", lw=1, label=f"target {t.gain_margin_db:g} dB")
    ax.set_ylabel(f"worst-case gain margin [dB]\n(clipped at {cap:g} dB)")
    ax.set_xlabel("capacitor-current damping gain Hi [V/A]")
    ax.legend(fontsize=7, loc="best")
    kp = f", Kp = {result.Kp_V_per_A:.4g} V/A"
    lg = f"Lg {result.Lg_range_H[0] * 1e3:.4g}..{result.Lg_range_H[1] * 1e3:.4g} mH"
    nc = len(result.variants) - 1
    sub = f"worst case over {lg}" + (f" and {nc} tolerance corners" if nc else "") + kp
    fig.suptitle(f"{title}\n{sub}" if title else sub, fontsize=10)
    return fig
