"""Output admittance of the current-controlled inverter seen from the grid.

Convention: the grid current ``i2`` [A] flows from the inverter into the
grid, ``vg`` [V] is the voltage at the point of common coupling (PCC, the
grid end of L2). With the current reference at zero, the inverter is the
admittance

    Yo(s) = -i2(s) / vg(s)          [S]

so a passive inverter (one that only absorbs energy from the grid at that
frequency) has ``Re Yo(jw) >= 0`` and a bare inductor L2 gives
``Yo = 1/(s L2)``. On a grid with impedance ``Zg`` between the PCC and an
ideal source, ``vg = vs + Zg i2`` and ``i2 (1 + Zg Yo) = Gcl i_ref - Yo vs``.

The model is the exact sampled-data one: the continuous LCL filter with the
converter voltage ``vi`` and the PCC voltage ``vg`` as inputs, the currents
sampled at ``k Ts``, the discrete controller and damping loop, and the
modulator's zero-order hold starting ``delay * Ts`` after the sample. Such a
loop is periodically time-varying: a grid voltage at ``w`` makes currents at
``w`` and at every alias ``w + k ws``. This module keeps only the component
at ``w`` (the baseband or fundamental component of the harmonic transfer
function):

    y[k]   = Pd(z) u[k] + Gyv(jw) vg           (exact samples, z = e^{jw Ts})
    u      = -K(z) y,   K = [Gc(z) on i_fb, Hi on ic]
    u      = (Gff(z) - K Gyv) vg / (1 + K Pd)    (Gff: optional grid-voltage feedforward)
    i2(jw) = G2v(jw) vg + G2u(jw) H(jw)/Ts u,  H(s) = e^{-s delay Ts}(1 - e^{-s Ts})/s

``Pd`` is the exact ZOH pulse response with the delay (the engine's
:func:`loopcheck.engine.discretize.discretize_plant`), ``Gyv``, ``G2v``, ``G2u`` the
continuous transfer functions, ``H/Ts`` the hold and delay seen from the
update sequence (the ideal sampler's ``1/Ts``). For a grid voltage at one
frequency this is the exact component of ``i2`` at that frequency (checked
against a Floquet steady state in the tests); it is not an LTI transfer
function, and near and above ``fs/2`` the aliases it leaves out are as
large as what it keeps.

References
----------
.. [1] P. Pirsto, J. Kukkola, M. Hinkkanen and L. Harnefors, (intersample
   modelling of the output admittance of sampled-data converters), IEEE
   Trans. Ind. Electron., vol. 68, no. 11, 2021 (abstract read; the form
   above is derived here).
.. [2] L. Harnefors, X. Wang, A. G. Yepes and F. Blaabjerg, "Passivity-based
   stability assessment of grid-connected VSCs - an overview", IEEE J.
   Emerg. Sel. Topics Power Electron., vol. 4, no. 1, 2016 (abstract read;
   the band around fs/6 from memory).
.. [3] K. J. Astrom and B. Wittenmark, "Computer-Controlled Systems: Theory
   and Design", 3rd ed., Prentice Hall, 1997 (sampler 1/Ts and the hold's
   frequency response; from memory).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq

from loopcheck.engine.controller import controller_response
from loopcheck.engine.discretize import discretize_plant
from loopcheck.engine.loop import loop_from_plant
from loopcheck.engine.plant import OUTPUT_I1, OUTPUT_I2, OUTPUT_IC, PlantSS, lcl_state_space


@dataclass(frozen=True)
class Feedforward:
    """Grid-voltage feedforward: the sampled PCC voltage vg[k], through a
    first-order low-pass, times ``gain`` [-], added to the converter-voltage
    command (u[k] = uc[k] - Hi ic[k] + gain F(z) vg[k]) and applied with the
    same hold and delay. ``cutoff_hz`` [Hz] (None: no filter) sets
    a = 1 - e^{-2 pi fc Ts} in y[k] = y[k-1] + a (vg[k] - y[k-1]),
    F(z) = a z / (z - (1 - a))."""

    gain: float = 1.0
    cutoff_hz: float | None = None

    def blocks(self, Ts_s: float):
        """(A, B, C, D) of gain * F(z) as a discrete state space [-] (1x1 or
        empty A for no filter)."""
        if self.cutoff_hz is None:
            return np.zeros((0, 0)), np.zeros((0, 1)), np.zeros((1, 0)), np.array([[self.gain]])
        a = -math.expm1(-2 * math.pi * self.cutoff_hz * Ts_s)
        g = self.gain
        return np.array([[1 - a]]), np.array([[a]]), np.array([[g * (1 - a)]]), np.array([[g * a]])

    def response(self, z, Ts_s: float):
        """gain * F(z) at the points z."""
        z = np.asarray(z, dtype=complex)
        if self.cutoff_hz is None:
            return np.full(z.shape, self.gain, dtype=complex)
        a = -math.expm1(-2 * math.pi * self.cutoff_hz * Ts_s)
        return self.gain * a * z / (z - (1 - a))


@dataclass(frozen=True)
class AdmittanceModel:
    """Everything needed to evaluate Yo at any s.

    A [n, n], Bu [n, 1] (input vi [V]), Bv [n, 1] (input vg [V]), C [3, n]
    (rows i1, i2, ic [A]) of the continuous filter without the grid;
    Ad, Bd, Cd the exact sampled plant with the delay; blocks the controller
    parts; Hi_V_per_A the damping gain; fb_row the regulated current's row;
    Ts_s [s]; delay in samples."""

    A: np.ndarray
    Bu: np.ndarray
    Bv: np.ndarray
    C: np.ndarray
    Ad: np.ndarray
    Bd: np.ndarray
    Cd: np.ndarray
    blocks: tuple
    Hi_V_per_A: float
    fb_row: int
    Ts_s: float
    delay: float
    feedforward: Feedforward | None = None


def pcc_plant(design) -> tuple[PlantSS, np.ndarray]:
    """The filter without the grid (L2, R2 of the filter only) and the input
    column of the PCC voltage vg [V]: L2 di2/dt = v - R2 i2 - vg."""
    f = design.filter
    d = f.damping
    p = lcl_state_space(f.L1_H, f.C_F, f.L2_H, f.R1_ohm, f.R2_ohm, d.kind, d.Rd_ohm, d.Cd_F, d.Ld_H)
    Bv = np.zeros((p.order, 1))
    Bv[2, 0] = -1.0 / f.L2_H
    return p, Bv


def admittance_model(design, feedforward: Feedforward | None = None) -> AdmittanceModel:
    """The sampled loop of ``design`` at a stiff PCC, ready for
    :func:`output_admittance`, with optional grid-voltage feedforward."""
    p, Bv = pcc_plant(design)
    Ts = design.sampling.Ts_s
    dp = discretize_plant(p.A, p.B, p.C, Ts, design.sampling.delay)
    loop = loop_from_plant(design, p)
    row = OUTPUT_I2 if design.control.feedback == "grid" else OUTPUT_I1
    return AdmittanceModel(
        p.A, p.B, Bv, p.C, dp.A, dp.B, dp.C, loop.blocks, float(design.control.Hi_V_per_A), row, Ts,
        float(design.sampling.delay), feedforward,
    )


def hold_response(s, Ts_s: float, delay: float):
    """e^{-s delay Ts} (1 - e^{-s Ts}) / s [s], the delayed zero-order hold
    (Ts at s = 0). Vectorised over complex s."""
    s = np.asarray(s, dtype=complex)
    x = s * Ts_s
    small = np.abs(x) < 1e-6
    with np.errstate(all="ignore"):
        h = np.where(small, Ts_s * (1 - x / 2 + x * x / 6), -np.expm1(-x) / np.where(small, 1.0, s))
    return h * np.exp(-s * delay * Ts_s)


def _resolve(A, Bm, s):
    """(sI - A)^-1 Bm for every s (1-D), shape [len(s), n, m]."""
    n = A.shape[-1]
    M = s[:, None, None] * np.eye(n) - A
    return np.linalg.solve(M, np.broadcast_to(Bm, (s.size,) + Bm.shape))


def output_admittance(model: AdmittanceModel, s) -> np.ndarray:
    """Yo(s) = -i2/vg [S] at the complex points ``s`` [rad/s] (any shape;
    ``s = 1j*w`` for the frequency response). Baseband component of the
    sampled-data loop, see the module docstring."""
    s = np.asarray(s, dtype=complex)
    shape = s.shape
    s = s.ravel()
    Ts = model.Ts_s
    z = np.exp(s * Ts)
    with np.errstate(all="ignore"):
        Xc = _resolve(model.A, np.concatenate([model.Bu, model.Bv], axis=1), s)  # [N, n, 2]
        G = model.C @ Xc  # [N, 3, 2]: rows i1 i2 ic, columns vi vg
        Xd = _resolve(model.Ad, model.Bd, z)
        Pd = (model.Cd @ Xd)[:, :, 0]  # [N, 3]
        Kc = controller_response(list(model.blocks), z)
        Hi = model.Hi_V_per_A
        fb, ic = model.fb_row, OUTPUT_IC
        KP = Kc * Pd[:, fb] + Hi * Pd[:, ic]
        KG = Kc * G[:, fb, 1] + Hi * G[:, ic, 1]
        ff = 0.0 if model.feedforward is None else model.feedforward.response(z, Ts)
        u = (ff - KG) / (1.0 + KP)
        i2 = G[:, OUTPUT_I2, 1] + G[:, OUTPUT_I2, 0] * hold_response(s, Ts, model.delay) / Ts * u
    return (-i2).reshape(shape)


def design_admittance(design, frequency_hz, feedforward: Feedforward | None = None) -> np.ndarray:
    """Yo(j 2 pi f) [S] of a design on a frequency grid [Hz] (vectorised)."""
    f = np.asarray(frequency_hz, dtype=float)
    return output_admittance(admittance_model(design, feedforward), 2j * math.pi * f)


@dataclass(frozen=True)
class PassivityBand:
    """A frequency band where Re Yo < 0 (the inverter is not passive).

    low_hz, high_hz: edges [Hz]; low_open / high_open: True when the band
    runs into the end of the scanned range there (the edge is the range end,
    not a sign change)."""

    low_hz: float
    high_hz: float
    low_open: bool = False
    high_open: bool = False


@dataclass(frozen=True)
class PassivityResult:
    """Non-passive bands of Yo over (f_min_hz, f_max_hz] [Hz]; the minimum of
    Re Yo [S] and where it is [Hz]; critical_hz = fs/(4 delay + 2) [Hz];
    nyquist_hz = fs/2 [Hz]."""

    bands: tuple[PassivityBand, ...]
    f_min_hz: float
    f_max_hz: float
    min_real_S: float
    min_real_hz: float
    critical_hz: float
    nyquist_hz: float

    @property
    def passive(self) -> bool:
        return not self.bands


def frequency_grid_hz(fs_hz: float, f_max_hz: float, f_min_hz: float = 1.0, n_log: int = 1500, n_lin: int = 6000):
    """Log-spaced from f_min to fs/100, then linear to f_max [Hz]."""
    lo = np.geomspace(f_min_hz, min(fs_hz / 100.0, f_max_hz), n_log)
    lin = np.linspace(min(fs_hz / 100.0, f_max_hz), f_max_hz, n_lin)
    return np.unique(np.concatenate([lo, lin]))


def passivity_bands(design, f_max_hz: float | None = None, f_min_hz: float = 1.0, grid_hz=None,
                    feedforward: Feedforward | None = None) -> PassivityResult:
    """Bands where Re Yo(j 2 pi f) < 0 on (f_min, f_max] [Hz] (default f_max = fs/2).

    A dense scan of Re Yo finds the sign changes; each edge is refined with
    Brent's method on the exact evaluation (to 1e-9 relative in frequency)."""
    fs = design.sampling.fs_hz
    f_max = fs / 2.0 if f_max_hz is None else float(f_max_hz)
    model = admittance_model(design, feedforward)

    def re(f):
        return output_admittance(model, 2j * math.pi * np.asarray(f, dtype=float)).real

    if grid_hz is None:
        f = frequency_grid_hz(fs, f_max, f_min_hz)
        if design.control.kind == "PR":  # narrow features beside every resonator
            off = np.geomspace(1e-7, 0.02, 80)
            for h in (1,) + tuple(design.control.harmonics):
                f0 = h * design.grid.f_hz
                f = np.concatenate([f, f0 * (1 - off), f0 * (1 + off)])
            f = np.unique(f[(f >= f_min_hz) & (f <= f_max)])
    else:
        f = np.asarray(grid_hz, dtype=float)
    r = re(f)
    neg = r < 0
    edges = []
    idx = np.nonzero(neg[1:] != neg[:-1])[0]
    for i in idx:
        a, b = f[i], f[i + 1]
        if not (np.isfinite(r[i]) and np.isfinite(r[i + 1])):
            edges.append(0.5 * (a + b))
            continue
        edges.append(brentq(lambda x: float(re([x])[0]), a, b, xtol=1e-12, rtol=1e-10))
    bands = []
    start = f[0] if neg[0] else None
    start_open = bool(neg[0])
    for e in edges:
        if start is None:
            start = e
            start_open = False
        else:
            bands.append(PassivityBand(float(start), float(e), start_open, False))
            start = None
    if start is not None:
        bands.append(PassivityBand(float(start), float(f[-1]), start_open, True))
    j = int(np.nanargmin(r))
    return PassivityResult(
        tuple(bands), float(f[0]), float(f[-1]), float(r[j]), float(f[j]),
        design.sampling.critical_hz, fs / 2.0,
    )
