"""BLAS thread limit around loopcheck's batched small-matrix kernels.

loopcheck works on stacks of small matrices (4 x 4 to about 30 x 30: plant
models, block matrix exponentials, closed-loop eigenvalues, resolvent
solves). A multi-threaded BLAS gains nothing on matrices that small, but
waking and synchronising its threads costs time, and on a loaded machine
(more runnable threads than cores) a kernel can wait milliseconds for a
worker that is not scheduled. :func:`small_matrix_kernels` therefore limits
the BLAS libraries loaded in the process to ``KERNEL_BLAS_THREADS`` threads
while such a kernel runs, and restores the previous setting on exit. It
never changes the environment (no environment variables are set, here or
at import) and has no effect outside the ``with`` block.

threadpoolctl is imported on first use, not at import, so that
``loopcheck --help`` stays fast; without it the context manager does
nothing. The limit is process-wide while it is in force (a BLAS setting),
so other threads of the same process that call BLAS at that moment run
single-threaded too.

Measured figures: benchmarks/bench_threads.py and benchmarks/THREADS.md.
"""

from __future__ import annotations

import threading
from contextlib import contextmanager
from typing import Iterator

#: BLAS threads inside the batched small-matrix kernels; None leaves the
#: BLAS setting alone (used by benchmarks/bench_threads.py to measure the
#: unlimited default).
KERNEL_BLAS_THREADS: int | None = 1

_local = threading.local()
_controller = None
_unavailable = False


def _get_controller():
    global _controller, _unavailable
    if _controller is None and not _unavailable:
        try:
            import numpy  # noqa: F401  (load the BLAS libraries first, so the controller sees them all)
            import scipy.linalg  # noqa: F401
            from threadpoolctl import ThreadpoolController
        except ImportError:  # declared as a dependency; degrade to no limit if missing
            _unavailable = True
            return None
        _controller = ThreadpoolController()
    return _controller


@contextmanager
def small_matrix_kernels() -> Iterator[None]:
    """Run the enclosed batched small-matrix work with the BLAS limited to
    ``KERNEL_BLAS_THREADS`` threads (see the module docstring). Nested
    uses apply the limit once, at the outermost level."""
    depth = getattr(_local, "depth", 0)
    if depth or KERNEL_BLAS_THREADS is None:
        _local.depth = depth + 1
        try:
            yield
        finally:
            _local.depth = depth
        return
    ctl = _get_controller()
    _local.depth = 1
    try:
        if ctl is None:
            yield
        else:
            with ctl.limit(limits=KERNEL_BLAS_THREADS, user_api="blas"):
                yield
    finally:
        _local.depth = 0


def limited(fn):
    """Decorator: run ``fn`` inside :func:`small_matrix_kernels`."""
    import functools

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        with small_matrix_kernels():
            return fn(*args, **kwargs)

    return wrapper
