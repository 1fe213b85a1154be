"""Timings of the impedance view (a script that prints, not a timed test).

1. Yo on 10 000 frequencies (one vectorised call) for the PFC-capacitor
   demo case. Goal: under 0.2 s.
2. The non-passive bands (dense scan and Brent edges). Goal: under 0.3 s.
3. The impedance-ratio verdict (adaptive winding count). Goal: under 0.3 s.
4. The exact eigenvalue verdict for N = 1 and N = 5 coupled units.
   Goal: under 0.05 s each.

Run from the repository root: ``python3 benchmarks/bench_impedance.py``
(``--runs N``, default 5). Wall-clock medians; two shared cores.
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

import numpy as np  # noqa: E402

from loopcheck.engine.admittance import design_admittance, passivity_bands  # noqa: E402
from loopcheck.io.casefile import read_case  # noqa: E402
from loopcheck.design.grid_network import exact_verdict, impedance_ratio_verdict
from loopcheck.io.read_network import read_grid_network


def median_time(fn, runs):
    out = []
    for _ in range(runs):
        t = time.perf_counter()
        fn()
        out.append(time.perf_counter() - t)
    return statistics.median(out)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--runs", type=int, default=5)
    runs = ap.parse_args().runs
    case = read_case("cases/commercial-30kva-pfc-capacitor.toml")
    d, net = case.design, read_grid_network(case)
    f = np.linspace(1.0, d.sampling.fs_hz, 10_000)
    print(f"Yo on 10 000 points:         {median_time(lambda: design_admittance(d, f), runs) * 1e3:8.1f} ms (goal 200)")
    print(f"non-passive bands:           {median_time(lambda: passivity_bands(d), runs) * 1e3:8.1f} ms (goal 300)")
    print(f"impedance-ratio verdict:     {median_time(lambda: impedance_ratio_verdict(d, net), runs) * 1e3:8.1f} ms (goal 300)")
    for n in (1, 5):
        t = median_time(lambda: exact_verdict(d, net, n), runs)
        print(f"exact verdict, {n} unit(s):    {t * 1e3:8.1f} ms (goal 50)")


if __name__ == "__main__":
    main()
