"""``loopcheck impedance``: output admittance, passivity bands and the
impedance-ratio verdict on the case's grid."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from loopcheck.cli.common import (
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
    from loopcheck.engine.damping_text import is_filtered

    if is_filtered(case.design.control):
        fail(f"{case.path}: [control] damping_filter: the impedance study models the measured capacitor current only, "
             f"got {case.design.control.damping_filter.kind!r}")

    from loopcheck.io.casefile import CaseError
    from loopcheck.design.grid_network import study
    from loopcheck.io.read_network import read_feedforward, read_grid_network
    from loopcheck.io.impedance_text import impedance_text

    try:
        net = read_grid_network(case)
        ffw = read_feedforward(case)
        result = study(case.design, net, feedforward=ffw)
    except CaseError as exc:
        fail(str(exc))
    print_warnings(case)
    if output is not None:
        from loopcheck.figures.admittance_plot import impedance_figure

        write_figure(impedance_figure(case.design, result, title=case.design.name), output, "-o")
    if json_output:
        typer.echo(json_line(_record(case, result)))
    else:
        typer.echo(impedance_text(case, result))
        typer.echo("")
        typer.echo(CAUTION)
    if fail_on_unstable:
        bad = result.ratio.verdict != "stable" or (result.exact is not None and not result.exact.stable)
        if bad:
            raise typer.Exit(EXIT_UNSTABLE)


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
