"""Discrete current controllers (P, PI, PR with harmonic resonators).

Each part of the controller is discretised on its own and kept as a small
state-space block; the blocks are summed in state space (never multiplied
out into one polynomial, which loses all accuracy for many resonators at
high sampling rates). Every numeric argument broadcasts, so a batch of
gains or sampling periods is built in one call.

Continuous forms:

* proportional: Kp
* integrator: Ki/s
* ideal resonator: Kr*s/(s^2 + w0^2)
* damped resonator: 2*Kr*wc*s/(s^2 + 2*wc*s + w0^2)

References
----------
.. [1] D. N. Zmood and D. G. Holmes, "Stationary frame current regulation of
   PWM inverters with zero steady-state error", IEEE Trans. Power Electron.,
   vol. 18, no. 3, pp. 814-822, 2003.
.. [2] R. Teodorescu, F. Blaabjerg, M. Liserre and P. C. Loh,
   "Proportional-resonant controllers and filters for grid-connected
   voltage-source converters", IEE Proc.-Electr. Power Appl., vol. 153,
   no. 5, pp. 750-762, 2006.
.. [3] A. G. Yepes, F. D. Freijedo, J. Doval-Gandoy, O. Lopez, J. Malvar and
   P. Fernandez-Comesana, "Effects of Discretization Methods on the
   Performance of Resonant Controllers", IEEE Trans. Power Electron.,
   vol. 25, no. 7, pp. 1692-1712, 2010.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class DiscreteSS:
    """Discrete SISO state space x[k+1] = A x + B e, y = C x + D e.

    Shapes: A [..., m, m], B [..., m, 1], C [..., 1, m], D [..., 1, 1]."""

    A: np.ndarray
    B: np.ndarray
    C: np.ndarray
    D: np.ndarray

    @property
    def order(self) -> int:
        return self.A.shape[-1]


def _batch(*args):
    arrs = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in args))
    return arrs, arrs[0].shape


def proportional_block(Kp) -> DiscreteSS:
    """Static gain Kp [V/A]."""
    (Kp,), batch = _batch(Kp)
    return DiscreteSS(
        np.zeros(batch + (0, 0)), np.zeros(batch + (0, 1)), np.zeros(batch + (1, 0)), Kp[..., None, None].copy()
    )


def integrator_block(Ki, Ts, method: str) -> DiscreteSS:
    """Discrete integrator Ki/s [V/(A*s)] with sampling period Ts [s].

    forward-euler: Ki*Ts/(z-1); backward-euler: Ki*Ts*z/(z-1);
    tustin: Ki*(Ts/2)*(z+1)/(z-1) (Franklin, Powell & Workman, "Digital
    Control of Dynamic Systems", 3rd ed., 1998, ch. 6)."""
    (Ki, Ts), batch = _batch(Ki, Ts)
    frac = {"forward-euler": 0.0, "backward-euler": 1.0, "tustin": 0.5}[method]
    A = np.ones(batch + (1, 1))
    B = Ts[..., None, None].copy()
    C = Ki[..., None, None].copy()
    D = (frac * Ki * Ts)[..., None, None]
    return DiscreteSS(A, B, C, D)


def _gbt(A, B, C, D, T):
    """Bilinear (Tustin) transform of a continuous state space with step T [s]."""
    n = A.shape[-1]
    I = np.eye(n)
    Tm = T[..., None, None]
    ima = I - 0.5 * Tm * A
    Ad = np.linalg.solve(ima, I + 0.5 * Tm * A)
    Bd = np.linalg.solve(ima, Tm * B)
    Cd = np.swapaxes(np.linalg.solve(np.swapaxes(ima, -1, -2), np.swapaxes(C, -1, -2)), -1, -2)
    Dd = D + 0.5 * (C @ Bd)
    return Ad, Bd, Cd, Dd


def resonator_block(Kr, w0_rad_s, wc_rad_s, Ts, method: str) -> DiscreteSS:
    """Discrete resonator tuned at w0 [rad/s].

    Continuous form Kr*s/(s^2 + w0^2) when wc = 0 (Kr in V/(A*s)),
    2*Kr*wc*s/(s^2 + 2*wc*s + w0^2) when wc > 0 (Kr in V/A).

    Methods (Yepes et al. 2010, see module references):
    ``tustin``: s -> (2/Ts)(z-1)/(z+1);
    ``tustin-prewarp``: s -> (w0/tan(w0*Ts/2))(z-1)/(z+1), which puts the
    peak exactly at w0;
    ``zoh``: step invariant; ``impulse-invariant``: H(z) = Ts*sum h(kTs) z^-k.
    """
    (Kr, w0, wc, Ts), batch = _batch(Kr, w0_rad_s, wc_rad_s, Ts)
    b1 = np.where(wc > 0, 2.0 * Kr * wc, Kr)
    A = np.zeros(batch + (2, 2))
    A[..., 0, 1] = 1.0
    A[..., 1, 0] = -(w0**2)
    A[..., 1, 1] = -2.0 * wc
    B = np.zeros(batch + (2, 1))
    B[..., 1, 0] = 1.0
    C = np.zeros(batch + (1, 2))
    C[..., 0, 1] = b1
    D = np.zeros(batch + (1, 1))
    if method == "tustin":
        return DiscreteSS(*_gbt(A, B, C, D, Ts))
    if method == "tustin-prewarp":
        Tw = 2.0 * np.tan(w0 * Ts / 2.0) / w0
        return DiscreteSS(*_gbt(A, B, C, D, Tw))
    if method in ("zoh", "impulse-invariant"):
        M = np.zeros(batch + (3, 3))
        M[..., :2, :2] = A * Ts[..., None, None]
        M[..., :2, 2:] = B * Ts[..., None, None]
        from scipy.linalg import expm  # lazily: the map path does not need scipy

        E = expm(M)
        Ad = E[..., :2, :2]
        if method == "zoh":
            return DiscreteSS(Ad, E[..., :2, 2:], C, D)
        Bd = Ad @ B * Ts[..., None, None]
        return DiscreteSS(Ad, Bd, C, (C @ B) * Ts[..., None, None])
    raise ValueError(f"unknown resonator discretisation {method!r}")


def parallel(blocks: list[DiscreteSS]) -> DiscreteSS:
    """Sum of SISO blocks (same input, outputs added), block-diagonal A."""
    batch = np.broadcast_shapes(*(b.D.shape[:-2] for b in blocks))
    m = sum(b.order for b in blocks)
    A = np.zeros(batch + (m, m))
    B = np.zeros(batch + (m, 1))
    C = np.zeros(batch + (1, m))
    D = np.zeros(batch + (1, 1))
    i = 0
    for b in blocks:
        j = i + b.order
        A[..., i:j, i:j] = b.A
        B[..., i:j, :] = b.B
        C[..., :, i:j] = b.C
        D += b.D
        i = j
    return DiscreteSS(A, B, C, D)


def _is_zero(gain) -> bool:
    """A single gain that is exactly zero (a batch of gains is never dropped)."""
    return np.ndim(gain) == 0 and float(gain) == 0.0


def controller_blocks(control, f1_hz, Ts, Kp=None, Ki=None, Kr=None, keep_inert: bool = False) -> list[DiscreteSS]:
    """The blocks of a :class:`loopcheck.engine.model.Control` at sampling period Ts [s].

    Kp, Ki, Kr override the control's gains (arrays allowed, for sweeps).
    Resonators are placed at the fundamental f1_hz [Hz] and at each harmonic.

    A mode with a single gain of exactly zero (a PI with Ki = 0, a PR with
    Kr = 0) is left out unless ``keep_inert``: its state never reaches the
    output (C = 0 and D = 0), so its pole on the unit circle is unobservable;
    the minimal realisation of the controller has no such pole, and it must
    not turn the verdict into "marginal". The controller is then exactly the
    P controller with the same Kp.

    References
    ----------
    .. [1] R. E. Kalman, "Mathematical description of linear dynamical
       systems", J. SIAM Control, ser. A, vol. 1, no. 2, pp. 152-192, 1963
       (the input-output behaviour is that of the controllable and
       observable part; from memory).
    """
    Kp = control.Kp_V_per_A if Kp is None else Kp
    Ki = control.Ki_V_per_As if Ki is None else Ki
    Kr = control.Kr if Kr is None else Kr
    blocks = [proportional_block(Kp)]
    inert = not keep_inert and _is_zero(Ki if control.kind == "PI" else Kr)
    if control.kind in ("PI", "PR") and inert:
        pass  # Ki = 0 or Kr = 0: the P controller (see above)
    elif control.kind == "PI":
        blocks.append(integrator_block(Ki, Ts, control.integrator))
    elif control.kind == "PR":
        for h in (1,) + tuple(control.harmonics):
            w0 = 2.0 * np.pi * f1_hz * h
            blocks.append(resonator_block(Kr, w0, control.wc_rad_s, Ts, control.resonator))
    elif control.kind != "P":
        raise ValueError(f"unknown controller kind {control.kind!r}")
    return blocks


def solve_at_points(A: np.ndarray, B: np.ndarray, z: np.ndarray) -> np.ndarray:
    """(z_i I - A)^-1 B for every point z_i (unbatched A [n, n], B [n, 1]).

    Returns [len(z), n, 1]; a point that hits an eigenvalue of A exactly
    (an integrator at z = 1, an ideal resonator at its frequency) gives inf
    instead of raising."""
    n = A.shape[-1]
    M = z[:, None, None] * np.eye(n) - A
    Bb = np.broadcast_to(B, (z.size, n, 1))
    try:
        return np.linalg.solve(M, Bb)
    except np.linalg.LinAlgError:
        out = np.empty((z.size, n, 1), dtype=complex)
        for i in range(z.size):
            try:
                out[i] = np.linalg.solve(M[i], Bb[i])
            except np.linalg.LinAlgError:
                out[i] = np.inf
        return out


def block_response(block: DiscreteSS, z: np.ndarray) -> np.ndarray:
    """Frequency response C (zI - A)^-1 B + D at the points z (1-D complex),
    for an unbatched block. Returns shape z.shape."""
    m = block.order
    D = complex(block.D[..., 0, 0])
    if m == 0:
        return np.full(z.shape, D, dtype=complex)
    x = solve_at_points(block.A, block.B, z)
    return (block.C @ x)[:, 0, 0] + D


def controller_response(blocks: list[DiscreteSS], z: np.ndarray) -> np.ndarray:
    """Frequency response of the sum of blocks at z (factored evaluation)."""
    return sum(block_response(b, z) for b in blocks)
