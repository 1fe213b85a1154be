"""The BLAS thread limit around loopcheck's small-matrix kernels
(loopcheck.engine.threads): it limits the BLAS inside and only inside the kernels,
restores the user's setting, never touches the environment, and keeps the
results. The thread counts are read back through threadpoolctl's
threadpool_info (general-purpose reference library); the matrix
exponential is compared with scipy.linalg.expm."""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest
import scipy.linalg
from threadpoolctl import threadpool_info, threadpool_limits

import loopcheck.engine.threads as lt
from loopcheck.engine.expm import expm_batched


def blas_threads():
    return sorted(i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas")


def test_limit_applies_inside_and_restores_outside():
    env = dict(os.environ)
    with threadpool_limits(limits=2, user_api="blas"):  # a user's setting (2 threads)
        before = blas_threads()
        assert before and all(n == 2 for n in before)
        with lt.small_matrix_kernels():
            assert all(n == 1 for n in blas_threads())
            with lt.small_matrix_kernels():  # nested: still 1, and the outer exit restores
                assert all(n == 1 for n in blas_threads())
            assert all(n == 1 for n in blas_threads())
        assert blas_threads() == before
    assert dict(os.environ) == env  # no environment variable set


def test_switch_off_leaves_blas_alone(monkeypatch):
    monkeypatch.setattr(lt, "KERNEL_BLAS_THREADS", None)
    with threadpool_limits(limits=2, user_api="blas"):
        with lt.small_matrix_kernels():
            assert all(n == 2 for n in blas_threads())


def test_kernel_runs_limited_and_matches_scipy(monkeypatch):
    seen = []
    real = np.linalg.solve

    def spy(a, b):  # called inside expm_batched
        seen.append(blas_threads())
        return real(a, b)

    monkeypatch.setattr(np.linalg, "solve", spy)
    rng = np.random.default_rng(3)
    M = rng.standard_normal((5, 4, 4)) * 3
    with threadpool_limits(limits=2, user_api="blas"):
        got = expm_batched(M)
        assert all(n == 2 for n in blas_threads())
    assert seen and all(all(n == 1 for n in s) for s in seen)
    ref = np.stack([scipy.linalg.expm(m) for m in M])
    assert np.max(np.abs(got - ref) / np.max(np.abs(ref))) < 1e-12


def test_import_does_not_load_threadpoolctl():
    code = ("import sys, loopcheck.cli.main, loopcheck.engine.threads, loopcheck.engine.expm; "
            "print('threadpoolctl' in sys.modules, 'OMP_NUM_THREADS' in __import__('os').environ)")
    env = {k: v for k, v in os.environ.items() if k not in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS")}
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, env=env).stdout
    assert out.split() == ["False", "False"]


@pytest.mark.parametrize("fn", ["simulate", "resonance_rate_check", "harmonic_check", "compare_damping",
                                "analyse_loop", "spectral_radius", "expm_batched"])
def test_batched_entry_points_are_limited(fn):
    import loopcheck.engine.analysis
    import loopcheck.engine.expm
    import loopcheck.harmonics.spectrum
    import loopcheck.design.passive
    import loopcheck.timedomain.simulate
    import loopcheck.engine.verdict

    mods = (loopcheck.timedomain.simulate, loopcheck.harmonics.spectrum, loopcheck.design.passive, loopcheck.engine.analysis, loopcheck.engine.verdict,
            loopcheck.engine.expm)
    f = next(getattr(m, fn) for m in mods if hasattr(m, fn))
    assert getattr(f, "__wrapped__", None) is not None  # functools.wraps of loopcheck.engine.threads.limited
