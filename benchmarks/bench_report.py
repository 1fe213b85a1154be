"""Time ``loopcheck report`` on the demo cases (goal: under 30 s per case).

Prints, per case, the total build time and the time spent in each part
(from the report's progress callback). Not a test: run it by hand::

    python benchmarks/bench_report.py [CASE.toml ...]
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

GOAL_S = 30.0


def main(paths: list[str]) -> int:
    from loopcheck.io.casefile import read_case
    from loopcheck.figures.report import build_report

    cases = paths or sorted(str(p) for p in (ROOT / "cases").glob("*.toml"))
    worst = 0.0
    for path in cases:
        marks: list[tuple[str, float]] = []
        rep = build_report(read_case(path), progress=lambda msg: marks.append((msg, time.perf_counter())))
        end = time.perf_counter()
        parts = []
        for (msg, t0), (_, t1) in zip(marks, marks[1:] + [("end", end)]):
            if t1 - t0 >= 0.05:
                parts.append(f"{msg.removeprefix('section ')} {t1 - t0:.2f}")
        worst = max(worst, rep.elapsed_s)
        print(f"{rep.elapsed_s:6.2f} s  {len(rep.html) / 1e6:5.2f} MB  {Path(path).name}  [{', '.join(parts)}]")
    print(f"slowest {worst:.2f} s (goal {GOAL_S:.0f} s): {'ok' if worst < GOAL_S else 'TOO SLOW'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
