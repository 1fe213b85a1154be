"""Exact sampled-data model of the plant: zero-order hold with a total loop
delay of any length (whole plus fractional sampling periods).

Timing: the currents are sampled at t = k*Ts; the voltage computed from
sample k is applied by the modulator (a zero-order hold) from
k*Ts + delay*Ts to (k+1)*Ts + delay*Ts. Splitting the sampling interval at
the update instant gives the exact discrete model

    x[k+1] = Phi x[k] + Gamma_new u[k] + Gamma_old u[k-1]
    Phi       = e^{A Ts}
    Gamma_new = int_0^{(1-d)Ts} e^{A s} ds B
    Gamma_old = e^{A (1-d) Ts} int_0^{d Ts} e^{A s} ds B

which for d = 0 is the ordinary ZOH equivalent and for d = 1 the ZOH
equivalent followed by one sample of delay (z^-1). A longer delay N + d
(N whole samples, e.g. sensor and anti-aliasing filters modelled as pure
delay) shifts both input terms by N samples: the older inputs are delay
states (a shift register), see :func:`discretize_plant`.

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
   :mod:`loopcheck.engine.expm`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from loopcheck.engine.expm import expm_batched
from loopcheck.engine.model import MAX_DELAY_SAMPLES


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
    """Discrete plant with the delay states.

    State ``xd = [x, u[k-1], ..., u[k-q]]`` (q = ceil(delay) delayed copies of
    each input, oldest last) when the delay is > 0, else ``xd = x``.
    ``xd[k+1] = A xd[k] + B u[k]``, outputs ``y[k] = C xd[k]`` (rows i1, i2, ic
    sampled at k). No direct feed-through (the samples precede the update)."""

    A: np.ndarray
    B: np.ndarray
    C: np.ndarray
    Ts_s: np.ndarray
    delay: float


#: Largest total loop delay [sampling periods] the model accepts.
MAX_DELAY = MAX_DELAY_SAMPLES


def delay_split(delay: float) -> tuple[int, float]:
    """Whole and fractional part ``(N, d)`` of a delay in samples, d in [0, 1)."""
    N = int(np.floor(delay + 1e-12))
    d = float(delay - N)
    if d < 1e-12:
        d = 0.0
    return N, d


def discretize_plant(A, B, C, Ts_s, delay: float) -> DiscretePlant:
    """Exact ZOH discretisation with a total loop delay ``delay`` in samples
    (0..:data:`MAX_DELAY`, whole plus fractional part).

    With delay = N + d (N whole, 0 <= d < 1) the input applied during
    [k Ts, k Ts + d Ts) is u[k-N-1] and during [k Ts + d Ts, (k+1) Ts) it
    is u[k-N], so x[k+1] = Phi x[k] + Gamma_new u[k-N] + Gamma_old u[k-N-1]
    (module docstring) and the older inputs are a chain of delay states.

    A [..., n, n], B [..., n, m] (m inputs, each held and delayed alike; the
    delayed inputs are the last q*m states, u[k-1] first), C [..., p, n];
    Ts_s [s] broadcasts over the batch. See the module docstring for the
    model and its references."""
    if not 0.0 <= delay <= MAX_DELAY:
        raise ValueError(f"delay must lie in 0..{MAX_DELAY:g} sampling periods")
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
    N, d = delay_split(delay)
    E_new, G_new = _expm_with_input(A, B, (1.0 - d) * Ts)
    E_old, G_old0 = _expm_with_input(A, B, d * Ts)
    Phi = E_new @ E_old
    G_old = E_new @ G_old0
    batch = Phi.shape[:-2]
    m = B.shape[-1]  # one delay state per input and whole sample (m = 1 for one converter)
    q = N + (1 if d > 0.0 else 0)  # delayed copies u[k-1] .. u[k-q]
    nt = n + q * m
    Ad = np.zeros(batch + (nt, nt))
    Bd = np.zeros(batch + (nt, m))
    Ad[..., :n, :n] = Phi

    def col(j):  # state block of u[k-j], j = 1..q
        return slice(n + (j - 1) * m, n + j * m)

    # u[k-N] drives Gamma_new, u[k-N-1] drives Gamma_old (j = 0 is the input itself)
    for j, G in ((N, G_new), (N + 1, G_old)):
        if j > q:
            continue
        Gb = np.broadcast_to(G, batch + (n, m))
        if j == 0:
            Bd[..., :n, :] += Gb
        else:
            Ad[..., :n, col(j)] += Gb
    Bd[..., col(1), :] = np.eye(m)
    for j in range(2, q + 1):
        Ad[..., col(j), col(j - 1)] = np.eye(m)
    p = C.shape[-2]
    Cd = np.zeros(batch + (p, nt))
    Cd[..., :, :n] = C
    return DiscretePlant(Ad, Bd, Cd, Ts, delay)
