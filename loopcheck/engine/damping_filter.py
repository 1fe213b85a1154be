"""The damping path as a discrete filter H(z) in front of the gain Hi.

Signals at sample k:

    s[k] = ic[k]               (signal "ic": measured capacitor current [A])
    s[k] = C vc[k] / Ts        (signal "vc": sampled capacitor voltage [A])
    y    = H(z) s              (the filter, its own states)
    u[k] = uc[k] - Hi * y[k]

Presets (``[control] damping_filter``):

* ``measured``: H = 1 on ic (plain capacitor-current feedback);
* ``backward-euler``: ic estimated from vc, y = C (vc[k] - vc[k-1]) / Ts,
  H = 1 - z^-1 on the vc signal; at the resonance it adds half a sample of
  lag, e^{-j w Ts/2} sin(w Ts/2)/(w Ts/2) relative to ic;
* ``tustin``: trapezoidal derivative, y[k] = 2 C (vc[k] - vc[k-1])/Ts - y[k-1],
  H = 2 (1 - z^-1)/(1 + z^-1); no phase error but its gain grows as
  tan(w Ts/2)/(w Ts/2) and it has a pole at z = -1 (a marginal filter mode);
* ``lead``: first-order linear prediction of ic, a = lead_samples ahead,
  y = (1 + a) ic[k] - a ic[k-1] (a lead that compensates part of the
  delay; its gain at fs/2 is 1 + 2a);
* ``high-pass``: s/(s + wc) on ic discretised by Tustin (removes offsets);
* ``coefficients``: explicit b, a (ascending powers of z^-1) on either signal.

The filter enters the sampled plant as extra states: the plant's ic output
row is replaced by the filter output y, so every caller that closes the
damping loop with ``u = uc - Hi * y`` (loop, maps, weak-grid sweeps) stays a
rank-one update in Hi and the maps' fast paths stay exact.

References
----------
.. [1] W. Pan, X. Ruan, C. Bao, W. Li and X. Wang, "Capacitor-current-
   feedback active damping with reduced computation delay for improving
   robustness of LCL-type grid-connected inverter", IEEE Trans. Power
   Electron., vol. 29, no. 7, pp. 3414-3427, 2014 (the virtual impedance of
   the damping path and its critical frequency; from memory).
.. [2] Z. Xin, X. Wang, P. C. Loh and F. Blaabjerg, "Realization of digital
   differentiator using generalized integrator for power converters", IEEE
   Trans. Power Electron., vol. 30, no. 12, 2015 (backward-Euler and Tustin
   derivative estimates of the capacitor current and their phase/gain
   errors; from memory).
.. [3] G. F. Franklin, J. D. Powell and M. L. Workman, "Digital Control of
   Dynamic Systems", 3rd ed., Addison-Wesley, 1998 (observable canonical
   state-space realisation of a discrete transfer function).
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np

from loopcheck.engine.discretize import DiscretePlant
from loopcheck.engine.model import Design, DampingFilter
from loopcheck.engine.damping_text import critical_formula, describe, is_filtered  # noqa: F401  (re-exported)
from loopcheck.engine.plant import OUTPUT_IC

#: Plant state that holds the capacitor voltage (loopcheck.engine.plant layout).
VC_STATE = 1


def coefficients(filt: DampingFilter, Ts_s) -> tuple[np.ndarray, np.ndarray]:
    """(b, a) of H(z) in ascending powers of z^-1, a0 = 1, same length
    [..., k] (a batch when Ts_s [s] is an array and the preset depends on it)."""
    Ts = np.asarray(Ts_s, dtype=float)
    k = filt.kind
    if k == "measured":
        b, a = [1.0], [1.0]
    elif k == "backward-euler":
        b, a = [1.0, -1.0], [1.0]
    elif k == "tustin":
        b, a = [2.0, -2.0], [1.0, 1.0]
    elif k == "lead":
        g = float(filt.lead_samples)
        b, a = [1.0 + g, -g], [1.0]
    elif k == "high-pass":
        h = np.pi * filt.cutoff_hz * Ts  # wc Ts / 2
        K = 1.0 / (1.0 + h)
        p = (1.0 - h) / (1.0 + h)
        b = np.stack(np.broadcast_arrays(K, -K), axis=-1)
        a = np.stack(np.broadcast_arrays(np.ones_like(p), -p), axis=-1)
        return b, a
    elif k == "coefficients":
        b, a = list(filt.b), list(filt.a)
    else:
        raise ValueError(f"unknown damping filter {k!r}")
    n = max(len(b), len(a))
    b = np.array(b + [0.0] * (n - len(b)), dtype=float)
    a = np.array(a + [0.0] * (n - len(a)), dtype=float)
    return b / a[0], a / a[0]


def realisation(b: np.ndarray, a: np.ndarray):
    """Observable canonical state space (Af, Bf, Cf, Df) of
    H(z) = sum b_i z^-i / sum a_i z^-i (a0 = 1, equal lengths [..., n+1]).
    Shapes [..., n, n], [..., n, 1], [..., 1, n], [..., 1, 1]."""
    b = np.asarray(b, dtype=float)
    a = np.asarray(a, dtype=float)
    b, a = np.broadcast_arrays(b, a)
    n = b.shape[-1] - 1
    batch = b.shape[:-1]
    Af = np.zeros(batch + (n, n))
    Af[..., :, 0] = -a[..., 1:]
    if n > 1:
        Af[..., :-1, 1:] = np.eye(n - 1)
    Bf = (b[..., 1:] - a[..., 1:] * b[..., :1])[..., None]
    Cf = np.zeros(batch + (1, n))
    if n:
        Cf[..., 0, 0] = 1.0
    Df = b[..., :1][..., None]
    return Af, Bf, Cf, Df


def signal_row(dp: DiscretePlant, filt: DampingFilter, Ts_s) -> np.ndarray:
    """Row [..., 1, nt] of the filter's input signal in the sampled plant's states."""
    if filt.signal == "vc":
        scale = np.asarray(filt.C_F / np.asarray(Ts_s, dtype=float))
        batch = np.broadcast_shapes(dp.C.shape[:-2], scale.shape)
        row = np.zeros(batch + (1, dp.C.shape[-1]))
        row[..., 0, VC_STATE] = np.broadcast_to(scale, batch)
        return row
    return dp.C[..., OUTPUT_IC : OUTPUT_IC + 1, :]


def with_damping_filter(dp: DiscretePlant, control, Ts_s) -> DiscretePlant:
    """The sampled plant with the damping filter's states appended and its
    ic output row replaced by the filter output y (unchanged when the damping
    path is the measured ic). Works on batches; Ts_s [s] broadcasts."""
    if not is_filtered(control):
        return dp
    filt = control.damping_filter
    b, a = coefficients(filt, Ts_s)
    Af, Bf, Cf, Df = realisation(b, a)
    s = signal_row(dp, filt, Ts_s)  # [..., 1, nt]
    batch = np.broadcast_shapes(dp.A.shape[:-2], s.shape[:-2], Af.shape[:-2])
    nt, nf = dp.A.shape[-1], Af.shape[-1]
    A = np.zeros(batch + (nt + nf, nt + nf))
    A[..., :nt, :nt] = dp.A
    A[..., nt:, :nt] = Bf @ s
    A[..., nt:, nt:] = Af
    B = np.zeros(batch + (nt + nf, dp.B.shape[-1]))
    B[..., :nt, :] = dp.B
    C = np.zeros(batch + (dp.C.shape[-2], nt + nf))
    C[..., :, :nt] = dp.C
    C[..., OUTPUT_IC : OUTPUT_IC + 1, :nt] = Df * s
    C[..., OUTPUT_IC : OUTPUT_IC + 1, nt:] = Cf
    return replace(dp, A=A, B=B, C=C)


def effective_response(filt: DampingFilter | None, theta: np.ndarray, Ts_s: float) -> np.ndarray:
    """The damping path relative to the measured ic at w Ts = theta [rad]:
    H(e^{j theta}) for the ic signal, H(e^{j theta})/(j theta) for the vc
    signal (vc = ic/(j w C) at the resonance, so C vc/Ts = ic/(j theta))."""
    theta = np.asarray(theta, dtype=float)
    if filt is None or filt.kind == "measured":
        return np.ones(theta.shape, dtype=complex)
    b, a = coefficients(filt, Ts_s)
    zi = np.exp(-1j * theta)[..., None] ** np.arange(b.shape[-1])
    H = (zi @ b) / (zi @ a)
    if filt.signal == "vc":
        H = H / (1j * theta)
    return H


def critical_frequency_hz(design: Design, points: int = 4000) -> float | None:
    """Lowest frequency [Hz] below fs/2 where the damping path turns from
    damping to anti-damping, or None if it damps up to fs/2.

    Definition: capacitor-current feedback acts as a virtual admittance
    across C, Y(w) ~ (Hi C / L1) G(w) e^{-j (delay + 1/2) w Ts} (Pan et al.
    2014, from memory; G the filter relative to the measured ic, see
    :func:`effective_response`); the critical frequency is where the phase
    of Y crosses -90 deg (Re Y, the virtual conductance, changes sign), the
    same as where the virtual impedance's phase crosses +-90 deg. For the
    measured ic it is fs/(4 delay + 2) in closed form; a backward-Euler
    estimate from vc adds half a sample of lag, giving fs/(4 delay + 4).

    References
    ----------
    .. [1] W. Pan, X. Ruan, C. Bao, W. Li and X. Wang, IEEE Trans. Power
       Electron., vol. 29, no. 7, pp. 3414-3427, 2014 (from memory).
    .. [2] Z. Xin, X. Wang, P. C. Loh and F. Blaabjerg, IEEE Trans. Power
       Electron., vol. 30, no. 12, 2015 (from memory).
    """
    s = design.sampling
    filt = design.control.damping_filter
    if filt is None or filt.kind == "measured":
        return s.critical_hz
    from scipy.optimize import brentq

    Ts = s.Ts_s
    lam = s.delay

    def re(theta):
        th = np.asarray(theta, dtype=float)
        return (effective_response(filt, th, Ts) * np.exp(-1j * (lam + 0.5) * th)).real

    th = np.linspace(1e-6, math.pi * (1 - 1e-9), points)
    v = re(th)
    sign = np.sign(v)
    idx = np.nonzero((sign[:-1] > 0) & (sign[1:] <= 0))[0]
    if idx.size == 0:
        return None
    i = int(idx[0])
    if v[i + 1] == 0.0:
        root = th[i + 1]
    else:
        root = brentq(lambda x: float(re(x)), th[i], th[i + 1], xtol=1e-15)
    return float(root / (2.0 * math.pi * Ts))


def damping_critical_hz(design: Design) -> float:
    """The critical frequency of the design's damping path [Hz]:
    fs/(4 delay + 2) for the measured ic (closed form), else
    :func:`critical_frequency_hz`; fs/2 when the path damps up to fs/2."""
    fc = critical_frequency_hz(design)
    return design.sampling.fs_hz / 2.0 if fc is None else fc

