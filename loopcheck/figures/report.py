"""The design report: one self-contained HTML file for one case.

:func:`build_report` runs the analysis of a :class:`loopcheck.io.casefile.Case`
and assembles the sections below, each by its own small builder function
(``SECTION_BUILDERS``), so late modules can be wired in one at a time:

========== ============================================================
id         content
========== ============================================================
job        what the design is for and what the report answers
inputs     every input with its unit, and the case file's warnings
verdict    eigenvalue verdict, spectral radius, margins, crossings, poles
frequency  Bode and Nyquist figures of this loop (P, N, Z stated)
map        stability map with the design point
weakgrid   weak-grid (grid inductance) table and plot
impedance  output admittance, non-passive bands, impedance-ratio verdict
gains      picked gains and exported firmware coefficients
waveforms  simulated waveforms
harmonics  harmonic check against the current-distortion limits
assumptions modelling assumptions
safety     safety cautions
========== ============================================================

A section whose module is not part of this version says so in a visible
line instead of content; nothing is faked. Figures are embedded as base64
PNG (``data:`` URIs); the page loads no external resource, runs no script
and prints to PDF with page breaks between the main sections.

All user text (names, descriptions, paths, warnings) is escaped with
:func:`html.escape`. Nothing here prints: progress goes through the optional
``progress(message)`` callback.
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import importlib.util
import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field

from loopcheck import __version__
from loopcheck.engine.damping_text import critical_formula
from loopcheck.engine.units import format_quantity as q

__all__ = [
    "ReportOptions",
    "Section",
    "Report",
    "ReportContext",
    "SECTION_BUILDERS",
    "SECTION_IDS",
    "build_report",
    "read_report_options",
    "render_html",
    "SAFETY_CAUTIONS",
]

#: The safety cautions of every report (and of the README's safety section).
SAFETY_CAUTIONS = (
    "Grid-connected converters carry lethal voltages, on the dc link and on the ac side, and the "
    "dc-link capacitors stay charged after disconnection. Work on them only when qualified and with "
    "the equipment isolated, locked out and verified dead.",
    "An unstable current loop can destroy hardware within milliseconds: the current grows at the "
    "filter resonance until the protection trips or semiconductors, capacitors or inductors fail.",
    "This analysis is a model. It does not replace hardware protection (overcurrent, overvoltage, "
    "desaturation), staged hardware tests at reduced voltage and current, grid-code compliance "
    "testing, or sign-off by a licensed engineer.",
    "Local electrical codes and the utility's interconnection rules govern every connection to the "
    "grid; where they differ from anything in this report, they apply.",
)


@dataclass(frozen=True)
class ReportOptions:
    """Options of a report.

    title: report title (default from the case name);
    prepared_by: free text for the header (empty: not shown);
    map_points: stability-map resolution (points along x, along y) [-];
    figure_dpi: resolution of the embedded PNG figures [dots per inch]."""

    title: str = ""
    prepared_by: str = ""
    map_points: tuple[int, int] = (120, 90)
    figure_dpi: int = 110


@dataclass(frozen=True)
class Section:
    """One report section: ``id`` (HTML id), ``title``, ``body_html`` (already
    escaped HTML), ``available`` (False: the module is not in this version)."""

    id: str
    title: str
    body_html: str
    available: bool = True


@dataclass(frozen=True)
class ReportContext:
    """What every section builder gets.

    case: the :class:`loopcheck.io.casefile.Case`; design and analysis of it;
    loop: the built :class:`loopcheck.engine.loop.Loop`; options; progress: callback
    taking one message; shared: a dict where builders leave results for
    later sections (e.g. picked gains for the firmware export)."""

    case: object
    design: object
    analysis: object
    loop: object
    options: ReportOptions
    progress: Callable[[str], None]
    shared: dict = field(default_factory=dict)


@dataclass(frozen=True)
class Report:
    """A built report: the HTML text, its sections, problems met (one line
    each, e.g. a section that could not be computed) and the build time [s]."""

    html: str
    sections: tuple[Section, ...]
    problems: tuple[str, ...]
    elapsed_s: float  # [s]; verdict: at the nominal point; headline: with the declared range
    verdict: str
    headline: str = ""


# ---------------------------------------------------------------------------
# small HTML helpers
# ---------------------------------------------------------------------------

e = html.escape


def _num(x: float | None, digits: int = 4) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "n/a"
    return f"{x:.{digits}g}"


def _deg(x: float | None) -> str:
    return "n/a" if x is None else f"{x:.1f}"


def _table(headers: list[str], rows: list[list[str]], caption: str = "", cls: str = "") -> str:
    """A table; headers and cells are HTML (escape before)."""
    head = "".join(f"<th scope='col'>{h}</th>" for h in headers)
    body = "".join(
        "<tr>" + "".join(f"<td class='n'>{c}</td>" if len(c) <= 14 else f"<td>{c}</td>" for c in r) + "</tr>"
        for r in rows
    )
    cap = f"<caption>{caption}</caption>" if caption else ""
    klass = f" class='{cls}'" if cls else ""
    return f"<table{klass}>{cap}<thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def figure_html(png: bytes, alt: str, caption_html: str, fig_id: str) -> str:
    """An embedded PNG figure with a caption (``alt`` is plain text)."""
    data = base64.b64encode(png).decode("ascii")
    return (
        f"<figure id='{e(fig_id)}'><img src='data:image/png;base64,{data}' alt='{e(alt)}'>"
        f"<figcaption>{caption_html}</figcaption></figure>"
    )


def _png(fig, ctx: ReportContext) -> bytes:
    from loopcheck.figures.bode_plot import figure_png_bytes

    return figure_png_bytes(fig, dpi=ctx.options.figure_dpi)


def not_available(what: str, module: str) -> str:
    """The visible line of a section whose module is not in this version."""
    return (
        f"<p class='na'><strong>Not available in this version of loopcheck.</strong> "
        f"{e(what)} needs the module <code>{e(module)}</code>, which this installation does not have; "
        f"this section is left out rather than filled with invented content.</p>"
    )


def _has_module(name: str) -> bool:
    try:
        return importlib.util.find_spec(name) is not None
    except (ImportError, ValueError):
        return False


def _hz(x: float) -> str:
    return e(q(x, "Hz"))


# ---------------------------------------------------------------------------
# section builders
# ---------------------------------------------------------------------------


def _controller_words(c) -> str:
    if c.kind == "P":
        return "a proportional (P) controller"
    if c.kind == "PI":
        return f"a PI controller (integrator discretised by {c.integrator})"
    orders = ", ".join(str(h) for h in c.harmonics)
    extra = f" and resonators at harmonics {orders}" if orders else ""
    damped = " (damped resonators)" if c.wc_rad_s > 0 else ""
    return f"a proportional-resonant (PR) controller{damped} with a resonator at the fundamental{extra}"


def _damping_words(design) -> str:
    parts = []
    Hi = design.control.Hi_V_per_A
    if Hi != 0:
        parts.append(f"capacitor-current active damping (virtual resistor) with Hi = {q(Hi, 'V/A', prefix=False)}")
    d = design.filter.damping
    if d.kind != "none":
        parts.append(f"passive {d.kind} damping of the capacitor branch (Rd = {q(d.Rd_ohm, 'Ohm')})")
    if not parts:
        return "no damping at all (neither active nor passive)"
    return " and ".join(parts)


def _periods(n: float) -> str:
    """'1 sampling period', '0.5 sampling periods'."""
    return f"{n:g} sampling period" + ("" if n == 1 else "s")


def build_job(ctx: ReportContext) -> Section:
    """The job of the design, in words built from the inputs."""
    d = ctx.design
    a = ctx.analysis
    which = "grid-side current i2" if d.control.feedback == "grid" else "converter-side current i1"
    desc = getattr(ctx.case, "description", "") or ""
    paras = [f"<p class='design-name'><strong>Design:</strong> {e(d.name or 'unnamed design')}</p>"]
    if desc:
        paras.append(f"<p class='desc'>{e(desc)}</p>")
    paras.append(
        "<p>The design under review is the digitally sampled current loop of a grid-connected inverter "
        f"with an LCL filter. The controller regulates the {e(which)} with {e(_controller_words(d.control))}, "
        f"updated at fs = {_hz(d.sampling.fs_hz)} with a computation delay of {_periods(d.sampling.delay)} "
        f"and the modulator's zero-order hold, and the filter resonance "
        f"({_hz(a.resonance_hz)} with the grid inductance) is met by {e(_damping_words(d))}.</p>"
    )
    paras.append(
        "<p>This report answers, for this one design: is the sampled loop stable (closed-loop "
        "eigenvalues), with how much margin (phase margins at every gain crossover, the interval of "
        "controller-gain factors that stays stable, the sensitivity peak), why (Bode and Nyquist plots "
        "of this loop, with the open-loop unstable poles counted), how far the grid may weaken, which "
        "gains to use and what goes into the firmware, what the waveforms and the current harmonics "
        "look like, and on which assumptions all of it rests.</p>"
    )
    paras.append(
        f"<p class='src'>Case file: <code>{e(str(ctx.case.path))}</code></p>"
    )
    return Section("job", "The job of the design", "".join(paras))


def _input_rows(design) -> list[list[str]]:
    f, g, s, c = design.filter, design.grid, design.sampling, design.control

    def row(name, sym, value, unit, prefix=True):
        shown = q(value, unit, prefix=prefix) if isinstance(value, (int, float)) else str(value)
        return [e(name), f"<code>{e(sym)}</code>", e(shown)]

    rows = [
        row("converter-side inductance", "L1", f.L1_H, "H"),
        row("filter capacitance", "C", f.C_F, "F"),
        row("grid-side inductance (without the grid)", "L2", f.L2_H, "H"),
        row("series resistance of L1", "R1", f.R1_ohm, "Ohm"),
        row("series resistance of L2", "R2", f.R2_ohm, "Ohm"),
        row("passive damping of the capacitor branch", "damping", f.damping.kind, ""),
    ]
    if f.damping.kind != "none":
        rows.append(row("damping resistor", "Rd", f.damping.Rd_ohm, "Ohm"))
    if f.damping.kind in ("split-RC", "split-RLC"):
        rows.append(row("damping-branch capacitor", "Cd", f.damping.Cd_F, "F"))
    if f.damping.kind == "split-RLC":
        rows.append(row("inductor across the damping resistor", "Ld", f.damping.Ld_H, "H"))
    rows += [
        row("grid fundamental frequency", "f", g.f_hz, "Hz"),
        row("grid inductance (design point)", "Lg", g.Lg_H, "H"),
        row("grid resistance", "Rg", g.Rg_ohm, "Ohm"),
    ]
    if g.Lg_range_H is not None:
        rng = f"{q(g.Lg_range_H[0], 'H')} to {q(g.Lg_range_H[1], 'H')}"
        rows.append([e("grid inductance range to survive"), "<code>Lg_range</code>", e(rng)])
    if g.S_VA is not None:
        rows.append(row("rated power", "S", g.S_VA, "VA"))
    if g.V_V is not None:
        rows.append(row("line-to-line rms voltage", "V", g.V_V, "V"))
    rows += [
        row("sampling (= control update) frequency", "fs", s.fs_hz, "Hz"),
        row("computation delay", "delay", f"{_periods(s.delay)} ({q(s.delay * s.Ts_s, 's')})", ""),
        row("regulated current", "feedback", "grid-side i2" if c.feedback == "grid" else "converter-side i1", ""),
        row("controller", "kind", c.kind, ""),
        row("proportional gain", "Kp", c.Kp_V_per_A, "V/A", prefix=False),
    ]
    if c.kind == "PI":
        rows.append(row("integral gain", "Ki", c.Ki_V_per_As, "V/A/s", prefix=False))
        rows.append(row("integrator discretisation", "integrator", c.integrator, ""))
    if c.kind == "PR":
        rows.append(row("resonant gain", "Kr", c.Kr, "V/A" if c.wc_rad_s > 0 else "V/A/s", prefix=False))
        rows.append(row("resonator bandwidth", "wc", c.wc_rad_s, "rad/s", prefix=False))
        hs = ", ".join(str(h) for h in (1,) + tuple(c.harmonics))
        rows.append(row("resonator orders (times the fundamental)", "harmonics", hs, ""))
        rows.append(row("resonator discretisation", "resonator", c.resonator, ""))
    rows.append(row("capacitor-current feedback gain (virtual resistor)", "Hi", c.Hi_V_per_A, "V/A", prefix=False))
    return rows


def build_inputs(ctx: ReportContext) -> Section:
    """Every input of the design with its unit, and the case file's warnings."""
    body = _table(["Quantity", "Symbol (case-file key)", "Value with unit"], _input_rows(ctx.design), cls="inputs")
    warnings = getattr(ctx.case, "warnings", ()) or ()
    if warnings:
        items = "".join(f"<li>{e(w)}</li>" for w in warnings)
        body += f"<div class='warn'><p><strong>Warnings from the case file:</strong></p><ul>{items}</ul></div>"
    return Section("inputs", "Inputs", body)


_BANNER = {
    "stable": ("STABLE", "[OK]", "All closed-loop poles lie inside the unit circle."),
    "marginal": ("MARGINAL", "[!!]", "The largest closed-loop pole lies on the unit circle: a sustained oscillation."),
    "unstable": ("UNSTABLE", "[XX]", "Closed-loop poles lie outside the unit circle: the current grows until the protection trips."),
}


def verdict_banner(analysis, range_verdict=None) -> str:
    """The verdict banner: the verdict in words and a glyph, not colour alone.

    ``range_verdict`` (a :class:`loopcheck.design.range_verdict.RangeVerdict`):
    where the case declares an Lg range or tolerances, the banner states
    the result over them, and a design stable only at its nominal point gets
    the not-stable banner."""
    state = analysis.verdict
    word, glyph, meaning = _BANNER.get(state, (state.upper(), "[?]", ""))
    at = ""
    rest = ""
    if range_verdict is not None and range_verdict.declared:
        from loopcheck.design.range_verdict import range_text

        at = " at the nominal Lg"
        rest = f" Over what the case declares: {range_text(range_verdict)}."
        if state == "stable" and not range_verdict.stable_everywhere:
            state, word, glyph = "unstable", "NOT STABLE OVER ITS RANGE", "[XX]"
            meaning = "Stable at the nominal point only."
    return (
        f"<div class='banner banner-{e(state)}' role='status'>"
        f"<span class='glyph' aria-hidden='true'>{e(glyph)}</span>"
        f"<span class='word'>{e(word)}</span>"
        f"<span class='why'>{e(meaning)} Spectral radius {analysis.spectral_radius:.6f}{at} "
        f"(tolerance {analysis.tolerance:.0e}), from the closed-loop eigenvalues.{e(rest)}</span></div>"
    )


def report_range_verdict(ctx: "ReportContext"):
    """The :class:`loopcheck.design.range_verdict.RangeVerdict` of the report's case (computed once)."""
    if "range_verdict" not in ctx.shared:
        from loopcheck.io.read_verdict import case_range_verdict

        ctx.shared["range_verdict"] = case_range_verdict(ctx.case)
    return ctx.shared["range_verdict"]


def build_verdict(ctx: ReportContext) -> Section:
    """Verdict, key numbers, crossovers, -180 deg crossings and the dominant poles."""
    a = ctx.analysis
    d = ctx.design
    fs = d.sampling.fs_hz
    gm = a.gain_margin
    side_words = "below" if a.resonance_side == "below" else "above"
    rows = [
        ["verdict (closed-loop eigenvalues)", e(a.verdict), "-"],
        ["spectral radius max|z| of the closed loop", f"{a.spectral_radius:.6f}", "-"],
        ["LCL resonance with the grid inductance", _num(a.resonance_hz, 5), "Hz"],
        ["LCL resonance without the grid inductance", _num(a.resonance_no_grid_hz, 5), "Hz"],
        [f"critical frequency {critical_formula(d)}; the resonance lies {side_words} it", _num(a.critical_hz, 5), "Hz"],
        ["open-loop poles outside the unit circle P", str(a.open_loop_unstable_poles), "-"],
        ["open-loop poles on the unit circle", str(a.open_loop_circle_poles), "-"],
        ["counter-clockwise encirclements of -1 N", str(a.nyquist_encirclements), "-"],
        ["closed-loop poles outside the unit circle Z", str(a.closed_loop_unstable_poles), "-"],
        ["Nyquist count agrees with the eigenvalues (N = P - Z)", "yes" if a.nyquist_consistent else "NO", "-"],
        ["smallest phase margin", _deg(a.phase_margin_deg), "deg"],
    ]
    if gm is not None:
        rows.append(["lower gain-margin factor (controller gain may shrink to)", _num(gm.lower_factor), "-"])
        rows.append(["lower gain margin", "n/a" if gm.lower_db is None else f"{gm.lower_db:+.2f}", "dB"])
        rows.append(["upper gain-margin factor (controller gain may grow to)",
                     "none (no upper limit)" if gm.upper_factor is None else _num(gm.upper_factor), "-"])
        rows.append(["upper gain margin", "n/a" if gm.upper_db is None else f"{gm.upper_db:+.2f}", "dB"])
    else:
        rows.append(["gain-margin interval", "n/a (the loop is not stable at k = 1)", "-"])
    ivs = "; ".join(f"{_num(lo)} to {'infinity' if hi is None else _num(hi)}" for lo, hi in a.stable_gain_intervals)
    rows.append(["stable intervals of the controller-gain factor k", e(ivs or "none"), "-"])
    rows.append(["sensitivity peak Ms = max|1/(1+L)|", _num(a.sensitivity_peak.value), "-"])
    rows.append(["frequency of the sensitivity peak", _num(a.sensitivity_peak.frequency_hz, 5), "Hz"])
    body = verdict_banner(a, report_range_verdict(ctx))
    body += _table(["Quantity", "Value", "Unit"], [[e(r[0]), r[1], r[2]] for r in rows],
                   caption="Key numbers (loop broken at the current controller, damping loop closed)")
    co_rows = [
        [_num(c.frequency_hz, 5), f"{c.phase_deg:.2f}", f"{abs(c.phase_margin_deg):.2f}", e(c.reaches_minus1_with)]
        for c in a.crossovers
    ]
    body += _table(
        ["Frequency [Hz]", "Loop phase [deg]", "Phase margin [deg]", "-1 is reached with extra"],
        co_rows or [["-", "-", "-", "no gain crossover"]],
        caption="Gain crossovers |L| = 1",
    )
    pc_rows = [
        [_num(p.frequency_hz, 5) + (" (fs/2)" if abs(p.frequency_hz - fs / 2) < 1e-6 * fs else ""),
         f"{p.gain_db:+.2f}", _num(p.factor)]
        for p in a.phase_crossings
    ]
    body += _table(
        ["Frequency [Hz]", "|L| [dB]", "Gain factor k = -1/L [-]"],
        pc_rows or [["-", "-", "none"]],
        caption="-180 deg crossings: scaling the controller by k puts a closed-loop pole on the unit circle there",
    )
    poles = sorted(a.closed_loop_poles, key=lambda p: -abs(p))
    seen, pole_rows = set(), []
    for p in poles:
        key = (round(abs(p), 9), round(abs(math.atan2(p.imag, p.real)), 9))
        if key in seen:
            continue
        seen.add(key)
        f_hz = abs(math.atan2(p.imag, p.real)) * fs / (2 * math.pi)
        pair = "pair" if abs(p.imag) > 1e-12 else "real"
        pole_rows.append([f"{abs(p):.6f}", _num(f_hz, 5), pair])
        if len(pole_rows) == 6:
            break
    body += _table(["|z| [-]", "Frequency of the pole angle [Hz]", "Kind"], pole_rows,
                   caption="Dominant closed-loop poles (largest magnitude first)")
    return Section("verdict", "Verdict and margins", body)


def build_frequency(ctx: ReportContext) -> Section:
    """Bode and Nyquist figures of this loop."""
    from loopcheck.figures.bode_plot import bode_figure, sample_loop
    from loopcheck.figures.nyquist_plot import nyquist_figure, sample_contour

    a, d = ctx.analysis, ctx.design
    ctx.progress("Bode figure")
    bode = bode_figure(d, a, curve=sample_loop(ctx.loop, d, a))
    bode_png = _png(bode, ctx)
    ctx.progress("Nyquist figure")
    nyq = nyquist_figure(d, a, curve=sample_contour(ctx.loop, d, a))
    nyq_png = _png(nyq, ctx)
    P, N, Z = a.open_loop_unstable_poles, a.nyquist_encirclements, a.closed_loop_unstable_poles
    body = figure_html(
        bode_png,
        "Bode plot of the loop gain: magnitude in dB and unwrapped phase in degrees over frequency in Hz up to fs/2",
        "Bode plot of the loop gain L (controller times plant, damping loop closed), up to the Nyquist "
        "frequency fs/2. Circles: gain crossovers with their phase margins (lag or lead); diamonds: "
        "-180 deg crossings with the controller-gain factor k that puts a closed-loop pole on the unit "
        "circle there; vertical lines: the LCL resonance, the critical frequency and fs/2.",
        "fig-bode",
    )
    body += (
        "<p class='read'><strong>Reading it.</strong> With no open-loop poles outside the unit circle "
        "(P = 0) the familiar rule holds: the loop is stable when the phase, over the band where "
        "|L| &gt; 0 dB, crosses -180 deg (and its odd multiples) upwards as often as downwards, "
        "usually not at all. With P &gt; 0 (the damping loop itself has unstable poles, typical when "
        "the resonance lies above the critical frequency) it must cross upwards P/2 times more often "
        "than downwards, and a phase margin at a single crossover says little on its own. The "
        "Nyquist count below and the eigenvalue verdict decide.</p>"
    )
    body += figure_html(
        nyq_png,
        f"Nyquist plot of the loop gain zoomed around -1; P = {P}, N = {N}, Z = {Z}",
        f"Nyquist plot of L, zoomed around the critical point -1 with the unit circle (left), and the "
        f"whole curve with its radius compressed (right). P = {P} open-loop poles outside the unit "
        f"circle, N = {N} counter-clockwise encirclements of -1, Z = {Z} closed-loop poles outside: "
        f"the argument principle N = P - Z {'holds' if a.nyquist_consistent else 'does NOT hold (see the verdict)'}.",
        "fig-nyquist",
    )
    body += (
        "<p class='read'><strong>Reading it.</strong> Follow the solid branch in the direction of the "
        "arrows (rising frequency) and the dashed mirror branch back; the closed loop is stable when the "
        "whole curve encircles -1 counter-clockwise exactly P times (N = P). The dotted circle around -1 "
        "has radius 1/Ms: the curve touches it at the sensitivity peak, and a small circle means the "
        "curve passes close to -1.</p>"
    )
    return Section("frequency", "Bode and Nyquist plots of this loop", body)


def build_map(ctx: ReportContext) -> Section:
    """Stability map with the design point (``loopcheck.design.maps``, ``loopcheck.figures.map_plot``),
    axes from the case's ``[map]`` table at the report's own resolution."""
    title = "Stability map"
    if not all(_has_module(m) for m in ("loopcheck.design.maps", "loopcheck.figures.map_plot", "loopcheck.io.map_table")):
        return Section("map", title, not_available("The stability map", "loopcheck.design.maps"), False)
    from loopcheck.figures.map_plot import map_figure
    from loopcheck.io.map_table import Overrides, map_spec
    from loopcheck.design.maps import compute_map

    d = ctx.design
    nx, ny = ctx.options.map_points
    spec = map_spec(ctx.case, Overrides(x_points=nx, y_points=ny, metrics=()))
    ctx.progress("stability map")
    smap = compute_map(d, spec)
    kr_unit = "V/A" if d.control.wc_rad_s > 0 else "V/A/s"
    body = figure_html(
        _png(map_figure(smap, kr_unit=kr_unit), ctx),
        f"Stability map over {spec.x.name} and {spec.y.name} with the design point",
        f"Where the loop is stable over {e(spec.x.name)} (x) and {e(spec.y.name)} (y), everything else at the "
        f"design's values; {nx} x {ny} grid points, boundaries located exactly along gain axes. The design "
        "point is marked.",
        "fig-map",
    )
    from loopcheck.io.map_summary import design_point_lines

    first, *rest = [ln.strip() for ln in design_point_lines(smap)]
    head = first.rsplit(": ", 1)[0]
    verdict = "stable" if smap.design_stable else "not stable"
    text = f"{e(head[0].upper() + head[1:])}: <strong>{verdict}</strong>" + "".join(f"; {e(r)}" for r in rest)
    line = (f"<p>{text}. Share of the map that is stable: {100.0 * float(smap.stable.mean()):.1f} %.</p>")
    return Section("map", title, body + line)


def _grid_inputs(ctx: ReportContext):
    """(Lg range [H] or None, tolerance spec, targets) of the case, parsed once."""
    if "grid_inputs" not in ctx.shared:
        from loopcheck.io.read_tolerance import parse_tolerance_table
        from loopcheck.io.read_targets import parse_targets

        case = ctx.case
        tables = getattr(case, "tables", {}) or {}
        spec = parse_tolerance_table(tables.get("tolerance"), case.where("tolerance"), ctx.design)
        targets = parse_targets(tables.get("targets"), case.where("targets"))
        ctx.shared["grid_inputs"] = (ctx.design.grid.Lg_range_H, spec, targets)
    return ctx.shared["grid_inputs"]


def _scr_of(design):
    g = design.grid
    if g.S_VA is None or g.V_V is None:
        return None
    from loopcheck.engine.scr import scr_from_lg

    return lambda lg: float(scr_from_lg(float(lg), g.S_VA, g.V_V, g.f_hz)) if lg > 0 else math.inf


def build_weak_grid(ctx: ReportContext) -> Section:
    """Weak-grid table and plot (``loopcheck.design.weakgrid``, ``loopcheck.figures.grid_plot``)."""
    title = "Weak grid: the grid-inductance range"
    if not all(_has_module(m) for m in ("loopcheck.design.weakgrid", "loopcheck.figures.grid_plot", "loopcheck.design.tolerance")):
        return Section("weakgrid", title, not_available("The weak-grid sweep", "loopcheck.design.weakgrid"), False)
    rng, spec, targets = _grid_inputs(ctx)
    if rng is None:
        return Section("weakgrid", title, (
            "<p class='na'><strong>Not computed for this case.</strong> The weak-grid sweep needs a grid-inductance "
            "range: <code>Lg_range</code> or <code>scr_range</code> in <code>[grid]</code>. This case gives only "
            "the nominal grid inductance, whose verdict is above.</p>"
        ), False)
    from loopcheck.figures.grid_plot import grid_figure
    from loopcheck.engine.verdict import classify
    from loopcheck.design.weakgrid import sweep_grid

    d = ctx.design
    ctx.progress("weak-grid sweep")
    res = sweep_grid(d, rng, spec, targets, n_points=61)
    fig = grid_figure(res, design_Lg_H=d.grid.Lg_H, title=d.name)
    body = figure_html(
        _png(fig, ctx),
        "Verdict and margins against the grid inductance",
        "Verdict and margins of the design against the grid inductance Lg over the case's range, for the "
        "nominal filter" + (" and every tolerance corner" if res.corners else "") + "; the crossing of the "
        "critical frequency is marked.",
        "fig-weakgrid",
    )
    nom = res.nominal
    ivs = "; ".join(f"{q(a, 'H')} to {q(b, 'H')}" for a, b in nom.scan.stable_intervals_H) or "none"
    lo, hi = rng
    body += (
        f"<p><strong>Stable Lg intervals</strong> (nominal filter, range {e(q(lo, 'H'))} to {e(q(hi, 'H'))}): "
        f"{e(ivs)}. Targets: {e(targets.describe())}.</p>"
    )
    if res.Lg_critical_H is not None:
        body += (f"<p>The resonance crosses the critical frequency {_hz(res.critical_hz)} at Lg = "
                 f"{e(q(res.Lg_critical_H, 'H'))}.</p>")
    scr_of = _scr_of(d)
    rows = []
    step = max(1, (nom.Lg_H.size - 1) // 10)  # about 11 rows of the 61 computed
    for i in range(0, nom.Lg_H.size, step):
        m = nom.margins.take(i)
        sr = float(m.spectral_radius)
        row = [e(q(float(nom.Lg_H[i]), "H"))]
        if scr_of is not None:
            row.append(_num(scr_of(float(nom.Lg_H[i])), 4))
        row += [
            _num(float(nom.resonance_hz[i]), 5), e(classify(sr)), f"{sr:.5f}",
            _deg(None if not math.isfinite(float(m.phase_margin_deg)) else float(m.phase_margin_deg)),
            _db_or(float(m.gm_lower_db)), _db_or(float(m.gm_upper_db)), _num(float(m.sensitivity_peak)),
        ]
        rows.append(row)
    heads = ["Lg [H]"] + (["SCR [-]"] if scr_of is not None else []) + [
        "Resonance [Hz]", "Verdict", "Spectral radius [-]", "Phase margin [deg]",
        "Lower gain margin [dB]", "Upper gain margin [dB]", "Sensitivity peak Ms [-]"]
    body += _table(heads, rows, caption="Nominal filter over the grid-inductance range")
    w = res.worst
    worst_line = (f"<p><strong>Worst point</strong> ({e(w.variant)}): Lg = {e(q(w.Lg_H, 'H'))}, resonance "
                  f"{_hz(w.resonance_hz)}; what sets it: {e(w.binding)}.</p>")
    if w.shortfalls:
        worst_line += "<div class='warn'><ul>" + "".join(f"<li>{e(x)}</li>" for x in w.shortfalls) + "</ul></div>"
    body += worst_line
    if res.corners:
        crow = []
        for f in res.corners:
            civ = "; ".join(f"{q(a, 'H')} to {q(b, 'H')}" for a, b in f.scan.stable_intervals_H) or "none"
            crow.append([e(f.label), "yes" if f.scan.fully_stable else "NO", e(civ)])
        body += _table(["Tolerance corner", "Stable over the whole range", "Stable Lg intervals [H]"], crow,
                       caption="Tolerance corners")
    return Section("weakgrid", title, body)


def _db_or(x: float) -> str:
    if math.isnan(x):
        return "n/a"
    if math.isinf(x):
        return "none" if x > 0 else "to zero"
    return f"{x:+.2f}"


def _firmware_html(ctx: ReportContext) -> str:
    """The exported controller: difference-equation coefficients and the re-check."""
    from loopcheck.io.casefile import CaseError
    from loopcheck.design.firmware import FirmwareFormatError, FirmwareSettings, export_controller, export_unsupported
    from loopcheck.io.read_firmware import read_firmware_settings

    if (why := export_unsupported(ctx.design)) is not None:
        return f"<p>Not exported: {html.escape(why)}</p>"
    case = ctx.case
    settings = FirmwareSettings()
    notes: list[str] = []
    tables = getattr(case, "tables", {}) or {}
    if "firmware" in tables:
        settings, notes = read_firmware_settings(
            tables["firmware"], case.where("firmware"), damping_gain_used=ctx.design.control.Hi_V_per_A != 0.0
        )
    try:
        ex = export_controller(ctx.design, settings)
    except FirmwareFormatError as exc:  # the [firmware] number format cannot hold a coefficient: bad input
        raise CaseError(f"{case.where('firmware')} {exc.key}: {exc}") from None
    out = [
        "<p>The controller as the firmware runs it, per sampling period Ts = "
        f"{e(q(ex.Ts_s, 's'))}: each section j computes "
        "<code>y_j[k] = b0 e[k] + b1 e[k-1] + b2 e[k-2] - a1 y_j[k-1] - a2 y_j[k-2]</code>, "
        "then <code>u[k] = Kp e[k] + sum_j y_j[k] - Hi ic[k]</code> (direct form I, histories start at 0; "
        "the full conventions and the C header come from <code>loopcheck export</code>).</p>"
    ]
    for coeffs, label in ((ex.si, "SI"), (ex.firmware, "firmware units")):
        if coeffs is None:
            continue
        unit = coeffs.gain_unit
        rows = [["Kp", "-", f"{coeffs.Kp:.10g}", "-", "-", "-", "-"], ["Hi", "-", f"{coeffs.Hi:.10g}", "-", "-", "-", "-"]]
        for sec in coeffs.sections:
            b = list(sec.b) + [0.0] * (3 - len(sec.b))
            a = list(sec.a) + [0.0] * (2 - len(sec.a))
            tuned = "-" if sec.tuned_frequency_hz is None else _num(sec.tuned_frequency_hz, 6)
            rows.append([e(sec.name), tuned] + [f"{x:.10g}" for x in b] + [f"{x:.10g}" for x in a])
        out.append(_table(
            ["Part", "Tuned to [Hz]", f"b0 / gain [{e(unit)}]", f"b1 [{e(unit)}]", f"b2 [{e(unit)}]", "a1 [-]", "a2 [-]"],
            rows, caption=f"Controller coefficients, exact ({e(label)})",
        ))
    qz = ex.quantised
    if qz.number_format.kind != "float64":
        vals = qz.values()
        rows = [[e(n), f"{v.value:.10g}", "-" if v.integer is None else str(v.integer)] for n, v in vals]
        out.append(_table(["Coefficient", f"Stored value [{e(qz.gain_unit)} or -]", "Stored integer [-]"], rows,
                          caption=f"Stored coefficients ({e(qz.number_format.kind)}, "
                          f"{qz.number_format.word_bits} bits)"))
    rc = ex.recheck
    rows = [["exact coefficients", e(rc.before.verdict), f"{rc.before.spectral_radius:.6f}",
             _deg(rc.before.phase_margin_deg), _num(rc.before.sensitivity_peak)]]
    if rc.after is not None:
        rows.append(["stored (quantised) coefficients", e(rc.after.verdict), f"{rc.after.spectral_radius:.6f}",
                     _deg(rc.after.phase_margin_deg), _num(rc.after.sensitivity_peak)])
    out.append(_table(["Controller", "Verdict", "Spectral radius [-]", "Smallest phase margin [deg]",
                       "Sensitivity peak Ms [-]"], rows, caption="Re-check of the loop with the exported coefficients"))
    msgs = list(notes) + list(rc.warnings)
    if msgs:
        out.append("<div class='warn'><ul>" + "".join(f"<li>{e(m)}</li>" for m in msgs) + "</ul></div>")
    return "".join(out)


def build_gains(ctx: ReportContext) -> Section:
    """Picked gains (``loopcheck.design.pick``) and exported coefficients (``loopcheck.design.firmware``)."""
    title = "Picked gains and firmware coefficients"
    parts, available = [], False
    pick_html = ctx.shared.get("pick_html")
    if pick_html is None and _has_module("loopcheck.design.pick"):
        pick_html = _pick_html(ctx)
    if pick_html:
        parts.append("<h3>Damping gain with the most room</h3>" + pick_html)
        available = True
    else:
        parts.append(not_available("Picking the damping gain", "loopcheck.design.pick"))
    if _has_module("loopcheck.design.firmware"):
        parts.append("<h3>Exported controller coefficients</h3>" + _firmware_html(ctx))
        available = True
    else:
        parts.append(not_available("The firmware export", "loopcheck.design.firmware"))
    return Section("gains", title, "".join(parts), available)


def _pick_html(ctx: ReportContext) -> str | None:
    """The damping gain picked by ``loopcheck.design.pick`` (with its figure)."""
    if not _has_module("loopcheck.figures.pick_plot"):
        return None
    from loopcheck.design.pick import pick_gain
    from loopcheck.figures.pick_plot import pick_figure

    d = ctx.design
    rng, spec, targets = _grid_inputs(ctx)
    ctx.progress("picking the damping gain")
    res = pick_gain(d, rng, spec, targets)
    out = []
    if res.Hi_V_per_A is not None:
        out.append(
            f"<p><strong>Recommended Hi = {_num(res.Hi_V_per_A, 5)} V/A</strong> (the design uses "
            f"{_num(d.control.Hi_V_per_A, 5)} V/A; Kp = {_num(res.Kp_V_per_A, 5)} V/A). Worst-case robustness "
            f"index {res.index:.3f} (1 = every target just met); "
            f"{'meets' if res.meets_targets else 'does NOT meet'} the targets ({e(res.targets.describe())}).</p>"
        )
    ivs = "; ".join(f"{_num(a, 5)} to {_num(b, 5)}" for a, b in res.Hi_interval_V_per_A)
    out.append(f"<p>Hi interval meeting the targets [V/A]: {e(ivs) if ivs else 'none'}.</p>")
    if res.ends:
        out.append("<ul>" + "".join(f"<li>{e(x.text)}</li>" for x in res.ends) + "</ul>")
    out.append(f"<p>{e(res.message)}</p>")
    out.append(figure_html(
        _png(pick_figure(res, design_Hi_V_per_A=d.control.Hi_V_per_A, title=d.name), ctx),
        "Worst-case margins against the damping gain Hi",
        "Worst case over the grid-inductance range and the tolerance corners against the capacitor-current "
        "gain Hi, with the recommendation and the design's own Hi marked.",
        "fig-pick",
    ))
    return "".join(out)


def build_waveforms(ctx: ReportContext) -> Section:
    """Simulated waveforms (``loopcheck.timedomain.simulate``, ``loopcheck.figures.sim_plot``), with the
    undamped loop (Hi = 0) overlaid when the design uses capacitor-current damping."""
    title = "Simulated waveforms"
    if not all(_has_module(m) for m in ("loopcheck.timedomain.simulate", "loopcheck.figures.sim_plot", "loopcheck.timedomain.scenario")):
        return Section("waveforms", title, not_available("The time-domain simulation", "loopcheck.timedomain.simulate"), False)
    from dataclasses import replace

    from loopcheck.io.read_scenario import parse_scenario
    from loopcheck.figures.sim_plot import waveform_figure
    from loopcheck.timedomain.simulate import resonance_rate_check, simulate, simulation_unsupported

    case, d = ctx.case, ctx.design
    if (why := simulation_unsupported(d)) is not None:
        return Section("waveforms", title, f"<p>Not simulated: {e(why)}</p>", False)
    tables = getattr(case, "tables", {}) or {}
    sc = parse_scenario(tables.get("scenario"), case.where("scenario"))
    pwm_sim = None
    if _has_module("loopcheck.io.read_pwm"):
        from loopcheck.io.read_pwm import read_pwm

        pwm_sim, _ = read_pwm(case, required=False)
        if sc.phases is None and pwm_sim is not None:
            sc = replace(sc, phases=pwm_sim.phases)
    ctx.progress("simulation")
    w = simulate(d, sc)
    rc = resonance_rate_check(d, sc)
    w0 = rc0 = None
    if d.control.Hi_V_per_A != 0.0:
        w0 = simulate(d, sc, Hi_V_per_A=0.0)
        rc0 = resonance_rate_check(d, sc, Hi_V_per_A=0.0)
    fig = waveform_figure(w, w0, rc, rc0, title=f"Simulated waveforms: {d.name or 'design'}")
    body = figure_html(
        _png(fig, ctx),
        "Simulated grid current, converter current, capacitor voltage and controller output over time",
        "Exact sampled-data simulation: the continuous LCL filter integrated exactly between samples under the "
        "discrete controller with its computation delay and the modulator's hold (averaged modulator, no "
        "switching ripple). Solid: the design"
        + ("; dashed: the same loop with the capacitor-current damping switched off (Hi = 0)." if w0 is not None else ".")
        + " Vertical lines mark the events.",
        "fig-waveforms",
    )
    rows = []
    for label, r in (("design", rc), ("Hi = 0", rc0)):
        if r is None:
            continue
        rows.append([
            e(label), _num(r.simulated_rate_per_s, 5), _num(r.predicted_rate_per_s, 5),
            "n/a" if r.rate_error is None else f"{100 * r.rate_error:.3g}",
            _num(r.simulated_frequency_hz, 5), _num(r.predicted_frequency_hz, 5),
            "n/a" if r.frequency_error is None else f"{100 * r.frequency_error:.3g}",
        ])
    body += _table(
        ["Loop", "Simulated rate [1/s]", "Pole rate ln|z|/Ts [1/s]", "Difference [%]",
         "Simulated frequency [Hz]", "Pole frequency [Hz]", "Difference [%]"],
        rows, caption="The resonance oscillation in the waveform beside the closed-loop pole that predicts it "
        "(negative rate: decays; positive: grows)",
    )
    notes = list(w.notes) + ([f"Hi = 0 run: {n}" for n in w0.notes] if w0 is not None else [])
    if pwm_sim is not None:  # the same saturation note as `loopcheck simulate`
        import numpy as np

        from loopcheck.io.findings import saturation_note

        for label, wave in (("", w), ("Hi = 0 run: ", w0)):
            note = None if wave is None else saturation_note(float(np.max(np.abs(wave.vi_V))), pwm_sim)
            if note:
                notes.append(label + note)
    if notes:
        body += "<div class='warn'><ul>" + "".join(f"<li>{e(n)}</li>" for n in notes) + "</ul></div>"
    return Section("waveforms", title, body)


def build_harmonics(ctx: ReportContext) -> Section:
    """Harmonic check (``loopcheck.harmonics.spectrum``, ``loopcheck.figures.harmonics_plot``); needs a ``[pwm]`` table."""
    title = "Harmonic check"
    if not all(_has_module(m) for m in ("loopcheck.harmonics.spectrum", "loopcheck.figures.harmonics_plot", "loopcheck.io.read_pwm")):
        return Section("harmonics", title, not_available("The harmonic check", "loopcheck.harmonics.spectrum"), False)
    from loopcheck.harmonics.spectrum import OvermodulationError, harmonic_check
    from loopcheck.figures.harmonics_plot import harmonics_figure
    from loopcheck.io.read_pwm import operating_point_of, read_harmonics_options, read_pwm

    case, d = ctx.case, ctx.design
    pwm, pwm_warn = read_pwm(case, required=False)
    if pwm is None:
        return Section("harmonics", title, (
            "<p class='na'><strong>Not computed for this case.</strong> The harmonic check needs a "
            "<code>[pwm]</code> table in the case file (dc-link voltage, switching frequency, modulation "
            "scheme and update); this case has none. See <code>loopcheck harmonics --help</code>.</p>"
        ), False)
    opts = read_harmonics_options(case)
    op = operating_point_of(case, pwm, opts)
    try:
        check = harmonic_check(d, pwm, op, opts.max_group, opts.max_sideband, opts.lg_points)
    except OvermodulationError as exc:
        return Section("harmonics", title, f"<p class='na'><strong>Not computed.</strong> {e(str(exc))}</p>", False)
    ctx.progress("harmonics figure")
    body = figure_html(
        _png(harmonics_figure(check, name=d.name), ctx),
        "Grid-current sidebands around the switching frequency against the current-distortion limits",
        "Grid-current sidebands of the carrier-based modulator through the LCL filter, in % of the rated "
        "current, against the limits of the tables named below.",
        "fig-harmonics",
    )
    w = check.worst
    from loopcheck.io.findings import unstable_loop_note

    loop_note = unstable_loop_note(ctx.analysis)
    if loop_note:  # the same warning as `loopcheck harmonics`; no "within the limits" for an unstable loop
        body += f"<div class='warn'><p><strong>Warning:</strong> {e(loop_note)}.</p></div>"
        verdict = "no verdict on the limits while the loop is not stable"
    else:
        verdict = "within the limits" if check.complies else "ABOVE the limits"
    body += (
        f"<p><strong>Worst sideband:</strong> {_num(w.frequency_hz, 6)} Hz (order {w.order:.1f}), "
        f"{_num(w.percent)} % of the rated current against a limit of {_num(w.limit_percent, 3)} % "
        f"(margin {w.margin_db:+.1f} dB): {verdict}. Modulation index {check.modulation_index:.3f}, "
        f"{e(pwm.scheme)}, {e(pwm.update)} update, fsw = {_num(pwm.fsw_hz, 6)} Hz, Vdc = {_num(pwm.Vdc_V)} V.</p>"
    )
    biggest = sorted(check.sidebands, key=lambda s: -s.percent)[:8]
    rows = [
        [f"({s.m}, {s.n:+d})", _num(s.frequency_hz, 6), f"{s.order:.1f}", _num(s.converter_V), _num(s.percent),
         _num(s.limit_percent, 3) + (" (assumed)" if s.assumed_limit else ""), f"{s.margin_db:+.1f}"]
        for s in sorted(biggest, key=lambda s: s.frequency_hz)
    ]
    body += _table(["Sideband (m, n)", "Frequency [Hz]", "Order [-]", "Converter voltage [V peak]",
                    "Grid current [% of rated]", "Limit [%]", "Margin [dB]"], rows,
                   caption="The largest sidebands")
    if check.worst_over_range is not None:
        r = check.worst_over_range
        body += (f"<p>Over the grid-inductance range the smallest margin is {r.margin_db:+.1f} dB at "
                 f"Lg = {e(q(r.Lg_H, 'H'))} ({_num(r.frequency_hz, 6)} Hz, {_num(r.percent)} % of rated).</p>")
    body += "<p>Limits: " + "; ".join(e(t) for t in check.limit_tables) + ".</p>"
    body += "<ul class='assume'>" + "".join(f"<li>{e(a)}</li>" for a in check.assumptions) + "</ul>"
    if getattr(check, "findings", ()):
        body += "<div class='warn'><ul>" + "".join(f"<li>{e(m)}</li>" for m in check.findings) + "</ul></div>"
    if pwm_warn:
        body += "<div class='warn'><ul>" + "".join(f"<li>{e(m)}</li>" for m in pwm_warn) + "</ul></div>"
    body += (
        "<p class='src'>A design aid, not a compliance test: the limits apply at the point of common coupling "
        "and are verified by measurement; local codes and the utility's interconnection rules govern.</p>"
    )
    return Section("harmonics", title, body)


def build_impedance(ctx: ReportContext) -> Section:
    """Output admittance, its non-passive bands and the impedance-ratio
    verdict on the case's grid (``loopcheck.design.grid_network``,
    ``loopcheck.figures.admittance_plot``)."""
    title = "Impedance view of the grid connection"
    if not all(_has_module(m) for m in ("loopcheck.design.grid_network", "loopcheck.figures.admittance_plot",
                                         "loopcheck.io.impedance_text")):
        return Section("impedance", title, not_available("The impedance view", "loopcheck.design.grid_network"), False)
    from loopcheck.figures.admittance_plot import impedance_figure
    from loopcheck.design.grid_network import study
    from loopcheck.io.read_network import read_feedforward, read_grid_network
    from loopcheck.io.impedance_text import impedance_text

    case, d = ctx.case, ctx.design
    ctx.progress("impedance view")
    result = study(d, read_grid_network(case), feedforward=read_feedforward(case))
    body = figure_html(
        _png(impedance_figure(d, result, title=d.name or ""), ctx),
        "Output admittance of the inverter with its non-passive bands shaded, the grid admittance, and the "
        "Nyquist curve of the impedance ratio near -1",
        "Output admittance Yo = -i2/vg seen from the grid (baseband component of the sampled loop, with the "
        "hold and the computation delay): magnitude and phase, the bands where Re Yo < 0 (the inverter is "
        "not passive there) shaded, the grid's admittance overlaid; below, the impedance ratio N Zg Yo near -1.",
        "fig-impedance",
    )
    lines = [ln.strip() for ln in impedance_text(case, result).splitlines()[1:] if ln.strip()]
    body += "<ul class='assume'>" + "".join(f"<li>{e(ln)}</li>" for ln in lines) + "</ul>"
    body += (
        "<p class='src'>The eigenvalue verdict is exact for a grid given as components; the impedance-ratio "
        "verdict (Sun, IEEE Trans. Power Electron., 2011) uses the baseband admittance and is shown beside it. "
        "Grid resonances falling in a non-passive band are the ones to avoid.</p>"
    )
    return Section("impedance", title, body)


def assumption_items(design) -> list[str]:
    """The modelling assumptions behind the numbers (plain text)."""
    f, s = design.filter, design.sampling
    items = [
        "Per-phase (single-phase equivalent) linear model; the three phases are balanced and decoupled.",
        "Averaged modulator: the converter voltage equals its reference, held constant by a zero-order hold "
        f"from {_periods(s.delay)} after the sample to one period later (exact sampled-data model "
        "with split sampling interval); switching ripple is not part of the loop model.",
        "The controller's output is the converter voltage: the modulator gain and the dc-link voltage are "
        "folded into the gains (gains in V/A); the dc-link voltage is constant and the modulator never saturates.",
        "Ideal current sensors with no anti-aliasing filter, no offset and no quantisation; the capacitor current "
        "is sampled at the same instant as the regulated current.",
        "The grid is an ideal voltage source behind the grid inductance Lg (in series with L2); the grid voltage "
        "is a disturbance and does not enter the loop gain.",
    ]
    if f.R1_ohm == 0 and f.R2_ohm == 0 and f.damping.kind == "none":
        items.append("The filter is lossless (R1 = R2 = 0): no resistive damping is credited to it.")
    else:
        items.append("Filter losses are the stated series resistances only; core losses and the frequency "
                     "dependence of winding resistance are not modelled.")
    items += [
        "Component values are nominal (tolerances, saturation of the inductors and ageing of the capacitors "
        "are covered only where a tolerance or weak-grid section says so).",
        "The loop is broken at the current controller with the damping loop closed; margins are for scaling "
        "the whole controller, with the damping gain Hi unchanged.",
        "Phase-locked loop, outer power/voltage loops and grid-voltage feed-forward are not part of the model.",
    ]
    return items


def build_assumptions(ctx: ReportContext) -> Section:
    """The modelling assumptions."""
    items = "".join(f"<li>{e(t)}</li>" for t in assumption_items(ctx.design))
    return Section("assumptions", "Modelling assumptions", f"<ul class='assume'>{items}</ul>")


def build_safety(ctx: ReportContext) -> Section:
    """The safety cautions."""
    items = "".join(f"<li>{e(t)}</li>" for t in SAFETY_CAUTIONS)
    return Section("safety", "Safety cautions", f"<div class='safety'><ul>{items}</ul></div>")


#: (section id, builder) in report order; the lead wires late modules here.
SECTION_BUILDERS: tuple[tuple[str, Callable[[ReportContext], Section]], ...] = (
    ("job", build_job),
    ("inputs", build_inputs),
    ("verdict", build_verdict),
    ("frequency", build_frequency),
    ("map", build_map),
    ("weakgrid", build_weak_grid),
    ("impedance", build_impedance),
    ("gains", build_gains),
    ("waveforms", build_waveforms),
    ("harmonics", build_harmonics),
    ("assumptions", build_assumptions),
    ("safety", build_safety),
)
SECTION_IDS = tuple(i for i, _ in SECTION_BUILDERS)

#: Sections whose failure stops the report (the rest show an error line).
_CORE = ("job", "inputs", "verdict", "frequency", "assumptions", "safety")


# ---------------------------------------------------------------------------
# options from the [report] table
# ---------------------------------------------------------------------------


def read_report_options(case) -> ReportOptions:
    """Options from the case file's optional ``[report]`` table:
    ``title`` and ``prepared_by`` (texts). Bad keys raise
    :class:`loopcheck.io.casefile.CaseError` (one line naming file, table, key)."""
    from loopcheck.io.casefile import check_keys, read_string

    t = (getattr(case, "tables", {}) or {}).get("report")
    if not t:
        return ReportOptions()
    w = case.where("report")
    check_keys(t, ("title", "prepared_by"), w)
    return ReportOptions(title=read_string(t, "title", w, ""), prepared_by=read_string(t, "prepared_by", w, ""))


# ---------------------------------------------------------------------------
# assembling
# ---------------------------------------------------------------------------


def check_tables(case) -> None:
    """Read every optional table the report's sections use, before any long
    work, so bad input fails fast. Raises :class:`loopcheck.io.casefile.CaseError`
    (one line naming the file, table and key)."""
    tables = getattr(case, "tables", {}) or {}
    design = case.design
    if _has_module("loopcheck.io.map_table"):
        from loopcheck.io.map_table import map_spec

        map_spec(case)
    if _has_module("loopcheck.design.tolerance"):
        from loopcheck.io.read_tolerance import parse_tolerance_table

        parse_tolerance_table(tables.get("tolerance"), case.where("tolerance"), design)
    if _has_module("loopcheck.design.weakgrid"):
        from loopcheck.io.read_targets import parse_targets

        parse_targets(tables.get("targets"), case.where("targets"))
    if _has_module("loopcheck.timedomain.scenario"):
        from loopcheck.io.read_scenario import parse_scenario

        parse_scenario(tables.get("scenario"), case.where("scenario"))
    if _has_module("loopcheck.io.read_pwm"):
        from loopcheck.io.read_pwm import operating_point_of, read_harmonics_options, read_pwm

        pwm, _ = read_pwm(case, required=False)
        opts = read_harmonics_options(case)
        if pwm is not None:
            operating_point_of(case, pwm, opts)
    if _has_module("loopcheck.design.firmware") and "firmware" in tables:
        from loopcheck.io.read_firmware import read_firmware_settings

        read_firmware_settings(tables["firmware"], case.where("firmware"),
                               damping_gain_used=design.control.Hi_V_per_A != 0.0)


def build_report(case, options: ReportOptions | None = None, progress: Callable[[str], None] | None = None) -> Report:
    """Analyse ``case`` and build its report.

    ``options``: :class:`ReportOptions` (default: from the case's
    ``[report]`` table). ``progress``: called with a short message as each
    part starts (never required). Core sections that fail raise; optional
    sections that fail show a visible error line and are listed in
    ``Report.problems``."""
    from loopcheck.engine.analysis import analyse
    from loopcheck.io.casefile import CaseError
    from loopcheck.engine.loop import build_loop

    t0 = time.perf_counter()
    say = progress or (lambda msg: None)
    opts = options if options is not None else read_report_options(case)
    check_tables(case)
    say("analysis")
    design = case.design
    analysis = analyse(design)
    loop = build_loop(design)
    ctx = ReportContext(case, design, analysis, loop, opts, say)
    sections, problems = [], []
    for sid, builder in SECTION_BUILDERS:
        say(f"section {sid}")
        if sid in _CORE:
            sections.append(builder(ctx))
            continue
        try:
            sections.append(builder(ctx))
        except CaseError:
            raise  # bad input in an optional table: the caller reports it (exit 2)
        except Exception as exc:  # an optional section must not sink the report; say so visibly
            msg = f"section '{sid}' could not be computed for this case: {type(exc).__name__}: {exc}"
            problems.append(msg)
            sections.append(Section(sid, sid, f"<p class='na'><strong>Not computed.</strong> {e(msg)}</p>", False))
    html_text = render_html(ctx, sections)
    from loopcheck.design.range_verdict import headline

    return Report(html_text, tuple(sections), tuple(problems), time.perf_counter() - t0, analysis.verdict,
                  headline(report_range_verdict(ctx)))


_CSS = """
:root { --ink:#1d1d1f; --muted:#5b5b66; --rule:#d6d6de; --accent:#0b4f7c; --paper:#ffffff;
        --ok:#006b4f; --okbg:#e3f4ee; --bad:#a13a00; --badbg:#fbe9df; --mid:#7a5600; --midbg:#fdf3d8; }
* { box-sizing: border-box; }
html { font-size: 15px; }
body { margin: 0; color: var(--ink); background: #f2f2f5;
       font-family: "DejaVu Sans", "Liberation Sans", "Helvetica Neue", Arial, sans-serif; line-height: 1.5; }
main { max-width: 1120px; margin: 0 auto; background: var(--paper); padding: 28px 40px 48px; }
header.top { border-bottom: 3px solid var(--accent); padding-bottom: 12px; margin-bottom: 14px; }
header.top .kicker { text-transform: uppercase; letter-spacing: .12em; font-size: .78rem; color: var(--accent); }
header.top h1 { margin: 4px 0 6px; font-size: 1.75rem; line-height: 1.2; }
header.top .meta { color: var(--muted); font-size: .86rem; }
h2 { font-size: 1.3rem; margin: 0 0 10px; padding-top: 6px; color: var(--accent); }
h2 .num { display: inline-block; min-width: 1.8em; color: var(--muted); font-weight: normal; }
section { padding: 18px 0 8px; border-top: 1px solid var(--rule); }
nav.toc { font-size: .9rem; columns: 2; column-gap: 32px; margin: 10px 0 4px; padding: 0; }
nav.toc ol { margin: 0; padding-left: 1.4em; }
nav.toc a { color: var(--accent); text-decoration: none; }
nav.toc .off { color: var(--muted); }
.banner { display: flex; align-items: baseline; gap: 14px; padding: 12px 16px; margin: 6px 0 16px;
          border-radius: 4px; -webkit-print-color-adjust: exact; print-color-adjust: exact; }
.banner .glyph { font-family: "DejaVu Sans Mono", monospace; font-weight: bold; font-size: 1.05rem; }
.banner .word { font-size: 1.5rem; font-weight: bold; letter-spacing: .06em; }
.banner .why { font-size: .92rem; }
.banner-stable { background: var(--okbg); color: var(--ok); border: 2px solid var(--ok); }
.banner-unstable { background: var(--badbg); color: var(--bad); border: 4px double var(--bad); }
.banner-marginal { background: var(--midbg); color: var(--mid); border: 2px dashed var(--mid); }
.caution { border-left: 5px solid var(--bad); background: #fff6f0; padding: 8px 14px; margin: 8px 0 4px;
           font-size: .9rem; -webkit-print-color-adjust: exact; print-color-adjust: exact; }
table { border-collapse: collapse; margin: 10px 0 18px; width: 100%; font-size: .88rem; }
caption { text-align: left; font-weight: bold; padding: 4px 0; color: var(--ink); }
th, td { border-bottom: 1px solid var(--rule); padding: 4px 8px; text-align: left; vertical-align: top; }
th { background: #eef1f6; font-weight: 600; -webkit-print-color-adjust: exact; print-color-adjust: exact; }
td:nth-child(n+2) { font-variant-numeric: tabular-nums; }
td.n { white-space: nowrap; }
code { font-family: "DejaVu Sans Mono", "Liberation Mono", monospace; font-size: .86em; }
figure { margin: 12px 0 18px; break-inside: avoid; page-break-inside: avoid; }
figure img { display: block; max-width: 100%; height: auto; border: 1px solid var(--rule); }
figcaption { font-size: .86rem; color: var(--muted); margin-top: 6px; }
p.na { border: 2px dashed var(--muted); padding: 10px 14px; color: var(--muted); background: #fafafa; }
.warn { border-left: 5px solid var(--mid); background: var(--midbg); padding: 4px 14px; font-size: .9rem; }
.safety { border: 3px solid var(--bad); padding: 6px 16px; background: #fff6f0; }
.safety li { margin: 6px 0; }
p.read { font-size: .92rem; background: #f6f8fb; padding: 8px 12px; border-left: 3px solid var(--accent); }
p.desc { font-style: italic; }
p.src { color: var(--muted); font-size: .86rem; }
footer { margin-top: 24px; color: var(--muted); font-size: .8rem; border-top: 1px solid var(--rule); padding-top: 8px; }
@page { size: A4; margin: 14mm 12mm 16mm; }
@media print {
  html { font-size: 11pt; }
  body { background: #fff; }
  main { max-width: none; padding: 0; }
  section { border-top: none; }
  section.major { break-before: page; page-break-before: always; }
  table, .banner, .safety, .caution { break-inside: avoid; page-break-inside: avoid; }
  thead { display: table-header-group; }
  a { color: inherit; text-decoration: none; }
}
"""


def render_html(ctx: ReportContext, sections: list[Section]) -> str:
    """The whole HTML document (self-contained: inline CSS, data: images, no script)."""
    d, a, o = ctx.design, ctx.analysis, ctx.options
    name = d.name or "unnamed design"
    title = o.title or f"Current-loop design report: {name}"
    stamp = _dt.datetime.now().strftime("%Y-%m-%d %H:%M")
    meta = [f"case file <code>{e(str(ctx.case.path))}</code>", f"generated {e(stamp)} by loopcheck {e(__version__)}"]
    if o.prepared_by:
        meta.insert(0, f"prepared by {e(o.prepared_by)}")
    toc = "".join(
        f"<li><a href='#{e(s.id)}'>{e(s.title)}</a>{'' if s.available else ' <span class=off>(not available)</span>'}</li>"
        for s in sections
    )
    major = {"verdict", "frequency", "map", "weakgrid", "impedance", "gains", "waveforms", "harmonics", "assumptions"}
    body = []
    for i, s in enumerate(sections, 1):
        cls = "major" if (s.id in major and s.available) else ""  # no page for a one-line section
        state = "ok" if s.available else "na"
        body.append(
            f"<section id='{e(s.id)}' class='{cls}' data-state='{state}'>"
            f"<h2><span class='num'>{i}</span>{e(s.title)}</h2>{s.body_html}</section>"
        )
    caution = (
        "<div class='caution'><strong>Caution.</strong> Grid-connected converters carry lethal voltages and an "
        "unstable current loop can destroy hardware. This report is a model result and no substitute for "
        "protection, hardware tests, grid-code compliance testing or licensed engineering sign-off; local codes "
        "and the utility's interconnection rules govern. See <a href='#safety'>the safety cautions</a>.</div>"
    )
    return (
        "<!DOCTYPE html>\n<html lang='en'>\n<head>\n<meta charset='utf-8'>\n"
        "<meta name='viewport' content='width=device-width, initial-scale=1'>\n"
        f"<meta name='generator' content='loopcheck {e(__version__)}'>\n"
        f"<title>{e(title)}</title>\n<style>{_CSS}</style>\n</head>\n<body>\n<main>\n"
        f"<header class='top'><div class='kicker'>loopcheck design report</div><h1>{e(title)}</h1>"
        f"<div class='meta'>{' &middot; '.join(meta)}</div></header>\n"
        f"{verdict_banner(a, report_range_verdict(ctx))}\n{caution}\n"
        f"<nav class='toc' aria-label='Contents'><ol>{toc}</ol></nav>\n"
        + "\n".join(body)
        + "\n<footer>Numbers are in SI units unless a unit says otherwise. Verdicts come from the closed-loop "
        "eigenvalues of the sampled model; margins from the factored frequency response of the same model.</footer>\n"
        "</main>\n</body>\n</html>\n"
    )
