"""Timings of ``loopcheck check`` (a script that prints, not a timed test).

1. ``analyse`` on the demo case (cases/commercial-30kva-weak-grid.toml,
   read once): median of N runs. Goal: under 0.2 s per case.
2. ``analyse`` on a PR controller with resonators up to the 13th harmonic
   at fs = 50 kHz (17 controller states): median of N runs. Goal: under
   0.5 s.
3. The cost of ``loopcheck --help``: the import time of ``loopcheck.cli.main``
   measured with ``python -X importtime`` in a fresh interpreter, the
   heavy modules it must NOT load (numpy, scipy, control, matplotlib,
   sympy) and the wall time of ``python -m loopcheck --help``. Goal: under
   0.3 s wall time, no heavy module imported.
4. The whole ``loopcheck check --json`` command on the demo case in a fresh
   interpreter (imports included), median of a few runs.

Run from the repository root: ``python3 benchmarks/bench_check.py``
(``--runs N``, default 15). Wall-clock times depend on what else runs on
the machine (two shared cores); the CPU time of this process is printed
beside them.
"""

from __future__ import annotations

import argparse
import math
import os
import statistics
import subprocess
import sys
import time

ROOT = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..")
sys.path.insert(0, ROOT)
os.environ.setdefault("MPLBACKEND", "Agg")

DEMO_CASE = os.path.join(ROOT, "cases", "commercial-30kva-weak-grid.toml")
HEAVY = ("numpy", "scipy", "control", "matplotlib", "sympy")


def median_time(fn, runs: int) -> tuple[float, float]:
    """Median wall time and median CPU time of fn() over runs [s]."""
    fn()  # warm-up (first-call caches, lazy imports)
    wall, cpu = [], []
    for _ in range(runs):
        w, c = time.perf_counter(), time.process_time()
        fn()
        wall.append(time.perf_counter() - w)
        cpu.append(time.process_time() - c)
    return statistics.median(wall), statistics.median(cpu)


def pr13_design():
    """Invented 50 kHz grid-side PR design with resonators 1, 3, 5, ..., 13."""
    from loopcheck.engine.model import Control, Design, Filter, Grid, Sampling

    L1, L2, C, Lg = 0.9e-3, 0.3e-3, 4.0e-6, 0.1e-3
    return Design(
        Filter(L1, C, L2, 0.02, 0.03),
        Grid(50.0, Lg),
        Sampling(50e3, 1.0),
        Control(
            "grid", "PR", Kp_V_per_A=2 * math.pi * 2000 * (L1 + L2 + Lg), Kr=800.0,
            harmonics=(3, 5, 7, 9, 11, 13), resonator="tustin-prewarp", Hi_V_per_A=12.0,
        ),
        name="bench 50 kHz PR to the 13th harmonic",
    )


def import_profile() -> tuple[float, list[str]]:
    """Cumulative import time of loopcheck.cli.main [s] and the heavy top-level
    modules it pulled in, from ``python -X importtime`` in a fresh process."""
    proc = subprocess.run(
        [sys.executable, "-X", "importtime", "-c", "import loopcheck.cli.main"],
        cwd=ROOT, capture_output=True, text=True, env=dict(os.environ, PYTHONPATH=ROOT),
    )
    total_us = 0
    heavy = set()
    for line in proc.stderr.splitlines():
        if not line.startswith("import time:") or "|" not in line:
            continue
        parts = [p.strip() for p in line[len("import time:"):].split("|")]
        if len(parts) != 3 or not parts[1].isdigit():
            continue
        name = parts[2]
        top = name.strip().split(".")[0]
        if top in HEAVY:
            heavy.add(top)
        if name.strip() == "loopcheck.cli.main":
            total_us = int(parts[1])
    return total_us * 1e-6, sorted(heavy)


def fresh_process_time(args: list[str], runs: int) -> float:
    """Median wall time [s] of ``python -m loopcheck ARGS`` in fresh processes."""
    times = []
    for _ in range(runs):
        t = time.perf_counter()
        proc = subprocess.run(
            [sys.executable, "-m", "loopcheck", *args], cwd=ROOT, capture_output=True, text=True,
            env=dict(os.environ, PYTHONPATH=ROOT, COLUMNS="200", NO_COLOR="1"),
        )
        times.append(time.perf_counter() - t)
        if proc.returncode not in (0, 4):
            raise SystemExit(f"python -m loopcheck {' '.join(args)} failed: {proc.stderr.strip()}")
    return statistics.median(times)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=15, help="repetitions per timing (default 15)")
    args = ap.parse_args()

    print(f"loopcheck check benchmarks ({args.runs} runs each, median; wall / CPU of this process)")

    from loopcheck.engine.analysis import analyse
    from loopcheck.io.casefile import read_case

    demo = read_case(DEMO_CASE).design
    wall, cpu = median_time(lambda: analyse(demo), args.runs)
    print(f"1. analyse, demo case {os.path.relpath(DEMO_CASE, ROOT)}: {wall * 1e3:.1f} ms wall, "
          f"{cpu * 1e3:.1f} ms CPU  (goal < 200 ms)")

    pr13 = pr13_design()
    wall, cpu = median_time(lambda: analyse(pr13), args.runs)
    a = analyse(pr13)
    print(f"2. analyse, {pr13.name} ({a.verdict}, {len(a.closed_loop_poles)} states): "
          f"{wall * 1e3:.1f} ms wall, {cpu * 1e3:.1f} ms CPU  (goal < 500 ms)")

    imp, heavy = import_profile()
    help_wall = fresh_process_time(["--help"], max(3, args.runs // 3))
    print(f"3. import loopcheck.cli.main: {imp * 1e3:.1f} ms (python -X importtime, cumulative); "
          f"heavy modules loaded: {', '.join(heavy) if heavy else 'none'}")
    print(f"   python -m loopcheck --help: {help_wall * 1e3:.0f} ms wall in a fresh process  (goal < 300 ms)")

    check_wall = fresh_process_time(["check", DEMO_CASE, "--json"], 3)
    print(f"4. python -m loopcheck check <demo> --json: {check_wall * 1e3:.0f} ms wall in a fresh process "
          f"(imports included)")


if __name__ == "__main__":
    main()
