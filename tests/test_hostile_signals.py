"""Interrupted runs (issue 11): a real SIGINT or SIGTERM sent to a
``loopcheck`` subprocess during ``map``, ``simulate`` and ``report``.

What every run must show afterwards (docs/bad-input.md, "termination"):
the previous output files are intact byte for byte, no temporary file is
left in the folder, the exit status is 128 + the signal number (130 for
SIGINT, 143 for SIGTERM: the shell convention, common practice) and stderr
ends with one line naming the signal.

Two moments are tested:

- mid-work: the real command, no instrumentation; the signal is sent
  shortly after the case's warning line appears on stderr (the case is read,
  the output session is open) while a long computation is running (a large
  map, a long simulation, a whole report);
- mid-write: the command runs in a small wrapper that pauses inside
  ``cli_common.atomic_path`` once the data of the *last* output has reached
  its temporary file (the earlier outputs of the run are already complete
  temporary files waiting to be renamed); the signal is sent during the
  pause. The wrapper changes nothing else (for the report it leaves out the
  five slow optional sections so that the run reaches the write within a
  few seconds; the write path is the same).

Each test is bounded by timeouts (the signal is answered within well under
a second; a hung process is killed and the test fails). The case is
invented demo data.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time

import pytest

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

# stable at its nominal point (resonance 0.9 kHz below fs/6), so a long
# simulation is not stopped early by the trip level; Ki is not used by a PR
# controller, which gives the warning line used as the sign of progress
CASE = """
name = "interrupted run"
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
Ki = "100 V/A/s"
Hi = "6.5 V/A"
"""

SIGNALS = [pytest.param(signal.SIGINT, id="SIGINT"), pytest.param(signal.SIGTERM, id="SIGTERM")]

# command -> (output options, slow arguments for mid-work, quick arguments for mid-write)
RUNS = {
    "map": ({"-o": "map.png", "--csv": "map.csv"},
            ["--x-points", "800", "--y-points", "800", "-q"], ["--x-points", "12", "--y-points", "10", "-q"]),
    "simulate": ({"-o": "sim.png", "--csv": "sim.csv"}, ["--duration", "3 s"], ["--duration", "20 ms"]),
    "report": ({"-o": "report.html"}, ["-q"], ["-q"]),
}

WRAPPER = textwrap.dedent("""
    import contextlib, os, sys, time
    import loopcheck.cli.common as cc

    last = sys.argv.pop(1)  # the base name of the last output the command writes
    real = cc.atomic_path

    @contextlib.contextmanager
    def pausing(path):
        with real(path) as tmp:
            yield tmp
            if os.path.basename(os.fspath(path)) == last:
                sys.stderr.write("paused with the data in " + os.path.basename(tmp) + "\\n")
                sys.stderr.flush()
                time.sleep(60)

    cc.atomic_path = pausing
    if os.environ.get("CORE_SECTIONS_ONLY"):
        import loopcheck.figures.report as rep
        rep.SECTION_BUILDERS = tuple(b for b in rep.SECTION_BUILDERS if b[0] in rep._CORE)
    from loopcheck.cli.main import app
    app(prog_name="loopcheck")
""")


def _env(**extra):
    path = os.pathsep.join(p for p in (ROOT, os.environ.get("PYTHONPATH", "")) if p)
    return dict(os.environ, PYTHONPATH=path, COLUMNS="200", NO_COLOR="1", MPLBACKEND="Agg", **extra)


def _prepare(tmp_path, command):
    case = tmp_path / "case.toml"
    case.write_text(CASE, encoding="utf-8")
    outputs, slow, quick = RUNS[command]
    old = {}
    for i, name in enumerate(outputs.values()):
        data = f"previous output {i} of an earlier run\n".encode() + os.urandom(64)
        (tmp_path / name).write_bytes(data)
        old[name] = data
    args = [command, str(case)]
    for option, name in outputs.items():
        args += [option, str(tmp_path / name)]
    return args, old, slow, quick, list(outputs.values())[-1]


def _wait_for(p, needle: str, timeout_s: float = 60.0) -> str:
    """Read stderr lines until one contains ``needle`` (the process must
    still be running); fail on a timeout or an early exit."""
    deadline = time.monotonic() + timeout_s
    seen = []
    while time.monotonic() < deadline:
        line = p.stderr.readline()
        if not line:
            break
        seen.append(line)
        if needle in line:
            return line
    p.kill()
    pytest.fail(f"no {needle!r} on stderr (exit {p.poll()}): {''.join(seen)}")


def _signal_and_check(p, sig, tmp_path, old):
    time.sleep(0.2)
    assert p.poll() is None, "the run ended before the signal"
    sent = time.monotonic()
    p.send_signal(sig)
    try:
        _, rest = p.communicate(timeout=15)
    finally:
        if p.poll() is None:
            p.kill()
            p.communicate()
    answered_s = time.monotonic() - sent
    assert p.returncode == 128 + sig, (p.returncode, rest)
    lines = rest.strip().splitlines()
    assert lines and lines[-1] == f"error: {signal.Signals(sig).name} received: no output of this run was written", rest
    assert "Traceback" not in rest, rest
    for name, data in old.items():
        assert (tmp_path / name).read_bytes() == data, f"{name} changed"
    assert sorted(os.listdir(tmp_path)) == sorted(["case.toml", *old]), os.listdir(tmp_path)
    return answered_s


@pytest.mark.parametrize("sig", SIGNALS)
@pytest.mark.parametrize("command", sorted(RUNS))
def test_a_signal_mid_work_leaves_the_previous_outputs(tmp_path, command, sig):
    args, old, slow, _, _ = _prepare(tmp_path, command)
    p = subprocess.Popen([sys.executable, "-m", "loopcheck", *args, *slow], cwd=tmp_path, env=_env(),
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    _wait_for(p, "[control] Ki: not used")
    answered_s = _signal_and_check(p, sig, tmp_path, old)
    assert answered_s < 10, answered_s  # answered between two chunks of work, not at the end of the run


@pytest.mark.parametrize("sig", SIGNALS)
@pytest.mark.parametrize("command", sorted(RUNS))
def test_a_signal_mid_write_removes_the_temporary_files(tmp_path, command, sig):
    args, old, _, quick, last = _prepare(tmp_path, command)
    script = tmp_path.parent / f"{tmp_path.name}-wrapper.py"
    script.write_text(WRAPPER, encoding="utf-8")
    env = _env(CORE_SECTIONS_ONLY="1") if command == "report" else _env()
    p = subprocess.Popen([sys.executable, str(script), last, *args, *quick], cwd=tmp_path, env=env,
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    line = _wait_for(p, "paused with the data in ")
    tmp_name = line.strip().rsplit(" ", 1)[-1]
    present = os.listdir(tmp_path)
    assert tmp_name in present and os.path.getsize(tmp_path / tmp_name) > 0  # the write is in progress
    # every output of the run is a complete temporary file now, none renamed yet
    assert len([f for f in present if ".tmp" in f]) == len(old), present
    _signal_and_check(p, sig, tmp_path, old)
