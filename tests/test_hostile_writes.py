"""Hostile places to write (issue 11): a full disk, a read-only folder and
two runs writing the same file at once.

- A full disk is real on Linux: ``/dev/full`` accepts an open and fails
  every write with ENOSPC (Linux ``null(4)``/``full(4)`` manual page, from
  memory). Results on a stdout redirected there, and an output file option
  naming it, are one line ``error: ...`` and exit 2, no traceback. Inside
  the process, a full disk that surfaces at ``fsync`` (delayed allocation)
  or in the middle of writing a figure or a CSV is simulated by raising
  ENOSPC from those calls: the partial temporary file is deleted and the
  previous output stays as it was.
- A read-only folder: what a read-only mount gives every process, root
  included, is EROFS from creating the temporary file (simulated by
  raising it from ``tempfile.mkstemp``); a folder without write permission
  is tested for real when the tests do not run as root (root may write
  anywhere, which is why ``os.access`` is the check).
- Two runs writing the same output at the same time: each writes its own
  temporary file and renames it (POSIX ``rename`` replaces the target
  atomically; common practice), so the final file equals one of the two
  complete outputs, never a mixture.

The case is invented demo data; hypothesis is not needed here (every
writer is enumerated).
"""

from __future__ import annotations

import errno
import os
import subprocess
import sys

import pytest
from typer.testing import CliRunner

from loopcheck.cli.main import app

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
ENV = {"COLUMNS": "200", "NO_COLOR": "1"}
HAS_DEV_FULL = os.path.exists("/dev/full") and sys.platform.startswith("linux")

CASE = """
name = "hostile writes"
[filter]
L1 = "1.5 mH"
C  = "33 uF"
L2 = "0.75 mH"
R1 = "20 mOhm"
R2 = "10 mOhm"
[grid]
f = "50 Hz"
Lg = "0.5 mH"
Lg_range = ["0 mH", "2 mH"]
S = "30 kVA"
V = "400 V"
[sampling]
fs = "10 kHz"
[control]
feedback = "grid"
kind = "PR"
Kp = "5 V/A"
Kr = "300 V/A/s"
Hi = "6.5 V/A"
[pwm]
dc_link = "750 V"
"""

# (command, output option, file name, quick arguments): every file-writing option
WRITERS = [
    ("check", "-o", "bode.png", []),
    ("check", "--nyquist", "nyq.svg", []),
    ("map", "--csv", "map.csv", ["--x-points", "4", "--y-points", "4", "-q"]),
    ("map", "-o", "map.png", ["--x-points", "4", "--y-points", "4", "-q"]),
    ("grid", "-o", "grid.svg", ["--points", "3", "-q"]),
    ("pick", "-o", "pick.png", ["--points", "7", "--lg-points", "2", "-q"]),
    ("export", "--header", "ctl.h", []),
    ("export", "--json-out", "ctl.json", []),
    ("simulate", "--csv", "sim.csv", ["--duration", "3 ms"]),
    ("simulate", "-o", "sim.png", ["--duration", "3 ms"]),
    ("harmonics", "-o", "harm.png", []),
    ("report", "-o", "report.html", ["-q"]),
]
IDS = [f"{w[0]} {w[1]}" for w in WRITERS]


@pytest.fixture
def quick_report(monkeypatch):
    """The report with its core sections only (the slow optional sections
    add nothing to the write path under test)."""
    import loopcheck.figures.report as rep

    monkeypatch.setattr(rep, "SECTION_BUILDERS", tuple(b for b in rep.SECTION_BUILDERS if b[0] in rep._CORE))


def _case(tmp_path):
    p = tmp_path / "case.toml"
    p.write_text(CASE, encoding="utf-8")
    return p


def _one_line_exit_2(r, *needles):
    assert r.exit_code == 2, (r.exit_code, r.stdout, r.stderr, r.exception)
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), r.stderr
    assert "Traceback" not in r.stderr
    for n in needles:
        assert n in lines[0], (n, lines[0])


def _no_temporaries(folder):
    return [f for f in os.listdir(folder) if ".tmp" in f] == []


# --- a full disk ---------------------------------------------------------------


def _sub_env():
    path = os.pathsep.join(p for p in (ROOT, os.environ.get("PYTHONPATH", "")) if p)
    return dict(os.environ, PYTHONPATH=path, COLUMNS="200", NO_COLOR="1", MPLBACKEND="Agg")


@pytest.mark.skipif(not HAS_DEV_FULL, reason="needs Linux /dev/full")
@pytest.mark.parametrize("args", [
    ["check", "{case}", "--json"],
    ["map", "{case}", "--x-points", "4", "--y-points", "3", "-q", "--json"],
    ["simulate", "{case}", "--duration", "3 ms"],
], ids=lambda a: " ".join(a[:1] + a[2:3]))
def test_results_on_a_full_disk_are_one_line(tmp_path, args):
    """stdout redirected to /dev/full: every write fails with ENOSPC."""
    case = _case(tmp_path)
    with open("/dev/full", "w") as full:
        r = subprocess.run([sys.executable, "-m", "loopcheck", *[a.format(case=case) for a in args]],
                           stdout=full, stderr=subprocess.PIPE, text=True, env=_sub_env(), timeout=120)
    assert r.returncode == 2, r.stderr
    lines = r.stderr.strip().splitlines()
    assert lines == ["error: cannot write the results to stdout: No space left on device"], r.stderr


@pytest.mark.skipif(not HAS_DEV_FULL, reason="needs Linux /dev/full")
@pytest.mark.parametrize("writer", [w for w in WRITERS if w[1] in ("--csv", "--header", "--json-out")],
                         ids=lambda w: f"{w[0]} {w[1]}")
def test_an_output_on_a_full_disk_is_one_line(tmp_path, writer):
    """An output option naming /dev/full (a device: written directly when
    the run ends) fails with one line naming it; the other outputs of the
    run stay as they were."""
    command, option, _, extra = writer
    case = _case(tmp_path)
    other = []
    if command in ("map", "simulate"):  # a second, regular output of the same run
        fig = tmp_path / "other.png"
        fig.write_bytes(b"old figure")
        other = ["-o", str(fig)]
    r = CliRunner().invoke(app, [command, str(case), option, "/dev/full", *other, *extra], env=ENV)
    _one_line_exit_2(r, "/dev/full", "No space left on device")
    if other:
        assert fig.read_bytes() == b"old figure"
    assert _no_temporaries(tmp_path)


def _enospc(*_a, **_k):
    raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))


@pytest.mark.parametrize("writer", WRITERS, ids=IDS)
def test_a_disk_that_fills_during_the_write(tmp_path, monkeypatch, quick_report, writer):
    """ENOSPC in the middle of the data (a figure or a CSV half written) or
    at fsync: one line naming the option, the previous file intact, the
    partial temporary file deleted."""
    command, option, name, extra = writer
    case = _case(tmp_path)
    out = tmp_path / name
    out.write_bytes(b"previous output")
    import matplotlib.figure

    import loopcheck.timedomain.simulate

    real_savefig, real_csv = matplotlib.figure.Figure.savefig, loopcheck.timedomain.simulate.write_csv

    def half_figure(self, fname, *a, **k):
        if not isinstance(fname, (str, os.PathLike)):  # the report's figures drawn into memory
            return real_savefig(self, fname, *a, **k)
        with open(fname, "wb") as fh:
            fh.write(b"\x89PNG half a figure")
        _enospc()

    def half_csv(wave, fh):
        fh.write("t_s,i1_A\n0,0\n")
        _enospc()

    with monkeypatch.context() as m:
        m.setattr(matplotlib.figure.Figure, "savefig", half_figure)
        m.setattr(loopcheck.timedomain.simulate, "write_csv", half_csv)
        m.setattr(os, "fsync", _enospc)
        r = CliRunner().invoke(app, [command, str(case), option, str(out), *extra], env=ENV)
    assert (real_savefig, real_csv) == (matplotlib.figure.Figure.savefig, loopcheck.timedomain.simulate.write_csv)
    _one_line_exit_2(r, option, str(out), "No space left on device")
    assert out.read_bytes() == b"previous output"
    assert sorted(os.listdir(tmp_path)) == sorted(["case.toml", name])


# --- a read-only folder --------------------------------------------------------


@pytest.mark.parametrize("writer", WRITERS, ids=IDS)
def test_a_read_only_file_system_is_one_line(tmp_path, monkeypatch, quick_report, writer):
    """EROFS when the temporary file is created (a read-only mount refuses
    it to root too)."""
    command, option, name, extra = writer
    case = _case(tmp_path)
    out = tmp_path / name
    out.write_bytes(b"previous output")
    import tempfile

    def read_only(*a, **k):
        raise OSError(errno.EROFS, os.strerror(errno.EROFS), k.get("dir"))

    with monkeypatch.context() as m:
        m.setattr(tempfile, "mkstemp", read_only)
        r = CliRunner().invoke(app, [command, str(case), option, str(out), *extra], env=ENV)
    _one_line_exit_2(r, option, str(out), "Read-only file system")
    assert out.read_bytes() == b"previous output"
    assert sorted(os.listdir(tmp_path)) == sorted(["case.toml", name])


@pytest.mark.skipif(os.name != "posix" or os.geteuid() == 0, reason="root may write into a read-only folder")
@pytest.mark.parametrize("writer", WRITERS[2:4] + WRITERS[6:7], ids=IDS[2:4] + IDS[6:7])
def test_a_folder_without_write_permission_is_one_line(tmp_path, writer):
    command, option, name, extra = writer
    case = _case(tmp_path)
    folder = tmp_path / "ro"
    folder.mkdir()
    (folder / name).write_bytes(b"previous output")
    folder.chmod(0o555)
    try:
        r = CliRunner().invoke(app, [command, str(case), option, str(folder / name), *extra], env=ENV)
    finally:
        folder.chmod(0o755)
    _one_line_exit_2(r, option, "no permission to write in")
    assert (folder / name).read_bytes() == b"previous output"
    assert os.listdir(folder) == [name]


# --- two runs writing the same output ------------------------------------------


@pytest.mark.parametrize("command,option,a,b", [
    # a CSV of tens of megabytes streams through many write calls: a plain
    # open-and-write by two processes would interleave or truncate
    ("simulate", "--csv", ["--duration", "150 ms"], ["--duration", "140 ms", "--compare", "Hi=5"]),
    ("map", "--csv", ["--x-points", "60", "--y-points", "50", "-q"], ["--x-points", "50", "--y-points", "60", "-q"]),
], ids=["simulate", "map"])
def test_two_runs_on_one_output_never_mix(tmp_path, command, option, a, b):
    case = _case(tmp_path)
    env = _sub_env()

    def start(out, extra):
        return subprocess.Popen([sys.executable, "-m", "loopcheck", command, str(case), option, str(out), *extra],
                                stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True, env=env)

    shared = tmp_path / "shared.csv"
    runs = [start(shared, a), start(shared, b)]  # at the same time, on the same file
    for p in runs:
        _, err = p.communicate(timeout=180)
        assert p.returncode == 0, err
    alone_a, alone_b = tmp_path / "a.csv", tmp_path / "b.csv"
    for out, extra in ((alone_a, a), (alone_b, b)):  # the complete outputs, one run at a time
        p = start(out, extra)
        _, err = p.communicate(timeout=180)
        assert p.returncode == 0, err
    got = shared.read_bytes()
    assert alone_a.read_bytes() != alone_b.read_bytes()
    assert got in (alone_a.read_bytes(), alone_b.read_bytes()), "the shared output is a mixture"
    assert _no_temporaries(tmp_path)
