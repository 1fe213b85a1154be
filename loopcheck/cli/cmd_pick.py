"""``loopcheck pick``: the damping gain Hi (and optionally Kp) with the most
worst-case room over the grid-inductance range and the tolerance corners."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Annotated, Optional

import typer

from loopcheck.cli.common import (
    EXIT_UNSTABLE,
    MAX_PICK_EVALUATIONS,
    check_figure_output,
    check_option_values,
    check_work,
    fail,
    json_line,
    load_case,
    print_warnings,
    progress,
    write_figure,
)
from loopcheck.cli.cmd_grid import (
    CAUTION,
    FractionBar,
    GainMarginOption,
    LgRangeOption,
    PhaseMarginOption,
    QuietOption,
    SensitivityPeakOption,
    lg_range_or_fail,
    read_spec_and_targets,
    worst_dict,
)


def _gain_range(option: str, values: Optional[tuple[str, str]], positive: bool = False):
    if values is None:
        return None
    from loopcheck.engine.units import UnitError, parse_quantity

    try:
        a, b = (parse_quantity(v, "gain") for v in values)
    except UnitError as exc:
        fail(f"{option}: {exc}")
    if not b > a:
        fail(f"{option}: need FROM < TO, got {values[0]} {values[1]}")
    if positive and a <= 0:
        fail(f"{option}: Kp must stay above 0 V/A, got {values[0]}")
    return a, b


def _f(x, fmt, width):
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return f"{'-':>{width}}"
    if isinstance(x, float) and math.isinf(x):
        return f"{('inf' if x > 0 else '-inf'):>{width}}"
    return f"{x:{width}{fmt}}"


def format_pick(case, r, rows: int) -> str:
    """Human report of a :class:`loopcheck.design.pick.PickResult`."""
    import numpy as np

    d = case.design
    L = [f"loopcheck pick: {d.name} ({case.path})"]
    hr = r.Hi_range_V_per_A
    s = r.scan
    if r.Kp_range_V_per_A is None:
        L.append(f"searched        Hi {hr[0]:.4g} .. {hr[1]:.4g} V/A ({s.Hi_V_per_A.size} values), Kp = {r.Kp_V_per_A:.4g} V/A (case)")
    else:
        kr = r.Kp_range_V_per_A
        L.append(f"searched        Hi {hr[0]:.4g} .. {hr[1]:.4g} V/A and Kp {kr[0]:.4g} .. {kr[1]:.4g} V/A")
    lo, hi = r.Lg_range_H
    nc = len(r.variants) - 1
    L.append(f"worst case over Lg {lo * 1e3:.4g} .. {hi * 1e3:.4g} mH ({len(r.Lg_samples_H)} samples)"
             + (f" and {nc} tolerance corners" if nc else ""))
    L.append(f"targets         {r.targets.describe()}")
    L.append("")
    if r.Hi_V_per_A is None:
        L.append("recommended     none")
    else:
        head = "recommended    " if r.meets_targets else "most robust    "  # not a recommendation if it misses a target
        L.append(f"{head} Hi = {r.Hi_V_per_A:.4g} V/A   (case: {d.control.Hi_V_per_A:.4g} V/A)"
                 + (f", Kp = {r.Kp_V_per_A:.4g} V/A (case: {d.control.Kp_V_per_A:.4g} V/A)" if r.Kp_range_V_per_A else ""))
        w = r.worst
        m = w.margins
        L.append(f"                worst-case index {r.index:.3f} (1 = on target), set by the {w.binding} "
                 f"at Lg = {w.Lg_H * 1e3:.4g} mH ({w.variant})")
        fall, rise = -float(m.gm_lower_db), float(m.gm_upper_db)
        fall_t = "without limit" if math.isinf(fall) else f"{fall:.2f} dB"
        rise_t = "without limit" if math.isinf(rise) else f"{rise:.2f} dB"
        L.append(f"                there: phase margin {float(m.phase_margin_deg):.1f} deg, gain may fall "
                 f"{fall_t} and rise {rise_t}, sensitivity peak "
                 f"{20 * math.log10(float(m.sensitivity_peak)):.2f} dB")
        L.append("                exact Lg scan at this gain: " +
                 (("stable over the whole range" + (" at every corner" if nc else "")) if r.verified_stable
                  else "UNSTABLE somewhere (see below)"))
    if r.Hi_interval_V_per_A:
        L.append("meets targets   " + ", ".join(f"{a:.4g} .. {b:.4g} V/A" for a, b in r.Hi_interval_V_per_A))
        for e in r.ends:
            L.append("  " + e.text)
    else:
        L.append("meets targets   no Hi in the searched range")
    L.append("")
    L.append(r.message)
    L.append("")
    L.append("Worst case against Hi")
    L.append(f"  {'Hi [V/A]':>9} {'index':>7} {'PM [deg]':>8} {'fall [dB]':>9} {'rise [dB]':>9} {'S [dB]':>7}")
    H = s.Hi_V_per_A
    # a grid value within rounding noise of zero (3.6e-15 from linspace) is shown as 0
    H = np.where(np.abs(H) < 1e-9 * max(float(np.ptp(H)), 1e-300), 0.0, H)
    step = max(1, int(math.ceil(H.size / rows)))
    for i in range(0, H.size, step):
        with np.errstate(all="ignore"):
            sdb = 20 * math.log10(s.sensitivity_peak[i]) if s.all_stable[i] else float("nan")
        idx = float(s.index[i])
        L.append(f"  {H[i]:9.4g} " + (f"{'unstable':>7}" if not math.isfinite(idx) else f"{idx:7.3f}") + " "
                 + _f(float(s.phase_margin_deg[i]), ".1f", 8) + " " + _f(float(s.gm_lower_room_db[i]), ".2f", 9) + " "
                 + _f(float(s.gm_upper_room_db[i]), ".2f", 9) + " " + _f(float(sdb), ".2f", 7))
    L.append("")
    L.append("caution: " + CAUTION)
    return "\n".join(L)


def pick(
    case: Annotated[Path, typer.Argument(help="Case file (TOML).", show_default=False, metavar="CASE.toml")],
    json_output: Annotated[bool, typer.Option("--json", help="Print the result as one JSON object instead of the report.")] = False,
    output: Annotated[
        Optional[Path],
        typer.Option("-o", "--output", help="Write a figure of the worst-case margins against Hi (.png, .svg or .pdf).", show_default=False),
    ] = None,
    also_kp: Annotated[bool, typer.Option("--also-kp", help="Pick Kp too, inside --kp-range (default 0.5 to 2 times the case's Kp).")] = False,
    hi_range: Annotated[
        Optional[tuple[str, str]],
        typer.Option("--hi-range", help='Hi search range FROM TO in V/A, e.g. --hi-range 0 20 (default +-1.5*2*pi*f_crit*L1).',
                     show_default=False, metavar="FROM TO"),
    ] = None,
    kp_range: Annotated[
        Optional[tuple[str, str]],
        typer.Option("--kp-range", help="Kp search range FROM TO in V/A (with --also-kp).", show_default=False, metavar="FROM TO"),
    ] = None,
    points: Annotated[int, typer.Option("--points", min=5, max=1001, help="Hi grid values before refinement.")] = 61,
    lg_points: Annotated[int, typer.Option("--lg-points", min=2, max=401, help="Lg samples over the range.")] = 21,
    lg_range: LgRangeOption = None,
    phase_margin: PhaseMarginOption = None,
    gain_margin: GainMarginOption = None,
    sensitivity_peak: SensitivityPeakOption = None,
    nominal_only: Annotated[bool, typer.Option("--nominal-only", help="Ignore the [tolerance] table (nominal filter only).")] = False,
    fail_if_none: Annotated[
        bool, typer.Option("--fail-if-none", help="Exit with code 4 when no gain meets the targets.")
    ] = False,
    quiet: QuietOption = False,
) -> None:
    """Pick the capacitor-current damping gain Hi (with --also-kp also Kp)
    that maximises the worst-case robustness over the grid-inductance range
    and the tolerance corners, against the margin targets ([targets] or the
    options; default phase margin >= 30 deg and gain margin >= 3 dB on both
    sides). Reports the recommended Hi, every Hi interval that meets the
    targets with what binds at each end, and the worst-case margins against
    Hi; when no gain meets the targets, which target fails and where.

    Exit codes: 0 the search ran; 2 bad input; 4 with --fail-if-none when no
    gain meets the targets.
    """
    loaded = load_case(case)
    check_figure_output(output)
    lo, hi = lg_range_or_fail(loaded, lg_range)
    spec, targets = read_spec_and_targets(loaded, nominal_only, phase_margin, gain_margin, sensitivity_peak)
    hr = _gain_range("--hi-range", hi_range)
    kr = _gain_range("--kp-range", kp_range, positive=True)
    if kr is not None and not also_kp:
        fail("--kp-range needs --also-kp")
    check_option_values(loaded.design, "Hi", hr, "--hi-range")
    check_option_values(loaded.design, "Kp", kr, "--kp-range")
    print_warnings(loaded)
    corners = 2 ** len(spec.components) if spec is not None else 1
    check_work(points * lg_points * (corners + 1) * (7 if also_kp else 1), MAX_PICK_EVALUATIONS,
               f"pick: {points} Hi values x {lg_points} Lg samples x {corners + 1} filters"
               + (" x 7 Kp values" if also_kp else ""),
               "lower --points or --lg-points, or use --nominal-only")

    from loopcheck.design.pick import pick_gain

    with progress(1000, "damping-gain search", quiet=quiet) as advance:
        res = pick_gain(loaded.design, (lo, hi), spec, targets, hi_range=hr, n_hi=points, n_lg=lg_points,
                        also_kp=also_kp, kp_range=kr, progress=FractionBar(advance))

    if output is not None:
        from loopcheck.figures.pick_plot import pick_figure

        fig = pick_figure(res, design_Hi_V_per_A=loaded.design.control.Hi_V_per_A,
                          title=loaded.design.name)
        write_figure(fig, output)

    if json_output:
        s = res.scan
        doc = {
            "name": loaded.design.name,
            "case": loaded.path,
            "Hi": res.Hi_V_per_A,
            "Kp": res.Kp_V_per_A,
            "Hi_interval": [list(iv) for iv in res.Hi_interval_V_per_A],
            "meets_targets": res.meets_targets,
            "robustness_index": res.index,
            "verified_stable": res.verified_stable,
            "message": res.message,
            "interval_ends": [{"Hi": e.Hi_V_per_A, "side": e.side, "binding": e.binding, "Lg_H": e.Lg_H,
                               "variant": e.variant, "text": e.text} for e in res.ends],
            "worst": None if res.worst is None else worst_dict(res.worst, targets),
            "targets": {"phase_margin_deg": targets.phase_margin_deg, "gain_margin_db": targets.gain_margin_db,
                        "sensitivity_peak_max": targets.sensitivity_peak_max},
            "Hi_range": list(res.Hi_range_V_per_A),
            "Kp_range": None if res.Kp_range_V_per_A is None else list(res.Kp_range_V_per_A),
            "Lg_range_H": list(res.Lg_range_H),
            "Lg_samples_H": list(res.Lg_samples_H),
            "variants": list(res.variants),
            "scan": {"Hi": s.Hi_V_per_A, "robustness_index": s.index, "phase_margin_deg": s.phase_margin_deg,
                     "gain_may_fall_db": s.gm_lower_room_db, "gain_may_rise_db": s.gm_upper_room_db,
                     "sensitivity_peak": s.sensitivity_peak, "all_stable": s.all_stable, "max_radius": s.max_radius},
            "units": {"Hi": "V/A", "Kp": "V/A", "Lg_H": "H"},
            "figure": str(output) if output is not None else None,
            "warnings": list(loaded.warnings),
            "caution": CAUTION,
        }
        typer.echo(json_line(doc))
    else:
        typer.echo(format_pick(loaded, res, rows=21))
    if fail_if_none and not res.meets_targets:
        raise typer.Exit(EXIT_UNSTABLE)
