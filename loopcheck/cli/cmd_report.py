"""``loopcheck report``: one self-contained HTML design report of a case."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from loopcheck.cli.common import atomic_write_text, check_output, fail, json_line, load_case, print_warnings, progress


def report(
    case: Annotated[
        Path,
        typer.Argument(help="Case file (TOML).", show_default=False, metavar="CASE.toml"),
    ],
    output: Annotated[
        Optional[Path],
        typer.Option(
            "--output", "-o",
            help="HTML file to write (default: <case name>-report.html in the current directory). "
            "Written atomically: a failed run leaves no half-written file.",
            show_default=False,
        ),
    ] = None,
    json_output: Annotated[
        bool,
        typer.Option("--json", help="Print one JSON object (file, verdict, sections) instead of the text line."),
    ] = False,
    quiet: Annotated[bool, typer.Option("--quiet", "-q", help="No progress messages on stderr.")] = False,
) -> None:
    """Write one self-contained HTML design report: the job of the design,
    inputs with units, verdict and margins, Bode and Nyquist plots of this
    loop, the sections of the other analyses available in this version,
    the modelling assumptions and the safety cautions. Figures are embedded;
    the file prints to PDF.

    Exit codes: 0 the report was written; 2 bad input.
    """
    loaded = load_case(case)
    out = output if output is not None else Path(f"{case.stem}-report.html")
    if out.exists() and out.is_dir():
        fail(f"-o {out}: is a directory; give a file name such as {out / (case.stem + '-report.html')}")
    if out.suffix.lower() not in (".html", ".htm") and not out.is_dir():
        fail(f"-o {out}: the report is an HTML file; use a name ending in .html (print it to PDF from a browser)")
    check_output(out, "-o")

    from loopcheck.io.casefile import CaseError
    from loopcheck.figures.report import SECTION_IDS, build_report, read_report_options

    try:
        options = read_report_options(loaded)
    except CaseError as exc:
        fail(str(exc))
    print_warnings(loaded)

    with progress(len(SECTION_IDS) + 1, "report", quiet=quiet) as advance:
        def step(message: str) -> None:
            if message.startswith("section ") or message == "analysis":
                advance(1)

        try:
            result = build_report(loaded, options, progress=step)
        except CaseError as exc:  # bad input in an optional table ([pwm], [scenario], [firmware], ...)
            fail(str(exc))
    try:
        atomic_write_text(out, result.html)
    except OSError as exc:
        fail(f"-o {out}: cannot write the report ({exc.strerror or exc})")
    for msg in result.problems:
        typer.echo(f"warning: {msg}", err=True)

    missing = [s.id for s in result.sections if not s.available]
    if json_output:
        typer.echo(json_line({
            "report": str(out),
            "case": loaded.path,
            "verdict": result.verdict,
            "headline": result.headline,
            "sections": [s.id for s in result.sections],
            "not_available": missing,
            "problems": list(result.problems),
            "bytes": len(result.html.encode("utf-8")),
            "seconds": round(result.elapsed_s, 3),
        }))
    else:
        extra = f"; not available in this version: {', '.join(missing)}" if missing else ""
        typer.echo(f"wrote {out} ({result.headline}; {len(result.sections)} sections{extra})")
