"""``loopcheck check``: verdict and margins of one or more case files."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from loopcheck.cli.common import (
    EXIT_UNSTABLE,
    case_verdict,
    check_figure_output,
    fail,
    json_line,
    load_cases,
    print_warnings,
    write_figure,
)


CAUTION = (
    "caution: model results only. Grid-connected converters carry lethal voltages and an unstable loop can "
    "destroy hardware; verify at reduced voltage with protection. Local codes, the utility's interconnection "
    "rules and a licensed engineer's sign-off take precedence."
)


def check(
    cases: Annotated[
        list[Path],
        typer.Argument(help="Case files (TOML), one or more.", show_default=False, metavar="CASE.toml"),
    ],
    json_output: Annotated[
        bool,
        typer.Option("--json", help="Print one JSON object per case per line (JSON Lines) instead of the summary."),
    ] = False,
    fail_on_unstable: Annotated[
        bool,
        typer.Option("--fail-on-unstable", help="Exit with code 4 when any case is not stable at its nominal point, "
                     "over its declared Lg range or at a tolerance corner (marginal counts as not stable)."),
    ] = False,
    bode: Annotated[
        Optional[Path],
        typer.Option("-o", "--bode", help="Write the Bode figure of the loop gain (.png, .svg or .pdf); one case only.",
                     show_default=False),
    ] = None,
    nyquist: Annotated[
        Optional[Path],
        typer.Option("--nyquist", help="Write the Nyquist figure (.png, .svg or .pdf); one case only.", show_default=False),
    ] = None,
) -> None:
    """Verdict and margins of each case: resonance and critical frequency,
    closed-loop eigenvalue verdict, crossovers and phase margins, gain-margin
    interval, -180 deg crossings, sensitivity peak and the Nyquist check.

    With -o/--bode and --nyquist (one case) the Bode and Nyquist figures
    are written as files.

    The headline states the verdict at the nominal point and, where the case
    declares an Lg (or SCR) range or tolerances, over all of them.

    Exit codes: 0 the analysis ran; 2 bad input; 4 with --fail-on-unstable
    when a case is not stable at its nominal point, over its range or at a
    tolerance corner.
    """
    if (bode is not None or nyquist is not None) and len(cases) != 1:
        fail(f"{'-o' if bode is not None else '--nyquist'}: a figure needs exactly one case, got {len(cases)}")
    check_figure_output(bode, "-o")
    check_figure_output(nyquist, "--nyquist")
    loaded = load_cases(cases)  # every file is checked before any output

    from loopcheck.engine.analysis import analyse
    from loopcheck.engine.closed_loop import characterise
    from loopcheck.engine.loop import build_loop
    from loopcheck.design.range_verdict import headline
    from loopcheck.io.summary import format_summary

    verdicts = [case_verdict(case) for case in loaded]  # bad optional tables fail before any output
    any_unstable = False
    for i, (case, rv) in enumerate(zip(loaded, verdicts)):
        print_warnings(case)
        result = analyse(case.design)
        loop = build_loop(case.design)
        closed = characterise(case.design, result, loop)
        if bode is not None:
            from loopcheck.figures.bode_plot import bode_figure, sample_loop

            write_figure(bode_figure(case.design, result, curve=sample_loop(loop, case.design, result)), bode, "-o")
        if nyquist is not None:
            from loopcheck.figures.nyquist_plot import nyquist_figure, sample_contour

            write_figure(nyquist_figure(case.design, result, curve=sample_contour(loop, case.design, result)),
                         nyquist, "--nyquist")
        any_unstable |= not result.stable or not rv.stable_everywhere
        if json_output:
            record = {"name": case.design.name, "case": case.path, "headline": headline(rv)}
            record.update({k: v for k, v in result.to_dict().items() if k != "name"})
            record["range_verdict"] = rv.to_dict()
            record["closed_loop"] = closed.to_dict()
            record["warnings"] = list(case.warnings)
            typer.echo(json_line(record))
        else:
            if i:
                typer.echo("")
            typer.echo(format_summary(case, result, rv, closed))
    if not json_output and loaded:
        typer.echo("")
        typer.echo(CAUTION)
    if fail_on_unstable and any_unstable:
        raise typer.Exit(EXIT_UNSTABLE)
