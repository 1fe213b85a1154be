"""Timings of the weak-grid sweep, Monte Carlo and damping-gain pick (a
script that prints, not a timed test).

1. Batched margins (verdict, phase margin, gain-margin interval,
   sensitivity peak) at 10 000 points (100 Lg x 100 damping gains).
   Goal: under 10 s, and at least 20 times faster than calling
   ``analyse()`` point by point (measured on a sample, extrapolated).
2. Exact stable Lg intervals for 32 tolerance corners (5 two-sided
   tolerances). Goal: under 10 s.
3. Monte Carlo of 10 000 units with margins. Goal: under 15 s.
4. ``pick_gain`` with the default grids on a 4-corner case. Goal: under 10 s.

Run from the repository root: ``python3 benchmarks/bench_weakgrid.py``.
Wall-clock times depend on what else runs on the machine; the CPU time of
this process is printed beside them.
"""

from __future__ import annotations

import os
import sys
import time

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))
os.environ.setdefault("MPLBACKEND", "Agg")

import numpy as np  # noqa: E402

from loopcheck.engine.model import Control, Design, Filter, Grid, Sampling  # noqa: E402

# an invented 20 kHz grid-side-current PR design with capacitor-current damping
DESIGN = Design(Filter(1.2e-3, 10e-6, 0.5e-3, 0.02, 0.01), Grid(50.0, 1e-3), Sampling(20e3, 1.0),
                Control("grid", "PR", Kp_V_per_A=2.5, Kr=200.0, Hi_V_per_A=6.0))
RANGE = (0.0, 6e-3)


class Timer:
    def __enter__(self):
        self.w, self.c = time.perf_counter(), time.process_time()
        return self

    def __exit__(self, *exc):
        self.wall = time.perf_counter() - self.w
        self.cpu = time.process_time() - self.c


def report(name, t, goal):
    ok = "meets" if t.wall <= goal else "MISSES"
    print(f"{name:<58} {t.wall:7.2f} s wall {t.cpu:7.2f} s cpu   goal {goal:g} s: {ok}")


def main() -> None:
    from dataclasses import replace

    from loopcheck.engine.analysis import analyse
    from loopcheck.design.pick import pick_gain
    from loopcheck.design.tolerance import ComponentTolerance, ToleranceSpec, corner_values
    from loopcheck.design.weakgrid import Targets, evaluate_points, monte_carlo, stable_lg_intervals

    Lg = np.linspace(*RANGE, 100)
    Hi = np.linspace(3.0, 10.0, 100)
    with Timer() as t1:
        m = evaluate_points(DESIGN, Lg[None, :], None, Hi[:, None])
    report("1. margins at 100 Lg x 100 Hi (batched)", t1, 10.0)
    rng = np.random.default_rng(0)
    sample = [(float(rng.choice(Lg)), float(rng.choice(Hi))) for _ in range(30)]
    with Timer() as ts:
        for lg, hi in sample:
            analyse(replace(DESIGN, grid=replace(DESIGN.grid, Lg_H=lg), control=replace(DESIGN.control, Hi_V_per_A=hi)))
    per_point = ts.wall / len(sample)
    print(f"   analyse() point by point: {per_point * 1e3:.1f} ms/point -> {per_point * m.stable.size:.1f} s "
          f"for the grid; speed-up {per_point * m.stable.size / t1.wall:.0f}x (goal >= 20x)")

    spec5 = ToleranceSpec(tuple(ComponentTolerance(n, -0.1, 0.1) for n in ("L1", "C", "L2", "R1", "R2")))
    labels, vals = corner_values(DESIGN, spec5)
    with Timer() as t2:
        scans = stable_lg_intervals(DESIGN, RANGE, vals)
    report(f"2. exact stable Lg intervals, {len(labels)} corners", t2, 10.0)
    print(f"   samples per corner: median {int(np.median([s.Lg_H.size for s in scans]))}, "
          f"max {max(s.Lg_H.size for s in scans)}")

    spec = ToleranceSpec((ComponentTolerance("C", -0.1, 0.1), ComponentTolerance("L1", -0.2, 0.0, "normal")))
    with Timer() as t3:
        mc = monte_carlo(DESIGN, spec, RANGE, Targets(), 10_000, seed=1)
    report("3. Monte Carlo, 10 000 units", t3, 15.0)
    print(f"   unstable {mc.n_unstable}, below targets {mc.n_below_targets} "
          f"(95 % interval {100 * mc.below_targets_ci[0]:.2f}..{100 * mc.below_targets_ci[1]:.2f} %)")

    with Timer() as t4:
        r = pick_gain(DESIGN, RANGE, spec, Targets())
    report("4. pick_gain, default grids, 4 corners", t4, 10.0)
    print(f"   Hi = {r.Hi_V_per_A}, interval {r.Hi_interval_V_per_A}")


if __name__ == "__main__":
    main()
