"""The ``loopcheck`` command line.

This module only builds the typer application and registers the commands.
Each command lives in its own module ``loopcheck/cmd_<name>.py`` and exposes
one function; registering it here is one import and one line::

    from loopcheck import cmd_check
    app.command("check")(cmd_check.check)

Command modules import only the standard library and typer at module level;
numpy, scipy, control and matplotlib are imported inside the command bodies,
so ``loopcheck --help`` does not load them.
"""

from __future__ import annotations

from typing import Annotated, Optional

import typer

from loopcheck import __version__

app = typer.Typer(
    name="loopcheck",
    help=(
        "Stability and margins of the digitally sampled current loop of an "
        "LCL-filtered grid-connected inverter (computation delay, ZOH, "
        "capacitor-current active damping)."
    ),
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,
)


def _version_callback(value: bool) -> None:
    if value:
        typer.echo(f"loopcheck {__version__}")
        raise typer.Exit()


@app.callback()
def _main(
    version: Annotated[
        Optional[bool],
        typer.Option("--version", callback=_version_callback, is_eager=True, help="Print the version and exit."),
    ] = None,
) -> None:
    """Stability and margins of the digitally sampled current loop of an
    LCL-filtered grid-connected inverter."""


# --- command registration: one import and one line per command -------------
# (in the order of the design work, which is the order `loopcheck --help` lists)
from loopcheck import cmd_check  # noqa: E402

app.command("check")(cmd_check.check)
from loopcheck import cmd_map  # noqa: E402

app.command("map")(cmd_map.map_command)
from loopcheck import cmd_grid  # noqa: E402

app.command("grid")(cmd_grid.grid)
from loopcheck import cmd_impedance  # noqa: E402

app.command("impedance")(cmd_impedance.impedance)
from loopcheck import cmd_pick  # noqa: E402

app.command("pick")(cmd_pick.pick)
from loopcheck import cmd_export  # noqa: E402

app.command("export")(cmd_export.export)
from loopcheck import cmd_simulate  # noqa: E402

app.command("simulate")(cmd_simulate.simulate)
from loopcheck import cmd_harmonics  # noqa: E402

app.command("harmonics")(cmd_harmonics.harmonics)
from loopcheck import cmd_report  # noqa: E402

app.command("report")(cmd_report.report)
