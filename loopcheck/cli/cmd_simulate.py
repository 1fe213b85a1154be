"""``loopcheck simulate``: time-domain proof of a design (exact sampled-data
simulation) with the simulated resonance rate set beside the closed-loop poles."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from loopcheck.cli.common import (
    case_verdict,
    check_figure_output,
    check_option_values,
    check_simulation_size,
    atomic_path,
    check_output,
    fail,
    json_line,
    load_case,
    print_warnings,
    warn,
    write_figure,
)


def _parse_compare(text: str) -> float:
    """``"Hi=0"`` or ``"Hi=5 V/A"`` -> the damping gain [V/A]."""
    from loopcheck.engine.units import UnitError, parse_quantity

    key, sep, value = text.partition("=")
    if not sep or key.strip() != "Hi":
        fail(f'--compare "{text}": expected Hi=<gain>, e.g. --compare Hi=0 or --compare "Hi=4 V/A"')
    try:
        return parse_quantity(value.strip(), "gain")
    except UnitError as exc:
        fail(f'--compare "{text}": {exc}')


def _pct(x) -> str:
    return "n/a" if x is None else f"{100.0 * x:.3g} %"


def _num(x, unit: str = "") -> str:
    if x is None:
        return "n/a"
    return f"{x:,.5g}{(' ' + unit) if unit else ''}"


def _rate_lines(label: str, rc, verdict: str) -> list[str]:
    lines = [
        f"{label}: Hi = {rc.Hi_V_per_A:.4g} V/A, Lg = {rc.Lg_H * 1e3:.4g} mH; engine verdict {verdict} "
        f"(largest |z| = {abs(rc.dominant_pole):.6f})",
        f"    {'resonance oscillation':<34}{'simulated':>14}{'closed-loop pole':>20}{'difference':>13}",
        f"    {'rate sigma = ln|z|/Ts [1/s]':<34}{_num(rc.simulated_rate_per_s):>14}"
        f"{_num(rc.predicted_rate_per_s):>20}{_pct(rc.rate_error):>13}",
        f"    {'frequency angle(z)/(2 pi Ts) [Hz]':<34}{_num(rc.simulated_frequency_hz):>14}"
        f"{_num(rc.predicted_frequency_hz):>20}{_pct(rc.frequency_error):>13}",
    ]
    if rc.envelope_rate_per_s is not None:
        lines.append(
            f"    envelope estimate (single oscillation): {_num(rc.envelope_rate_per_s, '1/s')} at "
            f"{_num(rc.envelope_frequency_hz, 'Hz')}"
        )
    else:
        lines.append("    envelope estimate: not available (no single dominant oscillation in the window)")
    trend = "grows" if (rc.simulated_rate_per_s or rc.predicted_rate_per_s) > 0 else "decays"
    tau = abs(1.0 / rc.predicted_rate_per_s) if rc.predicted_rate_per_s else float("inf")
    word = "doubles" if trend == "grows" else "halves"
    lines.append(
        f"    the oscillation {trend}: amplitude {word} every {0.6931 * tau * 1e3:.3g} ms "
        f"(fitted over {rc.samples} samples after '{rc.excitation}')"
    )
    lines.append(
        f"    dominant pole (verdict): rate {_num(rc.dominant_rate_per_s, '1/s')}, "
        f"frequency {_num(rc.dominant_frequency_hz, 'Hz')}"
    )
    return lines


def simulate(
    case: Annotated[Path, typer.Argument(help="Case file (TOML).", show_default=False, metavar="CASE.toml")],
    duration: Annotated[
        Optional[str],
        typer.Option("--duration", help='Simulated time, e.g. "80 ms" (default: [scenario] duration, else 60 ms).',
                     show_default=False),
    ] = None,
    compare: Annotated[
        Optional[str],
        typer.Option("--compare", help='Overlay a second run with another damping gain, e.g. "Hi=0" (undamped).',
                     show_default=False),
    ] = None,
    event: Annotated[
        Optional[list[str]],
        typer.Option("--event", help='Add an event, e.g. "resonance-burst at=20ms peak=15V" or '
                     '"grid-inductance-step at=30ms Lg=3mH" (repeatable; same keys as [[scenario.events]]).',
                     show_default=False, metavar="EVENT"),
    ] = None,
    output: Annotated[
        Optional[Path],
        typer.Option("--output", "-o", help="Write the waveform figure (PNG, SVG or PDF by suffix).", show_default=False),
    ] = None,
    csv: Annotated[
        Optional[Path],
        typer.Option("--csv", help="Write the waveforms as CSV (with --compare also <name>.compare.csv).",
                     show_default=False),
    ] = None,
    switched: Annotated[
        bool,
        typer.Option("--switched", help="Use the switched model (carrier-based PWM from the [pwm] table) instead of the "
                     "averaged modulator for the waveforms; the rate check stays on the averaged model."),
    ] = False,
    json_output: Annotated[bool, typer.Option("--json", help="Print one JSON object instead of the text summary.")] = False,
) -> None:
    """Simulate the continuous LCL filter under the discrete controller
    (exact integration between samples, computation delay, modulator hold)
    through the [scenario] events, and set the simulated decay or growth
    rate and frequency of the resonance oscillation beside the closed-loop
    pole that predicts them.

    Exit codes: 0 the simulation ran; 2 bad input.
    """
    loaded = load_case(case)
    from dataclasses import replace

    from loopcheck.timedomain.simulate import simulation_unsupported

    if (why := simulation_unsupported(loaded.design)) is not None:
        fail(f"{loaded.path}: {why}")

    from loopcheck.io.casefile import CaseError
    from loopcheck.io.read_scenario import parse_event_option, parse_scenario
    from loopcheck.engine.units import UnitError, parse_quantity

    try:
        extra = tuple(parse_event_option(e) for e in (event or []))
        sc = parse_scenario(loaded.tables.get("scenario"), loaded.where("scenario"), extra)
        if duration is not None:
            try:
                d_s = parse_quantity(duration, "time")
            except UnitError as exc:
                raise CaseError(f"--duration: {exc}") from None
            if not 0 < d_s <= 10.0:
                raise CaseError(f'--duration: must lie between 0 and 10 s, got "{duration}"')
            sc = replace(sc, duration_s=d_s)
            if not loaded.tables.get("scenario") and not event and sc.events and sc.events[0].time_s >= d_s:
                # the default burst (the user asked for no event): keep it inside a shorter run
                sc = replace(sc, events=(replace(sc.events[0], time_s=d_s / 3.0),))
        for ev in sc.events:
            if ev.time_s >= sc.duration_s:
                raise CaseError(
                    f"event '{ev.describe()}' at {ev.time_s * 1e3:g} ms is not before the end of the run "
                    f"({sc.duration_s * 1e3:g} ms); lengthen it with --duration"
                )
    except CaseError as exc:
        fail(str(exc))
    Hi_cmp = _parse_compare(compare) if compare is not None else None
    check_option_values(loaded.design, "Hi", Hi_cmp, "--compare")
    check_simulation_size(loaded.design, sc.duration_s, sc.points_per_sample, runs=1 if Hi_cmp is None else 2)
    check_figure_output(output)
    check_output(csv, "--csv")
    if csv is not None and Hi_cmp is not None:
        check_output(csv.with_name(csv.stem + ".compare" + (csv.suffix or ".csv")), "--csv")
    print_warnings(loaded)

    from loopcheck.io.read_pwm import read_pwm
    from loopcheck.timedomain.simulate import grid_peak_voltage_V, reference_peak_A, resonance_rate_check, write_csv
    from loopcheck.timedomain.simulate import simulate as run
    from loopcheck.engine.verdict import classify

    design = loaded.design
    try:
        pwm, pwm_warn = read_pwm(loaded, required=False)
    except CaseError as exc:
        fail(str(exc))
    if switched and pwm is None:
        fail(f"{loaded.where('pwm')}: missing table; --switched needs [pwm] with dc_link (e.g. \"750 V\")")
    if sc.phases is None and pwm is not None:
        sc = replace(sc, phases=pwm.phases)
    if switched:
        from loopcheck.timedomain.switched import sideband_check, simulate_switched
        from loopcheck.engine.threads import small_matrix_kernels

        def run_model(Hi=None):
            with small_matrix_kernels():  # block exponentials of small matrices: BLAS threads only cost here
                return simulate_switched(design, pwm, sc, Hi_V_per_A=Hi)
    else:
        def run_model(Hi=None):
            return run(design, sc, Hi_V_per_A=Hi)
    w = run_model()
    rc = resonance_rate_check(design, sc)
    w_c = rc_c = None
    if Hi_cmp is not None:
        w_c = run_model(Hi_cmp)
        rc_c = resonance_rate_check(design, sc, Hi_V_per_A=Hi_cmp)
    if switched:
        with small_matrix_kernels():
            sidebands = sideband_check(design, pwm, w, sc)
    else:
        sidebands = None

    notes = list(w.notes)
    if Hi_cmp is not None and Hi_cmp == design.control.Hi_V_per_A:
        notes.append(f"--compare Hi = {Hi_cmp:g} V/A is the design's own damping gain: the comparison repeats the design")
    if pwm is not None and not switched:
        import numpy as np

        from loopcheck.io.findings import saturation_note

        note = saturation_note(float(np.max(np.abs(w.vi_V))), pwm)
        if note:
            notes.append(note)
    if switched and pwm.modulation != "sine":
        notes.append(
            f"[pwm] modulation = {pwm.modulation!r}: the switched model compares sinusoidal leg references with the "
            "carrier (no zero-sequence injection), so its ripple is that of sine-triangle PWM"
        )
    files = []
    if output is not None:
        from loopcheck.figures.sim_plot import waveform_figure

        fig = waveform_figure(w, w_c, rc, rc_c)
        write_figure(fig, output)
        files.append(str(output))
    if csv is not None:
        targets = [(csv, w)]
        if w_c is not None:
            targets.append((csv.with_name(csv.stem + ".compare" + (csv.suffix or ".csv")), w_c))
        for path, wave in targets:
            try:
                with atomic_path(path) as tmp:
                    with open(tmp, "w", encoding="utf-8", newline="") as fh:
                        write_csv(wave, fh)
            except OSError as exc:
                fail(f"--csv {path}: cannot write the CSV ({exc.strerror or exc})")
            files.append(str(path))

    verdict = classify(abs(rc.dominant_pole))
    verdict_c = classify(abs(rc_c.dominant_pole)) if rc_c is not None else None
    from loopcheck.design.range_verdict import case_verdict_line, headline

    rv = case_verdict(loaded)
    if json_output:
        record = {
            "case": loaded.path,
            "name": design.name,
            "duration_s": sc.duration_s,
            "Ts_s": w.Ts_s,
            "delay": w.delay,
            "points_per_sample": w.points_per_sample,
            "resonance_hz": w.resonance_hz,
            "events": [{"time_s": t, "event": txt} for t, txt in w.events],
            "model": w.model,
            "design": {"verdict": verdict, "rate_check": rc, "tripped_at_s": w.tripped_at_s},
            "switched_sidebands": sidebands,
            "notes": notes + list(pwm_warn),
            "files": files,
            "warnings": list(loaded.warnings),
            "headline": headline(rv),
            "range_verdict": rv.to_dict(),
        }
        if rc_c is not None:
            record["comparison"] = {"verdict": verdict_c, "rate_check": rc_c, "tripped_at_s": w_c.tripped_at_s}
        typer.echo(json_line(record))
        return
    out = [
        f"simulate: {design.name} ({loaded.path})",
        *([case_verdict_line(rv)] if rv.declared else []),
        f"  run: {sc.duration_s * 1e3:g} ms, Ts = {w.Ts_s * 1e6:.4g} us, computation delay {w.delay:g} Ts, "
        f"{w.points_per_sample} points per sample (exact between samples), start: {sc.start}",
        f"  model: {'averaged modulator' if w.model == 'averaged' else w.model}"
        + ("; the rate check below uses the averaged model" if switched else ""),
        f"  grid voltage {grid_peak_voltage_V(design, sc):.4g} V peak, current reference "
        f"{reference_peak_A(design, sc):.4g} A peak (per phase; {sc.phases or 3}-phase reading of [grid] V and S)",
        f"  LCL resonance with Lg: {w.resonance_hz:,.1f} Hz; critical frequency fs/(4*delay+2): "
        f"{design.sampling.critical_hz:,.1f} Hz",
    ]
    for i, (t, txt) in enumerate(w.events, 1):
        out.append(f"  event ({i}) at {t * 1e3:g} ms: {txt}")
    out.append("")
    out += _rate_lines("design", rc, verdict)
    if rc_c is not None:
        out.append("")
        out += _rate_lines("comparison", rc_c, verdict_c)
    for run_, name in ((w, "design"), (w_c, "comparison")):
        if run_ is not None and run_.tripped_at_s is not None:
            out.append(f"  {name}: a current passed the trip level {run_.trip_current_A:.4g} A at "
                       f"{run_.tripped_at_s * 1e3:.4g} ms; the run stops there")
    if switched:
        out.append("")
        if sidebands is None:
            out.append("  switched model: no exact sideband comparison (needs whole-number fs/f1 and fsw/f1, two "
                       "fundamental periods after the last event, no trip)")
        else:
            out.append("  grid-current sidebands, switched simulation vs harmonic model (last two fundamental periods):")
            out.append(f"    {'(m, n)':<10}{'frequency [Hz]':>16}{'simulated [A]':>16}{'predicted [A]':>16}{'difference':>12}")
            for sb in sidebands:
                out.append(f"    {f'({sb.m}, {sb.n:+d})':<10}{sb.frequency_hz:>16,.0f}{sb.simulated_A:>16.4g}"
                           f"{sb.predicted_A:>16.4g}{100 * sb.difference:>11.2f}%")
    for n in notes:
        if "trip level" not in n:
            out.append(f"  note: {n}")
    for msg in pwm_warn:
        warn(msg)
    for f in files:
        out.append(f"  wrote {f}")
    out.append("")
    out.append("  Model results (linear parts, ideal modulator): they do not replace protection, hardware tests, "
               "grid-code compliance testing or licensed engineering sign-off.")
    typer.echo("\n".join(out))
