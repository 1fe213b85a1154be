"""Text of the impedance view (pure string building): the passivity bands
of the output admittance, the grid, the impedance-ratio verdict and the
eigenvalue verdict beside it. Shared by ``loopcheck impedance`` and the
report."""

from __future__ import annotations


def _hz(x) -> str:
    from loopcheck.engine.units import format_quantity

    return format_quantity(x, "Hz")


def _grid_line(result) -> str:
    from loopcheck.engine.units import format_quantity as q

    if result.measured is not None:
        m = result.measured
        return (f"grid: measured impedance {m.path} ({m.frequency_hz.size} rows, {_hz(m.frequency_hz[0])} .. "
                f"{_hz(m.frequency_hz[-1])}), {result.units} unit(s) behind it")
    n = result.network
    text = f"grid: Lg = {q(n.Lg_H, 'H')}, Rg = {q(n.Rg_ohm, 'Ohm')}"
    if n.has_shunt:
        text += f", shunt C = {q(n.C_shunt_F, 'F')} with {q(n.R_shunt_ohm, 'Ohm')} (resonance {_hz(n.resonance_hz())})"
    if result.source == "grid":
        text += " (from [grid]; no [grid_network] table)"
    if result.units > 1:
        text += f"; {result.units} identical units in parallel: each sees {result.units} x Zg in the common mode"
    return text


def impedance_text(case, result) -> str:
    """The ``impedance`` command's summary of ``result`` (an
    :class:`loopcheck.design.grid_network.ImpedanceStudy`) for ``case``."""
    from loopcheck.engine.units import format_quantity as q

    d = case.design
    p = result.passivity
    fs = d.sampling.fs_hz
    lines = [f"{d.name} ({case.path})",
             "output admittance Yo = -i2/vg at the point of connection (i2 into the grid; baseband component of the "
             "sampled loop)",
             f"  critical frequency fs/(4 delay + 2) = {_hz(p.critical_hz)}, Nyquist frequency fs/2 = {_hz(p.nyquist_hz)}"]
    ffw = result.feedforward
    if ffw is not None:
        filt = "no filter" if ffw.cutoff_hz is None else f"first-order low-pass {_hz(ffw.cutoff_hz)}"
        lines.append(f"  with grid-voltage feedforward of the sampled PCC voltage: gain {ffw.gain:g}, {filt}, "
                     "same hold and delay as the controller output")
    if p.passive:
        lines.append(f"  passive (Re Yo >= 0) from {_hz(p.f_min_hz)} to {_hz(p.f_max_hz)}")
    else:
        lines.append(f"  not passive (Re Yo < 0) between {_hz(p.f_min_hz)} and {_hz(p.f_max_hz)}:")
        for b in p.bands:
            lo = "below " + _hz(b.low_hz) if b.low_open else _hz(b.low_hz)
            hi = _hz(b.high_hz) + " (end of scan)" if b.high_open else _hz(b.high_hz)
            note = ""
            if b.low_hz >= p.nyquist_hz * (1 - 1e-9):
                note = "  above fs/2: indicative only, the left-out aliases are as large"
            elif b.low_hz <= p.critical_hz <= b.high_hz:
                note = "  contains the critical frequency"
            lines.append(f"    {lo} .. {hi}{note}")
        lines.append(f"  most negative Re Yo = {q(p.min_real_S, 'S')} at {_hz(p.min_real_hz)}")
    lines.append(_grid_line(result))
    r = result.ratio
    lines.append(f"  inverter on a stiff grid (eigenvalues): {r.stiff_verdict}")
    if result.measured is not None:
        lines.append(f"  frequency-response Nyquist count of {result.units} x Zg Yo over the data: "
                     f"{r.encirclements_cw} clockwise encirclement(s) of -1 -> {r.verdict}")
        lines.append("  valid only when all of these hold:")
        for text, ok in r.conditions:
            lines.append(f"    [{'met' if ok else 'NOT met'}] {text}")
        lines.append(f"  closest approach |1 + N Zg Yo| = {r.min_distance:.3g} at {_hz(r.min_distance_hz)}")
        lines.append("  eigenvalue verdict: not available for a measured impedance")
        return "\n".join(lines)
    lines.append(f"  impedance-ratio verdict (Nyquist count of N Zg Yo): {r.verdict}, "
                 f"{r.encirclements_cw} clockwise encirclement(s) of -1; closest approach |1 + N Zg Yo| = "
                 f"{r.min_distance:.3g} at {_hz(r.min_distance_hz)}")
    if not r.applicable:
        why = [] if r.stiff_verdict == "stable" else ["the inverter is not stable on a stiff grid"]
        if not r.grid_passive:
            why.append("the grid is not passive")
        lines.append(f"    not applicable: {'; '.join(why) or r.note}")
    if r.min_distance_hz > 0.4 * fs:
        lines.append("    the closest approach lies near or above fs/2, where the baseband admittance leaves out "
                     "aliases: trust the eigenvalue verdict")
    e = result.exact
    lines.append(f"  eigenvalue verdict (network{' and all units' if result.units > 1 else ''} inside the exact "
                 f"sampled model): {e.verdict}, spectral radius {e.spectral_radius:.6f}")
    if r.applicable and r.verdict != e.verdict:
        lines.append("  the two verdicts differ: the eigenvalue verdict is exact, the impedance-ratio one uses the "
                     "baseband admittance (docs/impedance.md)")
    return "\n".join(lines)
