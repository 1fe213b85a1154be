"""The sampled current loop: plant, delay, damping loop and controller.

Signals at sample k (converter voltage u, modulator gain folded in):

    e[k]  = i_ref[k] - i_fb[k]                  (i_fb = i2 or i1)
    uc[k] = controller(e)[k]
    u[k]  = uc[k] - Hi * y[k]                    (capacitor-current feedback,
                                                  y = H(z) ic or an estimate of ic
                                                  from vc, loopcheck.engine.damping_filter)
    applied from k*Ts + delay*Ts by the modulator's zero-order hold

The loop is broken at the current controller with the damping loop closed:
``L(z) = Gc(z) * P(z)``, P = i_fb/uc with ``u = uc - Hi*ic``. Scaling the
controller by k scales L by k and moves the closed-loop matrix affinely:
``A_cl(k) = A_ol - k * B_ol C_ol``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from loopcheck.engine.controller import DiscreteSS, controller_blocks, controller_response, parallel, solve_at_points
from loopcheck.engine.damping_filter import with_damping_filter
from loopcheck.engine.discretize import DiscretePlant, discretize_plant
from loopcheck.engine.plant import OUTPUT_I1, OUTPUT_I2, OUTPUT_IC, design_plant


@dataclass(frozen=True)
class Loop:
    """A sampled current loop ready for analysis (arrays may carry a batch).

    inner_A: plant + delay with the damping loop closed [..., n, n];
    plant_B: [..., n, 1] input uc; fb_C: [..., 1, n] regulated current;
    controller: summed controller state space; blocks: its parts (for the
    factored frequency response); Ts_s: sampling period [s]."""

    inner_A: np.ndarray
    plant_B: np.ndarray
    fb_C: np.ndarray
    controller: DiscreteSS
    blocks: tuple
    Ts_s: float
    plant: DiscretePlant

    def open_loop(self):
        """Series state space of L = Gc * P: (A_ol, B_ol, C_ol), states [plant, controller]."""
        return series_open_loop(self.inner_A, self.plant_B, self.fb_C, self.controller)

    def closed_loop_matrix(self, k=1.0) -> np.ndarray:
        """Closed-loop state matrix with the controller scaled by k (array ok)."""
        A, B, C = self.open_loop()
        k = np.asarray(k, dtype=float)[..., None, None]
        return A - k * (B @ C)

    def plant_response(self, z: np.ndarray) -> np.ndarray:
        """P(z) = i_fb/uc with the damping loop closed, at the points z."""
        x = solve_at_points(self.inner_A, self.plant_B, z)
        return (self.fb_C @ x)[:, 0, 0]

    def loop_response(self, z: np.ndarray) -> np.ndarray:
        """L(z) = Gc(z) * P(z), each factor evaluated in state space."""
        return controller_response(list(self.blocks), z) * self.plant_response(z)


def series_open_loop(Ai, Bp, Cfb, ctrl: DiscreteSS):
    """State space of Gc followed by the plant: input e, output i_fb."""
    n = Ai.shape[-1]
    m = ctrl.order
    batch = np.broadcast_shapes(Ai.shape[:-2], ctrl.A.shape[:-2])
    A = np.zeros(batch + (n + m, n + m))
    A[..., :n, :n] = Ai
    A[..., :n, n:] = Bp @ ctrl.C
    A[..., n:, n:] = ctrl.A
    B = np.zeros(batch + (n + m, 1))
    B[..., :n, :] = Bp @ ctrl.D
    B[..., n:, :] = ctrl.B
    C = np.zeros(batch + (1, n + m))
    C[..., :, :n] = Cfb
    return A, B, C


def close_damping_loop(plant: DiscretePlant, Hi):
    """Plant state matrix with u = uc - Hi*y[k] closed (Hi [V/A], array ok);
    y is the plant's ic row: the measured ic, or the damping filter's output
    when :func:`loopcheck.engine.damping_filter.with_damping_filter` appended it."""
    Hi = np.asarray(Hi, dtype=float)[..., None, None]
    Cic = plant.C[..., OUTPUT_IC : OUTPUT_IC + 1, :]
    return plant.A - Hi * (plant.B @ Cic)


def build_loop(design, Lg_H=None, Hi_V_per_A=None, Kp_V_per_A=None) -> Loop:
    """Assemble the sampled loop of a design.

    Lg_H [H], Hi_V_per_A [V/A] and Kp_V_per_A [V/A] override the design's
    values (arrays allowed: the result then carries that batch)."""
    return loop_from_plant(design, design_plant(design, Lg_H), Hi_V_per_A, Kp_V_per_A)


def loop_from_plant(design, p, Hi_V_per_A=None, Kp_V_per_A=None) -> Loop:
    """The sampled loop of a design around a given continuous plant ``p``
    (a :class:`loopcheck.engine.plant.PlantSS` with output rows i1, i2, ic), e.g.
    the filter with a grid network's states appended: the network is then
    inside the exact ZOH discretisation. Hi_V_per_A [V/A] and Kp_V_per_A
    [V/A] override the design's values."""
    Ts = design.sampling.Ts_s
    dplant = with_damping_filter(discretize_plant(p.A, p.B, p.C, Ts, design.sampling.delay), design.control, Ts)
    Hi = design.control.Hi_V_per_A if Hi_V_per_A is None else Hi_V_per_A
    Ai = close_damping_loop(dplant, Hi)
    row = OUTPUT_I2 if design.control.feedback == "grid" else OUTPUT_I1
    Cfb = dplant.C[..., row : row + 1, :]
    blocks = controller_blocks(design.control, design.grid.f_hz, Ts, Kp=Kp_V_per_A)
    ctrl = parallel(blocks)
    Bp = np.broadcast_to(dplant.B, Ai.shape[:-2] + dplant.B.shape[-2:])
    return Loop(Ai, Bp, Cfb, ctrl, tuple(blocks), Ts, dplant)
