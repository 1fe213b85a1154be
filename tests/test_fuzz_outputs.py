"""Fuzzing the output layer (issue 15, classes 1 and 8), property-based.

Class 1, data loss: an output of any command that resolves to the input
case file (the same name, another spelling of it, a symbolic or hard link)
is refused with one line naming the option, exit 2, and the case file is
left byte for byte as it was. Outputs through a symbolic link are written
to the link's target and the link stays a link; a FIFO is written directly.

Class 8, faults: the outputs of one run are committed together (a failure
while writing the second output leaves the old first output in place and no
temporary file), and SIGTERM removes the temporary file of a write in
progress (exit status 128 + 15, the shell convention; common practice).

The case is invented demo data. Hypothesis runs with a fixed seed
(derandomize) and few examples, so the file runs in a few seconds.
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
import threading

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from loopcheck.cli.main import app

ENV = {"COLUMNS": "200", "NO_COLOR": "1"}
FUZZ = settings(derandomize=True, max_examples=12, deadline=None,
                suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])

CASE = """
name = "output fuzz"
[filter]
L1 = "1.5 mH"
C  = "20 uF"
L2 = "0.6 mH"
[grid]
f = "50 Hz"
Lg = "0.5 mH"
Lg_range = ["0 mH", "2 mH"]
S = "20 kVA"
V = "400 V"
[sampling]
fs = "10 kHz"
[control]
feedback = "grid"
kind = "PR"
Kp = "5 V/A"
Kr = "300 V/A/s"
Hi = "7 V/A"
[pwm]
dc_link = "750 V"
"""

# (command, output option, suffix the option needs, extra arguments); every
# file-writing option of every command
WRITERS = [
    ("map", "--csv", "", ["--x-points", "4", "--y-points", "4", "-q"]),
    ("map", "-o", ".png", ["--x-points", "4", "--y-points", "4", "-q"]),
    ("grid", "-o", ".svg", ["--points", "3", "-q"]),
    ("pick", "-o", ".png", ["--points", "7", "--lg-points", "2", "-q"]),
    ("export", "--header", "", []),
    ("export", "--json-out", "", []),
    ("simulate", "--csv", "", ["--duration", "3 ms"]),
    ("simulate", "-o", ".png", ["--duration", "3 ms"]),
    ("harmonics", "-o", ".png", []),
    ("report", "-o", ".html", ["-q"]),
]

names = st.text(alphabet="abcdefghijklmnopqrstuvwxyz_-0123456789", min_size=1, max_size=12)


def _one_line_exit_2(r, *needles):
    assert r.exit_code == 2, (r.exit_code, r.stdout, r.stderr)
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), r.stderr
    for n in needles:
        assert n in lines[0], (n, lines[0])


def _alias(tmp, case, how: str, suffix: str, name: str):
    """Another path that names the case file."""
    if how == "same" and not suffix:
        return str(case)
    if how == "dotted" and not suffix:
        return os.path.join(str(tmp), ".", "sub", "..", case.name)
    if how == "relative" and not suffix:
        return os.path.relpath(case)
    link = tmp / f"{name}{suffix}"
    if how == "hardlink":
        os.link(case, link)
    else:
        os.symlink(case, link)
    return str(link)


@FUZZ
@given(writer=st.sampled_from(WRITERS), how=st.sampled_from(["same", "dotted", "relative", "symlink", "hardlink"]),
       name=names)
def test_an_output_that_is_the_input_is_refused(tmp_path_factory, writer, how, name):
    command, option, suffix, extra = writer
    tmp = tmp_path_factory.mktemp("alias")
    (tmp / "sub").mkdir()
    case = tmp / "case.toml"
    case.write_text(CASE, encoding="utf-8")
    before = case.read_bytes()
    out = _alias(tmp, case, how, suffix, name)
    r = CliRunner().invoke(app, [command, str(case), option, out, *extra], env=ENV)
    _one_line_exit_2(r, option, "input case file", "refusing to overwrite")
    assert case.read_bytes() == before
    assert not [f for f in os.listdir(tmp) if ".tmp" in f]


# the quick writers (the slow ones share the same atomic_path code)
QUICK = [w for w in WRITERS if w[1] in ("--csv", "--header", "--json-out")]


@settings(derandomize=True, max_examples=4, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(writer=st.sampled_from(QUICK), name=names, depth=st.integers(1, 3))
def test_writing_through_a_symlink_keeps_the_link(tmp_path_factory, writer, name, depth):
    command, option, suffix, extra = writer
    tmp = tmp_path_factory.mktemp("link")
    case = tmp / "case.toml"
    case.write_text(CASE, encoding="utf-8")
    suffix = suffix or {"--csv": ".csv", "--header": ".h", "--json-out": ".json"}[option]
    real_dir = tmp / "real"
    real_dir.mkdir()
    target = real_dir / f"{name}{suffix}"
    target.write_bytes(b"old")
    link = target
    for i in range(depth):  # a chain of links
        nxt = tmp / f"l{i}_{name}{suffix}"
        os.symlink(link, nxt)
        link = nxt
    r = CliRunner().invoke(app, [command, str(case), option, str(link), *extra], env=ENV)
    assert r.exit_code in (0, 4), (r.stdout, r.stderr)
    assert os.path.islink(link)
    assert os.path.realpath(link) == str(target)
    assert target.read_bytes() != b"old" and target.stat().st_size > 0
    assert not [f for d in (tmp, real_dir) for f in os.listdir(d) if ".tmp" in f]


@settings(derandomize=True, max_examples=3, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(points=st.integers(2, 5))
def test_a_fifo_is_written_directly(tmp_path_factory, points):
    tmp = tmp_path_factory.mktemp("fifo")
    case = tmp / "case.toml"
    case.write_text(CASE, encoding="utf-8")
    fifo = tmp / "out.csv"
    os.mkfifo(fifo)
    got = []
    reader = threading.Thread(target=lambda: got.append(open(fifo, "rb").read()))
    reader.start()
    r = CliRunner().invoke(app, ["map", str(case), "--csv", str(fifo), "--x-points", str(points),
                                 "--y-points", "2", "-q"], env=ENV)
    reader.join(timeout=30)
    assert r.exit_code == 0, r.stderr
    text = got[0].decode()
    assert "fr/fs" in text.splitlines()[0] and len(text.strip().splitlines()) == 1 + 2 * points
    assert os.path.exists(fifo) and not os.path.isfile(fifo)  # still a FIFO


@pytest.mark.parametrize("which", ["figure", "csv"])
@settings(derandomize=True, max_examples=2, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(stem=names)
def test_outputs_of_one_run_are_committed_together(tmp_path_factory, monkeypatch, which, stem):
    """The map writes its figure, then its CSV. Whichever write fails, both
    old files stay as they were and no temporary file is left."""
    tmp = tmp_path_factory.mktemp("commit")
    case = tmp / "case.toml"
    case.write_text(CASE, encoding="utf-8")
    fig, csv = tmp / f"{stem}.png", tmp / f"{stem}.csv"
    fig.write_bytes(b"old figure")
    csv.write_bytes(b"old csv")

    def broken(*a, **k):
        raise OSError(28, "No space left on device")

    import loopcheck.figures.figure_io
    import loopcheck.io.map_table

    with monkeypatch.context() as m:
        if which == "figure":
            m.setattr(loopcheck.figures.figure_io, "save_figure", broken)
        else:
            m.setattr(loopcheck.io.map_table, "csv_text", broken)
        r = CliRunner().invoke(app, ["map", str(case), "-o", str(fig), "--csv", str(csv), "--x-points", "3",
                                     "--y-points", "3", "-q"], env=ENV)
    _one_line_exit_2(r, "No space left")
    assert fig.read_bytes() == b"old figure" and csv.read_bytes() == b"old csv"
    assert sorted(os.listdir(tmp)) == sorted(["case.toml", fig.name, csv.name])


SIGTERM_SCRIPT = textwrap.dedent("""
    import sys, time, typer
    from loopcheck.cli.main import LoopcheckGroup
    from loopcheck.cli.common import atomic_path

    app = typer.Typer(cls=LoopcheckGroup, add_completion=False)

    @app.command()
    def write(out: str):
        with atomic_path(out) as tmp:
            with open(tmp, "w") as fh:
                fh.write("partial")
            print("ready", flush=True)
            time.sleep(60)

    @app.command()
    def other():
        pass

    app()
""")


@settings(derandomize=True, max_examples=3, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(name=names, suffix=st.sampled_from([".csv", ".png", ".h", ""]))
def test_sigterm_removes_the_temporary_file(tmp_path_factory, name, suffix):
    tmp = tmp_path_factory.mktemp("term")
    script = tmp / "writer.py"
    script.write_text(SIGTERM_SCRIPT)
    out = tmp / "out" / f"{name}{suffix}"
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([os.path.dirname(os.path.dirname(__file__)),
                                                        os.environ.get("PYTHONPATH", "")]))
    p = subprocess.Popen([sys.executable, str(script), "write", str(out)], stdout=subprocess.PIPE,
                         stderr=subprocess.PIPE, env=env, text=True)
    try:
        assert p.stdout.readline().strip() == "ready"
        assert any(".tmp" in f for f in os.listdir(out.parent))  # the write is in progress
        p.terminate()
        p.wait(timeout=30)
    finally:
        if p.poll() is None:
            p.kill()
    assert p.returncode == 128 + 15, p.stderr.read()
    assert os.listdir(out.parent) == []  # no temporary file, no half output
