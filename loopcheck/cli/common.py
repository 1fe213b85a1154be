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

from loopcheck.figures.figure_io import FIGURE_SUFFIXES

import typer

EXIT_OK = 0
EXIT_INTERNAL = 1
EXIT_BAD_INPUT = 2
EXIT_UNSTABLE = 4


def one_line(message: str) -> str:
    """``message`` with line breaks and other control characters escaped
    (``\\n``, ``\\r``, ``\\t``, ``\\x1b`` ...), so a diagnostic is always one line
    even when it quotes a value or a file name that contains a newline."""
    if message.isprintable():
        return message
    out = []
    for ch in message:
        if ch.isprintable() or ch == " ":
            out.append(ch)
        else:
            out.append(repr(ch)[1:-1] if ch not in "'\"" else ch)
    return "".join(out)


def fail(message: str, code: int = EXIT_BAD_INPUT) -> NoReturn:
    """Print ``error: <message>`` (one line) on stderr and exit with ``code``."""
    typer.echo(f"error: {one_line(message)}", err=True)
    raise typer.Exit(code)


def warn(message: str) -> None:
    """Print ``warning: <message>`` (one line) on stderr."""
    typer.echo(f"warning: {one_line(message)}", err=True)


def load_case(path: str | os.PathLike):
    """Read one case file; on bad input print the error and exit 2. The path
    is remembered as an input: no output of the command may overwrite it."""
    from loopcheck.io.casefile import CaseError, read_case

    try:
        case = read_case(path)
    except CaseError as exc:
        fail(str(exc))
    register_input(path)
    return case


def load_cases(paths: Sequence[str | os.PathLike]) -> list:
    """Read every case file before any work starts. All errors are printed
    (one line each) and the command exits 2 if there was any."""
    from loopcheck.io.casefile import CaseError, read_case

    cases, errors = [], []
    for p in paths:
        try:
            cases.append(read_case(p))
        except CaseError as exc:
            errors.append(str(exc))
    if errors:
        for msg in errors:
            typer.echo(f"error: {one_line(msg)}", err=True)
        raise typer.Exit(EXIT_BAD_INPUT)
    for p in paths:
        register_input(p)
    return cases


def print_warnings(case) -> None:
    """Print the warnings of a :class:`~loopcheck.io.casefile.Case` to stderr."""
    for msg in case.warnings:
        warn(msg)


# --- JSON --------------------------------------------------------------------


def to_jsonable(obj):
    """Plain JSON-ready copy of ``obj`` (:func:`loopcheck.engine.plain.plain`):
    non-finite floats become None, tuples lists, complex numbers
    ``[re, im]``, numpy scalars and arrays Python numbers and lists,
    dataclasses dicts."""
    from loopcheck.engine.plain import plain

    return plain(obj)


def json_line(obj) -> str:
    """One line of strict JSON (no NaN or Infinity tokens) for ``obj``."""
    return json.dumps(to_jsonable(obj), allow_nan=False, ensure_ascii=False)


# --- atomic output -----------------------------------------------------------
#
# One command run is one *session* (opened by the CLI entry in loopcheck.cli.main):
# it remembers the input case files and the outputs, refuses an output that
# is an input or another output, and commits every output file of the run
# together at the end (all renamed, or none). Outside a session (library
# use, direct calls) each atomic write is renamed into place at once.


class _Session:
    def __init__(self) -> None:
        self.inputs: list[str] = []
        self.outputs: list[tuple[str, str]] = []  # (path, option)
        self.pending: list[tuple[str, str, bool]] = []  # (temporary, target, direct)


_session: _Session | None = None


def begin_session() -> None:
    """Start a command run: forget earlier inputs and outputs."""
    global _session
    _session = _Session()


def end_session(commit: bool) -> None:
    """End a command run: with ``commit`` move every pending output into
    place (all of them, in the order written), else delete their temporary
    files so no output of a failed run appears."""
    global _session
    session, _session = _session, None
    if session is None:
        return
    pending = session.pending
    # the direct writes (a FIFO, /dev/stdout, a device) first: they can fail
    # (a full disk behind a redirection, a closed pipe) and a rename rarely
    # does, so a failing one leaves every regular output as it was
    pending.sort(key=lambda p: not p[2])
    try:
        if commit:
            while pending:
                tmp, target, direct = pending[0]
                try:
                    _finish(tmp, target, direct)
                except OSError as exc:  # name the file: "/dev/full: No space left on device"
                    if isinstance(exc, BrokenPipeError):
                        raise
                    raise OSError(exc.errno, f"{target}: {exc.strerror or exc}") from exc
                pending.pop(0)
    finally:
        for tmp, _target, _direct in pending:
            with contextlib.suppress(OSError):
                os.unlink(tmp)


def _same_file(a: str, b: str) -> bool:
    try:
        return os.path.samefile(a, b)
    except OSError:
        return os.path.realpath(a) == os.path.realpath(b)


def _input_clash(path: str) -> str | None:
    """The input case file that ``path`` would overwrite, or None."""
    if _session is None:
        return None
    for inp in _session.inputs:
        if _same_file(path, inp):
            return inp
    return None


def register_input(path: str | os.PathLike) -> None:
    """Remember ``path`` as an input of this run; fail (one line, exit 2)
    when an output already given resolves to it."""
    if _session is None:
        return
    p = os.fspath(path)
    _session.inputs.append(p)
    for out, option in _session.outputs:
        if _same_file(out, p):
            fail(f"{option} {out}: is the input case file {p}; refusing to overwrite it")


def _remember_output(path: str, option: str) -> None:
    if _session is None:
        return
    inp = _input_clash(path)
    if inp is not None:
        fail(f"{option} {path}: is the input case file {inp}; refusing to overwrite it")
    for out, other in _session.outputs:
        if _same_file(out, path) and (other != option or out != path):
            fail(f"{option} {path}: is also the output of {other}; give each output its own file")
    _session.outputs.append((path, option))


def _is_special(path: str) -> bool:
    """An existing target that is not a regular file (a terminal, a pipe,
    ``/dev/stdout``, a FIFO, a character device) or any name under /dev or
    /proc: written directly, never renamed over or truncated."""
    import stat

    p = os.path.abspath(path)
    try:
        mode = os.stat(p).st_mode
    except OSError:
        return False
    if p.startswith(("/dev/", "/proc/")):
        return not stat.S_ISDIR(mode)
    return not stat.S_ISREG(mode) and not stat.S_ISDIR(mode)


def _resolved(path: str) -> str:
    """The file an output path names: links followed, except for special
    files, which are used as given."""
    p = os.path.abspath(path)
    return p if _is_special(p) else os.path.realpath(p)


def output_problem(path: str | os.PathLike, directory: bool = False) -> str | None:
    """Why ``path`` cannot be written as an output file (``directory``: as an
    output directory), or None when it can. Checks only; creates nothing.
    Commands call it before the long work, so a bad output path costs no
    computation and leaves nothing behind. A symbolic link is judged by
    the file it points to (outputs are written through links)."""
    p = _resolved(os.fspath(path))
    if not directory and os.path.isdir(p):
        return "is a directory; give a file name"
    if directory and os.path.exists(p) and not os.path.isdir(p):
        return "exists and is not a directory"
    if not directory and _is_special(p):
        return None if os.access(p, os.W_OK) else "cannot write it: no permission"
    if not directory and _input_clash(p) is not None:
        return f"is the input case file {_input_clash(p)}; refusing to overwrite it"
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
    """Fail (one line, exit 2) when ``path`` given with ``option`` cannot be
    written: a directory given as a file, a missing permission, the input
    case file itself (also through a link), or the same file as another
    output of the run."""
    if path is None:
        return
    problem = output_problem(path, directory)
    if problem:
        fail(f"{option} {os.fspath(path)}: {problem}")
    if not directory:
        _remember_output(os.fspath(path), option)


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
    from loopcheck.figures.figure_io import save_figure

    try:
        with atomic_path(path) as tmp:
            save_figure(fig, tmp, dpi=dpi)
    except OSError as exc:
        write_failure(option, path, exc)


def _finish(tmp: str, target: str, direct: bool) -> None:
    """Move a finished temporary file to ``target``: rename for a regular
    file, copy the bytes for a terminal, pipe, FIFO or device (opened for
    appending, so a redirected stdout is not truncated), then delete it."""
    if direct:
        with open(tmp, "rb") as src, open(target, "ab") as dst:
            while True:
                block = src.read(1 << 20)
                if not block:
                    break
                dst.write(block)
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        return
    _set_default_mode(tmp)
    os.replace(tmp, target)


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike) -> Iterator[str]:
    """Yield a temporary path beside ``path`` to write to; on success it is
    renamed to ``path`` (``os.replace``), on an exception it is deleted and
    ``path`` is left as it was. The temporary name keeps the suffix of
    ``path`` (so e.g. matplotlib picks the format from it). Missing parent
    directories are created.

    A symbolic link is written through: the temporary file goes beside the
    file the link points to, which is replaced; the link stays a link. A
    target that is not a regular file (``/dev/stdout``, a FIFO) is written
    directly once the content is complete. An input case file of the
    running command is refused (``OSError``). Inside a command run the
    rename waits until the command has finished, so the outputs of one
    run appear together or not at all.

    Example::

        with atomic_path("out/map.png") as tmp:
            fig.savefig(tmp)
    """
    target = _resolved(os.fspath(path))
    problem = output_problem(target)
    if problem:  # a clear reason instead of mkstemp's "File exists" or "Is a directory"
        raise OSError(problem)
    direct = _is_special(target)
    base = os.path.basename(target)
    suffix = os.path.splitext(base)[1]
    if direct:
        directory = None  # the system's temporary directory
    else:
        directory = os.path.dirname(target)
        os.makedirs(directory, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{base}.", suffix=f".tmp{suffix}", dir=directory)
    os.close(fd)
    try:
        yield tmp
        if _session is not None:
            _session.pending.append((tmp, target, direct))
        else:
            _finish(tmp, target, direct)
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


# --- work limits -------------------------------------------------------------
#
# Work and memory are estimated before the long computation; a request
# beyond a limit is refused with one line saying what to reduce (documented
# in docs/bad-input.md). The limits keep one run within about a minute or
# two and well under a gigabyte on a small machine.

#: (map limits: loopcheck.io.map_table.MAX_MAP_WORK and friends)
#: pick: loop evaluations = Hi values x Lg samples x (corners + 1) x Kp values.
MAX_PICK_EVALUATIONS = 250_000
#: grid --monte-carlo: units drawn (about 0.25 ms each measured).
MAX_MONTE_CARLO_UNITS = 200_000
#: simulate: fine time points x loop states (float64 histories per run).
MAX_SIMULATION_WORK = 6e7


def check_option_values(design, name: str, values, option: str) -> None:
    """Fail (one line, exit 2) when a value given with ``option`` for the
    parameter ``name`` (L1, L2, C, Lg, fs, Kp, Hi, Ki, Kr) is outside the
    plausibility ranges of docs/case-file.md for ``design``."""
    if values is None:
        return
    from loopcheck.io.casefile import override_problem

    for v in values if isinstance(values, (tuple, list)) else (values,):
        problem = override_problem(design, name, v)
        if problem:
            fail(f"{option}: {problem}")


def check_work(amount: float, limit: float, what: str, reduce: str) -> None:
    """Fail (one line, exit 2) when the estimated ``amount`` of work exceeds
    ``limit``: ``what`` says what was asked, ``reduce`` what to lower."""
    if amount > limit:
        fail(f"{what}: too much work ({amount:.3g}, the limit is {limit:.3g}); {reduce}")


def check_simulation_size(design, duration_s: float, points_per_sample: int, runs: int = 1) -> None:
    """Refuse a simulation whose waveform histories would not fit the limit
    :data:`MAX_SIMULATION_WORK` (fine time points x loop states x runs)."""
    points = duration_s * design.sampling.fs_hz * points_per_sample
    from loopcheck.engine.model import loop_state_count

    states = loop_state_count(design) + 2
    check_work(points * states * runs, MAX_SIMULATION_WORK,
               f"simulate: {points:.3g} time points x about {states} states x {runs} run(s)",
               "shorten --duration ([scenario] duration) or lower [scenario] points_per_sample")


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


def case_verdict(case):
    """The case's :class:`loopcheck.design.range_verdict.RangeVerdict` over all it
    declares (Lg or SCR range, tolerances, grid network, feedforward); a bad
    table prints one line and exits 2."""
    from loopcheck.io.casefile import CaseError
    from loopcheck.io.read_verdict import case_range_verdict

    try:
        return case_range_verdict(case)
    except CaseError as exc:
        fail(str(exc))
