"""The ``loopcheck`` command line.

This module only builds the typer application and registers the commands.
Each command lives in its own module ``loopcheck/cmd_<name>.py`` and exposes
one function; registering it here is one import and one line::

    from loopcheck.cli import cmd_check
    app.command("check")(cmd_check.check)

Command modules import only the standard library and typer at module level;
numpy, scipy, control and matplotlib are imported inside the command bodies,
so ``loopcheck --help`` does not load them.
"""

from __future__ import annotations

from typing import Annotated, Optional

import contextlib
import errno
import os
import signal
import sys
import threading
import warnings

import typer
from typer.core import TyperGroup
from typer.exceptions import TyperException

from loopcheck import __version__
from loopcheck.cli import common as cli_common


class _Terminated(SystemExit):
    """SIGINT or SIGTERM, raised in the main thread so that ``finally`` blocks
    and the atomic writes clean up their temporary files (exit status 128 +
    the signal number: 130 for Ctrl-C, 143 for SIGTERM; common practice)."""


class _Signals:
    """The signals received during a run. They are recorded as well as
    raised, because an exception raised by a signal handler can be swallowed
    (for instance inside a weakref callback during an import, which Python
    reports as "Exception ignored" and continues): a run that received one
    never commits its outputs and exits 128 + the signal number."""

    received: list[int] = []
    armed = False  # raise only while the command runs, not while ending the session


def _on_signal(signum, frame):  # pragma: no cover - exercised in subprocess tests
    _Signals.received.append(signum)
    if _Signals.armed:
        raise _Terminated(128 + signum)


class LoopcheckGroup(TyperGroup):
    """The command group with loopcheck's run discipline:

    - a usage error of the command line (unknown option, missing argument,
      a value that is not a number) is one line ``error: ...`` on stderr
      naming the option, exit 2, instead of the usage block;
    - one run is one output session (see :mod:`loopcheck.cli.common`): the
      output files appear together when the command ends with exit 0 or 4,
      and none when it fails, is interrupted or terminated;
    - SIGINT (Ctrl-C) and SIGTERM end the run: temporary files are removed,
      no output is committed, one line on stderr, exit 130 or 143.
    """

    def get_command(self, ctx, cmd_name):
        cmd = super().get_command(ctx, cmd_name)
        if cmd is not None and not getattr(cmd, "_finite_checked", False):
            invoke = cmd.invoke

            def checked_invoke(sub_ctx, _invoke=invoke):
                _refuse_non_finite(sub_ctx)
                return _invoke(sub_ctx)

            cmd.invoke = checked_invoke
            cmd._finite_checked = True
        return cmd

    def main(self, args=None, prog_name=None, complete_var=None, standalone_mode=True, **extra):
        on_main = threading.current_thread() is threading.main_thread()
        _Signals.received = []
        previous = {s: signal.signal(s, _on_signal) for s in (signal.SIGINT, signal.SIGTERM)} if on_main else {}
        cli_common.begin_session()
        commit = False
        caught = warnings.catch_warnings()
        caught.__enter__()
        warnings.showwarning = _one_line_warning
        try:
            _Signals.armed = on_main
            try:
                rv = super().main(args=args, prog_name=prog_name, complete_var=complete_var,
                                  standalone_mode=False, **extra)
            except TyperException as exc:
                if not hasattr(exc, "format_message"):
                    raise
                if type(exc).__name__ == "NoArgsIsHelpError":
                    exc.show()
                    code = getattr(exc, "exit_code", cli_common.EXIT_BAD_INPUT)
                else:
                    typer.echo(f"error: {cli_common.one_line(_usage_text(exc))}", err=True)
                    code = getattr(exc, "exit_code", cli_common.EXIT_BAD_INPUT)
            except typer.Abort:
                typer.echo("error: aborted", err=True)
                code = 1
            except OSError as exc:
                code = _write_error(exc)
            else:
                code = rv if isinstance(rv, int) else 0
                try:  # results still in the buffer of a redirected stdout fail here, not at exit
                    sys.stdout.flush()
                except OSError as exc:
                    code = _write_error(exc)
            commit = code in (cli_common.EXIT_OK, cli_common.EXIT_UNSTABLE)
        finally:
            _Signals.armed = False
            if _Signals.received:  # also when the raised exception was swallowed on the way
                commit = False
                code = 128 + _Signals.received[0]
                typer.echo(f"error: {signal.Signals(code - 128).name} received: no output of this run was written",
                           err=True)
            try:
                cli_common.end_session(commit)
            except BrokenPipeError:  # the reader of a pipe went away: nothing more to say
                code = 1
            except OSError as exc:
                typer.echo(f"error: cannot write an output: {cli_common.one_line(exc.strerror or str(exc))}", err=True)
                code = cli_common.EXIT_BAD_INPUT
            finally:
                caught.__exit__(None, None, None)
                for s, handler in previous.items():
                    signal.signal(s, handler if handler is not None else signal.SIG_DFL)
        if standalone_mode:
            sys.exit(code)
        return code


#: errors of a full or read-only disk: bad environment, not a bug
_WRITE_ERRNOS = {errno.ENOSPC, errno.EDQUOT, errno.EFBIG, errno.EROFS, errno.EIO}


def _write_error(exc: OSError) -> int:
    """A full disk (or quota, read-only file system, I/O error) while writing
    the results, typically a redirected stdout: one line, exit 2; anything
    else is a bug and keeps its traceback. What is still buffered for stdout
    is discarded (fd 1 points to /dev/null), so Python's final flush does not
    fail a second time."""
    if exc.errno not in _WRITE_ERRNOS:
        raise exc
    where = exc.filename if exc.filename else "the results to stdout"
    typer.echo(f"error: cannot write {where}: {exc.strerror or exc}", err=True)
    if exc.filename:
        return cli_common.EXIT_BAD_INPUT
    with contextlib.suppress(OSError, ValueError, AttributeError):
        null = os.open(os.devnull, os.O_WRONLY)
        os.dup2(null, sys.stdout.fileno())
        os.close(null)
    return cli_common.EXIT_BAD_INPUT


def _one_line_warning(message, category, filename, lineno, file=None, line=None) -> None:
    """A Python warning that escaped the code that should have handled it
    (e.g. a numpy RuntimeWarning) as one line on stderr, without the source
    line."""
    import os

    where = f"{os.path.basename(filename)}:{lineno}"
    typer.echo(f"warning: {category.__name__} in {where}: {cli_common.one_line(str(message))}", err=True)


def _refuse_non_finite(ctx) -> None:
    """A float option given as nan or inf is bad input (one line, exit 2):
    ``--sensitivity-peak nan`` would otherwise remove the limit silently."""
    import math

    for param in ctx.command.params:
        value = ctx.params.get(param.name)
        values = value if isinstance(value, (tuple, list)) else (value,)
        for v in values:
            if isinstance(v, float) and not math.isfinite(v):
                name = max(param.opts, key=len) if param.opts else param.name
                cli_common.fail(f"{name} {v!r}: must be a finite number")


def _usage_text(exc) -> str:
    """One line for a usage error, naming the command and the option."""
    message = exc.format_message()
    ctx = getattr(exc, "ctx", None)
    command = ctx.command_path if ctx is not None else "loopcheck"
    return f"{command}: {message} (see {command} --help)"


app = typer.Typer(
    cls=LoopcheckGroup,
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
from loopcheck.cli import cmd_check  # noqa: E402

app.command("check")(cmd_check.check)
from loopcheck.cli import cmd_map  # noqa: E402

app.command("map")(cmd_map.map_command)
from loopcheck.cli import cmd_grid  # noqa: E402

app.command("grid")(cmd_grid.grid)
from loopcheck.cli import cmd_impedance  # noqa: E402

app.command("impedance")(cmd_impedance.impedance)
from loopcheck.cli import cmd_pick  # noqa: E402

app.command("pick")(cmd_pick.pick)
from loopcheck.cli import cmd_export  # noqa: E402

app.command("export")(cmd_export.export)
from loopcheck.cli import cmd_simulate  # noqa: E402

app.command("simulate")(cmd_simulate.simulate)
from loopcheck.cli import cmd_harmonics  # noqa: E402

app.command("harmonics")(cmd_harmonics.harmonics)
from loopcheck.cli import cmd_report  # noqa: E402

app.command("report")(cmd_report.report)
