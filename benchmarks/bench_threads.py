"""BLAS threads and loopcheck's commands (a script that prints timings).

Every command runs on a demo case in this process (typer's CliRunner, the
first run of each command discarded as warm-up: imports, caches) under
three settings, interleaved run by run so that the load of the machine
falls on all three alike:

* ``default``: the BLAS thread count left as the libraries set it, and
  loopcheck's own kernel limit switched off
  (``loopcheck.engine.threads.KERNEL_BLAS_THREADS = None``): the behaviour before
  the limit existed;
* ``kernels``: as shipped: the BLAS limited to one thread inside
  loopcheck's batched small-matrix kernels only
  (:func:`loopcheck.engine.threads.small_matrix_kernels`);
* ``process 1``: the whole command under
  ``threadpoolctl.threadpool_limits(1, "blas")``, the upper bound of what a
  limit can gain.

Before the commands, the kernels themselves (a 4 x 4 matrix exponential,
batched exponentials, eigenvalues and solves of the sizes the sweeps use)
are timed with the BLAS at its default and at one thread (medians of
interleaved repeats, milliseconds).

Printed per command: the median wall time of each setting [s], the
ratios default/kernels and default/process-1 (above 1: the limit is
faster) and the median CPU time of the process (all its threads) [s]. Also printed: the BLAS libraries and their default thread counts
(threadpoolctl.threadpool_info), the CPU count and the load average.

Run from the repository root: ``python3 benchmarks/bench_threads.py``
(``--runs N``, default 5; ``--only check,map`` for a subset). Wall-clock
times depend on what else runs on the machine; record the figures with the
conditions in benchmarks/THREADS.md.
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time

ROOT = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..")
sys.path.insert(0, ROOT)
os.environ.setdefault("MPLBACKEND", "Agg")

CASES = os.path.join(ROOT, "cases")
WEAK = os.path.join(CASES, "commercial-30kva-weak-grid.toml")
ONE_PH = os.path.join(CASES, "residential-5kva-1ph.toml")


def commands(tmp: str) -> list[tuple[str, list[str]]]:
    """(label, argv) of each command on a demo case."""
    return [
        ("check", ["check", WEAK, "--json"]),
        ("check (1ph, multi-resonator)", ["check", ONE_PH, "--json"]),
        ("map", ["map", WEAK, "--json"]),
        ("grid", ["grid", WEAK, "--json"]),
        ("pick", ["pick", WEAK, "--json"]),
        ("export", ["export", WEAK, "-o", os.path.join(tmp, "export")]),
        ("simulate", ["simulate", WEAK, "--json"]),
        ("simulate --switched", ["simulate", WEAK, "--switched", "--json"]),
        ("harmonics", ["harmonics", WEAK, "--json"]),
        ("report", ["report", WEAK, "-o", os.path.join(tmp, "report.html")]),
    ]


def kernel_table(repeats: int = 15) -> None:
    """Median wall time [ms] of each kernel at the default BLAS threads and at 1."""
    import numpy as np
    import scipy.linalg
    from threadpoolctl import ThreadpoolController

    import loopcheck.engine.threads as lt
    from loopcheck.engine.expm import expm_batched

    ctl = ThreadpoolController()
    rng = np.random.default_rng(0)
    A4 = rng.standard_normal((1, 4, 4))
    A = rng.standard_normal((4000, 8, 8))
    Bv = rng.standard_normal((4000, 8, 1))
    S = rng.standard_normal((40, 6, 6))
    E16 = rng.standard_normal((43, 16, 16)) * 0.3
    H = np.lib.stride_tricks.sliding_window_view(np.sin(0.3 * np.arange(300)) * 0.99 ** np.arange(300), 151).copy()
    kernels = {
        "expm_batched 1 x 4 x 4": lambda: expm_batched(A4),
        "scipy.linalg.expm 4 x 4": lambda: scipy.linalg.expm(A4[0]),
        "expm_batched 4000 x 8 x 8": lambda: expm_batched(A),
        "scipy.linalg.expm 40 x 6 x 6": lambda: scipy.linalg.expm(S),
        "eigvals 4000 x 8 x 8": lambda: np.linalg.eigvals(A),
        "solve 4000 x 8 x 8": lambda: np.linalg.solve(A, Bv),
        "scipy.linalg.expm 43 x 16 x 16": lambda: scipy.linalg.expm(E16),  # simulate's block exponentials
        "svd 150 x 151 (matrix pencil)": lambda: np.linalg.svd(H, full_matrices=False),  # the rate check's fit
    }
    shipped = lt.KERNEL_BLAS_THREADS
    lt.KERNEL_BLAS_THREADS = None  # the kernels as they were, without loopcheck's own limit
    print(f"\n{'kernel':<30}{'default [ms]':>13}{'1 thread [ms]':>15}{'ratio':>8}")
    for name, fn in kernels.items():
        fn()
        d, o = [], []
        for _ in range(repeats):
            t0 = time.perf_counter()
            fn()
            d.append(time.perf_counter() - t0)
            with ctl.limit(limits=1, user_api="blas"):
                t0 = time.perf_counter()
                fn()
                o.append(time.perf_counter() - t0)
        a, b = statistics.median(d) * 1e3, statistics.median(o) * 1e3
        print(f"{name:<30}{a:>13.3f}{b:>15.3f}{a / b:>8.2f}", flush=True)
    lt.KERNEL_BLAS_THREADS = shipped
    t0 = time.perf_counter()
    for _ in range(1000):
        with lt.small_matrix_kernels():
            pass
    print(f"cost of entering and leaving the kernel limit: {(time.perf_counter() - t0):.3f} ms per call")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=5)
    ap.add_argument("--only", default="", help="comma-separated command labels (prefix match)")
    ap.add_argument("--kernels-only", action="store_true", help="time the kernels only, not the commands")
    ap.add_argument("--report-runs", type=int, default=None, help="runs of the (slow) report command (default --runs)")
    args = ap.parse_args()

    import numpy  # noqa: F401
    import scipy.linalg  # noqa: F401
    from threadpoolctl import threadpool_info, threadpool_limits
    from typer.testing import CliRunner

    import loopcheck.engine.threads as lt
    from loopcheck.cli.main import app

    runner = CliRunner()
    env = {"COLUMNS": "200", "NO_COLOR": "1"}
    print(f"cpus: {os.cpu_count()}, load average at start: {os.getloadavg()[0]:.2f}")
    for info in threadpool_info():
        print(f"  {info['internal_api']} {info.get('version')}: {info['num_threads']} threads "
              f"({os.path.basename(info['filepath'])}, user_api {info['user_api']})")
    shipped = lt.KERNEL_BLAS_THREADS
    kernel_table()
    if args.kernels_only:
        return

    def run(argv, setting):
        lt.KERNEL_BLAS_THREADS = None if setting == "default" else shipped
        t0, c0 = time.perf_counter(), time.process_time()
        if setting == "process 1":
            with threadpool_limits(limits=1, user_api="blas"):
                r = runner.invoke(app, argv, env=env)
        else:
            r = runner.invoke(app, argv, env=env)
        dt, dc = time.perf_counter() - t0, time.process_time() - c0
        if r.exit_code not in (0, 4):
            raise SystemExit(f"{argv}: exit {r.exit_code}\n{r.stderr}")
        return dt, dc

    settings = ("default", "kernels", "process 1")
    only = [s.strip() for s in args.only.split(",") if s.strip()]
    with tempfile.TemporaryDirectory() as tmp:
        print(f"\n{'command':<30}{'default [s]':>12}{'kernels [s]':>12}{'process 1 [s]':>14}"
              f"{'def/kern':>9}{'def/proc1':>10}   cpu [s] default / kernels / process 1")
        for label, argv in commands(tmp):
            if only and not any(label.startswith(o) for o in only):
                continue
            run(argv, "default")  # warm-up
            times = {s: [] for s in settings}
            for _ in range(args.report_runs if label == "report" and args.report_runs else args.runs):
                for s in settings:
                    times[s].append(run(argv, s))
            med = {s: statistics.median(t for t, _ in v) for s, v in times.items()}
            cpu = {s: statistics.median(c for _, c in v) for s, v in times.items()}
            print(f"{label:<30}{med['default']:>12.3f}{med['kernels']:>12.3f}{med['process 1']:>14.3f}"
                  f"{med['default'] / med['kernels']:>9.2f}{med['default'] / med['process 1']:>10.2f}"
                  f"   {cpu['default']:.3f} / {cpu['kernels']:.3f} / {cpu['process 1']:.3f}", flush=True)
    lt.KERNEL_BLAS_THREADS = shipped
    print(f"\nload average at end: {os.getloadavg()[0]:.2f} (runs per setting: {args.runs}, medians)")


if __name__ == "__main__":
    main()
