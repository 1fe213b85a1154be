"""Figure of simulated waveforms (:mod:`loopcheck.timedomain.simulate`).

Four stacked panels against time [ms]: grid current i2 with its reference,
converter current i1, filter-capacitor voltage vc, and the controller
output u[k] (held value) with the applied converter voltage. Events are
marked by vertical lines and numbered; the LCL resonance and, when a
:class:`loopcheck.timedomain.simulate.RateCheck` is given, the simulated and predicted
rate and frequency of the resonance oscillation are written in a box. A
second :class:`~loopcheck.timedomain.simulate.Waveforms` (e.g. Hi = 0) is overlaid
dashed in another colour.

Colours: Okabe-Ito palette (colour-blind safe). matplotlib is imported
inside the function (object-oriented ``Figure``, Agg canvas, no pyplot).
"""

from __future__ import annotations

import numpy as np

from loopcheck.figures.bode_plot import OKABE_ITO


def _label(w, name: str) -> str:
    return f"{name}: capacitor-current feedback Hi = {w.Hi_V_per_A:.4g} V/A"


def waveform_figure(w, compare=None, rate=None, compare_rate=None, title: str | None = None,
                    window_s: tuple[float, float] | None = None):
    """Waveform figure.

    Parameters
    ----------
    w : loopcheck.timedomain.simulate.Waveforms
        The design's run (solid lines).
    compare : loopcheck.timedomain.simulate.Waveforms, optional
        Overlaid run (dashed), e.g. the undamped loop.
    rate, compare_rate : loopcheck.timedomain.simulate.RateCheck, optional
        Rate checks of the two runs, written in the annotation box.
    title : str, optional
    window_s : (start, stop) [s], optional
        Time window shown (default: the whole run).

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.figure import Figure

    c = OKABE_ITO
    fig = Figure(figsize=(9.6, 9.0), layout="constrained")
    axs = fig.subplots(4, 1, sharex=True, height_ratios=[1.3, 1.0, 1.0, 1.0])
    runs = [(w, c["blue"], "-", "design")]
    if compare is not None:
        runs.append((compare, c["vermillion"], (0, (5, 2)), "comparison"))

    for run, col, ls, name in runs:
        t = run.time_s * 1e3
        ts = run.sample_time_s * 1e3
        lw = 1.3 if name == "design" else 1.1
        axs[0].plot(t, run.i2_A, color=col, ls=ls, lw=lw, label=_label(run, name))
        axs[1].plot(t, run.i1_A, color=col, ls=ls, lw=lw)
        axs[2].plot(t, run.vc_V, color=col, ls=ls, lw=lw)
        axs[3].step(ts, run.u_V, where="post", color=col, ls=ls, lw=lw)
        if run.tripped_at_s is not None:
            for ax in axs:
                ax.axvline(run.tripped_at_s * 1e3, color=col, lw=1.0, ls=":")
            # a short vertical label beside the line (a horizontal one collides with the
            # event numbers when the trip follows an event closely); the details go in the box
            axs[0].annotate(
                f"trip ({name})", xy=(run.tripped_at_s * 1e3, 0.97), xycoords=("data", "axes fraction"),
                xytext=(-2, 0), textcoords="offset points", ha="right", va="top", rotation=90, fontsize=7,
                color=col, bbox=dict(boxstyle="round,pad=0.15", fc="white", ec="none", alpha=0.85),
            )
    # the reference on the panel of the regulated current (i2 for grid-side, i1 for converter-side feedback)
    ref_ax = axs[1] if getattr(w, "feedback", "grid") == "converter" else axs[0]
    ref_ax.step(w.sample_time_s * 1e3, w.iref_A, where="post", color=c["black"], lw=0.8, ls=(0, (1, 1.5)),
                label="current reference i_ref[k] (regulated current)")
    ax_v = axs[2].twinx()
    ax_v.plot(w.time_s * 1e3, w.vg_V, color=c["green"], lw=0.9, alpha=0.8, label="grid voltage vg (right axis, panel 3)")
    ax_v.set_ylabel("vg [V] (same scale as vc)", color=c["green"])
    ax_v.tick_params(axis="y", colors=c["green"])

    # keep the design's waveforms readable when the comparison run grows to the trip level
    if compare is not None:
        for ax, sig in zip(axs, ("i2_A", "i1_A", "vc_V", "u_V")):
            v = np.abs(getattr(w, sig))
            v = v[np.isfinite(v)]
            if v.size and np.max(np.abs(getattr(compare, sig))) > 4.0 * np.max(v):
                lim = 2.5 * float(np.max(v))
                ax.set_ylim(-lim, lim)
                ax.annotate("comparison clipped", xy=(1.0, 0.0), xycoords="axes fraction", xytext=(-3, 3),
                            textcoords="offset points", ha="right", va="bottom", fontsize=7, color=c["vermillion"])

    # events
    for i, (te, text) in enumerate(w.events, 1):
        for ax in axs:
            ax.axvline(te * 1e3, color="#777777", lw=0.8, ls="--")
        axs[0].annotate(f"({i})", xy=(te * 1e3, 1.0), xycoords=("data", "axes fraction"), xytext=(2, -2),
                        textcoords="offset points", fontsize=8, va="top", color="#444444")

    # zoom on the first excitation of the resonance
    burst = next((te for (te, text) in w.events if text.startswith(("burst", "voltage pulse"))), None)
    if burst is not None and window_s is None:
        t0, t1 = burst - 0.001, burst + 0.006
        ins = axs[0].inset_axes([0.62, 0.50, 0.37, 0.38])
        for run, col, ls, name in runs:
            sel = (run.time_s >= t0) & (run.time_s <= t1)
            if np.any(sel):
                ins.plot(run.time_s[sel] * 1e3, run.i2_A[sel], color=col, ls=ls, lw=1.0)
        ref = np.abs(w.i2_A[(w.time_s >= t0) & (w.time_s <= t1)])
        if ref.size:
            m = float(np.max(ref))
            ins.set_ylim(-1.4 * m, 1.4 * m)
        ins.set_xlim(t0 * 1e3, t1 * 1e3)
        ins.tick_params(labelsize=6.5)
        ins.set_title("zoom: i2 [A] around the excitation (ms)", fontsize=7)
        ins.grid(True, color="#e0e0e0", lw=0.5)

    # annotation box: resonance and rates
    lines = [f"LCL resonance (filter, with Lg): {w.resonance_hz:,.0f} Hz"]
    for rc, name in ((rate, "design"), (compare_rate, "comparison")):
        if rc is None:
            continue
        sim = (
            f"{rc.simulated_rate_per_s:+.4g} 1/s at {rc.simulated_frequency_hz:,.0f} Hz"
            if rc.simulated_rate_per_s is not None else "no oscillation fitted"
        )
        lines.append(
            f"{name}: resonance oscillation {sim} (simulated); "
            f"pole {rc.predicted_rate_per_s:+.4g} 1/s at {rc.predicted_frequency_hz:,.0f} Hz"
        )
    for run, _, _, name in runs:
        if run.tripped_at_s is not None:
            lines.append(f"{name}: a current reached the trip level {run.trip_current_A:.3g} A at "
                         f"{run.tripped_at_s * 1e3:.4g} ms; the run stops there")
    if w.events:
        lines.append("events: " + "; ".join(f"({i}) {txt}" for i, (_, txt) in enumerate(w.events, 1)))
    axs[0].text(
        0.01, 0.03, "\n".join(lines), transform=axs[0].transAxes, fontsize=7, va="bottom", ha="left",
        bbox=dict(boxstyle="round,pad=0.3", fc="white", ec="#999999", alpha=0.9),
    )

    conv = getattr(w, "feedback", "grid") == "converter"
    axs[0].set_ylabel("i2 [A]" + ("" if conv else "\n(regulated)"))
    axs[1].set_ylabel("i1 [A]" + ("\n(regulated)" if conv else ""))
    axs[2].set_ylabel("vc [V]")
    axs[3].set_ylabel("u [V]")
    axs[3].set_xlabel("time [ms]")
    if window_s is not None:
        axs[3].set_xlim(window_s[0] * 1e3, window_s[1] * 1e3)
    for ax in axs:
        ax.grid(True, color="#d8d8d8", lw=0.6)
    # vg on the same scale as vc, so the two voltages compare at a glance
    ax_v.set_ylim(axs[2].get_ylim())
    handles, labels = [], []
    for ax in list(axs) + [ax_v]:
        h, lab = ax.get_legend_handles_labels()
        for hh, ll in zip(h, lab):
            if ll and not ll.startswith("_"):
                handles.append(hh)
                labels.append(ll)
    fig.legend(handles, labels, loc="outside lower center", ncols=2, fontsize=8, frameon=False)
    if title is None:
        model = "averaged modulator" if w.model == "averaged" else w.model
        title = (
            f"Simulated waveforms: {w.name or 'design'}\n(exact sampled-data simulation, {model}, "
            f"Ts = {w.Ts_s * 1e6:.4g} us, delay {w.delay:g} Ts)"
        )
    fig.suptitle(title, fontsize=10.5)
    return fig

