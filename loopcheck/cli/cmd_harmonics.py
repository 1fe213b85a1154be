"""``loopcheck harmonics``: switching sidebands of the grid current against
the IEEE 519 / IEEE 1547 limits, and passive versus active damping in watts."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from loopcheck.cli.common import (
    case_verdict,
    check_figure_output,
    fail,
    json_line,
    load_case,
    print_warnings,
    warn,
    write_figure,
)

#: Exit code of ``--fail-on-overmodulation`` when the modulator leaves its linear range.
EXIT_OVERMODULATED = 3

CAUTION = (
    "Design aid, not a compliance test: the limits apply at the point of common coupling and are "
    "verified by measurement; local codes and the utility's interconnection rules govern."
)


def harmonics(
    case: Annotated[Path, typer.Argument(help="Case file (TOML) with a [pwm] table.", show_default=False,
                                         metavar="CASE.toml")],
    output: Annotated[
        Optional[Path],
        typer.Option("--output", "-o", help="Write the sideband figure (PNG, SVG or PDF by suffix).", show_default=False),
    ] = None,
    top: Annotated[int, typer.Option("--top", min=1, max=200, help="Number of largest sidebands listed.")] = 8,
    json_output: Annotated[bool, typer.Option("--json", help="Print one JSON object instead of the text summary.")] = False,
    fail_on_overmodulation: Annotated[
        bool,
        typer.Option("--fail-on-overmodulation",
                     help=f"Exit with code {EXIT_OVERMODULATED} when the operating point over-modulates at any evaluated Lg."),
    ] = False,
) -> None:
    """Grid-current sidebands around the switching frequency and its
    multiples (PWM Bessel expressions through the LCL filter) against the
    current-distortion limits of IEEE Std 519-2014 and IEEE Std 1547-2018,
    at the nominal grid inductance and over the Lg range; and the loss of
    a passive damping resistor (fundamental and ripple) beside the active
    (virtual-resistor) design.

    Over-modulation (a modulation index beyond the linear range of the
    [pwm] modulation, at the nominal Lg or anywhere over the Lg range) is a
    finding printed with the result, not an input error.

    Exit codes: 0 the check ran (whatever its outcome); 2 bad input;
    3 over-modulation, only with --fail-on-overmodulation.
    """
    loaded = load_case(case)
    check_figure_output(output)
    from loopcheck.io.casefile import CaseError
    from loopcheck.io.read_pwm import operating_point_of, read_harmonics_options, read_pwm

    try:
        pwm, pwm_warn = read_pwm(loaded, required=True)
        opts = read_harmonics_options(loaded)
        op = operating_point_of(loaded, pwm, opts)
    except CaseError as exc:
        fail(str(exc))
    print_warnings(loaded)
    for msg in pwm_warn:
        warn(msg)

    from loopcheck.harmonics.spectrum import harmonic_check
    from loopcheck.design.passive import compare_damping

    design = loaded.design
    check = harmonic_check(design, pwm, op, opts.max_group, opts.max_sideband, opts.lg_points)
    losses = compare_damping(design, op, pwm, opts.max_group, opts.max_sideband)
    # the sideband estimate presumes a stable current loop; say so when it is not
    from loopcheck.engine.analysis import analyse

    from loopcheck.io.findings import unstable_loop_note

    loop = analyse(design)
    loop_note = unstable_loop_note(loop)
    from loopcheck.design.range_verdict import case_verdict_line, headline

    rv = case_verdict(loaded)

    files = []
    if output is not None:
        from loopcheck.figures.harmonics_plot import harmonics_figure

        fig = harmonics_figure(check, name=design.name)
        write_figure(fig, output)
        files.append(str(output))

    if json_output:
        typer.echo(json_line({
            "case": loaded.path,
            "name": design.name,
            "harmonics": check,
            "damping_losses": losses,
            "files": files,
            "loop_verdict": loop.verdict,
            "headline": headline(rv),
            "range_verdict": rv.to_dict(),
            "overmodulation": {
                "nominal": check.overmodulated,
                "Lg_H": list(check.overmodulated_Lg_H),
                "linear_limit": check.linear_limit,
                "modulation": check.modulation,
                "findings": list(check.findings),
            },
            "caution": CAUTION,
            "warnings": list(loaded.warnings) + list(pwm_warn) + ([loop_note] if loop_note else []),
        }))
        _exit_for(check, fail_on_overmodulation)
        return

    w = check.worst
    lines = [
        f"harmonics: {design.name} ({loaded.path})",
        *([case_verdict_line(rv)] if rv.declared else []),
        f"  modulator: {pwm.scheme}, {pwm.modulation} reference, {pwm.update} update, fsw = {pwm.fsw_hz:,.0f} Hz, "
        f"Vdc = {pwm.Vdc_V:.4g} V; modulation index M = {check.modulation_index:.3f} "
        f"(linear up to {check.linear_limit:.4f})",
        f"  operating point: {op.current_rms_A:.4g} A rms at {op.current_phase_deg:+.3g} deg to the grid voltage "
        f"({op.grid_peak_V:.4g} V peak); rated current {op.rated_current_rms_A:.4g} A rms",
        f"  grid inductance Lg = {check.Lg_H * 1e3:.4g} mH",
        *([f"  WARNING: {loop_note}"] if loop_note else []),
        *([f"  FINDING: {check.findings[0]}"] + [f"    {t}" for t in check.findings[1:]] if check.findings else []),
        "",
        f"  {'sideband':<12}{'frequency':>12}{'order h':>10}{'converter':>12}{'|i2/vi|':>11}{'grid current':>14}"
        f"{'limit':>9}{'margin':>10}",
        f"  {'(m, n)':<12}{'[Hz]':>12}{'':>10}{'[V peak]':>12}{'[mA/V]':>11}{'[% rated]':>14}{'[%]':>9}{'[dB]':>10}",
    ]
    biggest = sorted(check.sidebands, key=lambda s: -s.percent)[:top]
    for s in sorted(biggest, key=lambda s: s.frequency_hz):
        mark = " *" if s is w or (s.m, s.n) == (w.m, w.n) else ""
        lim = f"{s.limit_percent:.3g}{'a' if s.assumed_limit else ''}"
        lines.append(
            f"  {f'({s.m}, {s.n:+d})':<12}{s.frequency_hz:>12,.0f}{s.order:>10.1f}{s.converter_V:>12.4g}"
            f"{s.admittance_S * 1e3:>11.4g}{s.percent:>14.4g}{lim:>9}{s.margin_db:>+10.1f}{mark}"
        )
    verdict = ("no verdict on the limits while the loop is not stable" if loop_note
               else "within the limits" if check.complies else "ABOVE the limits")
    lines += [
        "  (* worst sideband; 'a': limit from loopcheck's above-table assumption, see below)",
        "",
        f"  worst sideband: {w.frequency_hz:,.0f} Hz (h = {w.order:.1f}), {w.percent:.4g} % of rated current, "
        f"limit {w.limit_percent:.3g} %, margin {w.margin_db:+.1f} dB -> {verdict}",
        f"  all sidebands together: {check.total_percent:.4g} % of rated current (rss; the standards' 5 % TDD/TRD "
        "covers h <= 50 only)",
    ]
    if check.worst_over_range is not None:
        r = check.worst_over_range
        lo, hi = design.grid.Lg_range_H
        lines.append(
            f"  over Lg = {lo * 1e3:.4g} .. {hi * 1e3:.4g} mH ({len(check.lg_sweep)} values): smallest margin "
            f"{r.margin_db:+.1f} dB at Lg = {r.Lg_H * 1e3:.4g} mH ({r.frequency_hz:,.0f} Hz, {r.percent:.4g} %)"
            + (" (over-modulated there: clipped reference, indicative)" if r.overmodulated else "")
        )
    lines += ["", "  damping resistor loss (per phase and total):",
              f"    {'variant':<62}{'zeta':>6}{'fund. [W]':>11}{'ripple [W]':>12}{'total [W]':>11}"]
    for v in losses.variants:
        rip = "n/a" if v.ripple_W is None else f"{v.ripple_W:.3g}"
        lines.append(
            f"    {v.label[:62]:<62}{v.damping_ratio:>6.3f}{v.fundamental_W:>11.3g}{rip:>12}{v.total_W:>11.4g}"
        )
    lines.append("    (zeta: damping ratio of the filter resonance without control; fund./ripple: per phase)")
    for n in losses.notes:
        lines.append(f"    note: {n}")
    lines += ["", "  limits: " + "; ".join(check.limit_tables), "  assumptions:"]
    lines += [f"    - {a}" for a in check.assumptions]
    lines += ["", f"  {CAUTION}"]
    lines += [f"  wrote {f}" for f in files]
    typer.echo("\n".join(lines))
    _exit_for(check, fail_on_overmodulation)


def _exit_for(check, fail_on_overmodulation: bool) -> None:
    if fail_on_overmodulation and check.findings:
        raise typer.Exit(EXIT_OVERMODULATED)
