"""Figure of a :class:`loopcheck.design.maps.StabilityMap` (matplotlib, Agg).

Panels: the stability region with its exact boundary, the spectral radius,
and one panel per requested metric. Every panel marks the design point;
fr/fs axes carry the critical ratio 1/(4*delay + 2); Lg axes the nominal Lg
and the case's Lg range. Colours are from the Okabe-Ito palette (safe for
the common colour-vision deficiencies; M. Okabe and K. Ito, "Color
Universal Design", 2008, from memory) and the cividis/viridis colour maps;
the unstable region is hatched as well, so the figure also reads in grey.

Only this module imports matplotlib; it uses the object-oriented
:class:`matplotlib.figure.Figure` with the Agg canvas (no pyplot state).
"""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import ListedColormap
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch

# Okabe-Ito colours
SKY_BLUE = "#56B4E9"
ORANGE = "#E69F00"
VERMILLION = "#D55E00"
REDDISH_PURPLE = "#CC79A7"
YELLOW = "#F0E442"
BLUE = "#0072B2"
LIGHT_GREY = "#E4E4E4"
#: Top of the sensitivity-peak colour scale [dB] (12 dB: |S| = 4, a loop
#: very close to -1; common practice treats 6 dB as a usual design limit).
MS_DB_TOP = 12.0

CAUTION = (
    "Screening aid, not a certificate: grid-connected converters carry lethal voltages and an unstable loop "
    "can destroy hardware. Verify on hardware with protection enabled; local codes, the utility's "
    "interconnection rules and licensed engineering practice take precedence."
)

_DISPLAY = {
    "fr/fs": (1.0, "-", "resonance / sampling frequency fr/fs"),
    "fs": (1e-3, "kHz", "sampling frequency fs"),
    "Lg": (1e3, "mH", "grid inductance Lg"),
    "Kp": (1.0, "V/A", "proportional gain Kp"),
    "Hi": (1.0, "V/A", "capacitor-current gain Hi"),
    "C": (1e6, "\u00b5F", "filter capacitance C"),
    "L2": (1e3, "mH", "grid-side inductance L2"),
    "L1": (1e3, "mH", "converter-side inductance L1"),
    "Kr": (1.0, "V/A/s", "resonant gain Kr"),
    "Ki": (1.0, "V/A/s", "integral gain Ki"),
}


def axis_display(name: str, kr_unit: str = "V/A/s") -> tuple[float, str, str]:
    """(factor from SI to the displayed unit, displayed unit, label) of an axis."""
    f, u, label = _DISPLAY[name]
    if name == "Kr":
        u = kr_unit
    return f, u, f"{label} [{u}]"


def _ratio_text(r: float) -> str:
    frac = Fraction(r).limit_denominator(100)
    return f"{frac.numerator}/{frac.denominator}" if abs(float(frac) - r) < 1e-9 else f"{r:.4g}"


def _add_overlays(ax, smap, fx, fy, legend: list) -> None:
    """Critical ratio, Lg marks and the design point on one panel."""
    crit = smap.critical_ratio
    text = f"critical fr/fs = {getattr(smap, 'critical_formula', '1/(4 delay + 2)')} = {_ratio_text(crit)} (delay {smap.delay:g} Ts)"
    if smap.x.name == "fr/fs":
        ax.axvline(crit * fx, color=VERMILLION, ls="--", lw=1.6)
        legend.append(Line2D([], [], color=VERMILLION, ls="--", lw=1.6, label=text))
    if smap.y.name == "fr/fs":
        ax.axhline(crit * fy, color=VERMILLION, ls="--", lw=1.6)
        legend.append(Line2D([], [], color=VERMILLION, ls="--", lw=1.6, label=text))
    for name, f, line in (("x", fx, ax.axvline), ("y", fy, ax.axhline)):
        if getattr(smap, name).name != "Lg":
            continue
        line(smap.Lg_H * f, color="black", ls=":", lw=1.4)
        legend.append(Line2D([], [], color="black", ls=":", lw=1.4, label=f"nominal Lg = {smap.Lg_H * 1e3:.3g} mH"))
        if smap.Lg_range_H is not None:
            lo, hi = smap.Lg_range_H
            for v in (lo, hi):
                line(v * f, color=REDDISH_PURPLE, ls="-.", lw=1.8)
            legend.append(
                Line2D([], [], color=REDDISH_PURPLE, ls="-.", lw=1.8,
                       label=f"case Lg range {lo * 1e3:.3g}..{hi * 1e3:.3g} mH (must stay stable)")
            )
    inside = (
        smap.x.start <= smap.design_x <= smap.x.stop and smap.y.start <= smap.design_y <= smap.y.stop
    )
    verdict = "stable" if smap.design_stable else "NOT stable"
    label = f"design point ({verdict})" + ("" if inside else ", outside this map")
    # a stable design point is an orange star, one that is not stable a white
    # cross: shape and fill differ, so the two read apart without colour
    style = (dict(marker="*", ms=17, mfc=ORANGE, mec="black", mew=1.2) if smap.design_stable
             else dict(marker="X", ms=14, mfc="white", mec="black", mew=1.6))
    if inside:
        ax.plot(
            smap.design_x * fx, smap.design_y * fy, ls="none", **style,
            clip_on=False, zorder=6,  # a design point on the edge of the map (often Hi = 0) stays whole
        )
    legend.append(Line2D([], [], ls="none", **{**style, "ms": style["ms"] - 4}, label=label))


def _boundary_points(smap, fx, fy):
    xs, ys = [], []
    for x, bnd in zip(smap.x_values, smap.boundaries):
        for b in bnd:
            xs.append(x * fx)
            ys.append(b * fy)
    return np.array(xs), np.array(ys)


def _cells(ax, smap, X, Y, Z, **kw):
    """Draw grid values as cells: one image on linear axes (much faster than
    a mesh of a million quadrilaterals), a mesh on log axes."""
    if not (smap.x.log or smap.y.log) and min(Z.shape) >= 2:
        x, y = X[0], Y[:, 0]
        dx, dy = 0.5 * (x[-1] - x[0]) / (x.size - 1), 0.5 * (y[-1] - y[0]) / (y.size - 1)
        im = ax.imshow(
            Z, origin="lower", aspect="auto", interpolation="nearest",
            extent=(x[0] - dx, x[-1] + dx, y[0] - dy, y[-1] + dy), **kw,
        )
        return im
    return ax.pcolormesh(X, Y, Z, shading="nearest", rasterized=True, **kw)


def _region_panel(ax, smap, fx, fy, X, Y) -> None:
    stable = smap.stable.astype(float)
    cmap = ListedColormap([LIGHT_GREY, SKY_BLUE])
    _cells(ax, smap, X, Y, stable, cmap=cmap, vmin=0, vmax=1)
    if 0 < stable.mean() < 1 and min(stable.shape) >= 2:
        ax.contourf(X, Y, stable, levels=[-0.5, 0.5], colors="none", hatches=["//"])
    bx, by = _boundary_points(smap, fx, fy)
    ax.plot(bx, by, ls="none", marker="o", ms=1.3, color="black", rasterized=True)
    legend = [
        Patch(facecolor=SKY_BLUE, edgecolor="black", label="stable: every closed-loop pole inside |z| < 1"),
        Patch(facecolor=LIGHT_GREY, edgecolor="black", hatch="//", label="not stable (unstable or on |z| = 1)"),
        Line2D([], [], ls="none", marker="o", ms=3, color="black", label=_boundary_label(smap)),
    ]
    _add_overlays(ax, smap, fx, fy, legend)
    # say on the picture where the most damped point and the worst point are
    r = smap.spectral_radius
    for mask, text, pick, ec in (
        (smap.stable, "stable", np.argmin, BLUE),
        (~smap.stable, "not stable", np.argmax, "black"),
    ):
        if not mask.any():
            continue
        fill = np.inf if pick is np.argmin else -np.inf
        j, i = np.unravel_index(pick(np.where(mask, r, fill)), r.shape)
        tx = _inside(X[j, i], X[0, 0], X[0, -1], smap.x.log)
        ty = _inside(Y[j, i], Y[0, 0], Y[-1, 0], smap.y.log)
        ax.annotate(
            f"{text}\nmax|z| = {r[j, i]:.4g}", (X[j, i], Y[j, i]), xytext=(tx, ty), ha="center", va="center",
            fontsize=8, bbox=dict(boxstyle="round", fc="white", ec=ec, alpha=0.9),
            arrowprops=dict(arrowstyle="->", color=ec, lw=0.8),
        )
    ax.legend(handles=legend, loc="upper center", bbox_to_anchor=(0.5, -0.16), fontsize=8, ncol=1, frameon=False)
    ax.set_title("Stability region (exact boundary)")


def _inside(v: float, lo: float, hi: float, log: bool) -> float:
    """Move v at least 15 % of the axis span away from both ends."""
    if log:
        a, b, x = math.log(lo), math.log(hi), math.log(v)
        return math.exp(min(max(x, a + 0.15 * (b - a)), b - 0.15 * (b - a)))
    return min(max(v, lo + 0.15 * (hi - lo)), hi - 0.15 * (hi - lo))


def _boundary_label(smap) -> str:
    methods = set(smap.boundary_method)
    if methods == {"exact"}:
        return f"region boundary (exact along {smap.y.name}, D-decomposition)"
    if methods == {"refined"}:
        return f"region boundary (bisection between {smap.y.name} grid values)"
    return "region boundary (exact, or bisection where marked refined)"


def _metric_panel(fig, ax, smap, X, Y, Z, title, label, cmap_name, fx, fy, over=None, vmin=None, vmax=None):
    cmap = ListedColormap(_cmap_colors(cmap_name)).with_extremes(bad=LIGHT_GREY)
    extend = "neither"
    if over is not None:
        cmap = cmap.with_extremes(over=over)
        extend = "max"
    Zm = np.ma.masked_invalid(np.where(np.isposinf(Z), np.nan, Z)) if over is None else np.ma.masked_invalid(
        np.where(np.isposinf(Z), 1e300, Z)
    )
    finite = Z[np.isfinite(Z)]
    if vmin is None:
        vmin = float(finite.min()) if finite.size else 0.0
    if vmax is None:
        vmax = float(finite.max()) if finite.size else 1.0
    if vmax <= vmin:
        vmax = vmin + 1.0
    mesh = _cells(ax, smap, X, Y, Zm, cmap=cmap, vmin=vmin, vmax=vmax)
    cb = fig.colorbar(mesh, ax=ax, extend=extend)
    cb.set_label(label)
    if 0 < smap.stable.mean() < 1 and min(smap.stable.shape) >= 2:
        ax.contour(X, Y, smap.stable.astype(float), levels=[0.5], colors="black", linewidths=1.0)
    legend: list = []
    _add_overlays(ax, smap, fx, fy, legend)
    ax.set_title(title)


def _cmap_colors(name: str):
    from matplotlib import colormaps

    return colormaps[name](np.linspace(0.0, 1.0, 256))


def map_figure(smap, title: str | None = None, kr_unit: str = "V/A/s") -> Figure:
    """Figure of a stability map: region panel, spectral-radius panel and
    one panel per requested metric. Returns a matplotlib Figure (Agg)."""
    fx, ux, lx = axis_display(smap.x.name, kr_unit)
    fy, uy, ly = axis_display(smap.y.name, kr_unit)
    X, Y = np.meshgrid(smap.x_values * fx, smap.y_values * fy)
    panels = ["region", "radius"]
    if smap.phase_margin_deg is not None:
        panels.append("pm")
    if smap.gain_margin_lower is not None:
        panels += ["gm_lo", "gm_hi"]
    if smap.sensitivity_peak is not None:
        panels.append("ms")
    ncol = 2 if len(panels) <= 4 else 3
    nrow = math.ceil(len(panels) / ncol)
    notes_in = 1.0  # room for the notes under the panels [inch]
    height = 6.2 * nrow + notes_in
    fig = Figure(figsize=(6.4 * ncol, height))
    fig.set_layout_engine("constrained", rect=(0.0, notes_in / height, 1.0, 1.0 - notes_in / height))
    fig.loopcheck_fits = True  # everything inside the figure: no tight bounding box needed
    FigureCanvasAgg(fig)
    axes = fig.subplots(nrow, ncol, squeeze=False).ravel()
    for ax in axes[len(panels):]:
        ax.set_visible(False)
    for ax, kind in zip(axes, panels):
        ax.set_xlabel(lx)
        ax.set_ylabel(ly)
        if smap.x.log:
            ax.set_xscale("log")
        if smap.y.log:
            ax.set_yscale("log")
        if kind == "region":
            _region_panel(ax, smap, fx, fy, X, Y)
            _secondary_axes(ax, smap, fx, fy)
        elif kind == "radius":
            r = smap.spectral_radius
            rmin = float(np.min(r))
            top = max(min(float(np.max(r)), 2.0 - rmin), 1.0 + 1e-6)
            _metric_panel(
                fig, ax, smap, X, Y, np.minimum(r, top * (1 + 1e-12)), "Spectral radius (largest closed-loop |z|)",
                "max |z| of the closed-loop poles [-] (black line: boundary)", "cividis", fx, fy,
                vmin=min(rmin, 1.0 - 1e-6), vmax=top,
            )
        elif kind == "pm":
            _metric_panel(
                fig, ax, smap, X, Y, smap.phase_margin_deg, "Phase margin (smallest over the crossovers)",
                "phase margin [deg] (grey: not stable or no crossover)", "viridis", fx, fy, vmin=0.0,
            )
        elif kind in ("gm_lo", "gm_hi"):
            arr = smap.gain_margin_lower if kind == "gm_lo" else smap.gain_margin_upper
            with np.errstate(divide="ignore"):
                db = 20.0 * np.log10(arr)
            if kind == "gm_lo":
                db = np.where(np.isneginf(db), np.nan, -db)
                _metric_panel(
                    fig, ax, smap, X, Y, db, "Gain margin, downward (controller gain reduced)",
                    "-20 log10(lower factor) [dB] (grey: not stable or no lower limit)", "viridis", fx, fy, vmin=0.0,
                )
            else:
                finite = db[np.isfinite(db)]
                vmax = float(finite.max()) if finite.size else 1.0
                _metric_panel(
                    fig, ax, smap, X, Y, db, "Gain margin, upward (controller gain raised)",
                    "20 log10(upper factor) [dB] (yellow: no upper limit; grey: not stable)", "viridis", fx, fy,
                    over=YELLOW, vmin=0.0, vmax=max(vmax, 1.0),
                )
        elif kind == "ms":
            with np.errstate(divide="ignore"):
                ms_db = 20.0 * np.log10(smap.sensitivity_peak)
            finite = ms_db[np.isfinite(ms_db)]
            top = min(float(finite.max()), MS_DB_TOP) if finite.size else MS_DB_TOP
            _metric_panel(
                fig, ax, smap, X, Y, np.where(ms_db > top, np.inf, ms_db), "Sensitivity peak max |1/(1+L)|",
                f"sensitivity peak [dB] (yellow: above {top:.3g} dB; grey: not stable)", "cividis", fx, fy,
                over=YELLOW, vmin=0.0, vmax=max(top, 1.0),
            )
    head = title or smap.name or "stability map"
    fig.suptitle(f"{head}: stability map over {smap.x.name} and {smap.y.name}", fontsize=13)
    notes = [
        "Verdict from closed-loop eigenvalues of the exact sampled model (ZOH, computation delay "
        f"{smap.delay:g} Ts, damping loop, controller); tolerance {smap.tolerance:g} on |z| = 1.",
    ]
    if "fr/fs" in (smap.x.name, smap.y.name):
        notes.append(
            "fr/fs axis: the resonance is moved by scaling the filter capacitor C with fs fixed; "
            "L1, L2, Lg and all gains stay fixed, so Hi*Ts/L1 and Kp*Ts/(L1+L2+Lg) are constant along it."
        )
    notes.append(CAUTION)
    fig.text(0.01, 0.97 * notes_in / height, "\n".join(notes), ha="left", va="top", fontsize=7.5, wrap=True)
    return fig


def _secondary_axes(ax, smap, fx, fy) -> None:
    """Normalised gain beside a Hi axis and the resonance in kHz beside an
    fr/fs axis, when the quantities they need are constant on the map."""
    varying = set(smap.parameters)
    fs = smap.parameters.get("fs")
    if smap.y.name == "Hi" and not ({"fs", "L1"} & varying) and smap.L1_H and smap.fs_hz:
        k = 1.0 / (smap.fs_hz * smap.L1_H) / fy
        sec = ax.secondary_yaxis("right", functions=(lambda v, k=k: v * k, lambda v, k=k: v / k))
        sec.set_ylabel("normalised gain Hi*Ts/L1 [-]")
    if smap.x.name == "fr/fs" and fs is None and smap.fs_hz:
        k = smap.fs_hz * 1e-3 / fx
        sec = ax.secondary_xaxis("top", functions=(lambda v, k=k: v * k, lambda v, k=k: v / k))
        sec.set_xlabel(f"resonance fr [kHz] at fs = {smap.fs_hz * 1e-3:.4g} kHz")

