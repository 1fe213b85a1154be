"""Continuous-time state-space model of the LCL filter (per phase).

States ``x = [i1, vc, i2, (damping-branch states)]`` [A, V, A, ...], input
the converter voltage ``vi`` [V] (grid voltage zero for loop analysis),
outputs ``[i1, i2, ic]`` [A] where ``ic = i1 - i2`` is the current of the
whole shunt branch (what a capacitor-current sensor measures).

All builders broadcast over numpy arrays of parameters, so a whole sweep
grid is built in one call: the returned matrices have shape
``batch + (n, n)``.

The transfer functions of the same circuit are derived symbolically in
:mod:`loopcheck.engine.symbolic` and tested against this model.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

OUTPUT_I1, OUTPUT_I2, OUTPUT_IC = 0, 1, 2


@dataclass(frozen=True)
class PlantSS:
    """Continuous state space x' = A x + B vi, [i1, i2, ic] = C x.

    A: [..., n, n] [1/s]; B: [..., n, 1]; C: [..., 3, n] (rows i1, i2, ic)."""

    A: np.ndarray
    B: np.ndarray
    C: np.ndarray

    @property
    def order(self) -> int:
        return self.A.shape[-1]


def plant_order(damping_kind: str) -> int:
    """Number of states of the filter model for a passive-damping kind."""
    return {"none": 3, "series-R": 3, "split-RC": 4, "split-RLC": 5}[damping_kind]


def lcl_state_space(
    L1_H,
    C_F,
    L2_H,
    R1_ohm=0.0,
    R2_ohm=0.0,
    damping_kind: str = "none",
    Rd_ohm=0.0,
    Cd_F=0.0,
    Ld_H=0.0,
) -> PlantSS:
    """State-space model of an LCL filter with optional passive damping.

    Parameters broadcast against each other (numpy arrays or floats).
    ``L2_H`` is the whole grid-side inductance (filter L2 plus grid Lg) [H]
    and ``R2_ohm`` its resistance [ohm].

    Circuit equations (Kirchhoff, common practice), v = shunt-branch voltage:

    * L1 di1/dt = vi - R1 i1 - v
    * L2 di2/dt = v - R2 i2
    * none:      C dvc/dt = i1 - i2,                     v = vc
    * series-R:  C dvc/dt = i1 - i2,                     v = vc + Rd (i1 - i2)
    * split-RC:  C dvc/dt = i1 - i2 - id, Cd dvd/dt = id, id = (vc - vd)/Rd, v = vc
    * split-RLC: as split-RC with id = (vc - vd)/Rd + iL, Ld diL/dt = vc - vd

    References
    ----------
    .. [1] M. Liserre, F. Blaabjerg and S. Hansen, "Design and Control of an
       LCL-Filter-Based Three-Phase Active Rectifier", IEEE Trans. Ind.
       Appl., vol. 41, no. 5, pp. 1281-1291, 2005 (LCL model, series-R
       passive damping).
    """
    L1, C, L2, R1, R2, Rd, Cd, Ld = np.broadcast_arrays(
        *(np.asarray(v, dtype=float) for v in (L1_H, C_F, L2_H, R1_ohm, R2_ohm, Rd_ohm, Cd_F, Ld_H))
    )
    batch = L1.shape
    n = plant_order(damping_kind)
    A = np.zeros(batch + (n, n))
    B = np.zeros(batch + (n, 1))
    Cout = np.zeros(batch + (3, n))
    i1, vc, i2 = 0, 1, 2
    B[..., i1, 0] = 1.0 / L1
    A[..., i1, i1] = -R1 / L1
    A[..., i1, vc] = -1.0 / L1
    A[..., i2, vc] = 1.0 / L2
    A[..., i2, i2] = -R2 / L2
    A[..., vc, i1] = 1.0 / C
    A[..., vc, i2] = -1.0 / C
    if damping_kind == "series-R":
        # v = vc + Rd (i1 - i2)
        A[..., i1, i1] -= Rd / L1
        A[..., i1, i2] += Rd / L1
        A[..., i2, i1] += Rd / L2
        A[..., i2, i2] -= Rd / L2
    elif damping_kind in ("split-RC", "split-RLC"):
        vd = 3
        g = 1.0 / Rd
        A[..., vc, vc] -= g / C
        A[..., vc, vd] += g / C
        A[..., vd, vc] += g / Cd
        A[..., vd, vd] -= g / Cd
        if damping_kind == "split-RLC":
            iL = 4
            A[..., vc, iL] -= 1.0 / C
            A[..., vd, iL] += 1.0 / Cd
            A[..., iL, vc] = 1.0 / Ld
            A[..., iL, vd] = -1.0 / Ld
    elif damping_kind != "none":
        raise ValueError(f"unknown passive damping kind {damping_kind!r}")
    Cout[..., 0, i1] = 1.0
    Cout[..., 1, i2] = 1.0
    Cout[..., 2, i1] = 1.0
    Cout[..., 2, i2] = -1.0
    return PlantSS(A, B, Cout)


def design_plant(design, Lg_H=None) -> PlantSS:
    """Plant of a :class:`loopcheck.engine.model.Design` (grid inductance included).

    ``Lg_H`` overrides the design's grid inductance (may be an array)."""
    f, g = design.filter, design.grid
    Lg = g.Lg_H if Lg_H is None else Lg_H
    d = f.damping
    return lcl_state_space(
        f.L1_H, f.C_F, np.asarray(f.L2_H) + Lg, f.R1_ohm, f.R2_ohm + g.Rg_ohm,
        d.kind, d.Rd_ohm, d.Cd_F, d.Ld_H,
    )
