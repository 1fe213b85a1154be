"""Human-readable summary of one analysed case (pure string building).

:func:`format_summary` turns a :class:`~loopcheck.io.casefile.Case` and its
:class:`~loopcheck.engine.results.Analysis` into plain ASCII text with the unit on
every number; the ``check`` command prints it. Nothing here prints or
imports numpy.
"""

from __future__ import annotations

import math

from loopcheck.engine.damping_text import critical_formula, describe, is_filtered
from loopcheck.engine.units import format_quantity as q

__all__ = ["format_summary", "describe_design"]

_LABEL_WIDTH = 13


def _block(label: str, lines: list[str]) -> list[str]:
    out = []
    for i, line in enumerate(lines):
        head = label if i == 0 else ""
        out.append(f"  {head:<{_LABEL_WIDTH}}{line}")
    return out


def _deg(x: float | None, signed: bool = False) -> str:
    if x is None or not math.isfinite(x):
        return "n/a"
    return f"{x:+.1f} deg" if signed else f"{x:.1f} deg"


def _db(x: float | None) -> str:
    if x is None or not math.isfinite(x):
        return "n/a"
    return f"{x:+.2f} dB"


def _factor(x: float | None) -> str:
    if x is None or not math.isfinite(x):
        return "n/a"
    return f"{x:.4g}"


def _delay_text(delay: float) -> str:
    return f"{delay:g} sampling period" + ("" if delay == 1 else "s")


def _side_meaning(side: str, feedback: str, Hi: float) -> str:
    """What the side of the critical frequency means for this loop (the
    small-gain rule; the eigenvalue verdict is the exact answer)."""
    if side == "below":
        if feedback == "grid":
            rule = "grid-current feedback needs active damping there, a positive Hi damps"
        else:
            rule = "converter-current feedback is damped by the delay there"
    else:
        if feedback == "grid":
            rule = "grid-current feedback is damped by the delay there, a positive Hi works against it"
        else:
            rule = "converter-current feedback is anti-damped by the delay there"
    return f"{rule} (small-gain rule of thumb; the verdict below is exact)"


def describe_design(design) -> list[str]:
    """Lines describing the design's inputs (units on every number)."""
    f, g, s, c = design.filter, design.grid, design.sampling, design.control
    lines = [
        f"filter  L1 = {q(f.L1_H, 'H')}, C = {q(f.C_F, 'F')}, L2 = {q(f.L2_H, 'H')}, "
        f"R1 = {q(f.R1_ohm, 'Ohm')}, R2 = {q(f.R2_ohm, 'Ohm')}",
    ]
    d = f.damping
    if d.kind == "none":
        lines.append("        passive damping: none")
    elif d.kind == "series-R":
        lines.append(f"        passive damping: series-R, Rd = {q(d.Rd_ohm, 'Ohm')} in series with C")
    elif d.kind == "split-RC":
        lines.append(f"        passive damping: split-RC, Cd = {q(d.Cd_F, 'F')} in series with Rd = {q(d.Rd_ohm, 'Ohm')}")
    else:
        lines.append(
            f"        passive damping: split-RLC, Cd = {q(d.Cd_F, 'F')} in series with "
            f"Rd = {q(d.Rd_ohm, 'Ohm')} parallel Ld = {q(d.Ld_H, 'H')}"
        )
    grid = f"grid    f = {q(g.f_hz, 'Hz')}, Lg = {q(g.Lg_H, 'H')}, Rg = {q(g.Rg_ohm, 'Ohm')}"
    if g.Lg_range_H is not None:
        grid += f", Lg range {q(g.Lg_range_H[0], 'H')} to {q(g.Lg_range_H[1], 'H')}"
    lines.append(grid)
    lines.append(f"sample  fs = {q(s.fs_hz, 'Hz')}, computation delay {_delay_text(s.delay)}, ZOH modulator")
    which = "grid-side current i2" if c.feedback == "grid" else "converter-side current i1"
    ctrl = f"control {c.kind} on the {which}, Kp = {q(c.Kp_V_per_A, 'V/A', prefix=False)}"
    if c.kind == "PI":
        ctrl += f", Ki = {q(c.Ki_V_per_As, 'V/A/s', prefix=False)} ({c.integrator})"
    elif c.kind == "PR":
        unit = "V/A" if c.wc_rad_s > 0 else "V/A/s"
        orders = ", ".join(str(h) for h in (1,) + tuple(c.harmonics))
        ctrl += f", Kr = {q(c.Kr, unit, prefix=False)} at h = {orders} ({c.resonator}"
        ctrl += f", wc = {q(c.wc_rad_s, 'rad/s', prefix=False)})" if c.wc_rad_s > 0 else ")"
    lines.append(ctrl)
    if c.Hi_V_per_A == 0:
        lines.append("        capacitor-current damping: off (Hi = 0 V/A)")
    else:
        lines.append(f"        capacitor-current damping: Hi = {q(c.Hi_V_per_A, 'V/A', prefix=False)}" + (f" x H(z), {describe(c.damping_filter)}" if is_filtered(c) else ""))
    return lines


def format_summary(case, analysis, range_verdict=None, closed_loop=None) -> str:
    """The ``check`` summary of one case as text (no trailing newline).

    ``range_verdict``: a :class:`loopcheck.design.range_verdict.RangeVerdict`; when
    the case declares an Lg range or tolerances, the headline under the
    title states the result over them beside the nominal verdict."""
    a = analysis
    design = case.design
    fs = design.sampling.fs_hz
    delay = design.sampling.delay
    out = [f"{design.name}  ({case.path})"]
    if range_verdict is not None and range_verdict.declared:
        from loopcheck.design.range_verdict import headline

        out.append(f"  VERDICT: {headline(range_verdict)}")
    if case.description:
        out.append(f"  {case.description}")
    out += _block("design", describe_design(design))

    side = "BELOW" if a.resonance_side == "below" else "ABOVE"
    meaning = _side_meaning(a.resonance_side, design.control.feedback, design.control.Hi_V_per_A)
    out += _block(
        "resonance",
        [
            f"{q(a.resonance_hz, 'Hz')} with Lg, {q(a.resonance_no_grid_hz, 'Hz')} without Lg "
            f"(fr/fs = {a.resonance_hz / fs:.4f})",
            f"critical frequency {critical_formula(design)} = {q(a.critical_hz, 'Hz')} (delay {delay:g}); "
            f"the resonance lies {side} it:",
            meaning,
        ],
    )

    verdict_line = {
        "stable": f"STABLE: spectral radius {a.spectral_radius:.6f} < 1 (tolerance {a.tolerance:.0e})",
        "marginal": f"MARGINAL: spectral radius {a.spectral_radius:.6f} within {a.tolerance:.0e} of 1 "
        f"(poles on the unit circle: sustained oscillation)",
        "unstable": f"UNSTABLE: spectral radius {a.spectral_radius:.6f} > 1 "
        f"({a.closed_loop_unstable_poles} closed-loop poles outside the unit circle)",
    }.get(a.verdict, f"{a.verdict.upper()}: spectral radius {a.spectral_radius:.6f}")
    verdict_lines = [verdict_line + "; from the closed-loop eigenvalues"]
    if range_verdict is not None and range_verdict.declared:
        from loopcheck.design.range_verdict import range_text

        verdict_lines[0] += " at the nominal Lg"
        verdict_lines.append("over what the case declares: " + range_text(range_verdict))
    out += _block("verdict", verdict_lines)
    if closed_loop is not None:
        cl_lines = []
        bw = closed_loop.bandwidth_hz
        if bw is not None:
            cl_lines.append(f"bandwidth {q(bw, 'Hz')} (|i/i_ref| = |L/(1+L)| falls to -3 dB)")
        elif a.stable:
            cl_lines.append("bandwidth: n/a (|L/(1+L)| does not cross -3 dB below fs/2)")
        tr = closed_loop.tracking
        if tr is not None:
            cl_lines.append(
                f"tracking at {q(tr.frequency_hz, 'Hz')}: |i/i_ref| = {tr.gain:.5f}, phase {tr.phase_deg:+.3f} deg, "
                f"error {100 * tr.error:.3g} % of the reference amplitude"
            )
        yg = closed_loop.grid_voltage_admittance_S
        if yg is not None:
            cl_lines.append(
                f"grid-voltage rejection at {q(design.grid.f_hz, 'Hz')}: |i2/vg| = {q(abs(yg), 'S')} "
                f"(each volt of grid voltage there drives {q(abs(yg), 'A')} of grid current)"
            )
        for p in closed_loop.poles:
            osc = f"{q(p.damped_frequency_hz, 'Hz')}" if p.damped_frequency_hz > 0 else "real"
            cl_lines.append(
                f"pole |z| = {p.magnitude:.6f}: {osc}, damping ratio {p.damping_ratio:.3g}, "
                f"rate {p.rate_per_s:.4g} 1/s" + (" (grows)" if p.rate_per_s > 0 else "")
            )
        out += _block("closed loop", cl_lines)

    out += _block(
        "open loop",
        [
            f"{a.open_loop_unstable_poles} poles outside the unit circle, {a.open_loop_circle_poles} on it "
            f"(loop broken at the current controller, damping loop closed)"
        ],
    )

    if a.crossovers:
        lines = []
        for c in a.crossovers:
            lines.append(
                f"{q(c.frequency_hz, 'Hz')}: loop phase {_deg(c.phase_deg, True)}, phase margin "
                f"{_deg(c.phase_margin_deg, True)} (extra {c.reaches_minus1_with} reaches -1)"
            )
        if a.phase_margin_deg is not None:
            lines.append(f"phase margin (smallest at any crossover): {_deg(a.phase_margin_deg)}")
        out += _block("crossovers", lines)
    else:
        out += _block("crossovers", ["none (|L| never equals 1 on 0 Hz .. fs/2)"])

    gm = a.gain_margin
    if gm is None:
        gm_lines = [
            "n/a: the loop is not stable at the design gain"
            if not a.stable
            else "n/a: not found (a crossing may fall between frequency points)"
        ]
    else:
        low = (
            "no lower limit (stable as the gain goes to 0)"
            if gm.lower_factor == 0
            else f"down to x{_factor(gm.lower_factor)} ({_db(gm.lower_db)})"
        )
        high = (
            "no upper limit" if gm.upper_factor is None else f"up to x{_factor(gm.upper_factor)} ({_db(gm.upper_db)})"
        )
        gm_lines = [f"controller gain may be scaled {low}, {high}"]
    intervals = [iv for iv in a.stable_gain_intervals]
    if intervals:
        parts = [f"{_factor(lo)} .. {'inf' if hi is None else _factor(hi)}" for lo, hi in intervals]
        gm_lines.append("all stable gain factors: " + ", ".join(parts))
    else:
        gm_lines.append("no controller-gain factor makes the loop stable")
    out += _block("gain margin", gm_lines)

    nyq = fs / 2.0
    if a.phase_crossings:
        lines = []
        for pc in a.phase_crossings:
            at_nyq = " (Nyquist frequency)" if abs(pc.frequency_hz - nyq) <= 1e-6 * nyq else ""
            lines.append(
                f"{q(pc.frequency_hz, 'Hz')}{at_nyq}: |L| = {_db(pc.gain_db)}, "
                f"gain factor to reach -1: x{_factor(pc.factor)}"
            )
        out += _block("-180 deg", lines)
    else:
        out += _block("-180 deg", ["none on 0 Hz .. fs/2 (including the Nyquist frequency)"])

    sp = a.sensitivity_peak
    sp_db = 20 * math.log10(sp.value) if sp.value and math.isfinite(sp.value) and sp.value > 0 else None
    out += _block(
        "sensitivity",
        [f"peak |1/(1+L)| = {_factor(sp.value)} ({_db(sp_db)}) at {q(sp.frequency_hz, 'Hz')}"],
    )

    P = a.open_loop_unstable_poles
    Z = a.closed_loop_unstable_poles
    if a.nyquist_consistent:
        ny = (
            f"consistent: {a.nyquist_encirclements} counter-clockwise encirclements of -1 "
            f"= P - Z = {P} - {Z} (argument principle, checked against the eigenvalues)"
        )
    else:
        ny = (
            f"MISMATCH: {a.nyquist_encirclements} encirclements of -1, but P - Z = {P} - {Z} = {P - Z}; "
            f"the margins above may have missed a crossing (the verdict stands: it comes from the eigenvalues)"
        )
    out += _block("nyquist", [ny])

    if case.warnings:
        n = len(case.warnings)
        out += _block("warnings", [f"{n} about the case file, printed on stderr"])
    return "\n".join(out)
