"""Plumbing shared by the ``loopcheck`` commands.

- :func:`load_case` / :func:`load_cases`: read case files; bad input becomes
  one line ``error: <message>`` on stderr and exit code 2 (no traceback).
- :func:`print_warnings`: a case's warnings to stderr.
- :func:`json_line` / :func:`to_jsonable`: JSON with ``null`` for NaN and
  infinities (strict JSON, one object per line).
- :func:`atomic_write_text`, :func:`atomic_write_bytes`, :func:`atomic_path`:
  write outputs to a temporary file in the target directory and rename it
  into place, so a failed run never leaves a half-written file.
- :func:`progress`: a transient progress bar on stderr for long work
  (silent when stderr is not a terminal or with ``--quiet``).

Only the standard library and typer are imported at module level (rich is
imported inside :func:`progress`), so commands can import this module
without slowing ``loopcheck --help``.

Exit codes used by every command: :data:`EXIT_OK` 0 (the analysis ran),
:data:`EXIT_INTERNAL` 1 (a bug: a traceback is shown), :data:`EXIT_BAD_INPUT`
2 (bad case file or options), :data:`EXIT_UNSTABLE` 4 (``--fail-on-unstable``
and a case is not stable).
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import sys
import tempfile
from collections.abc import Callable, Iterator, Sequence
from typing import NoReturn

from loopcheck.figure_io import FIGURE_SUFFIXES

import typer

EXIT_OK = 0
EXIT_INTERNAL = 1
EXIT_BAD_INPUT = 2
EXIT_UNSTABLE = 4


def fail(message: str, code: int = EXIT_BAD_INPUT) -> NoReturn:
    """Print ``error: <message>`` (one line) on stderr and exit with ``code``."""
    typer.echo(f"error: {message}", err=True)
    raise typer.Exit(code)


def warn(message: str) -> None:
    """Print ``warning: <message>`` on stderr."""
    typer.echo(f"warning: {message}", err=True)


def load_case(path: str | os.PathLike):
    """Read one case file; on bad input print the error and exit 2."""
    from loopcheck.casefile import CaseError, read_case

    try:
        return read_case(path)
    except CaseError as exc:
        fail(str(exc))


def load_cases(paths: Sequence[str | os.PathLike]) -> list:
    """Read every case file before any work starts. All errors are printed
    (one line each) and the command exits 2 if there was any."""
    from loopcheck.casefile import CaseError, read_case

    cases, errors = [], []
    for p in paths:
        try:
            cases.append(read_case(p))
        except CaseError as exc:
            errors.append(str(exc))
    if errors:
        for msg in errors:
            typer.echo(f"error: {msg}", err=True)
        raise typer.Exit(EXIT_BAD_INPUT)
    return cases


def print_warnings(case) -> None:
    """Print the warnings of a :class:`~loopcheck.casefile.Case` to stderr."""
    for msg in case.warnings:
        warn(msg)


# --- JSON --------------------------------------------------------------------


def to_jsonable(obj):
    """Plain JSON-ready copy of ``obj`` (:func:`loopcheck.plain.plain`):
    non-finite floats become None, tuples lists, complex numbers
    ``[re, im]``, numpy scalars and arrays Python numbers and lists,
    dataclasses dicts."""
    from loopcheck.plain import plain

    return plain(obj)


def json_line(obj) -> str:
    """One line of strict JSON (no NaN or Infinity tokens) for ``obj``."""
    return json.dumps(to_jsonable(obj), allow_nan=False, ensure_ascii=False)


# --- atomic output -----------------------------------------------------------


def output_problem(path: str | os.PathLike, directory: bool = False) -> str | None:
    """Why ``path`` cannot be written as an output file (``directory``: as an
    output directory), or None when it can. Checks only; creates nothing.
    Commands call it before the long work, so a bad output path costs no
    computation and leaves nothing behind."""
    p = os.path.abspath(os.fspath(path))
    if not directory and os.path.isdir(p):
        return "is a directory; give a file name"
    if directory and os.path.exists(p) and not os.path.isdir(p):
        return "exists and is not a directory"
    parent = p if directory else os.path.dirname(p)
    while not os.path.exists(parent):  # the first existing ancestor decides
        up = os.path.dirname(parent)
        if up == parent:
            break
        parent = up
    if not os.path.isdir(parent):
        return f"cannot create it: {parent} is a file, not a directory"
    if not os.access(parent, os.W_OK | os.X_OK):
        return f"cannot create it: no permission to write in {parent}"
    return None


def check_output(path: str | os.PathLike | None, option: str, directory: bool = False) -> None:
    """Fail (one line, exit 2) when ``path`` given with ``option`` cannot be written."""
    if path is None:
        return
    problem = output_problem(path, directory)
    if problem:
        fail(f"{option} {os.fspath(path)}: {problem}")


def write_failure(option: str, path: str | os.PathLike, exc: OSError) -> NoReturn:
    """Fail (one line, exit 2) for an OSError raised while writing ``path``."""
    fail(f"{option} {os.fspath(path)}: cannot write it ({exc.strerror or exc})")


def check_figure_output(path: str | os.PathLike | None, option: str = "-o") -> None:
    """Fail (one line, exit 2) unless ``path`` is a writable .png/.svg/.pdf file name."""
    if path is None:
        return
    if os.path.splitext(os.fspath(path))[1].lower() not in FIGURE_SUFFIXES:
        fail(f"{option} {os.fspath(path)}: the figure must end in .png, .svg or .pdf")
    check_output(path, option)


def write_figure(fig, path: str | os.PathLike, option: str = "-o", dpi: int = 130) -> None:
    """Write a figure atomically (nothing half-written); a write error fails
    with one line naming the option and the path (exit 2)."""
    from loopcheck.figure_io import save_figure

    try:
        with atomic_path(path) as tmp:
            save_figure(fig, tmp, dpi=dpi)
    except OSError as exc:
        write_failure(option, path, exc)



@contextlib.contextmanager
def atomic_path(path: str | os.PathLike) -> Iterator[str]:
    """Yield a temporary path beside ``path`` to write to; on success it is
    renamed to ``path`` (``os.replace``), on an exception it is deleted and
    ``path`` is left as it was. The temporary name keeps the suffix of
    ``path`` (so e.g. matplotlib picks the format from it). Missing parent
    directories are created.

    Example::

        with atomic_path("out/map.png") as tmp:
            fig.savefig(tmp)
    """
    target = os.fspath(path)
    problem = output_problem(target)
    if problem:  # a clear reason instead of mkstemp's "File exists" or "Is a directory"
        raise OSError(problem)
    directory = os.path.dirname(os.path.abspath(target))
    os.makedirs(directory, exist_ok=True)
    base = os.path.basename(target)
    suffix = os.path.splitext(base)[1]
    fd, tmp = tempfile.mkstemp(prefix=f".{base}.", suffix=f".tmp{suffix}", dir=directory)
    os.close(fd)
    try:
        yield tmp
        _set_default_mode(tmp)
        os.replace(tmp, target)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def _set_default_mode(path: str) -> None:
    """Give the file the permissions a plain ``open(..., "w")`` would (mkstemp uses 0600)."""
    umask = os.umask(0)
    os.umask(umask)
    with contextlib.suppress(OSError):
        os.chmod(path, 0o666 & ~umask)


def atomic_write_bytes(path: str | os.PathLike, data: bytes) -> None:
    """Write ``data`` to ``path`` atomically (temporary file + ``os.replace``)."""
    with atomic_path(path) as tmp:
        with open(tmp, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())


def atomic_write_text(path: str | os.PathLike, text: str, encoding: str = "utf-8") -> None:
    """Write ``text`` to ``path`` atomically (temporary file + ``os.replace``)."""
    atomic_write_bytes(path, text.encode(encoding))


# --- progress ----------------------------------------------------------------


@contextlib.contextmanager
def progress(total: float, description: str, quiet: bool = False) -> Iterator[Callable[[float], None]]:
    """A transient progress bar on stderr; yields ``advance(n)``.

    Disabled (``advance`` does nothing visible) with ``quiet`` or when stderr
    is not a terminal, so logs and pipes stay clean. Results never go here:
    they belong on stdout.

    Example::

        with progress(len(chunks), "map", quiet=quiet) as advance:
            for chunk in chunks:
                work(chunk)
                advance(1)
    """
    enabled = not quiet and sys.stderr.isatty()
    if not enabled:
        yield lambda n=1: None
        return
    from rich.console import Console
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

    console = Console(stderr=True)
    with Progress(
        TextColumn("{task.description}"),
        BarColumn(),
        MofNCompleteColumn(),
        TimeRemainingColumn(),
        console=console,
        transient=True,
    ) as bar:
        task = bar.add_task(description, total=total)
        yield lambda n=1: bar.advance(task, n)


def case_tolerance(case):
    """The case's ``[tolerance]`` table as a ToleranceSpec (empty when
    absent); a bad table prints one line and exits 2."""
    from loopcheck.casefile import CaseError
    from loopcheck.tolerance import parse_tolerance_table

    try:
        return parse_tolerance_table((case.tables or {}).get("tolerance"), case.where("tolerance"), case.design)
    except CaseError as exc:
        fail(str(exc))
