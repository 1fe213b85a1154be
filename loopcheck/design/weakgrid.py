"""Weak grid: a design over a range of grid inductance, under component
tolerances, vectorised.

Grid inductance Lg adds to the grid-side inductor (L2 + Lg), pulls the LCL
resonance down and can push it across the critical frequency
fs/(4*delay + 2), where capacitor-current damping turns into anti-damping
(or grid-current feedback loses its built-in damping). This module answers,
for a design and an Lg range [H]:

* the Lg intervals where the closed loop is stable, with exact endpoints
  (:func:`stable_lg_intervals`): an adaptive eigenvalue scan that refines
  wherever the samples cannot rule out an excursion of a closed-loop
  eigenvalue across the unit circle between them (estimated from the bend
  of the eigenvalue paths, assumed smooth at the scale of the sampling),
  followed by bisection on the spectral radius minus one;
* per Lg: resonance, verdict, phase margin, gain-margin interval and
  sensitivity peak (:func:`evaluate_points`, batched over any number of
  points: component variants x Lg x damping gain x Kp);
* the worst point and what fails there, for the nominal filter and every
  tolerance corner (:func:`sweep_grid`);
* a Monte Carlo draw of units with the fraction that is unstable or misses
  the margin targets and its confidence interval (:func:`monte_carlo`).

Conventions
-----------
Verdicts come from closed-loop eigenvalues only: stable iff the spectral
radius is below ``1 - verdict.TOLERANCE``. Margins follow
:func:`loopcheck.engine.analysis.analyse` (the single-design reference) and are
computed from the loop gain L(z) = Gc(z) P(z) broken at the current
controller with the damping loop closed, evaluated in factored form: the
plant P from its eigen-decomposition (pole-residue form, with a linear-solve
fallback when the eigenvectors are ill-conditioned) and each controller
block on its own. No high-order polynomial is ever formed.

* phase margin [deg]: the smallest |180 deg + phase of L| over all gain
  crossovers |L| = 1 (inf when there is none);
* gain margin: the interval (lower, upper) of controller-gain factors k
  around k = 1 that keeps the loop stable; its ends are the nearest factors
  k = -1/L at the frequencies where L is real and negative (lower 0 and
  upper inf when none). In dB: 20*log10(lower) <= 0 <= 20*log10(upper);
* sensitivity peak [-]: max over frequency of |1/(1 + L)|.

The grid is modelled as an inductance Lg [H] with the case's resistance Rg
[ohm] (held constant over the range) in series with L2.

References
----------
.. [1] M. Liserre, F. Blaabjerg and S. Hansen, "Design and Control of an
   LCL-Filter-Based Three-Phase Active Rectifier", IEEE Trans. Ind. Appl.,
   vol. 41, no. 5, pp. 1281-1291, 2005 (LCL resonance formula; from memory).
.. [2] S. G. Parker, B. P. McGrath and D. G. Holmes, "Regions of Active
   Damping Control for LCL Filters", IEEE Trans. Ind. Appl., vol. 50, no. 1,
   pp. 424-432, 2014 (the critical frequency fs/6; from memory).
.. [3] Yu. I. Neimark, "Search for the parameter values that make automatic
   control system stable", Avtomatika i Telemekhanika, vol. 9, no. 3,
   pp. 190-203, 1948 (D-decomposition: the gain factors where a pole
   reaches the unit circle bound the stable gain interval).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from loopcheck.engine.controller import controller_blocks, parallel
from loopcheck.engine.damping_filter import damping_critical_hz, with_damping_filter
from loopcheck.engine.discretize import discretize_plant
from loopcheck.engine.loop import OUTPUT_I1, OUTPUT_I2, close_damping_loop, series_open_loop
from loopcheck.engine.margins import POLE_AT_POINT_TOL
from loopcheck.engine.model import Design, resonance_hz
from loopcheck.engine.plant import lcl_state_space
from loopcheck.design.tolerance import ComponentValues, ToleranceSpec, corner_factors, corner_values
from loopcheck.engine.verdict import TOLERANCE

__all__ = [
    "FamilyResult",
    "GridResult",
    "LgScan",
    "MonteCarloResult",
    "PointMargins",
    "Targets",
    "WorstPoint",
    "binding_target",
    "closed_loop_eigenvalues",
    "critical_crossing_lg",
    "discrete_plants",
    "evaluate_points",
    "monte_carlo",
    "parse_targets",
    "robustness_index",
    "stable_lg_intervals",
    "sweep_grid",
]

Progress = Callable[[float], None]

#: Default targets (common practice): phase margin [deg] and gain margin on
#: both sides [dB].
DEFAULT_PHASE_MARGIN_DEG = 30.0
DEFAULT_GAIN_MARGIN_DB = 3.0


# ---------------------------------------------------------------------------
# targets
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class Targets:
    """Margin targets.

    phase_margin_deg: smallest acceptable phase margin [deg];
    gain_margin_db: smallest acceptable gain margin on both sides [dB]
    (controller gain may fall by this much and rise by this much);
    sensitivity_peak_max: largest acceptable max|1/(1+L)| [-], or None.
    Defaults 30 deg and 3 dB are common practice."""

    phase_margin_deg: float = DEFAULT_PHASE_MARGIN_DEG
    gain_margin_db: float = DEFAULT_GAIN_MARGIN_DB
    sensitivity_peak_max: float | None = None

    def describe(self) -> str:
        s = f"phase margin >= {self.phase_margin_deg:g} deg, gain margin >= {self.gain_margin_db:g} dB on both sides"
        if self.sensitivity_peak_max is not None:
            s += f", sensitivity peak <= {self.sensitivity_peak_max:.3g} ({20 * math.log10(self.sensitivity_peak_max):.3g} dB)"
        return s


#: Largest gain-margin target or sensitivity-peak limit [dB] (a factor 1e10).
MAX_TARGET_DB = 200.0


def shown_db(x: float, unit: str) -> str:
    return f"{x:g} dB" if unit == "dB" else f"{x:g}"


# ---------------------------------------------------------------------------
# closed forms
# ---------------------------------------------------------------------------


def critical_crossing_lg(L1_H: float, C_F: float, L2_H: float, f_hz: float) -> float | None:
    """Grid inductance [H] at which the LCL resonance falls to ``f_hz``.

    From f_r(Lg) = sqrt((L1 + L2 + Lg)/(L1 (L2 + Lg) C))/(2 pi) [1]:
    Lg* = (L1 + L2 - w^2 L1 L2 C)/(w^2 L1 C - 1), w = 2 pi f_hz. None when
    no Lg >= 0 gives that resonance: f_r(0) is already below f_hz, or f_hz
    is at or below the limit 1/(2 pi sqrt(L1 C)) that f_r approaches as
    Lg -> inf. For f_hz = fs/(4*delay + 2) this is where the resonance
    crosses the critical frequency.

    References
    ----------
    .. [1] M. Liserre, F. Blaabjerg and S. Hansen, "Design and Control of an
       LCL-Filter-Based Three-Phase Active Rectifier", IEEE Trans. Ind.
       Appl., vol. 41, no. 5, pp. 1281-1291, 2005 (resonance formula; from
       memory). The inversion for Lg is derived.
    """
    w2 = (2.0 * math.pi * f_hz) ** 2
    den = w2 * L1_H * C_F - 1.0
    if den <= 0.0:
        return None
    lg = (L1_H + L2_H - w2 * L1_H * L2_H * C_F) / den
    return lg if lg >= 0.0 else None


# ---------------------------------------------------------------------------
# batched loops
# ---------------------------------------------------------------------------


def _values(design: Design, values: ComponentValues | None) -> ComponentValues:
    return ComponentValues.nominal(design, ()) if values is None else values


def _discrete_plants(design: Design, values: ComponentValues, Lg_H):
    """Exact ZOH + delay model of the plant for every variant x Lg (broadcast)."""
    g = design.grid
    kind = design.filter.damping.kind
    Lg = np.asarray(Lg_H, dtype=float)
    p = lcl_state_space(values.L1_H, values.C_F, values.L2_H + Lg, values.R1_ohm, values.R2_ohm + g.Rg_ohm,
                        kind, values.Rd_ohm, values.Cd_F, values.Ld_H)
    Ts = design.sampling.Ts_s
    return with_damping_filter(discretize_plant(p.A, p.B, p.C, Ts, design.sampling.delay), design.control, Ts)


@dataclass(frozen=True)
class _Rows:
    """Flattened batch of loops: inner (damping-closed) plant and Kp per row."""

    inner_A: np.ndarray  # [N, n, n]
    Bp: np.ndarray  # [N, n, 1]
    Cfb: np.ndarray  # [N, 1, n]
    Kp: np.ndarray  # [N] [V/A]
    shape: tuple[int, ...]


def discrete_plants(design: Design, Lg_H, values: ComponentValues | None = None):
    """Exact sampled plants (ZOH + computation delay) of every variant x Lg
    [H] (broadcast), for reuse in :func:`evaluate_points` (``plants=``) when
    only gains change between calls."""
    return _discrete_plants(design, _values(design, values), Lg_H)


def _rows(design: Design, Lg_H, values: ComponentValues | None, Hi_V_per_A, Kp_V_per_A, plants=None) -> _Rows:
    ctl = design.control
    Hi = np.asarray(ctl.Hi_V_per_A if Hi_V_per_A is None else Hi_V_per_A, dtype=float)
    Kp = np.asarray(ctl.Kp_V_per_A if Kp_V_per_A is None else Kp_V_per_A, dtype=float)
    dp = plants if plants is not None else _discrete_plants(design, _values(design, values), Lg_H)
    pshape = dp.A.shape[:-2]
    shape = np.broadcast_shapes(pshape, Hi.shape, Kp.shape)
    Ai = close_damping_loop(dp, Hi)
    n = Ai.shape[-1]
    Ai = np.broadcast_to(Ai, shape + (n, n)).reshape(-1, n, n)
    Bp = np.broadcast_to(dp.B, shape + (n, 1)).reshape(-1, n, 1)
    row = OUTPUT_I2 if ctl.feedback == "grid" else OUTPUT_I1
    Cfb = np.broadcast_to(dp.C[..., row : row + 1, :], shape + (1, n)).reshape(-1, 1, n)
    return _Rows(Ai, Bp, Cfb, np.broadcast_to(Kp, shape).reshape(-1).copy(), shape)


def _closed_loop_matrices(design: Design, rows: _Rows, sl=slice(None)) -> np.ndarray:
    ctl = design.control
    blocks = controller_blocks(ctl, design.grid.f_hz, design.sampling.Ts_s, Kp=rows.Kp[sl])
    ctrl = parallel(blocks)
    A, B, C = series_open_loop(rows.inner_A[sl], rows.Bp[sl], rows.Cfb[sl], ctrl)
    return A - B @ C


def closed_loop_eigenvalues(design: Design, Lg_H, values: ComponentValues | None = None,
                            Hi_V_per_A=None, Kp_V_per_A=None) -> np.ndarray:
    """Closed-loop eigenvalues for every point of the broadcast of the
    variants ``values``, ``Lg_H`` [H], ``Hi_V_per_A`` [V/A] and
    ``Kp_V_per_A`` [V/A] (None: the design's own). Shape ``batch + (m,)``."""
    rows = _rows(design, Lg_H, values, Hi_V_per_A, Kp_V_per_A)
    eig = np.linalg.eigvals(_closed_loop_matrices(design, rows))
    return eig.reshape(rows.shape + eig.shape[-1:])


# ---------------------------------------------------------------------------
# batched margins
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class PointMargins:
    """Verdict and margins of a batch of loops (arrays of one shape).

    spectral_radius: max |closed-loop pole| [-]; stable: spectral radius
    below 1 - verdict.TOLERANCE; dominant_pole_hz: frequency of the
    largest-magnitude closed-loop pole [Hz] (where an unstable loop rings).
    Margins are NaN for points that are not stable (or when not computed):
    phase_margin_deg [deg] (inf: no gain crossover); crossover_hz [Hz]
    where the smallest phase margin occurs; gm_lower_factor [-] (0: none),
    gm_upper_factor [-] (inf: none); sensitivity_peak [-] max|1/(1+L)| and
    sensitivity_peak_hz [Hz]."""

    spectral_radius: np.ndarray
    stable: np.ndarray
    dominant_pole_hz: np.ndarray
    phase_margin_deg: np.ndarray
    crossover_hz: np.ndarray
    gm_lower_factor: np.ndarray
    gm_upper_factor: np.ndarray
    sensitivity_peak: np.ndarray
    sensitivity_peak_hz: np.ndarray

    @property
    def gm_lower_db(self) -> np.ndarray:
        """20*log10(lower factor) [dB] (<= 0; -inf when the gain may fall to zero)."""
        with np.errstate(divide="ignore", invalid="ignore"):
            return 20.0 * np.log10(self.gm_lower_factor)

    @property
    def gm_upper_db(self) -> np.ndarray:
        """20*log10(upper factor) [dB] (>= 0; inf when there is no upper limit)."""
        with np.errstate(divide="ignore", invalid="ignore"):
            return 20.0 * np.log10(self.gm_upper_factor)

    def take(self, index) -> "PointMargins":
        return PointMargins(*(np.asarray(getattr(self, f))[index] for f in _PM_FIELDS))


_PM_FIELDS = ("spectral_radius", "stable", "dominant_pole_hz", "phase_margin_deg", "crossover_hz",
              "gm_lower_factor", "gm_upper_factor", "sensitivity_peak", "sensitivity_peak_hz")

#: Eigenvector condition number above which the pole-residue form of the
#: plant is replaced by linear solves (accuracy of the residues ~ cond * eps).
_COND_LIMIT = 1e7
#: Relative |Im L|/|L| below which a refined phase crossing is accepted as
#: real (same test as loopcheck.engine.margins.real_axis_crossings).
_REAL_TOL = 1e-7
#: Frequency grid of the batched margins: log-spaced and linear points on
#: (0, pi] plus, on each side of every plant and resonator pole angle, a
#: cluster of points at relative offsets 1e-7..0.06 (sharp resonances).
_GRID_LOG = 200
_GRID_LIN = 150
_GRID_CLUSTER = 12
#: Offsets around each closed-loop pole angle, in units of the pole's
#: distance to the unit circle (the width of its sensitivity peak).
_CL_OFFSETS = np.array([-4.0, -2.0, -1.0, -0.5, -0.25, 0.0, 0.25, 0.5, 1.0, 2.0, 4.0])
#: Halvings of each crossing bracket and golden-section steps of the
#: sensitivity-peak search (brackets start at one grid step, ~1e-3 rad).
_BISECT_STEPS = 32
_GOLDEN_STEPS = 25


def _residue_form(A: np.ndarray, B: np.ndarray, C: np.ndarray):
    """Poles, residues and a flag of ill-conditioned rows of C (zI - A)^-1 B.

    A [N, n, n], B [N, n, 1], C [N, 1, n]."""
    lam, V = np.linalg.eig(A)
    with np.errstate(all="ignore"):
        cond = np.linalg.cond(V)
    bad = ~(cond < _COND_LIMIT)
    if bad.any():
        V = V.copy()
        V[bad] = np.eye(A.shape[-1])
    VB = np.linalg.solve(V, B.astype(complex))[..., 0]
    CV = (C.astype(complex) @ V)[..., 0, :]
    return lam, CV * VB, bad


class _LoopEval:
    """L(z) = Gc(z) P(z) for a chunk of rows, evaluated at (row, z) pairs."""

    def __init__(self, design: Design, rows: _Rows, sl: slice):
        self.Ai = rows.inner_A[sl]
        self.Bp = rows.Bp[sl]
        self.Cfb = rows.Cfb[sl]
        self.Kp = rows.Kp[sl]
        self.lam, self.rho, self.bad = _residue_form(self.Ai, self.Bp, self.Cfb)
        ctl = design.control
        rest = controller_blocks(ctl, design.grid.f_hz, design.sampling.Ts_s, Kp=0.0)[1:]
        self.c_lam, self.c_rho, self.c_D, self.c_blocks = [], [], 0.0, []
        for b in rest:
            lam, rho, bad = _residue_form(b.A[None], b.B[None], b.C[None])
            if bad.any():
                self.c_blocks.append(b)
            else:
                self.c_lam.append(lam[0])
                self.c_rho.append(rho[0])
            self.c_D += float(b.D[..., 0, 0])
        self.c_lam = np.concatenate(self.c_lam) if self.c_lam else np.zeros(0, complex)
        self.c_rho = np.concatenate(self.c_rho) if self.c_rho else np.zeros(0, complex)
        self.res_angles = [2 * math.pi * design.grid.f_hz * h * design.sampling.Ts_s
                           for h in ((1,) + tuple(ctl.harmonics) if ctl.kind == "PR" else ())]

    def __call__(self, r: np.ndarray, z: np.ndarray) -> np.ndarray:
        """L at rows ``r`` (int array) and points ``z`` (same shape)."""
        with np.errstate(all="ignore"):
            P = np.sum(self.rho[r] / (z[..., None] - self.lam[r]), axis=-1)
            if self.bad.any():
                sel = self.bad[r]
                if sel.any():
                    rr, zz = r[sel], z[sel]
                    n = self.Ai.shape[-1]
                    M = zz[:, None, None] * np.eye(n) - self.Ai[rr]
                    x = np.linalg.solve(M, self.Bp[rr].astype(complex))
                    P[sel] = (self.Cfb[rr] @ x)[:, 0, 0]
            G = self.Kp[r] + self.c_D
            if self.c_lam.size:
                G = G + np.sum(self.c_rho / (z[..., None] - self.c_lam), axis=-1)
            for b in self.c_blocks:
                from loopcheck.engine.controller import block_response

                G = G + (block_response(b, z.ravel()) - float(b.D[..., 0, 0])).reshape(z.shape)
            return G * P

    def grid(self, Ts: float, cl_poles: np.ndarray) -> np.ndarray:
        """Per-row frequency grid [rad/sample] on (0, pi], refined around the
        plant's and the resonators' pole angles (poles of L) and around the
        closed-loop poles ``cl_poles`` [N, m] (poles of 1/(1+L): sensitivity
        peaks), there with offsets scaled by the pole's distance to the
        unit circle. Shape [N, nw]."""
        N = self.Ai.shape[0]
        w_min = 2.0 * math.pi * 0.5 * Ts
        base = np.unique(np.concatenate([np.geomspace(w_min, math.pi, _GRID_LOG),
                                         np.linspace(0.0, math.pi, _GRID_LIN + 1)[1:]]))
        offs = np.geomspace(1e-7, 0.06, _GRID_CLUSTER)
        rel = np.concatenate([1.0 - offs, 1.0 + offs])
        ang = np.abs(np.angle(self.lam))  # [N, n]
        ang = np.clip(ang, 1e-6, math.pi * (1 - 1e-9))
        extra = [ang[:, :, None] * rel]
        if self.res_angles:
            ra = np.array(self.res_angles)
            extra.append(np.broadcast_to((ra[:, None] * rel)[None], (N, ra.size, rel.size)))
        pa = np.abs(np.angle(cl_poles))[:, :, None]
        width = np.maximum(np.abs(1.0 - np.abs(cl_poles)), 1e-9)[:, :, None]
        extra.append(pa + width * _CL_OFFSETS)
        cl = np.concatenate([e.reshape(N, -1) for e in extra], axis=1)
        cl = np.clip(cl, w_min * 0.5, math.pi)
        w = np.concatenate([np.broadcast_to(base, (N, base.size)), cl], axis=1)
        return np.sort(w, axis=1)


def _bisect(f, r, a, b, fa_sign):
    """Vectorised bisection of sign changes of f(r, w) in [a, b]."""
    for _ in range(_BISECT_STEPS):
        m = 0.5 * (a + b)
        fm = f(r, m)
        left = np.sign(fm) == fa_sign
        a = np.where(left, m, a)
        b = np.where(left, b, m)
    return 0.5 * (a + b)


def _chunk_margins(design: Design, rows: _Rows, sl: slice, stable_rows: np.ndarray, out: dict, to_hz: float,
                   cl_poles: np.ndarray):
    """Margins of the stable rows of one chunk (indices into the chunk);
    ``cl_poles`` [rows of the chunk, m] closed-loop poles."""
    if stable_rows.size == 0:
        return
    ev = _LoopEval(design, rows, sl)
    Ts = design.sampling.Ts_s
    # restrict to the stable rows
    ev.Ai, ev.Bp, ev.Cfb, ev.Kp = ev.Ai[stable_rows], ev.Bp[stable_rows], ev.Cfb[stable_rows], ev.Kp[stable_rows]
    ev.lam, ev.rho, ev.bad = ev.lam[stable_rows], ev.rho[stable_rows], ev.bad[stable_rows]
    N = stable_rows.size
    W = ev.grid(Ts, cl_poles[stable_rows])
    nw = W.shape[1]
    R = np.broadcast_to(np.arange(N)[:, None], W.shape)
    Lw = ev(R, np.exp(1j * W))
    absL = np.abs(Lw)
    gidx = sl.start + stable_rows  # global indices

    # --- gain crossovers -> phase margin
    with np.errstate(all="ignore"):
        g = np.log(absL)
    fin = np.isfinite(g)
    s = np.sign(g)
    br = (s[:, :-1] * s[:, 1:] < 0) & fin[:, :-1] & fin[:, 1:]
    ri, ci = np.nonzero(br)
    pm = np.full(N, np.inf)
    fc = np.full(N, np.nan)
    if ri.size:
        def logabs(r, w):
            with np.errstate(all="ignore"):
                return np.log(np.abs(ev(r, np.exp(1j * w))))

        wc = _bisect(logabs, ri, W[ri, ci], W[ri, ci + 1], s[ri, ci])
        v = ev(ri, np.exp(1j * wc))
        ph = np.degrees(np.angle(v))
        pmi = np.abs((180.0 + ph + 180.0) % 360.0 - 180.0)
        order = np.lexsort((pmi, ri))
        first = np.ones(order.size, bool)
        first[1:] = ri[order][1:] != ri[order][:-1]
        sel = order[first]
        pm[ri[sel]] = pmi[sel]
        fc[ri[sel]] = wc[sel] * to_hz

    # --- real-axis crossings -> gain-margin interval
    with np.errstate(all="ignore"):
        h = Lw.imag / absL
    finh = np.isfinite(h)
    sh = np.sign(h)
    br = (sh[:, :-1] * sh[:, 1:] < 0) & finh[:, :-1] & finh[:, 1:]
    ri, ci = np.nonzero(br)
    lower = np.zeros(N)
    upper = np.full(N, np.inf)
    ks_r, ks_k = [], []
    if ri.size:
        def imrel(r, w):
            v = ev(r, np.exp(1j * w))
            with np.errstate(all="ignore"):
                return v.imag / np.abs(v)

        wx = _bisect(imrel, ri, W[ri, ci], W[ri, ci + 1], sh[ri, ci])
        v = ev(ri, np.exp(1j * wx))
        with np.errstate(all="ignore"):
            ok = np.isfinite(v) & (np.abs(v.imag) <= _REAL_TOL * np.abs(v)) & (np.abs(v) > 0) & (v.real < 0)
        ks_r.append(ri[ok])
        ks_k.append(-1.0 / v.real[ok])
    allr = np.arange(N)
    # z = +-1 are real-axis points, unless an open-loop pole sits there (the
    # lossless plant's integrator at z = 1): L is infinite there even when
    # rounding makes it merely huge
    for z0 in (-1.0, 1.0):
        v = ev(allr, np.full(N, z0 + 0j))
        pole = np.any(np.abs(ev.lam - z0) < POLE_AT_POINT_TOL, axis=1)
        with np.errstate(all="ignore"):
            ok = np.isfinite(v) & ~pole & (np.abs(v) > 0) & (v.real < 0)
        ks_r.append(allr[ok])
        ks_k.append(-1.0 / v.real[ok])
    kr = np.concatenate(ks_r)
    kk = np.concatenate(ks_k)
    below = kk < 1.0
    np.maximum.at(lower, kr[below], kk[below])
    np.minimum.at(upper, kr[~below], kk[~below])

    # --- sensitivity peak, refined by golden-section search per row
    with np.errstate(all="ignore"):
        S = 1.0 / np.abs(1.0 + Lw)
    S[~np.isfinite(S)] = 0.0
    i = np.argmax(S, axis=1)
    wi = W[allr, i][:, None]
    # neighbours strictly below and above (the grid may repeat a value)
    lo = W[allr, np.maximum(np.sum(W < wi, axis=1) - 1, 0)]
    hi = W[allr, np.minimum(np.sum(W <= wi, axis=1), nw - 1)]

    def sens(w):
        with np.errstate(all="ignore"):
            x = 1.0 / np.abs(1.0 + ev(allr, np.exp(1j * w)))
        return np.where(np.isfinite(x), x, 0.0)

    gr = (math.sqrt(5.0) - 1.0) / 2.0
    a, b = lo.copy(), hi.copy()
    c = b - gr * (b - a)
    d = a + gr * (b - a)
    fc_, fd_ = sens(c), sens(d)
    for _ in range(_GOLDEN_STEPS):
        left = fc_ > fd_
        b = np.where(left, d, b)
        a = np.where(left, a, c)
        d_new = np.where(left, c, a + gr * (b - a))
        c_new = np.where(left, b - gr * (b - a), d)
        fd_new = np.where(left, fc_, np.nan)
        fc_new = np.where(left, np.nan, fd_)
        # evaluate the one new point per row
        new_pt = np.where(left, c_new, d_new)
        fnew = sens(new_pt)
        fc_ = np.where(left, fnew, fc_new)
        fd_ = np.where(left, fd_new, fnew)
        c, d = c_new, d_new
    wS = 0.5 * (a + b)
    Sref = sens(wS)
    Sgrid = S[allr, i]
    better = Sref > Sgrid
    out["sensitivity_peak"][gidx] = np.where(better, Sref, Sgrid)
    out["sensitivity_peak_hz"][gidx] = np.where(better, wS, W[allr, i]) * to_hz
    out["phase_margin_deg"][gidx] = pm
    out["crossover_hz"][gidx] = fc
    out["gm_lower_factor"][gidx] = lower
    out["gm_upper_factor"][gidx] = upper


def evaluate_points(design: Design, Lg_H, values: ComponentValues | None = None, Hi_V_per_A=None,
                    Kp_V_per_A=None, *, margins: bool = True, chunk_rows: int = 600,
                    progress: Progress | None = None, tol: float = TOLERANCE, plants=None) -> PointMargins:
    """Verdict and margins at every point of a broadcast batch.

    ``values`` (component variants, see :class:`ComponentValues`; None: the
    design's own), ``Lg_H`` [H], ``Hi_V_per_A`` [V/A] and ``Kp_V_per_A``
    [V/A] (None: the design's) broadcast against each other; the result has
    the broadcast shape. The plant is discretised once per variant x Lg and
    the damping gain and Kp are applied afterwards, so sweeping gains costs
    only eigenvalues and frequency responses. ``plants``: the result of
    :func:`discrete_plants` for the same ``Lg_H`` and ``values`` (skips
    the matrix exponentials). ``progress(fraction)`` is called after each
    chunk of ``chunk_rows`` points. See the module docstring for the
    definitions."""
    rows = _rows(design, Lg_H, values, Hi_V_per_A, Kp_V_per_A, plants)
    N = rows.Kp.size
    Ts = design.sampling.Ts_s
    to_hz = 1.0 / (2.0 * math.pi * Ts)
    out = {k: np.full(N, np.nan) for k in _PM_FIELDS}
    out["stable"] = np.zeros(N, bool)
    for start in range(0, N, chunk_rows):
        sl = slice(start, min(N, start + chunk_rows))
        eig = np.linalg.eigvals(_closed_loop_matrices(design, rows, sl))
        mag = np.abs(eig)
        k = np.argmax(mag, axis=1)
        r = mag[np.arange(mag.shape[0]), k]
        out["spectral_radius"][sl] = r
        out["dominant_pole_hz"][sl] = np.abs(np.angle(eig[np.arange(eig.shape[0]), k])) * to_hz
        st = r < 1.0 - tol
        out["stable"][sl] = st
        if margins:
            _chunk_margins(design, rows, sl, np.nonzero(st)[0], out, to_hz, eig)
        if progress is not None:
            progress(sl.stop / N)
    return PointMargins(*(out[k].reshape(rows.shape) for k in _PM_FIELDS))


# ---------------------------------------------------------------------------
# robustness index against targets
# ---------------------------------------------------------------------------

#: Names of the terms of the robustness index, in order.
TERMS = ("phase margin", "lower gain margin", "upper gain margin", "sensitivity peak")


def _terms(m: PointMargins, t: Targets) -> np.ndarray:
    """Target-normalised margins [-], shape batch + (4,); 1 = exactly on target."""
    with np.errstate(all="ignore"):
        pm = m.phase_margin_deg / t.phase_margin_deg
        gl = -m.gm_lower_db / t.gain_margin_db
        gu = m.gm_upper_db / t.gain_margin_db
        if t.sensitivity_peak_max is None:
            sp = np.full(np.shape(pm), np.inf)
        else:
            sp = t.sensitivity_peak_max / m.sensitivity_peak
    return np.stack([pm, gl, gu, sp], axis=-1)


def robustness_index(m: PointMargins, t: Targets) -> np.ndarray:
    """Worst target-normalised margin of each point [-]:

    min(PM / PM_target, -GM_lower_dB / GM_target, GM_upper_dB / GM_target,
    S_limit / S_peak), the last only with a sensitivity-peak limit. An index
    >= 1 meets every target; -inf marks points that are not stable."""
    x = np.min(_terms(m, t), axis=-1)
    return np.where(np.asarray(m.stable), x, -np.inf)


def binding_target(m: PointMargins, t: Targets) -> np.ndarray:
    """Name of the term that sets the robustness index at each point
    (one of :data:`TERMS`, or ``"stability"`` for points that are not stable)."""
    T = _terms(m, t)
    T = np.where(np.isnan(T), np.inf, T)
    names = np.array(TERMS, dtype=object)[np.argmin(T, axis=-1)]
    return np.where(np.asarray(m.stable), names, "stability")


def _short_of(value: float, target: float, decimals: int) -> str:
    """``value`` (below ``target``) with enough decimals that it does not
    print as the target itself (2.996 dB, not 3.00 dB, against 3 dB)."""
    d = decimals
    while d < 6 and round(value, d) >= target:
        d += 1
    return f"{value:.{d}f}"


def shortfalls(m: PointMargins, t: Targets) -> list[str]:
    """Human one-liners of every target a single point misses (empty: all met)."""
    if not bool(m.stable):
        return [f"unstable: closed-loop pole at |z| = {float(m.spectral_radius):.4f}, "
                f"ringing at {float(m.dominant_pole_hz):.4g} Hz"]
    out = []
    pm = float(m.phase_margin_deg)
    if pm < t.phase_margin_deg:
        out.append(f"phase margin {_short_of(pm, t.phase_margin_deg, 1)} deg < {t.phase_margin_deg:g} deg")
    gl = -float(m.gm_lower_db)
    if gl < t.gain_margin_db:
        out.append(f"gain may fall only {_short_of(gl, t.gain_margin_db, 2)} dB (< {t.gain_margin_db:g} dB) before instability")
    gu = float(m.gm_upper_db)
    if gu < t.gain_margin_db:
        out.append(f"gain may rise only {_short_of(gu, t.gain_margin_db, 2)} dB (< {t.gain_margin_db:g} dB) before instability")
    if t.sensitivity_peak_max is not None and float(m.sensitivity_peak) > t.sensitivity_peak_max:
        out.append(f"sensitivity peak {float(m.sensitivity_peak):.3g} > {t.sensitivity_peak_max:.3g}")
    return out


# ---------------------------------------------------------------------------
# exact stable Lg intervals
# ---------------------------------------------------------------------------

#: An interval is refined when some closed-loop eigenvalue's path may bend
#: across the unit circle between two samples: its estimated deviation from
#: the straight chord, times SAFETY, reaches the chord's distance to the
#: circle (see :func:`_needs_refinement`).
_SAFETY = 4.0
#: ... or when any eigenvalue moves farther than this between samples [-]
#: (keeps the local curvature estimate honest).
_MAX_STEP = 0.05
#: Smallest refinement width, relative to the Lg range.
_MIN_WIDTH_REL = 1e-7
#: Cap on samples per variant (the scan reports when it was reached).
_MAX_SAMPLES = 4000


def _match(Ea, Eb):
    """For each eigenvalue of Ea [k, m], its nearest neighbour in Eb [k, m]."""
    j = np.argmin(np.abs(Ea[:, :, None] - Eb[:, None, :]), axis=2)
    return np.take_along_axis(Eb, j, axis=1), j


def _segment_min_modulus(p, q):
    """Smallest |z| on the straight segments from p to q (arrays)."""
    d = q - p
    dd = np.abs(d) ** 2
    with np.errstate(all="ignore"):
        t = np.where(dd > 0, -np.real(np.conj(p) * d) / dd, 0.0)
    t = np.clip(t, 0.0, 1.0)
    return np.abs(p + t * d)


def _needs_refinement(x, E, tol):
    """Per interval between consecutive samples x [S] with closed-loop
    eigenvalues E [S, m]: can an eigenvalue cross the unit circle and come
    back (or the reverse) between the two samples unseen?

    The unit disc is convex, so the straight chord between two eigenvalue
    positions inside the circle stays inside, and its distance to the
    circle is 1 - max(|a|, |b|); for two positions outside, the distance is
    min|z| on the chord minus 1. The actual path deviates from the chord by
    about |lambda''| h^2 / 8 (h the Lg step, lambda'' estimated from the
    second divided difference over the neighbouring samples, nearest-
    neighbour matching). Refine when SAFETY times that deviation reaches
    the distance, or when any eigenvalue moves more than _MAX_STEP.
    Eigenvalues that do cross (inside at one end, outside at the other) are
    located by the bisection instead."""
    S = x.size
    Ea, Eb = E[:-1], E[1:]
    Enext, jn = _match(Ea, Eb)  # eigenvalue i of sample k at sample k+1
    h = np.diff(x)[:, None]
    chord = np.abs(Enext - Ea)
    need = np.any(chord > _MAX_STEP, axis=1)
    curv = np.full(Ea.shape, np.inf)
    if S >= 3:
        Eprev, _ = _match(E[1:-1], E[:-2])  # sample k's eigenvalues matched at k-1, k = 1..S-2
        En2 = Enext[1:]  # sample k's eigenvalues at k+1, k = 1..S-2
        hl = (x[1:-1] - x[:-2])[:, None]
        hr = (x[2:] - x[1:-1])[:, None]
        d2 = np.abs(2.0 * ((En2 - E[1:-1]) / hr - (E[1:-1] - Eprev) / hl) / (hl + hr))  # at samples 1..S-2
        c_left = np.full(Ea.shape, np.nan)  # curvature at the interval's left sample
        c_left[1:] = d2
        c_right = np.full(Ea.shape, np.nan)  # at the right sample, mapped to the left sample's order
        c_right[:-1] = np.take_along_axis(d2, jn[:-1], axis=1)
        curv = np.fmax(c_left, c_right)
        curv = np.where(np.isnan(curv), np.inf, curv)
    dev = curv * h**2 / 8.0
    ma, mb = np.abs(Ea), np.abs(Enext)
    inside_a, inside_b = ma < 1.0 - tol, mb < 1.0 - tol
    margin = np.where(inside_a & inside_b, 1.0 - np.maximum(ma, mb), np.inf)
    out = ~inside_a & ~inside_b
    margin = np.where(out, _segment_min_modulus(Ea, Enext) - 1.0, margin)
    # infinite curvature (not yet estimable): fall back to the chord itself
    dev = np.where(np.isfinite(dev), dev, chord)
    risky = (_SAFETY * dev >= margin) & (chord > 1e-13)
    return need | np.any(risky, axis=1)


@dataclass(frozen=True)
class LgScan:
    """Stability of one variant over an Lg range.

    Lg_H: the samples of the adaptive scan [H] (sorted);
    spectral_radius: at those samples [-];
    stable_intervals_H: the stable Lg intervals [(from, to), ...] [H], ends
    exact to ~1e-12 of the range (interior ends are where a closed-loop pole
    crosses the unit circle; the range ends themselves when stable there);
    boundaries_H: the interior crossings [H];
    limit_reached: True when the sample cap stopped the refinement."""

    Lg_H: np.ndarray
    spectral_radius: np.ndarray
    stable_intervals_H: tuple[tuple[float, float], ...]
    boundaries_H: tuple[float, ...]
    limit_reached: bool = False

    @property
    def fully_stable(self) -> bool:
        iv = self.stable_intervals_H
        return len(iv) == 1 and iv[0][0] == self.Lg_H[0] and iv[0][1] == self.Lg_H[-1]


def _pairs_eigs(design, values: ComponentValues, Hi, Kp, fidx, Lg):
    vals = values.take(fidx)
    eig = closed_loop_eigenvalues(design, Lg, vals, Hi[fidx], Kp[fidx])
    return eig


def stable_lg_intervals(design: Design, Lg_range_H: tuple[float, float], values: ComponentValues | None = None,
                        Hi_V_per_A=None, Kp_V_per_A=None, *, n_initial: int = 41, extra_points=(),
                        tol: float = TOLERANCE, progress: Progress | None = None) -> list[LgScan]:
    """Stable Lg intervals of each variant, with exact endpoints.

    ``values`` holds F variants (1-D :class:`ComponentValues`; None: the
    design alone); ``Hi_V_per_A`` and ``Kp_V_per_A`` [V/A] are scalars or
    arrays of length F. Returns one :class:`LgScan` per variant.

    Method: the closed-loop eigenvalues are sampled on ``n_initial`` evenly
    spaced Lg values (plus ``extra_points``, e.g. the critical crossing).
    Between two samples an eigenvalue path can only reach the unit circle
    unseen by bending away from the straight chord (the disc is convex), so
    every interval is halved while some eigenvalue's estimated bend
    (second divided difference x step^2 / 8, times 4 for safety) reaches the
    chord's distance to the circle, or while some eigenvalue moves more than
    0.05 per step, down to 1e-7 of the range (see :func:`_needs_refinement`).
    Where the verdict changes between neighbours, the crossing is located
    by bisection on the spectral radius minus one. Stable means spectral
    radius < 1 - ``tol``."""
    lo, hi = float(Lg_range_H[0]), float(Lg_range_H[1])
    values = ComponentValues.nominal(design, (1,)) if values is None else values
    F = values.size
    ctl = design.control
    Hi = np.broadcast_to(np.asarray(ctl.Hi_V_per_A if Hi_V_per_A is None else Hi_V_per_A, float), (F,))
    Kp = np.broadcast_to(np.asarray(ctl.Kp_V_per_A if Kp_V_per_A is None else Kp_V_per_A, float), (F,))
    if hi <= lo:
        x0 = np.array([lo])
        E = _pairs_eigs(design, values, Hi, Kp, np.arange(F), np.full(F, lo))
        r = np.abs(E).max(axis=1)
        return [LgScan(x0, r[f : f + 1], ((lo, lo),) if r[f] < 1 - tol else (), ()) for f in range(F)]
    span = hi - lo
    x0 = np.linspace(lo, hi, n_initial)
    ex = [float(e) for e in extra_points if lo < float(e) < hi]
    x0 = np.unique(np.concatenate([x0, ex]))
    fidx = np.repeat(np.arange(F), x0.size)
    xs = np.tile(x0, F)
    E = _pairs_eigs(design, values, Hi, Kp, fidx, xs)
    X = [x0.copy() for _ in range(F)]
    EE = [E[f * x0.size : (f + 1) * x0.size] for f in range(F)]
    capped = [False] * F
    min_w = _MIN_WIDTH_REL * span
    for _round in range(40):
        new_f, new_x = [], []
        for f in range(F):
            x, Ef = X[f], EE[f]
            need = _needs_refinement(x, Ef, tol) & (np.diff(x) > min_w)
            if need.any():
                if x.size + need.sum() > _MAX_SAMPLES:
                    capped[f] = True
                    continue
                mid = 0.5 * (x[:-1][need] + x[1:][need])
                new_f.append(np.full(mid.size, f))
                new_x.append(mid)
        if not new_f:
            break
        nf = np.concatenate(new_f)
        nx = np.concatenate(new_x)
        En = _pairs_eigs(design, values, Hi, Kp, nf, nx)
        for f in np.unique(nf):
            sel = nf == f
            x = np.concatenate([X[f], nx[sel]])
            Ef = np.concatenate([EE[f], En[sel]])
            order = np.argsort(x)
            X[f], EE[f] = x[order], Ef[order]
        if progress is not None:
            progress(min(0.8, 0.1 + 0.05 * _round))
    # bisection at every change of verdict
    R = [np.abs(Ef).max(axis=1) for Ef in EE]
    S = [r < 1.0 - tol for r in R]
    bf, ba, bb, bsa = [], [], [], []
    for f in range(F):
        k = np.nonzero(S[f][:-1] != S[f][1:])[0]
        bf.append(np.full(k.size, f))
        ba.append(X[f][k])
        bb.append(X[f][k + 1])
        bsa.append(S[f][k])
    bf, ba, bb, bsa = (np.concatenate(v) for v in (bf, ba, bb, bsa))
    roots = np.zeros(0)
    if bf.size:
        a, b = ba.copy(), bb.copy()
        for _ in range(_BISECT_STEPS):
            m = 0.5 * (a + b)
            Em = _pairs_eigs(design, values, Hi, Kp, bf, m)
            sm = np.abs(Em).max(axis=1) < 1.0 - tol
            same = sm == bsa
            a = np.where(same, m, a)
            b = np.where(same, b, m)
            if np.all(b - a <= 1e-13 * span):
                break
        roots = 0.5 * (a + b)
    out = []
    for f in range(F):
        x, s = X[f], S[f]
        rf = roots[bf == f]
        intervals = []
        start = lo if s[0] else None
        k_changes = np.nonzero(s[:-1] != s[1:])[0]
        for kk, root in zip(k_changes, rf):
            if s[kk] and not s[kk + 1]:
                intervals.append((start, float(root)))
                start = None
            else:
                start = float(root)
        if start is not None:
            intervals.append((start, hi))
        out.append(LgScan(x, R[f], tuple((float(a), float(b)) for a, b in intervals),
                          tuple(float(v) for v in rf), capped[f]))
    if progress is not None:
        progress(1.0)
    return out


# ---------------------------------------------------------------------------
# the sweep behind `loopcheck grid`
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class WorstPoint:
    """The least robust point of a variant over the Lg range.

    Lg_H [H]; variant: label of the filter variant ("nominal" or a corner);
    resonance_hz [Hz] there; margins: :class:`PointMargins` of that point
    (0-d arrays); index: robustness index [-] (-inf when unstable);
    binding: the term that sets it; shortfalls: every missed target, in
    words (empty when all are met)."""

    Lg_H: float
    variant: str
    resonance_hz: float
    margins: PointMargins
    index: float
    binding: str
    shortfalls: tuple[str, ...]


@dataclass(frozen=True)
class FamilyResult:
    """One filter variant (nominal or a tolerance corner) over the Lg range.

    label; factors: component -> 1 + deviation [-]; scan: the exact stable
    intervals (:class:`LgScan`); Lg_H [H], resonance_hz [Hz] and margins
    (:class:`PointMargins`) on the evenly spaced table grid; worst:
    :class:`WorstPoint`."""

    label: str
    factors: dict
    scan: LgScan
    Lg_H: np.ndarray
    resonance_hz: np.ndarray
    margins: PointMargins
    worst: WorstPoint


@dataclass(frozen=True)
class GridResult:
    """Result of :func:`sweep_grid`.

    Lg_range_H [H]; critical_hz: fs/(4*delay+2) [Hz]; Lg_critical_H: Lg
    where the nominal resonance crosses it [H] (None if it does not within
    Lg >= 0); targets; nominal and corners: :class:`FamilyResult`; worst:
    the worst point over the nominal filter and all corners."""

    Lg_range_H: tuple[float, float]
    critical_hz: float
    Lg_critical_H: float | None
    targets: Targets
    nominal: FamilyResult
    corners: tuple[FamilyResult, ...]
    worst: WorstPoint
    monte_carlo: "MonteCarloResult | None" = None

    def to_dict(self) -> dict:
        """Plain dict of every field (arrays as nested lists; None for non-finite numbers)."""
        from loopcheck.engine.plain import plain

        return {f: plain(getattr(self, f)) for f in self.__dataclass_fields__}


def _refine_worst(design, values1: ComponentValues, Hi, Kp, targets, x, idx, radius_mode, lo, hi):
    """Refine the worst Lg between the neighbours of grid point ``idx`` by
    bounded scalar minimisation of -radius (unstable) or the index (stable)."""
    from scipy.optimize import minimize_scalar

    a = x[max(idx - 1, 0)]
    b = x[min(idx + 1, x.size - 1)]

    def obj(lg):
        m = evaluate_points(design, np.array([lg]), values1, Hi, Kp, margins=not radius_mode)
        if radius_mode:
            return -float(m.spectral_radius[0])
        v = float(robustness_index(m, targets)[0])
        return v if math.isfinite(v) else 1e9 * (1 if v > 0 else -1)

    best_x, best_v = x[idx], obj(x[idx])
    if b > a:
        res = minimize_scalar(obj, bounds=(a, b), method="bounded",
                              options={"xatol": 1e-5 * max(hi - lo, 1e-12), "maxiter": 30})
        if res.fun < best_v:
            best_x = float(res.x)
    return min(max(best_x, lo), hi)


def _worst_of(design, label, values1, Hi, Kp, targets, scan: LgScan, Lg, margins, lo, hi) -> WorstPoint:
    if not scan.fully_stable:
        i = int(np.argmax(scan.spectral_radius))
        lg = _refine_worst(design, values1, Hi, Kp, targets, scan.Lg_H, i, True, lo, hi)
    else:
        idx = robustness_index(margins, targets)
        i = int(np.argmin(idx))
        lg = _refine_worst(design, values1, Hi, Kp, targets, Lg, i, False, lo, hi)
    m = evaluate_points(design, np.array([lg]), values1, Hi, Kp).take(0)
    ix = float(robustness_index(m, targets))
    fr = float(resonance_hz(values1.L1_H[0], values1.C_F[0] + _split_c(design, values1)[0], values1.L2_H[0] + lg))
    return WorstPoint(lg, label, fr, m, ix, str(binding_target(m, targets)), tuple(shortfalls(m, targets)))


def _split_c(design, values: ComponentValues):
    kind = design.filter.damping.kind
    return values.Cd_F if kind in ("split-RC", "split-RLC") else np.zeros(values.shape)


def sweep_grid(design: Design, Lg_range_H: tuple[float, float] | None = None, spec: ToleranceSpec | None = None,
               targets: Targets | None = None, *, n_points: int = 21, n_initial: int = 41,
               progress: Progress | None = None) -> GridResult:
    """Sweep the grid inductance over its range for the nominal filter and
    every tolerance corner: exact stable intervals, a table of resonance,
    verdict and margins on ``n_points`` evenly spaced Lg values, and the
    worst point of each variant (refined between table points).

    ``Lg_range_H`` [H] defaults to the case's ``Grid.Lg_range_H`` (or the
    single nominal Lg)."""
    targets = targets or Targets()
    spec = spec or ToleranceSpec()
    if Lg_range_H is None:
        Lg_range_H = design.grid.Lg_range_H or (design.grid.Lg_H, design.grid.Lg_H)
    lo, hi = float(Lg_range_H[0]), float(Lg_range_H[1])
    fcrit = damping_critical_hz(design)
    f = design.filter
    lg_star = critical_crossing_lg(f.L1_H, f.shunt_capacitance_F, f.L2_H, fcrit)
    labels, cvals = corner_values(design, spec)
    _, factors = corner_factors(spec)
    nominal = ComponentValues.nominal(design, (1,))
    allv = ComponentValues(*(np.concatenate([getattr(nominal, a), getattr(cvals, a)])
                             for a in ("L1_H", "C_F", "L2_H", "R1_ohm", "R2_ohm", "Rd_ohm", "Cd_F", "Ld_H")))
    F = allv.size
    names = ["nominal"] + labels

    def sub(a, b):
        return None if progress is None else (lambda x: progress(a + (b - a) * x))

    extra = [lg_star] if lg_star is not None else []
    scans = stable_lg_intervals(design, (lo, hi), allv, n_initial=n_initial, extra_points=extra, progress=sub(0.0, 0.5))
    Lg = np.linspace(lo, hi, n_points) if hi > lo else np.array([lo])
    m_all = evaluate_points(design, Lg[None, :], allv.reshape((F, 1)), progress=sub(0.5, 0.85))
    fr_all = resonance_hz(allv.L1_H[:, None], (allv.C_F + _split_c(design, allv))[:, None], allv.L2_H[:, None] + Lg[None, :])
    fams = []
    ctl = design.control
    for k in range(F):
        v1 = allv.take(slice(k, k + 1))
        mk = m_all.take(k)
        worst = _worst_of(design, names[k], v1, ctl.Hi_V_per_A, ctl.Kp_V_per_A, targets, scans[k], Lg, mk, lo, hi)
        fk = {} if k == 0 else {n: float(v[k - 1]) for n, v in factors.items()}
        fams.append(FamilyResult(names[k], fk, scans[k], Lg, fr_all[k], mk, worst))
        if progress is not None:
            progress(0.85 + 0.15 * (k + 1) / F)
    overall = min((fm.worst for fm in fams), key=lambda w: (w.index, -float(w.margins.spectral_radius)))
    return GridResult((lo, hi), fcrit, lg_star, targets, fams[0], tuple(fams[1:]), overall)


# ---------------------------------------------------------------------------
# Monte Carlo
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class MonteCarloResult:
    """Monte Carlo draw of units.

    n_units; seed; confidence [-] of the intervals; n_unstable: units whose
    loop is not stable; n_below_targets: units that are unstable or miss a
    margin target; *_fraction [-] = count / n_units; *_ci: Clopper-Pearson
    interval [-] (from, to); *_ci_wilson: Wilson score interval [-];
    Lg_distribution: how Lg was drawn; worst_unit: index, Lg [H], robustness
    index and component deviations of the least robust unit."""

    n_units: int
    seed: int | None
    confidence: float
    n_unstable: int
    n_below_targets: int
    unstable_fraction: float
    unstable_ci: tuple[float, float]
    unstable_ci_wilson: tuple[float, float]
    below_targets_fraction: float
    below_targets_ci: tuple[float, float]
    below_targets_ci_wilson: tuple[float, float]
    Lg_distribution: str
    worst_unit: dict = field(default_factory=dict)


def monte_carlo(design: Design, spec: ToleranceSpec, Lg_range_H: tuple[float, float], targets: Targets,
                n_units: int, seed: int | None = None, *, confidence: float = 0.95,
                progress: Progress | None = None) -> MonteCarloResult:
    """Draw ``n_units`` units and report the fraction that is unstable and
    the fraction that is unstable or misses a margin target, each with its
    confidence interval (Clopper-Pearson, and Wilson for comparison).

    Component deviations are drawn first (one component after the other,
    in the fixed order L1, C, L2, R1, R2, Rd, Cd, Ld whatever the order of
    the keys in the file, see :func:`loopcheck.design.tolerance.draw_units`), then Lg
    uniformly over ``Lg_range_H`` [H], all from
    ``numpy.random.default_rng(seed)``: the same seed gives the same units.

    References
    ----------
    .. [1] C. J. Clopper and E. S. Pearson, Biometrika, vol. 26, no. 4,
       pp. 404-413, 1934; E. B. Wilson, J. Amer. Statist. Assoc., vol. 22,
       pp. 209-212, 1927 (see :mod:`loopcheck.design.tolerance`).
    """
    from loopcheck.design.tolerance import clopper_pearson_interval, draw_units, wilson_interval

    if n_units < 1:
        raise ValueError("n_units must be at least 1")
    rng = np.random.default_rng(seed)
    vals, dev = draw_units(design, spec, n_units, rng)
    lo, hi = Lg_range_H
    Lg = rng.uniform(lo, hi, n_units) if hi > lo else np.full(n_units, lo)
    m = evaluate_points(design, Lg, vals, progress=progress)
    idx = robustness_index(m, targets)
    n_unst = int(np.sum(~m.stable))
    n_below = int(np.sum(~(idx >= 1.0)))
    if n_unst:
        w = int(np.argmax(np.where(m.stable, -np.inf, m.spectral_radius)))
    else:
        w = int(np.argmin(idx))
    worst = {"unit": w, "Lg_H": float(Lg[w]), "index": float(idx[w]), "spectral_radius": float(m.spectral_radius[w]),
             "deviations": {k: float(v[w]) for k, v in dev.items()}}
    return MonteCarloResult(
        n_units, seed, confidence, n_unst, n_below,
        n_unst / n_units, clopper_pearson_interval(n_unst, n_units, confidence),
        wilson_interval(n_unst, n_units, confidence),
        n_below / n_units, clopper_pearson_interval(n_below, n_units, confidence),
        wilson_interval(n_below, n_units, confidence),
        "uniform over the range", worst,
    )
