"""``loopcheck export``: the controller as the firmware runs it."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Annotated, Optional

import typer

from loopcheck.cli.common import (
    EXIT_UNSTABLE,
    atomic_write_text,
    case_verdict,
    check_output,
    fail,
    json_line,
    load_case,
    print_warnings,
    to_jsonable,
    warn,
    write_failure,
)


def export(
    case: Annotated[Path, typer.Argument(help="Case file (TOML).", show_default=False, metavar="CASE.toml")],
    out_dir: Annotated[
        Optional[Path],
        typer.Option("-o", "--out-dir", help="Write <case>_controller.h and <case>_controller.json into this directory."),
    ] = None,
    header: Annotated[Optional[Path], typer.Option("--header", help="Write the C header to this path.")] = None,
    json_out: Annotated[Optional[Path], typer.Option("--json-out", help="Write the JSON export to this path.")] = None,
    json_output: Annotated[
        bool, typer.Option("--json", help="Print the JSON export on stdout instead of the summary.")
    ] = False,
    fail_on_unstable: Annotated[
        bool,
        typer.Option(
            "--fail-on-unstable",
            help="Exit with code 4 when the loop with the stored (quantised) coefficients is not stable.",
        ),
    ] = False,
    range_error: Annotated[
        bool,
        typer.Option(
            "--range-error",
            help="Put an #error in the C header when the design is not stable over the case's declared Lg range or "
                 "tolerance corners (PREFIX_ALLOW_RANGE_UNSTABLE overrides it).",
        ),
    ] = False,
) -> None:
    """The discrete current controller as difference equations (direct form I
    sections, integrator, damping gain) in the case's sampling period, in
    V/A and, with a [firmware] table, in firmware units with quantised
    coefficients; stability and margins re-checked with the stored
    coefficients. Output: a summary (or --json) on stdout, and with -o or
    --header/--json-out a C99 header of constants and a JSON file.

    Where the case declares an Lg (or SCR) range or tolerances, the summary,
    the JSON and the header state the verdict over all of it, and the header
    warns when it fails (with --range-error it also stops the build).

    Exit codes: 0 done; 2 bad input; 4 with --fail-on-unstable when the
    stored coefficients give a loop that is not stable.
    """
    if out_dir is not None and (header is not None or json_out is not None):
        fail("give either -o/--out-dir or --header/--json-out, not both")
    check_output(out_dir, "-o", directory=True)
    check_output(header, "--header")
    check_output(json_out, "--json-out")
    loaded = load_case(case)
    from loopcheck.design.firmware import export_unsupported

    if (why := export_unsupported(loaded.design)) is not None:
        fail(f"{loaded.path}: {why}")
    print_warnings(loaded)

    from loopcheck.io.casefile import CaseError
    from loopcheck.io.export_c import export_json, render_header, render_summary
    from loopcheck.design.firmware import FirmwareFormatError, FirmwareSettings, export_controller
    from loopcheck.io.read_firmware import read_firmware_settings

    where = loaded.where("firmware")
    settings = FirmwareSettings()
    if "firmware" in loaded.tables:
        try:
            settings, notes = read_firmware_settings(
                loaded.tables["firmware"], where, damping_gain_used=loaded.design.control.Hi_V_per_A != 0.0
            )
        except CaseError as exc:
            fail(str(exc))
        for n in notes:
            warn(n)
    try:
        ex = export_controller(loaded.design, settings)
    except FirmwareFormatError as exc:
        fail(f"{where} {exc.key}: {exc}")

    rv = case_verdict(loaded)
    if out_dir is not None:
        stem = Path(loaded.path).stem
        header = out_dir / f"{stem}_controller.h"
        json_out = out_dir / f"{stem}_controller.json"
        check_output(header, "-o")  # e.g. a directory of that name inside out_dir
        check_output(json_out, "-o")
    files = {}
    if header is not None:
        files["C header"] = os.fspath(header)
    if json_out is not None:
        files["JSON"] = os.fspath(json_out)
    doc = export_json(ex, loaded.path, files)
    doc["range_verdict"] = rv.to_dict()
    option = "-o" if out_dir is not None else None
    if header is not None:
        try:
            atomic_write_text(header, render_header(ex, loaded.path, rv, range_error))
        except OSError as exc:
            write_failure(option or "--header", header, exc)
    if json_out is not None:
        import json

        try:
            atomic_write_text(json_out, json.dumps(to_jsonable(doc), indent=2, allow_nan=False, ensure_ascii=False) + "\n")
        except OSError as exc:
            write_failure(option or "--json-out", json_out, exc)
    if json_output:
        typer.echo(json_line(doc))
    else:
        typer.echo(render_summary(ex, loaded.path, files, rv))
    final = ex.recheck.after if ex.recheck.after is not None else ex.recheck.before
    if json_output:  # the summary already lists them
        for w in ex.recheck.warnings:
            warn(w)
    if fail_on_unstable and not final.stable:
        raise typer.Exit(EXIT_UNSTABLE)
