"""Stability verdict from closed-loop eigenvalues.

A discrete-time loop is asymptotically stable iff every eigenvalue of its
closed-loop state matrix lies strictly inside the unit circle (common
practice; e.g. K. Ogata, "Discrete-Time Control Systems", 2nd ed., 1995).
Integrators, ideal resonators and a lossless filter put open-loop poles on
the unit circle by construction, and rounding moves such poles by ~1e-15;
closed-loop poles within ``TOLERANCE`` of the circle are therefore called
``marginal`` rather than stable or unstable.
"""

from __future__ import annotations

import numpy as np

from loopcheck.engine.threads import limited

#: Band around |z| = 1 treated as "on the circle" [dimensionless].
TOLERANCE = 1e-9


@limited
def spectral_radius(A: np.ndarray) -> np.ndarray:
    """max |eig(A)| over the last two axes (batched)."""
    return np.abs(np.linalg.eigvals(A)).max(axis=-1)


def classify(radius, tol: float = TOLERANCE):
    """'stable', 'marginal' or 'unstable' from the spectral radius."""
    r = float(radius)
    if r < 1.0 - tol:
        return "stable"
    if r <= 1.0 + tol:
        return "marginal"
    return "unstable"


def count_outside(poles, tol: float = TOLERANCE) -> int:
    """Number of poles with |z| > 1 + tol."""
    return int(np.sum(np.abs(poles) > 1.0 + tol))


def count_on_circle(poles, tol: float = TOLERANCE) -> int:
    """Number of poles with | |z| - 1 | <= tol."""
    return int(np.sum(np.abs(np.abs(poles) - 1.0) <= tol))
