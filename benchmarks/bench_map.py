"""Timings of ``loopcheck map`` (a script that prints, not a timed test).

1. A 1000 x 1000 verdict map with exact boundaries and the spectral radius
   of a grid-side-current PR design (fr/fs 0.02..0.45 against Hi).
   Goal: under 3 s on a 2-core machine.
2. The same verdict computed point by point with python-control on a
   random sample of those points (as a new user would write it: state
   space, sample_system, a delay block, feedback, poles), extrapolated to
   the whole grid. Goal: the map at least 1000 times faster. The sample's
   verdicts are also compared with the map's.
3. A 200 x 200 map with phase margin, gain-margin interval and sensitivity
   peak. Goal: under 10 s.

Run from the repository root: ``python3 benchmarks/bench_map.py``
(``--sample N`` sets the python-control sample size, default 300).
Wall-clock times depend on what else runs on the machine; the CPU time of
this process is printed beside them.
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import time

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))
os.environ.setdefault("MPLBACKEND", "Agg")

import numpy as np  # noqa: E402

from loopcheck.design import maps  # noqa: E402
from loopcheck.engine.model import Control, Design, Filter, Grid, Sampling  # noqa: E402

# an invented 14 kHz grid-side-current PR design
L1, C, L2, R1, R2 = 2.0e-3, 6.8e-6, 0.8e-3, 0.015, 0.005
FS, F1, KP, KR, HI = 14e3, 50.0, 11.0, 900.0, 14.0
DESIGN = Design(
    Filter(L1, C, L2, R1, R2),
    Grid(F1, 0.0),
    Sampling(FS, 1.0),
    Control("grid", "PR", Kp_V_per_A=KP, Kr=KR, Hi_V_per_A=HI),
    name="bench 14 kHz grid-side PR",
)


def timed(fn):
    w, c = time.perf_counter(), time.process_time()
    out = fn()
    return out, time.perf_counter() - w, time.process_time() - c


def control_verdict(ratio: float, hi: float) -> bool:
    """One point with python-control (the per-point loop of a general library)."""
    import control as ct

    Ts = 1.0 / FS
    wr = 2 * math.pi * ratio * FS
    c = (L1 + L2) / (L1 * L2 * wr**2)
    A = [[-R1 / L1, -1.0 / L1, 0.0], [1.0 / c, 0.0, -1.0 / c], [0.0, 1.0 / L2, -R2 / L2]]
    plant = ct.ss(A, [[1.0 / L1], [0.0], [0.0]], [[1.0, 0.0, -1.0], [0.0, 0.0, 1.0]], [[0.0], [0.0]])
    delayed = ct.sample_system(plant, Ts, method="zoh") * ct.ss([[0.0]], [[1.0]], [[1.0]], [[0.0]], Ts)
    inner = ct.feedback(delayed, np.array([[hi, 0.0]]))
    w0 = 2 * math.pi * F1
    res = ct.sample_system(ct.ss(ct.tf([KR, 0.0], [1.0, 0.0, w0**2])), Ts, method="tustin", prewarp_frequency=w0)
    loop = ct.series(ct.parallel(res, ct.ss([], [], [], [[KP]], Ts)), inner[1, 0])
    poles = ct.feedback(loop, 1).poles()
    return bool(np.max(np.abs(poles)) < 1.0 - 1e-9)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sample", type=int, default=300, help="python-control sample size")
    args = ap.parse_args()

    spec = maps.MapSpec(maps.Axis("fr/fs", 0.02, 0.45, 1000), maps.Axis("Hi", 0.0, 45.0, 1000))
    maps.compute_map(DESIGN, maps.MapSpec(maps.Axis("fr/fs", 0.02, 0.45, 20), maps.Axis("Hi", 0.0, 45.0, 20)))  # warm-up
    m, wall, cpu = timed(lambda: maps.compute_map(DESIGN, spec))
    n = m.stable.size
    print(f"1000 x 1000 verdict map (exact boundaries + spectral radius): {wall:.2f} s wall, {cpu:.2f} s CPU "
          f"[goal < 3 s]; {100 * m.stable_fraction:.1f} % stable; boundary method: "
          f"{m.boundary_method.count('exact')} exact / {m.boundary_method.count('refined')} refined columns")

    import control  # noqa: F401  (import time not counted)

    rng = np.random.default_rng(0)
    ii = rng.integers(0, 1000, args.sample)
    jj = rng.integers(0, 1000, args.sample)
    control_verdict(0.1, 10.0)  # warm-up
    w0 = time.perf_counter()
    verdicts = [control_verdict(m.x_values[i], m.y_values[j]) for i, j in zip(ii, jj)]
    per_point = (time.perf_counter() - w0) / args.sample
    mismatch = sum(v != bool(m.stable[j, i]) for v, i, j in zip(verdicts, ii, jj))
    full = per_point * n
    print(f"python-control, point by point: {1e3 * per_point:.2f} ms per point -> {full:.0f} s "
          f"({full / 60:.1f} min) for the same {n} points; map speed-up {full / wall:.0f}x wall "
          f"[goal >= 1000x]; verdicts differing on the {args.sample}-point sample: {mismatch}")

    spec2 = maps.MapSpec(maps.Axis("fr/fs", 0.02, 0.45, 200), maps.Axis("Hi", 0.0, 45.0, 200), maps.METRICS)
    m2, wall2, cpu2 = timed(lambda: maps.compute_map(DESIGN, spec2))
    print(f"200 x 200 map with phase margin, gain-margin interval and sensitivity peak: {wall2:.2f} s wall, "
          f"{cpu2:.2f} s CPU [goal < 10 s]; margins at {int(m2.stable.sum())} stable points")


if __name__ == "__main__":
    main()
