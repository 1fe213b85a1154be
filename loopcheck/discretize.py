"""Exact sampled-data model of the plant: zero-order hold with a computation
delay of any fraction of a sampling period.

Timing: the currents are sampled at t = k*Ts; the voltage computed from
sample k is applied by the modulator (a zero-order hold) from
k*Ts + delay*Ts to (k+1)*Ts + delay*Ts. Splitting the sampling interval at
the update instant gives the exact discrete model

    x[k+1] = Phi x[k] + Gamma_new u[k] + Gamma_old u[k-1]
    Phi       = e^{A Ts}
    Gamma_new = int_0^{(1-d)Ts} e^{A s} ds B
    Gamma_old = e^{A (1-d) Ts} int_0^{d Ts} e^{A s} ds B

which for d = 0 is the ordinary ZOH equivalent and for d = 1 the ZOH
equivalent followed by one sample of delay (z^-1).

References
----------
.. [1] K. J. Astrom and B. Wittenmark, "Computer-Controlled Systems: Theory
   and Design", 3rd ed., Prentice Hall, 1997, ch. 2 (sampling a system with
   a time delay).
.. [2] G. F. Franklin, J. D. Powell and M. L. Workman, "Digital Control of
   Dynamic Systems", 3rd ed., Addison-Wesley, 1998 (modified z-transform).
.. [3] C. F. Van Loan, "Computing integrals involving the matrix
   exponential", IEEE Trans. Autom. Control, vol. 23, no. 3, pp. 395-404,
   1978 (the block matrix exponential used here).
.. [4] N. J. Higham, "The scaling and squaring method for the matrix
   exponential revisited", SIAM J. Matrix Anal. Appl., vol. 26, no. 4,
   pp. 1179-1193, 2005 (the exponential itself, batched in
   :mod:`loopcheck.expm`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from .expm import expm_batched


def _expm_with_input(A, B, tau):
    """Return (e^{A tau}, int_0^tau e^{A s} ds B) via one block exponential.

    A [..., n, n], B [..., n, m], tau broadcastable to the batch shape [s]."""
    n, m = A.shape[-1], B.shape[-1]
    tau = np.asarray(tau, dtype=float)[..., None, None]
    batch = np.broadcast_shapes(A.shape[:-2], B.shape[:-2], tau.shape[:-2])
    M = np.zeros(batch + (n + m, n + m))
    M[..., :n, :n] = A * tau
    M[..., :n, n:] = B * tau
    E = expm_batched(M)
    return E[..., :n, :n], E[..., :n, n:]


@dataclass(frozen=True)
class DiscretePlant:
    """Discrete plant with the delay state.

    State ``xd = [x, u_prev]`` when the delay is > 0, else ``xd = x``.
    ``xd[k+1] = A xd[k] + B u[k]``, outputs ``y[k] = C xd[k]`` (rows i1, i2, ic
    sampled at k). No direct feed-through (the samples precede the update)."""

    A: np.ndarray
    B: np.ndarray
    C: np.ndarray
    Ts_s: np.ndarray
    delay: float


def discretize_plant(A, B, C, Ts_s, delay: float) -> DiscretePlant:
    """Exact ZOH discretisation with computation delay ``delay`` in samples (0..1).

    A [..., n, n], B [..., n, m] (m inputs, each held and delayed alike; the
    delayed inputs are the last m states), C [..., p, n]; Ts_s [s] broadcasts over the
    batch. See the module docstring for the model and its references."""
    if not 0.0 <= delay <= 1.0:
        raise ValueError("delay must lie in 0..1 sampling periods")
    A = np.asarray(A, dtype=float)
    B = np.asarray(B, dtype=float)
    C = np.asarray(C, dtype=float)
    Ts = np.asarray(Ts_s, dtype=float)
    n = A.shape[-1]
    if delay == 0.0:
        Phi, Gam = _expm_with_input(A, B, Ts)
        batch = Phi.shape[:-2]
        Cb = np.broadcast_to(C, batch + C.shape[-2:])
        return DiscretePlant(Phi, Gam, Cb.copy(), Ts, delay)
    E_new, G_new = _expm_with_input(A, B, (1.0 - delay) * Ts)
    E_old, G_old0 = _expm_with_input(A, B, delay * Ts)
    Phi = E_new @ E_old
    G_old = E_new @ G_old0
    batch = Phi.shape[:-2]
    m = B.shape[-1]  # one delay state per input (m = 1 for one converter)
    Ad = np.zeros(batch + (n + m, n + m))
    Ad[..., :n, :n] = Phi
    Ad[..., :n, n:] = G_old
    Bd = np.zeros(batch + (n + m, m))
    Bd[..., :n, :] = np.broadcast_to(G_new, batch + (n, m))
    Bd[..., n:, :] = np.eye(m)
    p = C.shape[-2]
    Cd = np.zeros(batch + (p, n + m))
    Cd[..., :, :n] = C
    return DiscretePlant(Ad, Bd, Cd, Ts, delay)
