"""Time the sampled-data simulation, the rate check and the harmonic check
on the demo cases. Goals: a 60 ms run with 20 points per sample in under
0.5 s, the rate check in under 0.5 s, the harmonic check (with the Lg range)
in under 0.2 s. Not a test: run it by hand::

    python benchmarks/bench_simulate.py [CASE.toml ...]
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))


def main(paths: list[str]) -> int:
    from loopcheck.io.casefile import read_case
    from loopcheck.harmonics.spectrum import PwmSpec, harmonic_check, operating_point
    from loopcheck.io.read_scenario import parse_scenario
    from loopcheck.timedomain.simulate import resonance_rate_check, simulate

    cases = paths or sorted(str(p) for p in (ROOT / "cases").glob("*.toml"))
    print(f"{'case':<44}{'samples':>9}{'simulate':>11}{'rate check':>12}{'harmonics':>11}")
    for path in cases:
        case = read_case(path)
        d = case.design
        sc = parse_scenario(case.tables.get("scenario"), case.where("scenario"))
        t0 = time.perf_counter()
        w = simulate(d, sc)
        t1 = time.perf_counter()
        resonance_rate_check(d, sc)
        t2 = time.perf_counter()
        th = float("nan")
        if d.grid.V_V is not None and d.grid.S_VA is not None:
            fsw = d.sampling.fs_hz
            phases = 1 if "1ph" in Path(path).stem else 3
            pwm = PwmSpec(Vdc_V=2.2 * d.grid.V_V, fsw_hz=fsw, scheme="three-phase" if phases == 3 else "full-bridge-unipolar")
            try:
                t3 = time.perf_counter()
                harmonic_check(d, pwm, operating_point(d, pwm))
                th = time.perf_counter() - t3
            except ValueError:
                pass
        print(f"{Path(path).stem[:43]:<44}{w.sample_time_s.size:>9}{t1 - t0:>10.3f}s{t2 - t1:>11.3f}s{th:>10.3f}s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
