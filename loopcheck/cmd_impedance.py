"""``loopcheck impedance``: output admittance, passivity bands and the
impedance-ratio verdict on the case's grid."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from loopcheck.cli_common import (
    EXIT_UNSTABLE,
    check_figure_output,
    fail,
    json_line,
    load_case,
    print_warnings,
    write_figure,
)

CAUTION = (
    "caution: model results only. Grid-connected converters carry lethal voltages and an unstable loop can "
    "destroy hardware; verify at reduced voltage with protection. Local codes, the utility's interconnection "
    "rules and a licensed engineer's sign-off take precedence."
)


def impedance(
    case_file: Annotated[Path, typer.Argument(help="Case file (TOML).", show_default=False, metavar="CASE.toml")],
    output: Annotated[
        Optional[Path],
        typer.Option("-o", "--output", help="Write the admittance and Nyquist figure (.png, .svg or .pdf).",
                     show_default=False),
    ] = None,
    json_output: Annotated[bool, typer.Option("--json", help="Print one JSON object instead of the text.")] = False,
    fail_on_unstable: Annotated[
        bool,
        typer.Option("--fail-on-unstable", help="Exit with code 4 when the impedance-ratio or the eigenvalue verdict "
                     "is not stable (not applicable counts as not stable)."),
    ] = False,
) -> None:
    """Output admittance of the inverter seen from the grid and stability on the case's grid impedance.

    Yo = -i2/vg at the point of connection (i2 into the grid), from the exact
    sampled-data loop (baseband component, zero-order hold and computation
    delay included); the bands where Re Yo < 0 (not passive) with their
    edges, scanned up to fs; the impedance-ratio verdict (Nyquist count of
    N Zg Yo) on the [grid_network] table (series R-L, shunt R-C, units, or a
    measured CSV table), or on the [grid] Lg and Rg when there is none, with
    the grid-voltage feedforward of a [feedforward] table if given; and,
    for networks given as components, the exact eigenvalue verdict with the
    network inside the sampled model beside it.

    Exit codes: 0 the analysis ran; 2 bad input; 4 with --fail-on-unstable
    when a verdict is not stable.
    """
    check_figure_output(output, "-o")
    case = load_case(case_file)
    from loopcheck.damping_text import is_filtered

    if is_filtered(case.design.control):
        fail(f"{case.path}: [control] damping_filter: the impedance study models the measured capacitor current only, "
             f"got {case.design.control.damping_filter.kind!r}")

    from loopcheck.casefile import CaseError
    from loopcheck.grid_network import read_feedforward, read_grid_network, study

    try:
        net = read_grid_network(case)
        ffw = read_feedforward(case)
        result = study(case.design, net, feedforward=ffw)
    except CaseError as exc:
        fail(str(exc))
    print_warnings(case)
    if output is not None:
        from loopcheck.admittance_plot import impedance_figure

        write_figure(impedance_figure(case.design, result, title=case.design.name), output, "-o")
    if json_output:
        typer.echo(json_line(_record(case, result)))
    else:
        typer.echo(_text(case, result))
        typer.echo("")
        typer.echo(CAUTION)
    if fail_on_unstable:
        bad = result.ratio.verdict != "stable" or (result.exact is not None and not result.exact.stable)
        if bad:
            raise typer.Exit(EXIT_UNSTABLE)


def _hz(x) -> str:
    from loopcheck.units import format_quantity

    return format_quantity(x, "Hz")


def _grid_line(result) -> str:
    from loopcheck.units import format_quantity as q

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


def _text(case, result) -> str:
    from loopcheck.units import format_quantity as q

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


def _record(case, result) -> dict:
    from dataclasses import asdict

    p = result.passivity
    rec = {
        "name": case.design.name,
        "case": case.path,
        "admittance": {
            "convention": "Yo = -i2/vg, i2 into the grid, baseband component",
            "critical_hz": p.critical_hz,
            "nyquist_hz": p.nyquist_hz,
            "scan_hz": [p.f_min_hz, p.f_max_hz],
            "passive": p.passive,
            "nonpassive_bands": [asdict(b) for b in p.bands],
            "min_real_S": p.min_real_S,
            "min_real_hz": p.min_real_hz,
        },
        "feedforward": None if result.feedforward is None else asdict(result.feedforward),
        "grid": {"source": result.source, "units": result.units},
        "impedance_ratio": None,
        "eigenvalue": None,
        "warnings": list(case.warnings),
    }
    if result.network is not None:
        rec["grid"].update({k: v for k, v in asdict(result.network).items() if k not in ("units", "measured")})
    if result.measured is not None:
        m = result.measured
        rec["grid"].update({"measured": m.path, "rows": int(m.frequency_hz.size)})
        r = result.ratio
        rec["impedance_ratio"] = {
            "method": "frequency-response Nyquist count over the measured data",
            "verdict": r.verdict, "encirclements_cw": r.encirclements_cw, "stiff_grid_verdict": r.stiff_verdict,
            "grid_passive": r.grid_passive, "min_distance": r.min_distance, "min_distance_hz": r.min_distance_hz,
            "conditions": [{"condition": t, "met": ok} for t, ok in r.conditions],
        }
    else:
        r = result.ratio
        rec["impedance_ratio"] = {k: v for k, v in asdict(r).items()}
        rec["impedance_ratio"]["method"] = "Nyquist count of N Zg Yo on s = sigma + jw"
        rec["eigenvalue"] = asdict(result.exact)
    return rec
