"""Stability maps: where in a plane of two design parameters the sampled
current loop is stable, with exact region boundaries.

Conventions
-----------
A map sweeps two parameters of a :class:`loopcheck.engine.model.Design` (the
*axes*) over a grid and keeps everything else at the design's own values.
Axis names are the case-file names (:data:`AXIS_NAMES`), values are SI
(H, F, Hz, V/A, V/(A*s)); ``"fr/fs"`` is the plain ratio of the LCL
resonance (grid inductance included) to the sampling frequency.

``"fr/fs"`` moves the resonance by scaling the filter capacitance (C, and
the damping capacitor Cd of the split passive-damping variants, by the same
factor) with fs, the inductors and every gain fixed, so the normalised gains
Hi*Ts/L1 and Kp*Ts/(L1+L2+Lg) stay constant along that axis. Combined with
an ``"fs"``, ``"L1"``, ``"L2"`` or ``"Lg"`` axis the capacitance is chosen
per point so that every point has exactly the ratio on the axis.

Verdicts come from closed-loop eigenvalues (stable: every eigenvalue inside
``|z| < 1 - tolerance``, as in :mod:`loopcheck.engine.verdict`), the same model as
:func:`loopcheck.engine.analysis.analyse` (exact ZOH with the computation delay,
damping loop, controller blocks), so a map point agrees with ``check``.

Method
------
The gains ``Kp``, ``Hi``, ``Kr`` and ``Ki`` enter the closed-loop matrix
affinely through a rank-one term, ``A(y) = A0 + y*A1``, so the
characteristic polynomial is affine in the gain: ``p(z; y) = p0(z) +
y*p1(z)``. Along a gain axis the region boundary is found exactly by
D-decomposition (Neimark 1948; Gryazina & Polyak 2006): a root can cross the
unit circle only at z = 1 (``y = -p0(1)/p1(1)``), at z = -1, or at
``z = e^{jw}`` where ``p0/p1`` is real, i.e. at the zeros of the
trigonometric polynomial ``Im(p0(e^{jw}) conj(p1(e^{jw}))) = sum_m d_m
sin(m w)``; dividing by ``sin w`` leaves a Chebyshev series of the second
kind in ``cos w``, solved with a colleague matrix (Good 1961). Every piece
between two candidate gains is then classified by the eigenvalues of the
state-space matrix (never by the polynomial), and every boundary that
changes the verdict is verified by eigenvalues just beside it, or located by
eigenvalue bisection where that check fails.

The modal path (used first along a gain, :func:`gain_lines`): the
monomial coefficients are never formed. With ``A(y) = A(b) + (y - b) u
v^T`` and the balanced eigendecomposition ``A(b) = V diag(mu) V^-1``,
residues ``r = (v^T V) o (V^-1 u)`` give ``det(zI - A(y)) = prod_k (z -
mu_k) (1 - (y - b) sum_k r_k/(z - mu_k))``; the candidate gains are
``b + 1/G(e^{jw})`` where ``G = sum_k r_k/(z - mu_k)`` is real, plus z =
+-1, classified by eigenvalues as above, and the radius follows every root
in this product form (:mod:`loopcheck.engine.map_kernels`). Lines with a
near-defective eigenvector matrix, or whose followed radius contradicts the
intervals or the eigenvalues at the last grid value, take the polynomial
path below.

The slower exact path of the polynomial route: where the polynomial is ill-conditioned (roots
clustered near z = 1 at very low fr/fs, many resonators, high fs; detected
by comparing its roots with state-space eigenvalues), the candidate gains
come from the frequency response instead: with ``A1 = u v^T``,
``det(zI - A0 - y A1) = det(zI - A0) (1 - y G(z))``, ``G = v^T (zI -
A0)^{-1} u`` evaluated in modal form, so ``y = 1/G(e^{jw})`` where G is
real; the radius of such a line comes from eigenvalues at every grid value.

The gridded spectral radius along a gain axis follows the roots of
``p(z; y)`` from one grid value to the next with a predictor and Newton
steps, checked against Newton's identities (sum of roots and sum of squares
against the coefficients); a failed check re-seeds the roots from a
companion-matrix eigenvalue problem. Lines where the tracked radius contradicts the exact
intervals take the slower path too; only if even its intervals contradict
the eigenvalue grid are the boundaries located by bisection between grid
values (marked "refined"). When neither axis is a gain, every grid point is an eigenvalue
problem and boundaries are located by bisection between grid points (a
region thinner than one grid step can then be missed; the map says so per
column in :attr:`StabilityMap.boundary_method`).

References
----------
.. [1] Yu. I. Neimark, "Search for the parameter values that make automatic
   control system stable", Avtomatika i Telemekhanika, vol. 9, no. 3,
   pp. 190-203, 1948 (D-decomposition; from memory).
.. [2] E. N. Gryazina and B. T. Polyak, "Stability regions in the parameter
   space: D-decomposition revisited", Automatica, vol. 42, no. 1,
   pp. 13-26, 2006 (from memory).
.. [3] I. J. Good, "The colleague matrix, a Chebyshev analogue of the
   companion matrix", Quart. J. Math., vol. 12, no. 1, pp. 61-68, 1961
   (from memory).
.. [4] N. J. Higham, "The scaling and squaring method for the matrix
   exponential revisited", SIAM J. Matrix Anal. Appl., vol. 26, no. 4,
   pp. 1179-1193, 2005 (the batched matrix exponential of
   :mod:`loopcheck.engine.expm`, used by the discretisation).
.. [5] Parker, McGrath and Holmes, "Regions of Active
   Damping Control for LCL Filters", IEEE Trans. Ind. Appl., vol. 50,
   no. 1, pp. 424-432, 2014 (the critical ratio fr/fs = 1/6 drawn on maps;
   from memory).
.. [6] B. N. Parlett and C. Reinsch, "Balancing a matrix for calculation
   of eigenvalues and eigenvectors", Numer. Math., vol. 13, pp. 293-304,
   1969 (diagonal balancing before the modal decomposition; from memory).

Newton's method on polynomial roots and Newton's identities between roots
and coefficients, used by :func:`track_radius`, are common practice.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import Callable

import numpy as np

from loopcheck.engine.controller import controller_blocks, parallel
from loopcheck.engine.damping_filter import damping_critical_hz, is_filtered, with_damping_filter
from loopcheck.engine.discretize import discretize_plant
from loopcheck.engine.loop import series_open_loop
from loopcheck.engine.model import Design, design_resonance_hz
from loopcheck.engine.plant import OUTPUT_I1, OUTPUT_I2, OUTPUT_IC, lcl_state_space
from loopcheck.engine.verdict import TOLERANCE

#: Parameters a map axis can sweep (case-file names; "fr/fs" is a ratio).
AXIS_NAMES = ("fr/fs", "fs", "Lg", "Kp", "Hi", "C", "L2", "L1", "Kr", "Ki")
#: Axes along which the closed-loop matrix is affine (exact D-decomposition).
GAIN_AXES = ("Kp", "Hi", "Kr", "Ki")
#: SI unit of each axis ("" for the ratio; Kr is V/(A*s) for the ideal
#: resonator and V/A for the damped one, see :class:`loopcheck.engine.model.Control`).
AXIS_UNITS = {
    "fr/fs": "",
    "fs": "Hz",
    "Lg": "H",
    "Kp": "V/A",
    "Hi": "V/A",
    "C": "F",
    "L2": "H",
    "L1": "H",
    "Kr": "V/A/s",
    "Ki": "V/A/s",
}
#: Metrics that can be asked for per grid point besides the spectral radius.
METRICS = ("phase-margin", "gain-margin", "sensitivity")

#: Pairs of axes that cannot be combined (both set the filter capacitance).
_CONFLICTS = {frozenset(("fr/fs", "C"))}

ProgressFn = Callable[[float], None]


# ---------------------------------------------------------------------------
# axes and results
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class Axis:
    """One map axis.

    name: one of :data:`AXIS_NAMES`; start, stop: first and last value
    [SI unit of the parameter, :data:`AXIS_UNITS`; plain ratio for
    ``"fr/fs"``], start < stop; points: number of grid values (>= 2);
    log: geometric instead of linear spacing (start > 0)."""

    name: str
    start: float
    stop: float
    points: int
    log: bool = False

    def values(self) -> np.ndarray:
        """The grid values [SI unit of the axis], ascending."""
        if self.log:
            return np.geomspace(self.start, self.stop, self.points)
        return np.linspace(self.start, self.stop, self.points)

    @property
    def unit(self) -> str:
        """SI unit of the axis values ("" for the ratio fr/fs)."""
        return AXIS_UNITS[self.name]

    @property
    def is_gain(self) -> bool:
        """True for the gains along which the boundary is exact (D-decomposition)."""
        return self.name in GAIN_AXES


@dataclass(frozen=True)
class MapSpec:
    """What to map: the x and y axes and the extra per-point metrics
    (a subset of :data:`METRICS`)."""

    x: Axis
    y: Axis
    metrics: tuple[str, ...] = ()


@dataclass(frozen=True, eq=False)
class StabilityMap:
    """A computed stability map. Arrays are indexed ``[iy, ix]``.

    x, y: the axes; x_values, y_values: grid values [axis SI units].
    stable: every closed-loop eigenvalue inside ``|z| < 1 - tolerance`` [bool].
    spectral_radius: largest closed-loop eigenvalue magnitude [-].
    intervals: per x value, the stable y intervals ``(from, to)`` [y unit],
    clipped to the y range. boundaries: per x value, the y values inside the
    range where the verdict changes [y unit]. boundary_method: per x value,
    ``"exact"`` (D-decomposition along a gain axis, each boundary verified
    by eigenvalues or located by eigenvalue bisection) or ``"refined"``
    (bisection between grid points; a region thinner than one y step may be
    missed).
    parameters: every parameter that varies across the map under its
    case-file name (``"fs"``, ``"C"``, ``"Cd"``, ``"Lg"``, ``"Kp"``, ``"Hi"``,
    ``"Kr"``, ``"Ki"``, ``"L1"``, ``"L2"``) as ``[iy, ix]`` arrays [SI], plus
    ``"fr/fs"`` when it is an axis.
    phase_margin_deg [deg], gain_margin_lower / gain_margin_upper
    [controller-gain factor, -; upper inf when unbounded],
    sensitivity_peak [-] and sensitivity_peak_hz [Hz]: the requested
    metrics (None when not requested; NaN where undefined, e.g. not stable).
    boundary_path: per x value, how the column was computed along a gain
    axis: ``"modal"`` (the fast modal path) or ``"polynomial"`` (the
    fallback for near-defective modal bases, see :func:`gain_lines`), or
    ``"grid"`` without a gain on the y axis. kernels: ``"numba"`` or
    ``"numpy"``, the inner loops used (:mod:`loopcheck.engine.map_kernels`).
    design_x, design_y: the case's own values on the axes [axis units];
    design_stable: its verdict; design_interval: the stable y interval at
    x = design_x that contains design_y over the whole gain line (not the
    drawn range; ends may be infinite), or None; design_line: the
    :class:`loopcheck.design.design_line.DesignLine` with every stable interval
    of that line and, for a design that is not stable, the nearest ones.
    critical_ratio: the critical fr/fs [-], 1/(4*delay + 2) for the measured
    ic (loopcheck.engine.damping_filter.damping_critical_hz with a filter); delay
    [sampling periods]; fs_hz, L1_H: the case's own sampling frequency [Hz]
    and converter-side inductance [H]; Lg_H: nominal grid inductance [H]; Lg_range_H:
    the case's grid-inductance range [H] or None; tolerance: the band
    around |z| = 1 counted as not stable [-].
    """

    name: str
    x: Axis
    y: Axis
    x_values: np.ndarray
    y_values: np.ndarray
    stable: np.ndarray
    spectral_radius: np.ndarray
    intervals: tuple
    boundaries: tuple
    boundary_method: tuple
    parameters: dict
    design_x: float
    design_y: float
    design_stable: bool
    design_interval: tuple | None
    critical_ratio: float
    delay: float
    fs_hz: float
    L1_H: float
    Lg_H: float
    Lg_range_H: tuple | None
    tolerance: float
    phase_margin_deg: np.ndarray | None = None
    gain_margin_lower: np.ndarray | None = None
    gain_margin_upper: np.ndarray | None = None
    sensitivity_peak: np.ndarray | None = None
    sensitivity_peak_hz: np.ndarray | None = None
    design_line: object | None = None
    boundary_path: tuple = ()
    kernels: str = ""
    critical_formula: str = "1/(4 delay + 2)"

    def to_dict(self) -> dict:
        """Plain dict of every field (arrays as nested lists; None for non-finite numbers)."""
        from loopcheck.engine.plain import plain

        return {f: plain(getattr(self, f)) for f in self.__dataclass_fields__}

    @property
    def stable_fraction(self) -> float:
        """Share of grid points that are stable [-]."""
        return float(np.mean(self.stable))


# ---------------------------------------------------------------------------
# parameters of map points
# ---------------------------------------------------------------------------


def check_axes(x: str, y: str) -> None:
    """Raise ValueError when the axis names cannot be combined."""
    for a in (x, y):
        if a not in AXIS_NAMES:
            raise ValueError(f"unknown axis {a!r}; known: {', '.join(AXIS_NAMES)}")
    if x == y:
        raise ValueError(f"x and y are both {x!r}")
    if frozenset((x, y)) in _CONFLICTS:
        raise ValueError(f"{x!r} and {y!r} both set the filter capacitance; use one of them")


def design_value(design: Design, name: str) -> float:
    """The design's own value of an axis parameter [SI; ratio for fr/fs]."""
    f, g, c = design.filter, design.grid, design.control
    return {
        "fr/fs": lambda: design_resonance_hz(design, with_grid=True) / design.sampling.fs_hz,
        "fs": lambda: design.sampling.fs_hz,
        "Lg": lambda: g.Lg_H,
        "Kp": lambda: c.Kp_V_per_A,
        "Hi": lambda: c.Hi_V_per_A,
        "C": lambda: f.C_F,
        "L2": lambda: f.L2_H,
        "L1": lambda: f.L1_H,
        "Kr": lambda: c.Kr,
        "Ki": lambda: c.Ki_V_per_As,
    }[name]()


def _split_damping(design: Design) -> bool:
    return design.filter.damping.kind in ("split-RC", "split-RLC")


def point_parameters(design: Design, values: dict) -> dict:
    """Every model parameter at map points [SI], under case-file names.

    ``values`` maps axis names to arrays (or floats) that broadcast against
    each other; the result maps ``"L1", "C", "Cd", "L2", "Lg", "fs", "Kp",
    "Hi", "Kr", "Ki"`` to arrays of the common shape (read-only broadcast
    views where a value does not vary). ``"fr/fs"`` sets C
    (and Cd, by the same factor) from the point's own L1, L2, Lg and fs:
    ``C_total = (L1 + L2 + Lg) / (L1 (L2 + Lg) (2 pi fr)^2)`` (lossless LCL
    resonance, Liserre, Blaabjerg & Hansen, IEEE Trans. Ind. Appl., vol. 41,
    no. 5, 2005)."""
    f, g, s, c = design.filter, design.grid, design.sampling, design.control
    prm = {
        "L1": f.L1_H,
        "C": f.C_F,
        "Cd": f.damping.Cd_F if _split_damping(design) else 0.0,
        "L2": f.L2_H,
        "Lg": g.Lg_H,
        "fs": s.fs_hz,
        "Kp": c.Kp_V_per_A,
        "Hi": c.Hi_V_per_A,
        "Kr": c.Kr,
        "Ki": c.Ki_V_per_As,
    }
    for k, v in values.items():
        if k != "fr/fs":
            prm[k] = v
    arrays = np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in list(prm.values()) + list(values.values())))
    out = dict(zip(prm, arrays))  # read-only broadcast views, no copies
    if "fr/fs" in values:
        ratio = np.asarray(values["fr/fs"], dtype=float)
        w = 2.0 * math.pi * ratio * out["fs"]
        L2t = out["L2"] + out["Lg"]
        c_total = (out["L1"] + L2t) / (out["L1"] * L2t * w**2)
        scale = c_total / (f.C_F + (f.damping.Cd_F if _split_damping(design) else 0.0))
        out["C"] = np.broadcast_to(f.C_F * scale, out["C"].shape)
        if _split_damping(design):
            out["Cd"] = np.broadcast_to(f.damping.Cd_F * scale, out["C"].shape)
    return out


def point_design(design: Design, values: dict) -> Design:
    """The design at one map point: ``values`` maps axis names to floats
    [axis units]. Used to recompute any map point independently."""
    p = {k: float(v) for k, v in point_parameters(design, values).items()}
    f = design.filter
    damping = f.damping
    if _split_damping(design):
        damping = dataclasses.replace(damping, Cd_F=p["Cd"])
    filt = dataclasses.replace(f, L1_H=p["L1"], C_F=p["C"], L2_H=p["L2"], damping=damping)
    grid = dataclasses.replace(design.grid, Lg_H=p["Lg"])
    sampling = dataclasses.replace(design.sampling, fs_hz=p["fs"])
    control = dataclasses.replace(
        design.control, Kp_V_per_A=p["Kp"], Hi_V_per_A=p["Hi"], Kr=p["Kr"], Ki_V_per_As=p["Ki"]
    )
    return dataclasses.replace(design, filter=filt, grid=grid, sampling=sampling, control=control)


# ---------------------------------------------------------------------------
# batched model: exact ZOH with delay, damping loop, controller
# ---------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class _Plants:
    """Discrete plants with the damping loop open: Ad [..., n, n], Bd
    [..., n, 1], rows of the regulated current and the capacitor current
    (c_fb, c_ic [..., 1, n]), sampling period Ts [s]."""

    Ad: np.ndarray
    Bd: np.ndarray
    c_fb: np.ndarray
    c_ic: np.ndarray
    Ts: np.ndarray


def _plants(design: Design, prm: dict) -> _Plants:
    f, g = design.filter, design.grid
    d = f.damping
    p = lcl_state_space(
        prm["L1"], prm["C"], prm["L2"] + prm["Lg"], f.R1_ohm, f.R2_ohm + g.Rg_ohm,
        d.kind, d.Rd_ohm, prm["Cd"], d.Ld_H,
    )
    Ts = 1.0 / prm["fs"]
    dp = with_damping_filter(discretize_plant(p.A, p.B, p.C, Ts, design.sampling.delay), design.control, Ts)
    Ad, Bd, Cd = dp.A, dp.B, dp.C
    row = OUTPUT_I2 if design.control.feedback == "grid" else OUTPUT_I1
    return _Plants(Ad, Bd, Cd[..., row : row + 1, :], Cd[..., OUTPUT_IC : OUTPUT_IC + 1, :], Ts)


def _open_loops(design: Design, prm: dict, plants: _Plants | None = None):
    """Batched ``(A_ol, B_ol, C_ol)`` of the loop broken at the controller
    (damping loop closed), the same structure as :mod:`loopcheck.engine.loop`."""
    if plants is None:
        plants = _plants(design, prm)
    Hi = np.asarray(prm["Hi"], dtype=float)[..., None, None]
    Ai = plants.Ad - Hi * (plants.Bd @ plants.c_ic)
    blocks = controller_blocks(design.control, design.grid.f_hz, plants.Ts, Kp=prm["Kp"], Ki=prm["Ki"], Kr=prm["Kr"])
    ctrl = parallel(blocks)
    batch = np.broadcast_shapes(Ai.shape[:-2], ctrl.A.shape[:-2])
    Ai = np.broadcast_to(Ai, batch + Ai.shape[-2:])
    Bp = np.broadcast_to(plants.Bd, batch + plants.Bd.shape[-2:])
    Cfb = np.broadcast_to(plants.c_fb, batch + plants.c_fb.shape[-2:])
    return series_open_loop(Ai, Bp, Cfb, ctrl)


def closed_loop_matrices(design: Design, values: dict) -> np.ndarray:
    """Closed-loop state matrices ``[..., n, n]`` at map points (``values``
    as in :func:`point_parameters`)."""
    prm = point_parameters(design, values)
    A, B, C = _open_loops(design, prm)
    return A - B @ C


def _radius(A: np.ndarray) -> np.ndarray:
    """Spectral radius of a stack of matrices (batched eigenvalues)."""
    if A.shape[0] == 0:
        return np.zeros(0)
    return np.abs(np.linalg.eigvals(A)).max(axis=-1)


# ---------------------------------------------------------------------------
# characteristic polynomials and exact crossings along a gain
# ---------------------------------------------------------------------------


def char_polys(A0: np.ndarray, A1: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Coefficients (ascending powers of z) of ``p(z; y) = det(zI - A0 - y A1)
    = p0(z) + y p1(z)`` for stacks ``A0, A1 [m, n, n]`` with ``A1`` of rank
    one. The determinant is evaluated at the n+1 roots of unity and turned
    into coefficients by an FFT (exact interpolation of a degree-n
    polynomial). Returns ``(p0, p1)``, each ``[m, n+1]``; p0 is monic and
    p1 has degree < n."""
    m, n = A0.shape[0], A0.shape[-1]
    N = n + 1
    zk = np.exp(2j * np.pi * np.arange(N) / N)
    eye = np.eye(n)
    Z = zk[None, :, None, None] * eye
    v0 = np.linalg.det(Z - A0[:, None])
    v1 = np.linalg.det(Z - (A0 + A1)[:, None])
    c0 = (np.fft.fft(v0, axis=-1) / N).real
    c1 = (np.fft.fft(v1, axis=-1) / N).real - c0
    c0[:, n] = 1.0
    c1[:, n] = 0.0
    return c0, c1


def _polyval_asc(c: np.ndarray, z: np.ndarray) -> np.ndarray:
    """Evaluate ascending-coefficient polynomials ``c [m, n+1]`` at ``z [m, k]``."""
    out = np.zeros(z.shape, dtype=complex) + c[:, -1:]
    for k in range(c.shape[1] - 2, -1, -1):
        out = out * z + c[:, k : k + 1]
    return out


def _u_to_t(n: int) -> np.ndarray:
    """Matrix M with ``sum_k d_k U_k = sum_j (M d)_j T_j`` (k, j = 0..n-1):
    U_k = 2 (T_k + T_{k-2} + ...) ending in + T_0 for even k (Chebyshev
    polynomials of the second and first kind, e.g. Mason & Handscomb,
    "Chebyshev Polynomials", 2003, ch. 1; from memory)."""
    M = np.zeros((n, n))
    for k in range(n):
        for j in range(k % 2, k + 1, 2):
            M[j, k] = 2.0 if j > 0 else 1.0
    return M


def _cheb_real_roots(t: np.ndarray) -> list[np.ndarray]:
    """Real roots in [-1, 1] of Chebyshev series ``t [m, D+1]`` (T_0..T_D),
    one array per row; colleague-matrix eigenvalues, batched by degree."""
    m = t.shape[0]
    out: list[np.ndarray] = [np.zeros(0)] * m
    scale = np.abs(t).max(axis=1)
    big = np.abs(t) > 1e-13 * scale[:, None]
    deg = np.where(big.any(axis=1), t.shape[1] - 1 - np.argmax(big[:, ::-1], axis=1), 0)
    for D in np.unique(deg):
        if D < 1:
            continue
        idx = np.nonzero(deg == D)[0]
        c = t[idx, : D + 1]
        if D == 1:
            roots = (-c[:, 0] / c[:, 1])[:, None].astype(complex)
        else:
            mat = np.zeros((D, D))
            off = np.full(D - 1, 0.5)
            off[0] = math.sqrt(0.5)
            mat[np.arange(D - 1), np.arange(1, D)] = off
            mat[np.arange(1, D), np.arange(D - 1)] = off
            scl = np.array([1.0] + [math.sqrt(0.5)] * (D - 1))
            mats = np.broadcast_to(mat, (idx.size, D, D)).copy()
            mats[:, :, -1] -= (c[:, :-1] / c[:, -1:]) * (scl / scl[-1]) * 0.5
            roots = np.linalg.eigvals(mats)
        ok = (np.abs(roots.imag) < 1e-6) & (np.abs(roots.real) <= 1.0 + 1e-9)
        for r, i in enumerate(idx):
            out[i] = np.clip(roots[r][ok[r]].real, -1.0, 1.0)
    return out


def crossing_gains(p0: np.ndarray, p1: np.ndarray) -> list[np.ndarray]:
    """Every gain y at which ``p0 + y p1`` has a root on the unit circle,
    per row (coefficients ascending, ``[m, n+1]``): z = 1, z = -1 and the
    complex pairs ``e^{+-jw}`` where ``p0/p1`` is real (D-decomposition, see
    the module docstring). Spurious extra values are harmless (each piece
    between them is classified by eigenvalues); none is missed unless the
    polynomial itself is inaccurate."""
    m, n1 = p0.shape
    n = n1 - 1
    a, b = p0, p1
    cands: list[list[float]] = [[] for _ in range(m)]
    scale_b = np.abs(b).sum(axis=1)
    for sign in (1.0, -1.0):
        powers = sign ** np.arange(n1)
        v0 = a @ powers
        v1 = b @ powers
        ok = np.abs(v1) > 1e-13 * np.maximum(scale_b, 1e-300)
        for i in np.nonzero(ok)[0]:
            cands[i].append(-v0[i] / v1[i])
    # Im(p0 conj p1) on the circle = sum_m d_m sin(m w), m = 1..n
    d = np.zeros((m, n))
    for mm in range(1, n + 1):
        d[:, mm - 1] = (a[:, mm:] * b[:, : n1 - mm]).sum(axis=1) - (a[:, : n1 - mm] * b[:, mm:]).sum(axis=1)
    t = d @ _u_to_t(n).T
    roots = _cheb_real_roots(t)
    for i, x in enumerate(roots):
        if x.size == 0:
            continue
        z = np.exp(1j * np.arccos(x))[None, :]
        P0 = _polyval_asc(a[i : i + 1], z)[0]
        P1 = _polyval_asc(b[i : i + 1], z)[0]
        mag = np.abs(P1) ** 2
        ok = mag > (1e-12 * scale_b[i]) ** 2
        cands[i].extend((-(P0[ok] * np.conj(P1[ok])).real / mag[ok]).tolist())
    return [np.array(c, dtype=float) for c in cands]


# ---------------------------------------------------------------------------
# intervals along a line
# ---------------------------------------------------------------------------


@dataclass
class _LineIntervals:
    """Verdict pieces of one line: boundaries (ascending) and whether the
    piece below the first boundary is stable; method "exact" or "refined";
    path: "modal" or "polynomial" along a gain (see :func:`gain_lines`),
    "grid" for verdicts on the grid refined by bisection."""

    boundaries: np.ndarray
    first_stable: bool
    method: str
    path: str = "grid"

    def intervals(self, lo: float, hi: float) -> tuple:
        edges = [lo] + list(self.boundaries) + [hi]
        out = []
        s = self.first_stable
        for a, b in zip(edges[:-1], edges[1:]):
            if s:
                out.append((float(a), float(b)))
            s = not s
        return tuple(out)

    def flags(self, y: np.ndarray) -> np.ndarray:
        below = np.searchsorted(self.boundaries, y, side="left")
        on = np.isin(y, self.boundaries)
        return (((below % 2) == 0) == self.first_stable) & ~on


def _poly_radius(c: np.ndarray) -> np.ndarray:
    """Largest root magnitude of ascending-coefficient monic polynomials
    ``c [m, n+1]`` (companion-matrix eigenvalues)."""
    return np.abs(_companion_roots(c)).max(axis=-1)


def _companion_roots(c: np.ndarray) -> np.ndarray:
    m, n1 = c.shape
    n = n1 - 1
    M = np.zeros((m, n, n))
    M[:, 0, :] = -c[:, -2::-1] / c[:, -1:]
    M[:, np.arange(1, n), np.arange(n - 1)] = 1.0
    return np.linalg.eigvals(M)


NEWTON_STEPS = 3


def track_radius(p0: np.ndarray, p1: np.ndarray, y: np.ndarray, progress: ProgressFn | None = None) -> np.ndarray:
    """Spectral radius of ``p0 + y_j p1`` for every line and every grid
    value y_j (ascending), ``[len(y), m]``.

    The roots are followed from one y to the next (linear extrapolation of
    the last step as predictor, two Newton steps), then checked against
    Newton's identities: the sum of the roots must equal minus the
    next-to-leading coefficient and the sum of their squares c_{n-1}^2 -
    2 c_{n-2} (monic polynomial), which fails when two roots have merged
    into one. Lines failing the check, or whose last Newton correction of a
    root near the largest modulus is not below 1e-9 (relative), are
    re-seeded from companion-matrix eigenvalues at that y."""
    m, n1 = p0.shape
    n = n1 - 1
    ny = y.size
    out = np.empty((ny, m))
    if n == 0:
        out[:] = 0.0
        return out
    a = [p0[:, k : k + 1] for k in range(n1)]
    b = [p1[:, k : k + 1] for k in range(n1)]
    r = _companion_roots(p0 + y[0] * p1).astype(complex)
    out[0] = np.abs(r).max(axis=1)
    vel = np.zeros_like(r)
    p = np.empty_like(r)
    dp = np.empty_like(r)
    tmp = np.empty_like(r)
    h_prev = 1.0
    step = max(1, ny // 50)
    with np.errstate(all="ignore"):
        for j in range(1, ny):
            yy = y[j]
            h = yy - y[j - 1]
            c = [a[k] + yy * b[k] for k in range(n1)]
            r_old = r.copy()
            if j > 1:
                r += vel * (h / h_prev)
            for _ in range(NEWTON_STEPS):
                p.fill(1.0)
                dp.fill(0.0)
                for k in range(n - 1, -1, -1):
                    dp *= r
                    dp += p
                    p *= r
                    p += c[k]
                np.divide(p, dp, out=tmp)
                r -= tmp
            np.subtract(r, r_old, out=vel)
            h_prev = h
            absr = np.abs(r)
            mag = absr.sum(axis=1)
            e1 = c[n - 1][:, 0]
            e2 = c[n - 2][:, 0] if n >= 2 else 0.0
            # converged where it matters: the roots that set the radius
            # (slow, linear convergence of two small real roots about to meet
            # does not change the radius; Newton's identities below still
            # catch roots that merged)
            top = absr >= 0.999 * absr.max(axis=1, keepdims=True)
            ok = ((np.abs(tmp) <= 1e-9 * (1.0 + absr)) | ~top).all(axis=1)
            ok &= np.abs(r.sum(axis=1) + e1) <= 1e-8 * (1.0 + mag)
            ok &= np.abs((r * r).sum(axis=1) - (e1 * e1 - 2.0 * e2)) <= 1e-8 * (1.0 + mag * mag)
            if not ok.all():
                k = np.nonzero(~ok)[0]
                r[k] = _companion_roots(p0[k] + yy * p1[k])
                vel[k] = 0.0
                absr[k] = np.abs(r[k])
            absr.max(axis=1, out=out[j])
            if progress is not None and j % step == 0:
                progress(step / ny)
    return out


def _bisect(evaluate, line, a, b, sa, span: float, rel_tol: float = 1e-10):
    """Vectorised bisection: ``evaluate(line, y) -> stable`` with
    ``evaluate(line, a) == sa != evaluate(line, b)``; returns the crossing
    of each bracket to ``rel_tol * span``."""
    a = np.array(a, dtype=float)
    b = np.array(b, dtype=float)
    if a.size == 0:
        return a
    width = float(np.max(np.abs(b - a)))
    iters = max(1, int(math.ceil(math.log2(max(width, 1e-300) / (rel_tol * span)))) + 1) if width > 0 else 0
    for _ in range(iters):
        mid = 0.5 * (a + b)
        same = evaluate(line, mid) == sa
        a = np.where(same, mid, a)
        b = np.where(same, b, mid)
    return 0.5 * (a + b)


def _classify(A0, A1, cands: list, lo: float, hi: float, tol: float, method: str = "exact"):
    """D-decomposition step two: split [lo, hi] of every line at its
    candidate gains, classify each piece by state-space eigenvalues at its
    midpoint, and confirm each verdict-changing boundary by eigenvalues
    2e-6 of the range beside it (else locate it by eigenvalue bisection
    between the neighbouring midpoints).

    Returns the per-line intervals and, for the caller's checks, the flat
    piece arrays ``(line, mid, radius_at_mid)``."""
    m = A0.shape[0]
    span = hi - lo
    edges = []
    for c in cands:
        c = np.unique(c[(c > lo) & (c < hi)])
        edges.append(np.concatenate([[lo], c, [hi]]))
    counts = np.array([e.size - 1 for e in edges])
    line = np.repeat(np.arange(m), counts)
    left = np.concatenate([e[:-1] for e in edges])
    right = np.concatenate([e[1:] for e in edges])
    mid = 0.5 * (left + right)

    def evaluate(li, y):
        return _radius(A0[li] + np.asarray(y)[:, None, None] * A1[li]) < 1.0 - tol

    rad_mid = _radius(A0[line] + mid[:, None, None] * A1[line])
    st = rad_mid < 1.0 - tol
    change = np.nonzero((line[:-1] == line[1:]) & (st[:-1] != st[1:]))[0]
    c = right[change].copy()
    li = line[change]
    dl = np.minimum(2e-6 * span, 0.5 * (c - left[change]))
    dr = np.minimum(2e-6 * span, 0.5 * (right[change + 1] - c))
    ok = (evaluate(li, c - dl) == st[change]) & (evaluate(li, c + dr) == st[change + 1])
    if not ok.all():
        k = np.nonzero(~ok)[0]
        c[k] = _bisect(evaluate, li[k], mid[change[k]], mid[change[k] + 1], st[change[k]], span)
    first = np.concatenate([[0], np.cumsum(counts)[:-1]])
    order = np.argsort(li, kind="stable")
    split = np.searchsorted(li[order], np.arange(m + 1))
    out = []
    for i in range(m):
        b = np.sort(c[order[split[i] : split[i + 1]]])
        out.append(_LineIntervals(b, bool(st[first[i]]), method))
    return out, (line, mid, rad_mid)


def _exact_lines(A0, A1, p0, p1, lo: float, hi: float, tol: float):
    """Stable intervals along ``A0 + y A1`` for y in [lo, hi], per line, with
    the candidate gains from the characteristic polynomial
    (:func:`crossing_gains`), classified by :func:`_classify`.

    Returns the intervals and, per line, whether the polynomial's roots
    disagreed with the state-space eigenvalues at the piece midpoints (the
    caller then takes the slower path for that line)."""
    lines, (line, mid, rad_mid) = _classify(A0, A1, crossing_gains(p0, p1), lo, hi, tol)
    pr = _poly_radius(p0[line] + mid[:, None] * p1[line])
    suspect = np.zeros(A0.shape[0], dtype=bool)
    suspect[line[np.abs(pr - rad_mid) > 1e-9 * np.maximum(1.0, rad_mid)]] = True
    return lines, suspect


def frequency_crossing_gains(A0: np.ndarray, A1: np.ndarray) -> list[np.ndarray]:
    """Candidate gains of the lines ``A0 + y A1`` (A1 = u v^T of rank one)
    from the frequency response instead of the polynomial: with
    ``G(z) = v^T (zI - A0)^{-1} u``, ``det(zI - A0 - y A1) = det(zI - A0)
    (1 - y G(z))``, so a root sits on the unit circle at ``y = 1/G(e^{jw})``
    where G is real (matrix determinant lemma; D-decomposition as in the
    module docstring). G is evaluated in modal form (state-space solve for
    ill-conditioned eigenvectors) on a frequency grid clustered around the
    eigenvalues of A0 near the circle, and the real-axis crossings are
    refined by regula falsi. Well conditioned where the polynomial is not
    (many resonators, roots clustered near z = 1); a crossing narrower than
    the clustered grid could be missed, which the caller's eigenvalue
    checks detect."""
    m, n = A0.shape[0], A0.shape[-1]
    U, sv, Vt = np.linalg.svd(A1)
    u = U[:, :, 0] * sv[:, :1]
    v = Vt[:, 0, :]
    lam, V = np.linalg.eig(A0)
    with np.errstate(all="ignore"):
        direct = ~(np.linalg.cond(V) < 1e10)
    Vinv = np.linalg.inv(np.where(direct[:, None, None], np.eye(n), V))
    res = (v[:, None, :] @ V)[:, 0, :] * (Vinv @ u[:, :, None])[:, :, 0]

    def G(li, w):
        z = np.exp(1j * w)
        out = np.zeros(w.shape, dtype=complex)
        with np.errstate(all="ignore"):
            for k in range(n):
                out += res[li, k][:, None] / (z - lam[li, k][:, None])
            bad = direct[li]
            if bad.any():
                lb = li[bad]
                M = z[bad][..., None, None] * np.eye(n) - A0[lb][:, None]
                x = np.linalg.solve(M, np.broadcast_to(u[lb][:, None, :, None], M.shape[:-1] + (1,)))
                out[bad] = (v[lb][:, None, None, :] @ x)[..., 0, 0]
        return out

    near = (np.abs(lam) > 0.5) & (lam.imag > 1e-12)
    ang = np.where(near, np.abs(np.angle(lam)), np.nan)
    base = np.unique(np.concatenate([np.geomspace(1e-6, math.pi, _N_LOG), np.linspace(0.0, math.pi, 2 * _N_LIN + 1)[1:]]))
    offs = np.concatenate([1.0 - _CLUSTER[::-1], 1.0 + _CLUSTER])
    wc = (ang[:, :, None] * offs[None, None, :]).reshape(m, -1)
    wc = np.where(np.isfinite(wc) & (wc > 0) & (wc < math.pi), wc, math.pi)
    w = np.sort(np.concatenate([np.broadcast_to(base, (m, base.size)), wc], axis=1), axis=1)
    rows = np.arange(m)
    g = G(rows, w)
    with np.errstate(all="ignore"):
        h = g.imag / np.abs(g)
    fin = np.isfinite(h)
    ii, jj, kk = _sign_brackets(h, fin)

    def fh(li, x):
        val = G(li, np.asarray(x)[:, None])[:, 0]
        with np.errstate(all="ignore"):
            return val.imag / np.abs(val)

    wr = _illinois(fh, ii, w[ii, jj], w[ii, kk], h[ii, jj], h[ii, kk])
    val = G(ii, wr[:, None])[:, 0]
    cands: list[list[float]] = [[] for _ in range(m)]
    with np.errstate(all="ignore"):
        ok = np.isfinite(val) & (np.abs(val.imag) <= 1e-7 * np.abs(val)) & (np.abs(val) > 0)
        for i, gv in zip(ii[ok], val[ok]):
            cands[i].append(1.0 / gv.real)
        for w0 in (0.0, math.pi):
            g0 = G(rows, np.full((m, 1), w0))[:, 0]
            ok0 = np.isfinite(g0) & (np.abs(g0) > 0)
            for i in np.nonzero(ok0)[0]:
                cands[i].append(1.0 / g0[i].real)
    return [np.array(c, dtype=float) for c in cands]


def _refined_lines(evaluate, stable, y, span: float) -> list[_LineIntervals]:
    """Intervals of lines from grid verdicts ``stable [ny, m]`` plus
    bisection (``evaluate(line, y) -> stable``) between grid values where
    the verdict changes; all brackets of all lines are bisected together."""
    jj, ii = np.nonzero(stable[:-1] != stable[1:])
    b = _bisect(evaluate, ii, y[jj], y[jj + 1], stable[jj, ii], span)
    order = np.argsort(ii, kind="stable")
    split = np.searchsorted(ii[order], np.arange(stable.shape[1] + 1))
    return [
        _LineIntervals(np.sort(b[order[split[i] : split[i + 1]]]), bool(stable[0, i]), "refined")
        for i in range(stable.shape[1])
    ]


def _gain_lines_poly(A0, A1, y, tol: float = TOLERANCE, progress: ProgressFn | None = None):
    """Stability along lines ``A(y) = A0 + y A1`` (``A0, A1 [m, n, n]``, A1 of
    rank one; y ascending grid of the gain).

    Returns ``(lines, radius)``: per line a :class:`_LineIntervals` with the
    exact boundaries (D-decomposition, see the module docstring) over
    [y[0], y[-1]], and the spectral radius ``[len(y), m]``. Lines where the
    polynomial route proves unreliable get their radius from state-space
    eigenvalues at every grid value, and their boundaries from bisection
    if the exact ones contradict those eigenvalues."""
    lo, hi = float(y[0]), float(y[-1])
    p0, p1 = char_polys(A0, A1)
    lines, suspect = _exact_lines(A0, A1, p0, p1, lo, hi, tol)
    radius = track_radius(p0, p1, y, progress)
    flags = np.stack([ln.flags(y) for ln in lines], axis=1)
    suspect |= ((flags != (radius < 1.0 - tol)) & (np.abs(radius - 1.0) > 1e-7)).any(axis=0)
    if suspect.any():
        # the slower exact path: eigenvalues at every grid value, candidate
        # gains from the frequency response, bisection only as a last resort
        k = np.nonzero(suspect)[0]
        for i in k:
            radius[:, i] = _radius(A0[i][None] + y[:, None, None] * A1[i][None])
        eig_stable = radius[:, k] < 1.0 - tol
        fresh, _ = _classify(A0[k], A1[k], frequency_crossing_gains(A0[k], A1[k]), lo, hi, tol)
        wrong = []
        for col, (i, ln) in enumerate(zip(k, fresh)):
            bad = (ln.flags(y) != eig_stable[:, col]) & (np.abs(radius[:, i] - 1.0) > 1e-7)
            if bad.any():
                wrong.append(i)
            else:
                lines[i] = ln

        def evaluate(li, yy):
            return _radius(A0[li] + np.asarray(yy)[:, None, None] * A1[li]) < 1.0 - tol

        if wrong:
            kw = np.array(wrong)
            redo = _refined_lines(lambda li, yy: evaluate(kw[li], yy), radius[:, kw] < 1.0 - tol, y, hi - lo)
            for i, ln in zip(kw, redo):
                lines[i] = ln
    return lines, radius


# ---------------------------------------------------------------------------
# the modal path along a gain: no monomial coefficients
# ---------------------------------------------------------------------------

#: Eigenvector-matrix condition number above which a line's modal form is
#: not trusted (the line then takes the polynomial path).
MODAL_COND_LIMIT = 1e10
#: Second singular value of A1 relative to the first above which A1 does not
#: count as rank one (the line then takes the polynomial path).
RANK_ONE_TOL = 1e-9


@dataclass(frozen=True, eq=False)
class _Modal:
    """Lines ``A(y) = A0 + y A1`` with ``A1 = u v^T`` in modal form around a
    base gain: ``A(base) = V diag(mu) V^-1`` (after diagonal balancing),
    residues ``r = (v^T V) o (V^-1 u)``, so that ``det(zI - A(y)) =
    prod_k (z - mu_k) (1 - (y - base) sum_k r_k / (z - mu_k))``.

    mu, r: ``[m, n]`` complex; base: ``[m]`` [y unit]; cond: eigenvector
    condition number ``[m]``; ok: lines whose modal form is usable."""

    mu: np.ndarray
    r: np.ndarray
    base: np.ndarray
    cond: np.ndarray
    ok: np.ndarray


def _rank_one(A1: np.ndarray):
    """``(u [m, n], v [m, n], ok [m])`` with ``A1 ~ u v^T``; ok where the
    second singular value is below :data:`RANK_ONE_TOL` of the first."""
    U, sv, Vt = np.linalg.svd(A1)
    u = U[:, :, 0] * sv[:, :1]
    v = Vt[:, 0, :]
    ok = sv[:, 0] > 0
    if sv.shape[1] > 1:
        ok &= sv[:, 1] <= RANK_ONE_TOL * sv[:, 0]
    return u, v, ok


def _balance(A: np.ndarray, sweeps: int = 20):
    """Diagonal balancing of a stack ``A [m, n, n]`` by powers of two (the
    row/column norm equalisation of Parlett & Reinsch, "Balancing a matrix
    for calculation of eigenvalues and eigenvectors", Numer. Math. 13,
    1969, as in LAPACK xGEBAL; from memory). Returns ``(D^-1 A D, d)`` with
    ``D = diag(d)``; the eigenvalues are unchanged, the eigenvector matrix
    of the result is usually far better conditioned when the states have
    very different units."""
    A = np.array(A, dtype=float)
    m, n = A.shape[0], A.shape[-1]
    d = np.ones((m, n))
    absA = np.abs(A)
    diag = np.arange(n)
    absA[:, diag, diag] = 0.0
    for _ in range(sweeps):
        changed = False
        for i in range(n):
            c = absA[:, :, i].sum(axis=1)
            r = absA[:, i, :].sum(axis=1)
            with np.errstate(all="ignore"):
                f = np.exp2(np.round(0.5 * np.log2(r / c)))
                good = (c > 0) & (r > 0) & np.isfinite(f) & (f != 1.0)
                good &= c * f + r / f < 0.95 * (c + r)
            if not good.any():
                continue
            changed = True
            f = np.where(good, f, 1.0)
            absA[:, :, i] *= f[:, None]
            absA[:, i, :] /= f[:, None]
            A[:, :, i] *= f[:, None]
            A[:, i, :] /= f[:, None]
            d[:, i] *= f
        if not changed:
            break
    return A, d


def _modal_form(A0: np.ndarray, A1: np.ndarray, lo: float, hi: float) -> _Modal:
    """Modal form of the lines (see :class:`_Modal`), balanced; the base
    gain is the lower end of the range, or the middle or the upper end
    where the eigenvectors there are better conditioned."""
    m, n = A0.shape[0], A0.shape[-1]
    u, v, rank_ok = _rank_one(A1)
    mu = np.zeros((m, n), dtype=complex)
    r = np.zeros((m, n), dtype=complex)
    base = np.full(m, lo)
    cond = np.full(m, np.inf)
    todo = np.arange(m)
    for b in (lo, 0.5 * (lo + hi), hi):
        if todo.size == 0:
            break
        Ab, dd = _balance(A0[todo] + b * A1[todo])
        lam, V = np.linalg.eig(Ab)
        with np.errstate(all="ignore"):
            c = np.linalg.cond(V)
        good = np.isfinite(c) & (c < MODAL_COND_LIMIT)
        k = todo[good]
        if k.size:
            Vg = V[good]
            a = np.linalg.solve(Vg, (u[k] / dd[good])[:, :, None])[:, :, 0]
            bb = ((v[k] * dd[good])[:, None, :] @ Vg)[:, 0, :]
            mu[k], r[k], base[k], cond[k] = lam[good], a * bb, b, c[good]
        todo = todo[~good]
    ok = rank_ok & np.isfinite(cond)
    return _Modal(mu, r, base, cond, ok)


def _modal_G(mu: np.ndarray, r: np.ndarray, z: np.ndarray) -> np.ndarray:
    """``G(z) = sum_k r_k / (z - mu_k)`` for lines ``mu, r [S, n]`` at
    ``z [S, F]`` (:func:`loopcheck.engine.map_kernels.modal_response`)."""
    from loopcheck.engine.map_kernels import modal_response

    return modal_response(mu, r, z)


def _modal_crossing_gains(md: _Modal, lines: np.ndarray) -> list[np.ndarray]:
    """Candidate gains of the given lines where a closed-loop root is on the
    unit circle: ``y = base + 1/G(e^{jw})`` at the real crossings of G
    (sign changes of Im G bracketed on a frequency grid clustered around
    the poles near the circle, refined by regula falsi) and at z = +-1
    (D-decomposition in the frequency domain; matrix determinant lemma).
    Spurious values are harmless (every piece is classified by
    eigenvalues); a crossing pair narrower than the grid could be missed,
    which the caller's grid check detects."""
    m = lines.size
    mu, r, base = md.mu[lines], md.r[lines], md.base[lines]
    near = (np.abs(mu) > 0.5) & (mu.imag > 1e-12)
    ang = np.where(near, np.abs(np.angle(mu)), np.nan)
    grid = np.unique(np.concatenate([np.geomspace(1e-6, math.pi, _N_LOG), np.linspace(0.0, math.pi, 2 * _N_LIN + 1)[1:]]))
    offs = np.concatenate([1.0 - _CLUSTER[::-1], 1.0 + _CLUSTER])
    wc = (ang[:, :, None] * offs[None, None, :]).reshape(m, -1)
    wc = np.where(np.isfinite(wc) & (wc > 0) & (wc < math.pi), wc, math.pi)
    w = np.sort(np.concatenate([np.broadcast_to(grid, (m, grid.size)), wc], axis=1), axis=1)
    from loopcheck.engine.map_kernels import imag_ratio

    h = imag_ratio(mu, r, w)
    fin = np.isfinite(h)
    ii, jj, kk = _sign_brackets(h, fin)

    def fh(li, x):
        val = _modal_G(mu[li], r[li], np.exp(1j * np.asarray(x))[:, None])[:, 0]
        with np.errstate(all="ignore"):
            return val.imag / np.abs(val)

    wr = _illinois(fh, ii, w[ii, jj], w[ii, kk], h[ii, jj], h[ii, kk])
    val = _modal_G(mu[ii], r[ii], np.exp(1j * wr)[:, None])[:, 0]
    pts, gains = [], []
    with np.errstate(all="ignore"):
        ok = np.isfinite(val) & (np.abs(val.imag) <= 1e-7 * np.abs(val)) & (np.abs(val) > 0)
        pts.append(ii[ok])
        gains.append(base[ii[ok]] + 1.0 / val.real[ok])
        for z0 in (1.0, -1.0):
            g0 = _modal_G(mu, r, np.full((m, 1), z0, dtype=complex))[:, 0]
            ok0 = np.isfinite(g0) & (np.abs(g0) > 0)
            pts.append(np.nonzero(ok0)[0])
            gains.append(base[ok0] + 1.0 / g0.real[ok0])
    pts, gains = np.concatenate(pts), np.concatenate(gains)
    order = np.argsort(pts, kind="stable")
    split = np.searchsorted(pts[order], np.arange(m + 1))
    return [gains[order[split[i] : split[i + 1]]] for i in range(m)]


def _modal_radius(md: _Modal, lines: np.ndarray, A0, A1, y: np.ndarray, progress: ProgressFn | None = None):
    """Spectral radius ``[len(y), S]`` of the given lines at the grid
    values y (ascending), by following every closed-loop root in the
    product form of :class:`_Modal` (no polynomial coefficients; see
    :func:`loopcheck.engine.map_kernels.follow_roots`: predictor, Newton steps,
    trace checks). Where a line fails a check its roots are re-seeded from
    the eigenvalues of ``A0 + y A1`` at that grid value and followed on
    from there. Returns ``(radius, reseeded)``, the second the number of
    re-seeded grid values."""
    from loopcheck.engine.map_kernels import follow_roots

    mu, r, base = md.mu[lines], md.r[lines], md.base[lines]
    S = mu.shape[0]
    out = np.empty((y.size, S))
    todo = np.arange(S)
    start = np.zeros(S, dtype=np.int64)
    reseeded = 0
    while todo.size:
        seeds = np.linalg.eigvals(A0[lines[todo]] + y[start[todo]][:, None, None] * A1[lines[todo]])
        sub = np.empty((y.size, todo.size))
        fail = follow_roots(mu[todo], r[todo], base[todo], y, seeds, start[todo], sub)
        for col, i in enumerate(todo):
            hi = fail[col] if fail[col] >= 0 else y.size
            out[start[i] : hi, i] = sub[start[i] : hi, col]
        again = fail >= 0
        todo, start = todo[again], start.copy()
        start[todo] = fail[again]
        reseeded += todo.size
    if progress is not None:
        progress(1.0)
    return out, reseeded


def gain_lines(A0, A1, y, tol: float = TOLERANCE, progress: ProgressFn | None = None):
    """Stability along lines ``A(y) = A0 + y A1`` (``A0, A1 [m, n, n]``, A1 of
    rank one; y ascending grid of the gain).

    Returns ``(lines, radius)``: per line a :class:`_LineIntervals` with the
    exact boundaries (D-decomposition, see the module docstring) over
    [y[0], y[-1]], and the spectral radius ``[len(y), m]``.

    First the modal path (:func:`_modal_form`): candidate gains from the
    frequency response in modal form, each piece classified and each
    boundary confirmed by eigenvalues (:func:`_classify`), the radius
    followed in the product form (:func:`_modal_radius`). A line whose A1 is
    not rank one, whose eigenvector matrix is near-defective, whose exact
    intervals contradict the followed radius on the grid, or whose radius at
    the last grid value differs from the eigenvalues there, takes the
    polynomial path (:func:`_gain_lines_poly`, with its own slower exact
    path). ``lines[i].path`` says which path a line took."""
    lo, hi = float(y[0]), float(y[-1])
    m = A0.shape[0]
    lines: list = [None] * m
    radius = np.empty((y.size, m))
    md = _modal_form(A0, A1, lo, hi)
    fast = np.nonzero(md.ok)[0]
    if fast.size:
        fl, _ = _classify(A0[fast], A1[fast], _modal_crossing_gains(md, fast), lo, hi, tol)
        rad, _ = _modal_radius(md, fast, A0, A1, y, progress)
        flags = np.stack([ln.flags(y) for ln in fl], axis=1)
        bad = ((flags != (rad < 1.0 - tol)) & (np.abs(rad - 1.0) > 1e-7)).any(axis=0)
        r_end = _radius(A0[fast] + y[-1] * A1[fast])
        bad |= ~(np.abs(r_end - rad[-1]) <= 1e-9 * np.maximum(1.0, r_end))
        for col, i in enumerate(fast):
            if not bad[col]:
                fl[col].path = "modal"
                lines[i] = fl[col]
                radius[:, i] = rad[:, col]
    slow = np.array([i for i in range(m) if lines[i] is None], dtype=int)
    if slow.size:
        sl, srad = _gain_lines_poly(A0[slow], A1[slow], y, tol)
        for col, i in enumerate(slow):
            sl[col].path = "polynomial"
            lines[i] = sl[col]
            radius[:, i] = srad[:, col]
    return lines, radius


# ---------------------------------------------------------------------------
# the map
# ---------------------------------------------------------------------------

#: Points per chunk when every grid point needs its own model.
_CHUNK = 4096


def _line_matrices(design: Design, fixed: dict, gain: str, y_ref: float):
    """``A0, A1`` with ``A(y) = A0 + y*A1`` along the gain ``gain`` for the
    parameter arrays ``fixed`` (one entry per line)."""
    A0 = closed_loop_matrices(design, {**fixed, gain: 0.0})
    A1 = (closed_loop_matrices(design, {**fixed, gain: y_ref}) - A0) / y_ref
    return A0, A1


def _y_ref(values: np.ndarray) -> float:
    r = float(np.max(np.abs(values)))
    return r if r > 0 else 1.0


def _pointwise_radius(design: Design, xname, xv, yname, yv, progress: ProgressFn | None):
    """Spectral radius at every grid point ``[ny, nx]`` (state-space
    eigenvalues, chunked)."""
    X, Y = np.meshgrid(xv, yv)
    xs, ys = X.ravel(), Y.ravel()
    out = np.empty(xs.size)
    n_chunks = max(1, math.ceil(xs.size / _CHUNK))
    for s in range(0, xs.size, _CHUNK):
        sl = slice(s, s + _CHUNK)
        out[sl] = _radius(closed_loop_matrices(design, {xname: xs[sl], yname: ys[sl]}))
        if progress is not None:
            progress(1.0 / n_chunks)
    return out.reshape(X.shape)


def _physical_evaluator(design: Design, xname, xv, yname, tol):
    def evaluate(li, yy):
        yy = np.asarray(yy, dtype=float)
        out = np.empty(yy.size, dtype=bool)
        for s in range(0, yy.size, _CHUNK):
            sl = slice(s, s + _CHUNK)
            A = closed_loop_matrices(design, {xname: xv[li[sl]], yname: yy[sl]})
            out[sl] = _radius(A) < 1.0 - tol
        return out

    return evaluate


def _column_lines(design: Design, spec: MapSpec, xv, yv, tol, progress):
    """Stable y intervals per x value plus the grid verdict and radius
    ``[ny, nx]`` for any pair of axes."""
    xname, yname = spec.x.name, spec.y.name
    span = float(yv[-1] - yv[0])
    if spec.y.is_gain:
        A0, A1 = _line_matrices(design, {xname: xv}, yname, _y_ref(yv))
        lines, radius = gain_lines(A0, A1, yv, tol, progress)
        stable = np.stack([ln.flags(yv) for ln in lines], axis=1)
        return lines, stable, radius
    if spec.x.is_gain:
        A0, A1 = _line_matrices(design, {yname: yv}, xname, _y_ref(xv))
        rows, radius_t = gain_lines(A0, A1, xv, tol, progress)
        stable = np.stack([ln.flags(xv) for ln in rows], axis=0)
        radius = radius_t.T
    else:
        radius = _pointwise_radius(design, xname, xv, yname, yv, progress)
        stable = radius < 1.0 - tol
    evaluate = _physical_evaluator(design, xname, xv, yname, tol)
    lines = _refined_lines(evaluate, stable, yv, span)
    return lines, stable, radius


def _kernels() -> str:
    from loopcheck.engine.map_kernels import BACKEND, _JIT

    return BACKEND if _JIT is not None else "numpy"


def _varying_parameters(design: Design, spec: MapSpec, xv, yv) -> dict:
    X, Y = np.broadcast_arrays(xv[None, :], yv[:, None])
    prm = point_parameters(design, {spec.x.name: xv[None, :], spec.y.name: yv[:, None]})
    out = {}
    for k in ("fs", "C", "Cd", "L1", "L2", "Lg", "Kp", "Hi", "Kr", "Ki"):
        v = prm[k]
        if v.size and np.ptp(v) > 0:
            out[k] = v
    for ax, grid in ((spec.x, X), (spec.y, Y)):
        if ax.name == "fr/fs":
            out["fr/fs"] = grid
        elif ax.name not in out:
            out[ax.name] = grid
    return out


def compute_map(design: Design, spec: MapSpec, tol: float = TOLERANCE, progress: ProgressFn | None = None) -> StabilityMap:
    """Compute the stability map of ``design`` over ``spec``.

    ``progress(fraction)`` is called with increments that add up to about
    1 (for a progress bar); nothing is printed. See the module docstring
    for the method."""
    check_axes(spec.x.name, spec.y.name)
    for m in spec.metrics:
        if m not in METRICS:
            raise ValueError(f"unknown metric {m!r}; known: {', '.join(METRICS)}")
    xv, yv = spec.x.values(), spec.y.values()
    share = 0.5 if spec.metrics else 1.0
    prog = None if progress is None else (lambda f: progress(share * f))
    lines, stable, radius = _column_lines(design, spec, xv, yv, tol, prog)
    x0 = design_value(design, spec.x.name)
    y0 = design_value(design, spec.y.name)
    from loopcheck.design.design_line import design_line

    d_line = design_line(design, spec, tol)
    d_stable = d_line.stable
    d_interval = None
    if d_stable and d_line.containing is not None:
        d_interval = (d_line.containing.low, d_line.containing.high)
    s = design.sampling
    metrics = {}
    if spec.metrics:
        prog2 = None if progress is None else (lambda f: progress((1.0 - share) * f))
        metrics = grid_margins(design, spec, xv, yv, stable, prog2)
    lo, hi = float(yv[0]), float(yv[-1])
    return StabilityMap(
        name=design.name,
        x=spec.x,
        y=spec.y,
        x_values=xv,
        y_values=yv,
        stable=stable,
        spectral_radius=radius,
        intervals=tuple(ln.intervals(lo, hi) for ln in lines),
        boundaries=tuple(tuple(float(b) for b in ln.boundaries) for ln in lines),
        boundary_method=tuple(ln.method for ln in lines),
        boundary_path=tuple(ln.path for ln in lines),
        kernels=_kernels(),
        parameters=_varying_parameters(design, spec, xv, yv),
        design_x=float(x0),
        design_y=float(y0),
        design_stable=d_stable,
        design_interval=d_interval,
        design_line=d_line,
        critical_ratio=damping_critical_hz(design) / s.fs_hz,
        critical_formula=("1/(4 delay + 2)" if not is_filtered(design.control)
                          else f"numeric ({design.control.damping_filter.kind} damping filter)"),
        delay=s.delay,
        fs_hz=s.fs_hz,
        L1_H=design.filter.L1_H,
        Lg_H=design.grid.Lg_H,
        Lg_range_H=design.grid.Lg_range_H,
        tolerance=tol,
        **metrics,
    )


# ---------------------------------------------------------------------------
# margins per grid point
# ---------------------------------------------------------------------------

#: Points per chunk in the margin computation (bounds memory: chunk x ~1600
#: frequencies of complex numbers per array).
_MARGIN_CHUNK = 800
#: Base frequency grid [rad/sample]: log-spaced part and linear part.
_N_LOG, _N_LIN = 500, 1000
#: Local maxima of |1/(1+L)| refined per point.
_N_PEAKS = 4
#: Relative offsets of the extra frequencies around open-loop poles near the
#: unit circle (resonances, resonators).
_CLUSTER = np.geomspace(1e-9, 3e-2, 40)


class _LoopData:
    """Factored loop gain ``L(z) = Gc(z) * Gfb(z) / (1 + Hi * Gic(z))`` for a
    set of map points: plant responses in modal form per unique plant,
    controller as ``Kp + g * U(z)`` with the unit response U of the
    integrator or the resonators per unique sampling period (g = Ki or Kr).
    Nothing is multiplied out into a polynomial."""

    def __init__(self, design: Design, prm: dict):
        self.design = design
        keys = np.stack([prm[k] for k in ("L1", "C", "Cd", "L2", "Lg", "fs")], axis=1)
        ukeys, self.pidx = np.unique(keys, axis=0, return_inverse=True)
        self.pidx = self.pidx.ravel()
        uprm = {k: ukeys[:, i] for i, k in enumerate(("L1", "C", "Cd", "L2", "Lg", "fs"))}
        pl = _plants(design, uprm)
        self.plants = pl
        lam, V = np.linalg.eig(pl.Ad)
        with np.errstate(all="ignore"):
            cond = np.linalg.cond(V)
        self.direct = ~(cond < 1e10)
        Vinv = np.linalg.inv(np.where(self.direct[:, None, None], np.eye(V.shape[-1]), V))
        wb = (Vinv @ pl.Bd)[..., 0]
        self.lam = lam
        self.r_fb = (pl.c_fb @ V)[:, 0, :] * wb
        self.r_ic = (pl.c_ic @ V)[:, 0, :] * wb
        self.Kp = prm["Kp"]
        self.Hi = prm["Hi"]
        kind = design.control.kind
        self.g = prm["Kr"] if kind == "PR" else (prm["Ki"] if kind == "PI" else np.zeros_like(self.Kp))
        ufs, self.tidx = np.unique(prm["fs"], return_inverse=True)
        self.tidx = self.tidx.ravel()
        self.Ts_u = 1.0 / ufs
        self.Ts = 1.0 / prm["fs"]
        blocks = controller_blocks(design.control, design.grid.f_hz, self.Ts_u, Kp=0.0, Ki=1.0, Kr=1.0)
        self.blocks = [b for b in blocks[1:]]
        # each block of order <= 2 as (n1 z + n0) / (z^2 + a1 z + a0) + d
        # (first order: n1 / (z + a1) + d) per sampling period, from its own
        # realisation; nothing is multiplied across blocks. Arrays [T, blocks]
        self._unit_coef = self._block_coefficients()
        # controller poles (resonators, integrator) for the frequency clusters
        self.ctrl_angles = [np.abs(np.angle(np.linalg.eigvals(b.A))) for b in self.blocks if b.order > 0]

    def plant(self, pi, z, which: str):
        """Plant response at points ``pi [S]`` and ``z [S, F]``."""
        from loopcheck.engine.map_kernels import modal_response

        u = self.pidx[pi]
        res = self.r_fb if which == "fb" else self.r_ic
        out = modal_response(self.lam[u], res[u], np.broadcast_to(z, (u.size,) + z.shape[1:]))
        with np.errstate(all="ignore"):
            bad = self.direct[u]
            if bad.any():
                c = self.plants.c_fb if which == "fb" else self.plants.c_ic
                ub = u[bad]
                n = self.plants.Ad.shape[-1]
                M = z[bad][..., None, None] * np.eye(n) - self.plants.Ad[ub][:, None]
                x = np.linalg.solve(M, np.broadcast_to(self.plants.Bd[ub][:, None], M.shape[:-1] + (1,)))
                out[bad] = (c[ub][:, None] @ x)[..., 0, 0]
        return out

    def _block_coefficients(self):
        """Per sampling period and block, ``(n1, n0, a1, a0, d)`` with the
        block's response ``(n1 z + n0) / (z^2 + a1 z + a0) + d`` (a
        first-order block c b / (z - a) as ``(c b z) / (z^2 - a z)``, a
        static one as ``d``), from its own realisation; nothing is
        multiplied across blocks. Array ``[T, 5, blocks]``."""
        T = self.Ts_u.size
        nb = len(self.blocks)
        co = np.zeros((T, 5, nb))
        for j, b in enumerate(self.blocks):
            A, B, C, D = (np.broadcast_to(m, (T,) + m.shape[-2:]) for m in (b.A, b.B, b.C, b.D))
            co[:, 4, j] = D[:, 0, 0]
            if b.order == 1:
                co[:, 0, j] = C[:, 0, 0] * B[:, 0, 0]
                co[:, 2, j] = -A[:, 0, 0]
            elif b.order == 2:
                a11, a12, a21, a22 = A[:, 0, 0], A[:, 0, 1], A[:, 1, 0], A[:, 1, 1]
                b1, b2 = B[:, 0, 0], B[:, 1, 0]
                c1, c2 = C[:, 0, 0], C[:, 0, 1]
                co[:, 0, j] = c1 * b1 + c2 * b2
                co[:, 1, j] = -c1 * a22 * b1 + c1 * a12 * b2 + c2 * a21 * b1 - c2 * a11 * b2
                co[:, 2, j] = -(a11 + a22)
                co[:, 3, j] = a11 * a22 - a12 * a21
            elif b.order > 2:
                raise ValueError("controller blocks above second order are not supported here")
        return co

    def unit_controller(self, pi, z):
        """U(z) at points ``pi [S]``, ``z [S, F]`` (zero for a P controller)."""
        if not self.blocks:
            return np.zeros(z.shape, dtype=complex)
        from loopcheck.engine.map_kernels import block_sum

        return block_sum(self._unit_coef[self.tidx[pi]], z)

    def loop(self, pi, z):
        """L(z) at points ``pi [S]`` and ``z [S, F]``."""
        with np.errstate(all="ignore"):
            gc = self.Kp[pi][:, None] + self.g[pi][:, None] * self.unit_controller(pi, z)
            return gc * self.plant(pi, z, "fb") / (1.0 + self.Hi[pi][:, None] * self.plant(pi, z, "ic"))

    def loop_grid(self, pi, w: np.ndarray) -> np.ndarray:
        """L at points ``pi [S]`` on one shared frequency grid ``w [F]``
        [rad/sample], ``[S, F]``: plant and controller responses are
        evaluated once per unique plant and sampling period, then combined."""
        z = np.exp(1j * w)[None, :]
        up, inv_p = np.unique(self.pidx[pi], return_inverse=True)
        ut, inv_t = np.unique(self.tidx[pi], return_inverse=True)
        rep_p = np.array([pi[np.argmax(self.pidx[pi] == u)] for u in up])
        rep_t = np.array([pi[np.argmax(self.tidx[pi] == u)] for u in ut])
        zp = np.broadcast_to(z, (up.size, w.size))
        gfb = self.plant(rep_p, zp, "fb")[inv_p.ravel()]
        gic = self.plant(rep_p, zp, "ic")[inv_p.ravel()]
        unit = self.unit_controller(rep_t, np.broadcast_to(z, (ut.size, w.size)))[inv_t.ravel()]
        with np.errstate(all="ignore"):
            gc = self.Kp[pi][:, None] + self.g[pi][:, None] * unit
            return gc * gfb / (1.0 + self.Hi[pi][:, None] * gic)

    def special_angles(self, pi) -> np.ndarray:
        """Angles [rad/sample] of open-loop poles near the unit circle per
        point ``[S, K]`` (NaN-padded): the damping loop's poles and the
        controller's."""
        u = self.pidx[pi]
        pl = self.plants
        Ai = pl.Ad[u] - self.Hi[pi][:, None, None] * (pl.Bd[u] @ pl.c_ic[u])
        p = np.linalg.eigvals(Ai)
        keep = (np.abs(p) > 0.8) & (p.imag > 1e-12)
        ang = np.where(keep, np.abs(np.angle(p)), np.nan)
        parts = [ang]
        for ca in self.ctrl_angles:
            parts.append(np.where(ca[self.tidx[pi]] > 1e-12, ca[self.tidx[pi]], np.nan))
        return np.concatenate(parts, axis=1)


def _base_grid(fs_max: float) -> np.ndarray:
    w_lo = 2.0 * math.pi * 0.5 / fs_max
    return np.unique(np.concatenate([np.geomspace(w_lo, math.pi, _N_LOG), np.linspace(0.0, math.pi, _N_LIN + 1)[1:]]))


def _sign_brackets(h: np.ndarray, fin: np.ndarray):
    """Brackets of the zeros of sampled functions ``h [S, F]`` (finite where
    ``fin``): ``(row, left, right)`` index arrays of the sign changes between
    neighbours, plus the samples that are exactly zero (left = right), which
    a sign test alone would miss (a crossing exactly on a grid point)."""
    ii, jj = np.nonzero((np.sign(h[:, :-1]) * np.sign(h[:, 1:]) < 0) & fin[:, :-1] & fin[:, 1:])
    i0, j0 = np.nonzero((h == 0) & fin)
    return np.concatenate([ii, i0]), np.concatenate([jj, j0]), np.concatenate([jj + 1, j0])


def _illinois(f, pts, a, b, fa, fb, iters: int = 40, xtol: float = 1e-13):
    """Vectorised regula falsi (Illinois variant) for sign changes of
    ``f(pts, w)`` in [a, b]; returns the roots."""
    a, b, fa, fb = (np.array(v, dtype=float) for v in (a, b, fa, fb))
    for _ in range(iters):
        if a.size == 0:
            break
        with np.errstate(all="ignore"):
            c = b - fb * (b - a) / (fb - fa)
        bad = ~np.isfinite(c) | (c <= np.minimum(a, b)) | (c >= np.maximum(a, b))
        c = np.where(bad, 0.5 * (a + b), c)
        fc = f(pts, c)
        same = np.sign(fc) == np.sign(fb)
        # fc on the side of b: keep a, halve fa (Illinois); else a <- b
        fa = np.where(same, 0.5 * fa, fb)
        a = np.where(same, a, b)
        b, fb = c, fc
        if np.all((np.abs(b - a) <= xtol * np.maximum(1.0, np.abs(b))) | (fc == 0)):
            break
    return b


def _wrap_deg(x):
    y = (x + 180.0) % 360.0 - 180.0
    return np.where(y == -180.0, 180.0, y)


def _margins_chunk(data: _LoopData, pi: np.ndarray, w_base: np.ndarray):
    """Margins of the points ``pi``: phase margin [deg], gain-margin factors
    (lower, upper), sensitivity peak and its angle [rad/sample]."""
    from loopcheck.engine.margins import POLE_AT_POINT_TOL  # (scipy.optimize only when margins are asked for)

    S = pi.size
    Lb = data.loop_grid(pi, w_base)
    ang = data.special_angles(pi)
    wc = (ang[:, :, None] * np.concatenate([1.0 - _CLUSTER[::-1], 1.0 + _CLUSTER])[None, None, :]).reshape(S, -1)
    wc = np.where(np.isfinite(wc) & (wc > 0) & (wc < math.pi), wc, math.pi)
    Lc = data.loop(pi, np.exp(1j * wc))
    w = np.concatenate([np.broadcast_to(w_base, (S, w_base.size)), wc], axis=1)
    L = np.concatenate([Lb, Lc], axis=1)
    order = np.argsort(w, axis=1, kind="stable")
    w = np.take_along_axis(w, order, axis=1)
    L = np.take_along_axis(L, order, axis=1)
    rows = np.arange(S)

    def L1(p, x):
        return data.loop(pi[p], np.exp(1j * np.asarray(x))[:, None])[:, 0]

    with np.errstate(all="ignore"):
        absL = np.abs(L)
        # gain crossovers |L| = 1 and the phase margin there
        g = np.log(absL)
        fin = np.isfinite(g)
        ii, jj, kk = _sign_brackets(g, fin)
        wx = _illinois(lambda p, x: np.log(np.abs(L1(p, x))), ii, w[ii, jj], w[ii, kk], g[ii, jj], g[ii, kk])
        v = L1(ii, wx)
        pm = np.abs(_wrap_deg(180.0 + np.degrees(np.angle(v))))
        pm_min = np.full(S, np.inf)
        np.minimum.at(pm_min, ii, pm)
        pm_min[~np.isfinite(pm_min)] = np.nan
        # real-axis crossings with L < 0: controller factors k = -1/L
        h = L.imag / absL
        fin = np.isfinite(h)
        ii, jj, kk = _sign_brackets(h, fin)

        def fh(p, x):
            val = L1(p, x)
            return val.imag / np.abs(val)

        wr = _illinois(fh, ii, w[ii, jj], w[ii, kk], h[ii, jj], h[ii, kk])
        v = L1(ii, wr)
        real = np.isfinite(v) & (np.abs(v.imag) <= 1e-7 * np.abs(v)) & (v.real < 0)
        k_pt = [ii[real]]
        k_val = [-1.0 / v.real[real]]
        # z = +-1 are real-axis points, unless an open-loop pole sits there
        # (the lossless plant's integrator at z = 1): L is infinite there
        # even when rounding makes it merely huge
        plant_poles = data.lam[data.pidx[pi]]
        for z0 in (-1.0, 1.0):
            v0 = L1(rows, np.full(S, math.acos(z0)))
            pole = np.any(np.abs(plant_poles - z0) < POLE_AT_POINT_TOL, axis=1)
            ok = np.isfinite(v0) & ~pole & (np.abs(v0) > 0) & (v0.real < 0)
            k_pt.append(rows[ok])
            k_val.append(-1.0 / v0.real[ok])
        kp = np.concatenate(k_pt)
        kv = np.concatenate(k_val)
        lower = np.zeros(S)
        upper = np.full(S, np.inf)
        below = kv < 1.0
        np.maximum.at(lower, kp[below], kv[below])
        np.minimum.at(upper, kp[~below], kv[~below])
        # sensitivity peak: golden-section search around the largest few
        # local maxima on the grid (a narrow peak beside a resonator can sit
        # between grid points, below another local maximum)
        Sv = np.abs(1.0 / (1.0 + L))
        Sv[~np.isfinite(Sv)] = 0.0
        F = Sv.shape[1]
        peak = np.zeros_like(Sv, dtype=bool)
        peak[:, 1:-1] = (Sv[:, 1:-1] >= Sv[:, :-2]) & (Sv[:, 1:-1] >= Sv[:, 2:])
        peak[:, 0] = Sv[:, 0] >= Sv[:, 1]
        peak[:, -1] = Sv[:, -1] >= Sv[:, -2]
        cand = np.argsort(np.where(peak, -Sv, np.inf), axis=1)[:, :_N_PEAKS]
        rr = np.repeat(rows, cand.shape[1])
        jj = cand.ravel()
        lo = w[rr, np.maximum(jj - 1, 0)]
        hi = w[rr, np.minimum(jj + 1, F - 1)]
        best_w = w[rr, jj]
        best = Sv[rr, jj]
        gr = (math.sqrt(5.0) - 1.0) / 2.0
        a, b = lo.copy(), hi.copy()
        c = b - gr * (b - a)
        d = a + gr * (b - a)

        def fs_(x):
            val = np.abs(1.0 / (1.0 + L1(rr, x)))
            return np.where(np.isfinite(val), val, 0.0)

        fc, fd = fs_(c), fs_(d)
        for _ in range(40):
            left = fc > fd  # the maximum lies in [a, d]
            a, b = np.where(left, a, c), np.where(left, d, b)
            x = np.where(left, b - gr * (b - a), a + gr * (b - a))
            fx = fs_(x)
            c, d, fc, fd = (
                np.where(left, x, d),
                np.where(left, c, x),
                np.where(left, fx, fd),
                np.where(left, fc, fx),
            )
        xm = 0.5 * (a + b)
        fm = fs_(xm)
        take = fm > best
        best = np.where(take, fm, best).reshape(S, -1)
        best_w = np.where(take, xm, best_w).reshape(S, -1)
        k = np.argmax(best, axis=1)
        best, best_w = best[rows, k], best_w[rows, k]
    return pm_min, lower, upper, best, best_w


def grid_margins(design: Design, spec: MapSpec, xv, yv, stable, progress: ProgressFn | None = None) -> dict:
    """Phase margin, gain-margin interval and sensitivity peak at every
    stable grid point (NaN elsewhere), vectorised.

    The loop is broken at the current controller with the damping loop
    closed, as in :func:`loopcheck.engine.analysis.analyse`: crossovers |L| = 1 and
    real-axis crossings of L are bracketed on a shared frequency grid plus
    frequencies clustered around the open-loop poles near the unit circle,
    then refined by regula falsi; the phase margin is the smallest
    |180 deg + phase| over the crossovers; the gain-margin interval is
    bounded by the nearest controller factors k = -1/L (L real, negative,
    the Nyquist frequency and a finite L(1) included) below and above 1;
    the sensitivity peak is max |1/(1+L)|, refined by golden-section search.
    Returns arrays ``[ny, nx]`` keyed like the :class:`StabilityMap`
    fields."""
    X, Y = np.meshgrid(xv, yv)
    shape = X.shape
    keys = ("phase_margin_deg", "gain_margin_lower", "gain_margin_upper", "sensitivity_peak", "sensitivity_peak_hz")
    out = {k: np.full(shape, np.nan) for k in keys}
    idx = np.flatnonzero(stable)
    if idx.size == 0:
        if progress is not None:
            progress(1.0)
        return {k: out[k] for k in keys if _metric_of(k) in spec.metrics}
    prm = point_parameters(design, {spec.x.name: X.ravel()[idx], spec.y.name: Y.ravel()[idx]})
    data = _LoopData(design, prm)
    w_base = _base_grid(float(np.max(prm["fs"])))
    res = [np.empty(idx.size) for _ in range(5)]
    n_chunks = max(1, math.ceil(idx.size / _MARGIN_CHUNK))
    for s in range(0, idx.size, _MARGIN_CHUNK):
        pi = np.arange(s, min(s + _MARGIN_CHUNK, idx.size))
        pm, lo, hi, sp, spw = _margins_chunk(data, pi, w_base)
        res[0][pi], res[1][pi], res[2][pi], res[3][pi] = pm, lo, hi, sp
        res[4][pi] = spw / (2.0 * math.pi * data.Ts[pi])
        if progress is not None:
            progress(1.0 / n_chunks)
    for k, r in zip(keys, res):
        flat = out[k].ravel()
        flat[idx] = r
        out[k] = flat.reshape(shape)
    return {k: out[k] for k in keys if _metric_of(k) in spec.metrics}


def _metric_of(key: str) -> str:
    if key.startswith("phase"):
        return "phase-margin"
    if key.startswith("gain"):
        return "gain-margin"
    return "sensitivity"
