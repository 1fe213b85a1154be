"""Matrix exponential of a whole stack of small matrices at once.

scipy.linalg.expm loops over a stack in Python-level work per matrix
(about 0.2 ms for a 5 x 5 matrix); sweeps build thousands of plant models,
so the same algorithm is written here once for the whole stack.

References
----------
.. [1] N. J. Higham, "The scaling and squaring method for the matrix
   exponential revisited", SIAM J. Matrix Anal. Appl., vol. 26, no. 4,
   pp. 1179-1193, 2005.
"""

from __future__ import annotations

import numpy as np

from loopcheck.engine.threads import limited

_PADE13 = (
    64764752532480000.0,
    32382376266240000.0,
    7771770303897600.0,
    1187353796428800.0,
    129060195264000.0,
    10559470521600.0,
    670442572800.0,
    33522128640.0,
    1323241920.0,
    40840800.0,
    960960.0,
    16380.0,
    182.0,
    1.0,
)
_THETA13 = 5.371920351148152


@limited
def expm_batched(M: np.ndarray) -> np.ndarray:
    """Matrix exponential of a stack of square matrices ``M [..., n, n]``.

    Scaling and squaring with the [13/13] Pade approximant (Higham 2005), vectorised over the stack: one set of
    matrix products for all matrices that need the same number of
    squarings. Runs with the BLAS limited to one thread
    (:func:`loopcheck.engine.threads.small_matrix_kernels`)."""
    M = np.asarray(M, dtype=float)
    shape = M.shape
    n = shape[-1]
    X = M.reshape((-1, n, n))
    out = np.empty_like(X)
    if X.shape[0] == 0:
        return out.reshape(shape)
    norm = np.abs(X).sum(axis=-2).max(axis=-1)  # 1-norm
    with np.errstate(divide="ignore"):
        s = np.where(norm > _THETA13, np.ceil(np.log2(np.maximum(norm, 1e-300) / _THETA13)), 0.0).astype(int)
    eye = np.eye(n)
    b = _PADE13
    for sv in np.unique(s):
        idx = np.nonzero(s == sv)[0]
        A = X[idx] / (2.0**sv)
        A2 = A @ A
        A4 = A2 @ A2
        A6 = A4 @ A2
        U = A @ (A6 @ (b[13] * A6 + b[11] * A4 + b[9] * A2) + b[7] * A6 + b[5] * A4 + b[3] * A2 + b[1] * eye)
        V = A6 @ (b[12] * A6 + b[10] * A4 + b[8] * A2) + b[6] * A6 + b[4] * A4 + b[2] * A2 + b[0] * eye
        R = np.linalg.solve(V - U, V + U)
        for _ in range(int(sv)):
            R = R @ R
        out[idx] = R
    return out.reshape(shape)
