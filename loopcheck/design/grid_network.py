"""A grid given as a small network, or as a measured impedance, and the
stability of the inverter on it.

Network (per phase, between the PCC and the ideal grid source): a series
branch ``Rg + s Lg`` to the source and, at the PCC, an optional shunt
branch ``R_shunt + 1/(s C_shunt)`` (cable capacitance, power-factor
correction). Seen from the PCC with the source shorted:

    Zg(s) = (Rg + s Lg) || (R_shunt + 1/(s C_shunt))          [ohm]

``units = N`` identical inverters in parallel at the PCC share it.

Two verdicts:

* the impedance-ratio criterion (:func:`impedance_ratio_verdict`): the
  inverter is stable on a stiff grid (closed-loop eigenvalues), the grid is
  passive, and ``1 + N Zg Yo`` does not encircle 0 along ``s = sigma + jw``
  (Sun 2011). ``Yo`` is the baseband admittance of
  :mod:`loopcheck.engine.admittance`;
* the exact eigenvalue verdict (:func:`exact_verdict`): the network's states
  (and all N units) appended to the continuous plant before the exact ZOH
  discretisation, all loops closed, spectral radius of the closed loop.

For identical units the coupled model splits into one common mode that sees
``N Zg`` and ``N - 1`` modes that see a stiff PCC (Agorreta et al. 2011).

References
----------
.. [1] J. Sun, "Impedance-based stability criterion for grid-connected
   inverters", IEEE Trans. Power Electron., vol. 26, no. 11,
   pp. 3075-3078, 2011 (from memory).
.. [2] J. L. Agorreta, M. Borrega, J. Lopez and L. Marroyo, "Modeling and
   control of N-paralleled grid-connected inverters with LCL filter coupled
   due to grid impedance in PV plants", IEEE Trans. Power Electron.,
   vol. 26, no. 3, 2011 (citation seen; the common-mode N Zg from memory).
.. [3] H. Nyquist, "Regeneration theory", Bell Syst. Tech. J., vol. 11,
   pp. 126-147, 1932 (argument principle).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from loopcheck.engine.admittance import admittance_model, output_admittance
from loopcheck.engine.controller import controller_blocks, parallel
from loopcheck.engine.discretize import discretize_plant
from loopcheck.engine.plant import OUTPUT_I1, OUTPUT_I2, OUTPUT_IC, lcl_state_space
from loopcheck.engine.verdict import TOLERANCE, classify

#: Real part of the contour s = sigma + jw, as a fraction of fs [1/s per Hz];
#: the same offset as the engine's |z| = 1 + 1e-7.
CONTOUR_SIGMA_PER_FS = 1e-7


@dataclass(frozen=True)
class GridNetwork:
    """Grid between the PCC and the ideal source, per phase.

    Lg_H [H], Rg_ohm [ohm]: series branch; C_shunt_F [F] (0: none) with
    R_shunt_ohm [ohm] in series: shunt branch at the PCC; units: number of
    identical inverters in parallel at the PCC; measured: a measured
    impedance (:class:`loopcheck.design.measured_grid.MeasuredImpedance`, read
    from a CSV file by :mod:`loopcheck.io.read_network`) instead of the components."""

    Lg_H: float = 0.0
    Rg_ohm: float = 0.0
    C_shunt_F: float = 0.0
    R_shunt_ohm: float = 0.0
    units: int = 1
    measured: object = None

    @property
    def has_shunt(self) -> bool:
        return self.C_shunt_F > 0.0

    def scaled(self, n: float) -> "GridNetwork":
        """The network with n times the impedance (R, L times n, C over n)."""
        return replace(self, Lg_H=self.Lg_H * n, Rg_ohm=self.Rg_ohm * n, C_shunt_F=self.C_shunt_F / n,
                       R_shunt_ohm=self.R_shunt_ohm * n)

    def resonance_hz(self) -> float | None:
        """1/(2 pi sqrt(Lg C_shunt)) [Hz], the parallel resonance of the network alone."""
        if not self.has_shunt or self.Lg_H <= 0:
            return None
        return 1.0 / (2 * math.pi * math.sqrt(self.Lg_H * self.C_shunt_F))


def network_impedance(net: GridNetwork, s) -> np.ndarray:
    """Zg(s) [ohm] seen from the PCC (source shorted), vectorised over complex s."""
    s = np.asarray(s, dtype=complex)
    zl = net.Rg_ohm + s * net.Lg_H
    if not net.has_shunt:
        return zl
    with np.errstate(all="ignore"):
        zc = net.R_shunt_ohm + 1.0 / (s * net.C_shunt_F)
        return zl * zc / (zl + zc)


# ---------------------------------------------------------------------------
# exact verdict: network states inside the exact ZOH step
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class CoupledPlant:
    """Continuous state space of ``units`` inverters on the network.

    A [n, n]; B [n, N] (one converter voltage per unit); C [3N, n], rows
    (i1, i2, ic) of unit 0, then of unit 1, ...; unit_order: states per unit;
    vg_row [n]: the PCC voltage as a linear function of the states."""

    A: np.ndarray
    B: np.ndarray
    C: np.ndarray
    unit_order: int
    units: int
    vg_row: np.ndarray | None = None  # PCC voltage [V] as a row over the states


def coupled_plant(design, net: GridNetwork, units: int | None = None) -> CoupledPlant:
    """``units`` copies of the design's filter (its own L2 and R2, not the
    [grid] Lg) connected at the PCC to the network ``net``.

    Circuit (Kirchhoff, common practice): unit k has L2 di2_k/dt = a_k - vg
    with a_k = v_k - R2 i2_k from the filter model. With a shunt branch the
    network states are [vcs, ig]: C_shunt dvcs/dt = sum i2 - ig,
    Lg dig/dt = vg - Rg ig, vg = vcs + R_shunt (sum i2 - ig). Without one the
    inductors form a cut set and vg is algebraic:
    vg = (Rg L2 S + Lg sum a_k) / (L2 + N Lg), S = sum i2."""
    N = net.units if units is None else int(units)
    f = design.filter
    d = f.damping
    p = lcl_state_space(f.L1_H, f.C_F, f.L2_H, f.R1_ohm, f.R2_ohm, d.kind, d.Rd_ohm, d.Cd_F, d.Ld_H)
    nf = p.order
    i2 = 2
    L2 = f.L2_H
    extra = 2 if net.has_shunt else 0
    n = N * nf + extra
    A = np.zeros((n, n))
    B = np.zeros((n, N))
    C = np.zeros((3 * N, n))
    for k in range(N):
        sl = slice(k * nf, (k + 1) * nf)
        A[sl, sl] = p.A
        B[sl, k] = p.B[:, 0]
        C[3 * k : 3 * k + 3, sl] = p.C
    # vg as a row over the states
    Srow = np.zeros(n)
    for k in range(N):
        Srow[k * nf + i2] = 1.0
    if net.has_shunt:
        if net.Lg_H <= 0:
            raise ValueError("a shunt branch needs a series inductance Lg > 0")
        vcs, ig = N * nf, N * nf + 1
        vg = net.R_shunt_ohm * Srow
        vg[vcs] += 1.0
        vg[ig] -= net.R_shunt_ohm
        A[vcs, :] = Srow / net.C_shunt_F
        A[vcs, ig] -= 1.0 / net.C_shunt_F
        A[ig, :] = vg / net.Lg_H
        A[ig, ig] -= net.Rg_ohm / net.Lg_H
    else:
        arow = np.zeros(n)
        for k in range(N):
            arow[k * nf : (k + 1) * nf] += L2 * p.A[i2, :]
        vg = (net.Rg_ohm * L2 * Srow + net.Lg_H * arow) / (L2 + N * net.Lg_H)
    for k in range(N):
        A[k * nf + i2, :] -= vg / L2
    return CoupledPlant(A, B, C, nf, N, vg)


@dataclass(frozen=True)
class ExactVerdict:
    """Closed-loop eigenvalue verdict of the coupled sampled model.

    verdict: stable / marginal / unstable; spectral_radius [-]; units;
    order: closed-loop states."""

    verdict: str
    spectral_radius: float
    units: int
    order: int

    @property
    def stable(self) -> bool:
        return self.verdict == "stable"


def coupled_closed_loop_matrix(design, net: GridNetwork, units: int | None = None, feedforward=None) -> np.ndarray:
    """Closed-loop state matrix of ``units`` identical sampled loops on the
    network: exact ZOH with the delay of the whole coupled plant, each unit
    with its own controller (the design's) and damping gain, all sampled
    together; with ``feedforward`` (:class:`loopcheck.engine.admittance.Feedforward`)
    each unit adds gain * F(z) * vg[k] of the sampled PCC voltage."""
    cp = coupled_plant(design, net, units)
    N = cp.units
    Ts = design.sampling.Ts_s
    dp = discretize_plant(cp.A, cp.B, cp.C, Ts, design.sampling.delay)
    ctrl = parallel(controller_blocks(design.control, design.grid.f_hz, Ts))
    fb = OUTPUT_I2 if design.control.feedback == "grid" else OUTPUT_I1
    Fb = dp.C[[3 * k + fb for k in range(N)], :]
    Ic = dp.C[[3 * k + OUTPUT_IC for k in range(N)], :]
    Hi = design.control.Hi_V_per_A
    I = np.eye(N)
    Ac, Bc, Cc, Dc = (np.kron(I, m) for m in (ctrl.A, ctrl.B, ctrl.C, ctrl.D))
    nd, nc = dp.A.shape[0], Ac.shape[0]
    Acl = np.zeros((nd + nc, nd + nc))
    Acl[:nd, :nd] = dp.A - dp.B @ (Dc @ Fb + Hi * Ic)
    Acl[:nd, nd:] = dp.B @ Cc
    Acl[nd:, :nd] = -Bc @ Fb
    Acl[nd:, nd:] = Ac
    if feedforward is None:
        return Acl
    Af, Bf, Cf, Df = feedforward.blocks(Ts)
    Vg = np.zeros((1, nd))
    Vg[0, : cp.A.shape[0]] = cp.vg_row  # vg[k] from the sampled continuous states
    nf = N * Af.shape[0]
    A2 = np.zeros((nd + nc + nf, nd + nc + nf))
    A2[: nd + nc, : nd + nc] = Acl
    ones = np.ones((N, 1))
    A2[:nd, :nd] += dp.B @ (ones * Df[0, 0]) @ Vg
    if nf:
        A2[:nd, nd + nc:] = dp.B @ np.kron(I, Cf)
        A2[nd + nc:, :nd] = np.kron(ones, Bf) @ Vg
        A2[nd + nc:, nd + nc:] = np.kron(I, Af)
    return A2


def exact_verdict(design, net: GridNetwork, units: int | None = None, tol: float = TOLERANCE,
                  feedforward=None) -> ExactVerdict:
    """Verdict from the eigenvalues of :func:`coupled_closed_loop_matrix`."""
    Acl = coupled_closed_loop_matrix(design, net, units, feedforward)
    r = float(np.max(np.abs(np.linalg.eigvals(Acl))))
    return ExactVerdict(classify(r, tol), r, net.units if units is None else int(units), Acl.shape[0])


# ---------------------------------------------------------------------------
# impedance-ratio criterion
# ---------------------------------------------------------------------------


def stiff_design(design):
    """The design on a stiff PCC (grid inductance and resistance zero)."""
    return replace(design, grid=replace(design.grid, Lg_H=0.0, Rg_ohm=0.0, Lg_range_H=None))


def stiff_grid_verdict(design, tol: float = TOLERANCE) -> tuple[str, float]:
    """(verdict, spectral radius) of the inverter on a stiff PCC, from the
    engine's closed-loop eigenvalues."""
    from loopcheck.engine.loop import build_loop

    loop = build_loop(stiff_design(design))
    r = float(np.max(np.abs(np.linalg.eigvals(loop.closed_loop_matrix(1.0)))))
    return classify(r, tol), r


def winding_count(F, w_seed: np.ndarray, max_rounds: int = 40, max_step_rad: float = 0.5) -> tuple[int, float, np.ndarray, np.ndarray]:
    """Counter-clockwise winding number of F(w) around 0 for w from -inf to
    +inf, from w >= 0 (F(-w) = conj F(w) for a real system: the negative
    half mirrors the positive one). The seed grid [rad/s] is refined until no
    step in the argument exceeds ``max_step_rad``. Returns (winding,
    residual from an integer, w, F(w))."""
    w = np.unique(np.asarray(w_seed, dtype=float))
    f = F(w)
    for _ in range(max_rounds):
        d = np.angle(f[1:] / f[:-1])
        bad = np.nonzero(~(np.abs(d) <= max_step_rad))[0]
        if bad.size == 0:
            break
        wn = 0.5 * (w[bad] + w[bad + 1])
        keep = wn > w[bad] * (1 + 1e-13)
        if not keep.any():
            break
        wn = wn[keep]
        w = np.concatenate([w, wn])
        f = np.concatenate([f, F(wn)])
        order = np.argsort(w)
        w, f = w[order], f[order]
    total = 2.0 * np.sum(np.angle(f[1:] / f[:-1])) / (2.0 * math.pi)
    n = int(round(total))
    return n, abs(total - n), w, f


def contour_seed(fs_hz: float, special_hz=(), f_top_factor: float = 200.0) -> np.ndarray:
    """Seed angular frequencies [rad/s] from 0 to f_top_factor * fs, dense
    near fs/2 and refined geometrically around the special frequencies [Hz]."""
    f = [np.array([0.0]), np.geomspace(0.01, fs_hz / 100, 400), np.linspace(fs_hz / 100, 4 * fs_hz, 4000),
         np.geomspace(4 * fs_hz, f_top_factor * fs_hz, 400)]
    for fx in special_hz:
        if fx and fx > 0:
            f.append(fx * (1 + np.concatenate([-np.geomspace(1e-9, 0.05, 60), np.geomspace(1e-9, 0.05, 60)])))
    return 2 * math.pi * np.unique(np.concatenate(f))


@dataclass(frozen=True)
class ImpedanceVerdict:
    """The impedance-ratio verdict on a grid.

    stiff_verdict / stiff_radius: the inverter on a stiff PCC (eigenvalues);
    grid_passive: the grid impedance has Re Zg >= 0 (components: all
    resistances non-negative); encirclements_cw: clockwise encirclements of
    -1 by N Zg Yo (= closed-loop roots of 1 + N Zg Yo right of the contour
    when the criterion applies); residual: distance of the winding sum from
    an integer; applicable: stiff grid stable and grid passive; verdict:
    "stable", "unstable" or "not applicable"; min_distance: smallest
    |1 + N Zg Yo| on the contour [-] and where [Hz]; units: N."""

    stiff_verdict: str
    stiff_radius: float
    grid_passive: bool
    encirclements_cw: int
    residual: float
    applicable: bool
    verdict: str
    min_distance: float
    min_distance_hz: float
    units: int
    note: str = ""


def _verdict_from_count(stiff: str, passive: bool, ccw: int) -> tuple[bool, str]:
    applicable = stiff == "stable" and passive
    if not applicable:
        return False, "not applicable"
    return True, "stable" if ccw == 0 else "unstable"


def impedance_ratio_verdict(design, net: GridNetwork, units: int | None = None, feedforward=None) -> ImpedanceVerdict:
    """Sun's impedance-ratio criterion with ``N Zg`` (N = units) and the
    baseband output admittance, counted along s = sigma + jw with
    sigma = 1e-7 fs (right of any lossless pole on the jw axis)."""
    N = net.units if units is None else int(units)
    netN = net.scaled(N)
    stiff, r = stiff_grid_verdict(design)
    passive = min(net.Rg_ohm, net.R_shunt_ohm) >= 0.0
    model = admittance_model(design, feedforward)
    fs = design.sampling.fs_hz
    sigma = CONTOUR_SIGMA_PER_FS * fs

    def F(w):
        s = sigma + 1j * np.asarray(w)
        with np.errstate(all="ignore"):
            return 1.0 + network_impedance(netN, s) * output_admittance(model, s)

    from loopcheck.engine.model import design_resonance_hz

    special = [design_resonance_hz(stiff_design(design), with_grid=False), netN.resonance_hz(), fs / 2]
    ccw, resid, w, f = winding_count(F, contour_seed(fs, special))
    applicable, verdict = _verdict_from_count(stiff, passive, ccw)
    j = int(np.argmin(np.abs(f)))
    note = ""
    if applicable and ccw > 0:  # impossible for a stable inverter on a passive grid: numerical trouble
        note = "more counter-clockwise than clockwise turns: the count is not trustworthy"
        applicable, verdict = False, "not applicable"
    return ImpedanceVerdict(stiff, r, passive, -ccw, resid, applicable, verdict, float(np.abs(f[j])),
                            float(w[j] / (2 * math.pi)), N, note)


# ---------------------------------------------------------------------------
# the [grid_network] table
# ---------------------------------------------------------------------------

KEYS = ("Lg", "Rg", "C_shunt", "R_shunt", "units", "measured")


# ---------------------------------------------------------------------------
# one case: everything the impedance command reports
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class ImpedanceCurves:
    """Sampled curves for the figure: frequency_hz [Hz] (positive, log-spaced),
    Yo_S [S], Zg_ohm [ohm] of the grid as N units see it (N Zg; NaN outside
    measured data), loop = N Zg Yo [-]."""

    frequency_hz: np.ndarray
    Yo_S: np.ndarray
    Zg_ohm: np.ndarray
    loop: np.ndarray


@dataclass(frozen=True)
class ImpedanceStudy:
    """The impedance view of one case.

    passivity: non-passive bands of Yo (:class:`loopcheck.engine.admittance.PassivityResult`);
    network: the components (None for measured data); measured: the table
    (None for components); units; ratio: the impedance-ratio verdict
    (:class:`ImpedanceVerdict` or :class:`loopcheck.design.measured_grid.MeasuredVerdict`);
    exact: the eigenvalue verdict with the network inside the exact model
    (None for measured data); source: "grid_network", "measured" or "grid"
    (the [grid] Lg and Rg when the case has no [grid_network] table);
    curves: for the figure; feedforward: the grid-voltage feedforward or None."""

    passivity: object
    network: GridNetwork | None
    measured: object
    units: int
    ratio: object
    exact: ExactVerdict | None
    source: str
    curves: ImpedanceCurves
    feedforward: object = None


def study(design, net: GridNetwork | None, f_max_hz: float | None = None, feedforward=None) -> ImpedanceStudy:
    """Passivity bands, impedance-ratio and eigenvalue verdicts for a design
    on a network (``None``: the design's own [grid] Lg and Rg).

    The measured table, if any, was read with the case (:mod:`loopcheck.io.read_network`)."""
    from loopcheck.engine.admittance import passivity_bands
    from loopcheck.design.measured_grid import measured_verdict

    fs = design.sampling.fs_hz
    source = "grid_network"
    if net is None:
        net = GridNetwork(design.grid.Lg_H, design.grid.Rg_ohm)
        source = "grid"
    passivity = passivity_bands(design, f_max_hz=fs if f_max_hz is None else f_max_hz, feedforward=feedforward)
    N = net.units
    f = np.geomspace(1.0, 2.0 * fs, 4000)
    f = np.unique(np.concatenate([f, np.linspace(fs / 50, 2 * fs, 4000)]))
    model = admittance_model(design, feedforward)
    Yo = output_admittance(model, 2j * math.pi * f)
    if net.measured is not None:
        meas = net.measured
        ratio = measured_verdict(design, meas, N, feedforward=feedforward)
        Z = np.where((f >= meas.frequency_hz[0]) & (f <= meas.frequency_hz[-1]), N * meas.interpolate(f), np.nan)
        return ImpedanceStudy(passivity, None, meas, N, ratio, None, "measured", ImpedanceCurves(f, Yo, Z, Z * Yo),
                              feedforward)
    ratio = impedance_ratio_verdict(design, net, feedforward=feedforward)
    exact = exact_verdict(design, net, feedforward=feedforward)
    Z = network_impedance(net.scaled(N), 2j * math.pi * f)
    return ImpedanceStudy(passivity, net, None, N, ratio, exact, source, ImpedanceCurves(f, Yo, Z, Z * Yo),
                          feedforward)


