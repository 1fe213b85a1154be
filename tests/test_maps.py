"""Stability maps (loopcheck.design.maps) checked against the outside world.

Oracles used here: scipy.linalg.expm and scipy.signal.cont2discrete
(reference libraries), numpy's polynomial-from-roots, sympy derivations of
the z-domain damping loop with the Jury stability test, the published
region boundaries at the critical frequency, and the single-design
analysis that ``loopcheck check`` prints. All designs are invented.
"""

import math

import numpy as np
import pytest
import sympy as sp
from scipy.linalg import expm
from scipy.signal import cont2discrete

from loopcheck.design import maps
from loopcheck.engine.analysis import analyse
from loopcheck.engine.discretize import discretize_plant
from loopcheck.engine.expm import expm_batched
from loopcheck.engine.model import Control, Design, Filter, Grid, PassiveDamping, Sampling
from loopcheck.engine.plant import OUTPUT_IC, lcl_state_space

# invented filter used by several checks
L1, L2, FS = 1.9e-3, 0.7e-3, 12e3


def _design(feedback="grid", kind="P", delay=1.0, Kp_norm=0.002, Hi=0.0, C=5e-6, **control):
    """Lossless invented design; Kp given as Kp*Ts/(L1+L2)."""
    Kp = Kp_norm * (L1 + L2) * FS
    return Design(
        Filter(L1, C, L2),
        Grid(50.0, 0.0),
        Sampling(FS, delay),
        Control(feedback, kind, Kp_V_per_A=Kp, Hi_V_per_A=Hi, **control),
        name="invented",
    )


# ---------------------------------------------------------------------------
# building blocks against reference libraries
# ---------------------------------------------------------------------------


def test_batched_expm_matches_scipy():
    # reference: scipy.linalg.expm (general-purpose library); matrices with
    # norms from 1e-3 to ~60 exercise zero to several squarings
    rng = np.random.default_rng(7)
    M = rng.standard_normal((40, 5, 5)) * np.geomspace(1e-3, 12.0, 40)[:, None, None]
    E = expm_batched(M)
    for m, e in zip(M, E):
        ref = expm(m)
        assert np.max(np.abs(e - ref)) <= 1e-12 * max(1.0, np.max(np.abs(ref)))


def test_batched_zoh_matches_scipy_and_engine():
    # reference: scipy.signal.cont2discrete(method="zoh") for delay 0; the
    # engine's discretize_plant for fractional delays (same model, other code)
    p = lcl_state_space(np.array([1.9e-3, 1.2e-3]), np.array([5e-6, 12e-6]), 0.7e-3, 0.03, 0.01)
    Ts = 1.0 / FS
    d0 = discretize_plant(p.A, p.B, p.C, Ts, 0.0)
    Ad, Bd = d0.A, d0.B
    for k in range(2):
        ref = cont2discrete((p.A[k], p.B[k], p.C[k], np.zeros((3, 1))), Ts, method="zoh")
        np.testing.assert_allclose(Ad[k], ref[0], rtol=0, atol=1e-13)
        np.testing.assert_allclose(Bd[k], ref[1], rtol=0, atol=1e-13)
    for delay in (0.25, 0.5, 1.0):
        # batched call against one-at-a-time calls (same model)
        d = discretize_plant(p.A, p.B, p.C, Ts, delay)
        for k in range(2):
            ref = discretize_plant(p.A[k], p.B[k], p.C[k], Ts, delay)
            np.testing.assert_allclose(d.A[k], ref.A, rtol=0, atol=1e-13)
            np.testing.assert_allclose(d.B[k], ref.B, rtol=0, atol=1e-13)


def test_characteristic_polynomial_is_affine_and_matches_numpy():
    # reference: numpy.poly of numpy.linalg.eigvals; the affine form
    # p0 + y p1 must reproduce det(zI - A0 - y A1) at any y (rank-one A1)
    d = _design(kind="PR", Kp_norm=0.05, Hi=8.0, Kr=500.0)
    x = np.array([0.07, 0.21, 0.33])
    A0, A1 = maps._line_matrices(d, {"fr/fs": x}, "Hi", 10.0)
    p0, p1 = maps.char_polys(A0, A1)
    for y in (-3.0, 0.0, 7.5, 31.0):
        for i in range(3):
            ref = np.poly(np.linalg.eigvals(A0[i] + y * A1[i]))[::-1].real
            np.testing.assert_allclose(p0[i] + y * p1[i], ref, rtol=0, atol=1e-10 * np.abs(ref).max())


def test_tracked_radius_matches_eigenvalues():
    # reference: numpy.linalg.eigvals on every point of a small map
    d = _design(kind="PR", Kp_norm=0.06, Hi=10.0, Kr=800.0)
    spec = maps.MapSpec(maps.Axis("fr/fs", 0.03, 0.45, 40), maps.Axis("Hi", -10.0, 60.0, 90))
    m = maps.compute_map(d, spec)
    X, Y = np.meshgrid(m.x_values, m.y_values)
    A = maps.closed_loop_matrices(d, {"fr/fs": X.ravel(), "Hi": Y.ravel()})
    ref = np.abs(np.linalg.eigvals(A)).max(axis=-1).reshape(X.shape)
    np.testing.assert_allclose(m.spectral_radius, ref, rtol=0, atol=1e-9)
    # the exact intervals agree with the eigenvalue grid (nothing lies on a boundary here)
    assert np.array_equal(m.stable, ref < 1.0 - m.tolerance)


# ---------------------------------------------------------------------------
# the damping loop alone: exact bound from the z-domain model and Jury's test
# ---------------------------------------------------------------------------


def _jury_interval_for_damping_loop(theta: float):
    """Stable range of k = Hi*sin(theta)/(wr*L1) for the damping loop alone,
    derived here with sympy.

    Plant ic/vi = (1/L1) s/(s^2 + wr^2) (Kirchhoff, LCL filter, common
    practice). ZOH: G(z) = (1 - 1/z) Z{(1/L1)/(s^2 + wr^2)} where the
    z-transform of sin(wr k Ts) is summed below as two geometric series;
    one sample of computation delay multiplies by 1/z. Closing vi = -Hi*ic
    gives the characteristic polynomial, and the Jury conditions for a
    cubic (E. I. Jury, "Theory and Application of the z-Transform Method",
    Wiley, 1964; K. Ogata, "Discrete-Time Control Systems", 2nd ed.,
    Prentice Hall, 1995, sec. 4-3; from memory) give the range of k.
    Region picture: Parker, McGrath and Holmes, "Regions
    of Active Damping Control for LCL Filters", IEEE Trans. Ind. Appl.,
    vol. 50, no. 1, pp. 424-432, 2014 (from memory)."""
    k, th = sp.symbols("k theta", real=True)
    zc = sp.Symbol("zc")
    # sum_{n>=0} sin(n th) zc^-n as two geometric series in e^{+-j th}/zc
    e = sp.exp(sp.I * th)
    num, den = sp.fraction(sp.together((1 / (1 - e / zc) - 1 / (1 - 1 / (e * zc))) / (2 * sp.I)))
    num = sp.expand(sp.expand(num / e).rewrite(sp.cos))
    den = sp.expand(sp.expand(den / e).rewrite(sp.cos))
    zsin = sp.cancel(sp.simplify(num / den))
    # G_ic(z) * wr * L1 = (1 - 1/z) * Z{sin}; with the delay, times 1/z
    g = sp.simplify((1 - 1 / zc) * zsin / zc)
    num, den = sp.fraction(sp.together(g))
    # 1 + k' G = 0 with k' = Hi/(wr L1) * ... ; normalise so that k multiplies sin(theta)
    charpoly = sp.Poly(sp.expand(den + (k / sp.sin(th)) * num), zc)
    a = [sp.simplify(c) for c in charpoly.all_coeffs()]  # highest power first
    a = [sp.simplify(c / a[0]) for c in a]
    assert len(a) == 4  # a cubic
    a3, a2, a1, a0 = a
    P = lambda v: a3 * v**3 + a2 * v**2 + a1 * v + a0  # noqa: E731
    b0 = a0**2 - a3**2
    b2 = a0 * a2 - a3 * a1
    conds = [P(1) > 0, -P(-1) > 0, sp.Abs(a0) < a3, sp.Abs(b0) > sp.Abs(b2)]
    conds = [c.subs(th, theta) for c in conds]
    region = sp.S.Reals
    for c in conds:
        if c is sp.true:
            continue
        region = region.intersect(sp.solve_univariate_inequality(c, k, relational=False))
    return region


@pytest.mark.parametrize("ratio", [0.03, 0.08, 0.12, 0.15, 0.2, 0.3, 0.42])
def test_damping_loop_bound_matches_jury(ratio):
    theta = 2.0 * math.pi * ratio
    region = _jury_interval_for_damping_loop(theta)
    assert isinstance(region, sp.Interval)
    k_lo, k_hi = float(region.start), float(region.end)
    # closed forms read off the Jury conditions: 0 < k < 2c - 1 below the
    # critical ratio 1/6 (positive damping gain, Parker et al. 2014, from
    # memory); above it the sign reverses, max(2c - 1, -1 - c) < k < 0, where
    # the z = -1 condition -P(-1) > 0 takes over from 2c - 1 above fr/fs = 1/4
    c = math.cos(theta)
    expected = (0.0, 2 * c - 1) if ratio < 1 / 6 else (max(2 * c - 1, -1 - c), 0.0)
    assert sorted((k_lo, k_hi)) == pytest.approx(sorted(expected), abs=1e-12)
    # our solver on the engine's exact discrete plant: damping loop alone,
    # reduced to the part the capacitor current observes (the lossless
    # filter keeps an unobservable pole at z = 1)
    wr = theta * FS
    C = (L1 + L2) / (L1 * L2 * wr**2)
    p = lcl_state_space(L1, C, L2)
    dp = discretize_plant(p.A, p.B, p.C, 1.0 / FS, 1.0)
    A, B, cic = dp.A, dp.B, dp.C[OUTPUT_IC : OUTPUT_IC + 1, :]
    O = np.vstack([cic @ np.linalg.matrix_power(A, i) for i in range(4)])
    _, s, Vt = np.linalg.svd(O)
    Q = Vt[: int(np.sum(s > 1e-9 * s[0]))]
    assert Q.shape[0] == 3
    Ar, Br, cr = Q @ A @ Q.T, Q @ B, cic @ Q.T
    to_k = math.sin(theta) / (wr * L1)  # Hi -> k
    span = 4.0 / to_k
    y = np.linspace(-span, span, 7)  # deliberately coarse: boundaries must not depend on it
    lines, _ = maps.gain_lines(Ar[None], (-Br @ cr)[None], y)
    ivs = lines[0].intervals(y[0], y[-1])
    assert len(ivs) == 1
    lo, hi = (v * to_k for v in ivs[0])
    assert (lo, hi) == pytest.approx(sorted((k_lo, k_hi)), abs=1e-9)


def test_damping_loop_has_no_stable_gain_at_the_critical_ratio():
    # at fr/fs = 1/6 the Jury range collapses: 2c - 1 = 0 (Parker et al. 2014, from memory)
    region = _jury_interval_for_damping_loop(2.0 * math.pi / 6.0)
    assert region.is_empty or (region.measure == 0)


# ---------------------------------------------------------------------------
# published region boundaries on full maps
# ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    "feedback, delay, critical, left_stable",
    [
        # grid-current feedback: stable without damping only above fs/6 with one
        # sample of delay (Parker, McGrath & Holmes 2014; Wang, Blaabjerg & Loh,
        # IEEE Trans. Power Electron., vol. 31, no. 1, pp. 213-223, 2016; from memory)
        ("grid", 1.0, 1.0 / 6.0, False),
        # half a sample of computation delay moves the ratio to 1/4 (Pan, Ruan, Bao,
        # Li & Wang, IEEE Trans. Power Electron., vol. 29, no. 7, pp. 3414-3427,
        # 2014; from memory)
        ("grid", 0.5, 0.25, False),
        # converter-current feedback is the mirror case (Dannehl, Wessels & Fuchs,
        # IEEE Trans. Ind. Electron., vol. 56, no. 2, pp. 380-388, 2009; from memory)
        ("converter", 1.0, 1.0 / 6.0, True),
        ("converter", 0.5, 0.25, True),
    ],
)
def test_undamped_map_boundary_at_critical_ratio(feedback, delay, critical, left_stable):
    d = _design(feedback=feedback, delay=delay, Kp_norm=0.001)
    kp = d.control.Kp_V_per_A
    spec = maps.MapSpec(maps.Axis("fr/fs", critical - 0.03, critical + 0.03, 601), maps.Axis("Kp", kp, 2 * kp, 4))
    m = maps.compute_map(d, spec)
    row = m.stable[0]  # the smallest gain
    flips = m.x_values[1:][row[1:] != row[:-1]]
    assert row[0] == left_stable and row[-1] != left_stable
    assert flips.size == 1
    # a small controller gain shifts the boundary by a few 1e-4 (it tends
    # to the critical ratio as Kp -> 0)
    assert abs(flips[0] - critical) < 5e-4
    assert m.critical_ratio == pytest.approx(critical)


def test_capacitor_current_band_below_critical_and_small_gains_above():
    # Below fs/6 the stable Hi band runs from Kp*L1/(L1+L2) (where the
    # resonant residue of Kp*G_i2 + Hi*G_ic changes sign; partial fractions
    # of the LCL transfer functions, common practice) up to about the exact
    # bound of the damping loop alone (derived above with sympy/Jury); above
    # fs/6 only 0 <= Hi < Kp*L1/(L1+L2) is stable (Parker et al. 2014; Pan
    # et al. 2014; from memory).
    kn = 0.002
    d = _design(Kp_norm=kn)
    spec = maps.MapSpec(maps.Axis("fr/fs", 0.05, 0.4, 8), maps.Axis("Hi", 0.0, 1.5 * L1 * FS, 31))
    m = maps.compute_map(d, spec)
    norm = L1 * FS  # Hi -> Hi*Ts/L1
    lower = d.control.Kp_V_per_A * L1 / (L1 + L2)
    for x, ivs in zip(m.x_values, m.intervals):
        assert len(ivs) == 1
        a, b = ivs[0]
        th = 2 * math.pi * x
        if x < 1 / 6:
            inner = (2 * math.cos(th) - 1) * th / math.sin(th)  # k_max in Hi*Ts/L1
            assert a == pytest.approx(lower, rel=1e-8)
            # the small controller gain perturbs the damping-loop bound by the
            # order of its own normalised value
            assert abs(b / norm - inner) <= 2 * kn
        else:
            assert a == 0.0
            assert b == pytest.approx(lower, rel=1e-8)


# ---------------------------------------------------------------------------
# every map agrees with the single-design analysis (the `check` verdict)
# ---------------------------------------------------------------------------

_PR = dict(kind="PR", Kp_norm=0.06, Hi=12.0, Kr=700.0)


@pytest.mark.parametrize(
    "design_kwargs, x, y",
    [
        (_PR, maps.Axis("fr/fs", 0.002, 0.49, 60), maps.Axis("Hi", -20.0, 70.0, 50)),
        (dict(kind="PI", Kp_norm=0.05, Hi=10.0, Ki_V_per_As=3000.0, delay=0.6), maps.Axis("Kp", 1.0, 40.0, 30), maps.Axis("Lg", 0.0, 4e-3, 25)),
        (_PR, maps.Axis("Lg", 0.0, 4e-3, 20), maps.Axis("fs", 6e3, 24e3, 20)),
        (dict(_PR, feedback="converter", Hi=0.0), maps.Axis("fs", 6e3, 30e3, 25, True), maps.Axis("Kp", 0.5, 40.0, 30)),
        (_PR, maps.Axis("L2", 0.2e-3, 3e-3, 25), maps.Axis("Kr", 0.0, 5000.0, 30)),
        (_PR, maps.Axis("C", 2e-6, 30e-6, 25), maps.Axis("L1", 0.5e-3, 4e-3, 20)),
    ],
)
def test_random_points_agree_with_check(design_kwargs, x, y):
    d = _design(**design_kwargs)
    m = maps.compute_map(d, maps.MapSpec(x, y))
    rng = np.random.default_rng(11)
    span = m.y_values[-1] - m.y_values[0]
    checked = 0
    for _ in range(8):
        i, j = rng.integers(m.x_values.size), rng.integers(m.y_values.size)
        a = analyse(maps.point_design(d, {x.name: m.x_values[i], y.name: m.y_values[j]}))
        assert a.spectral_radius == pytest.approx(m.spectral_radius[j, i], abs=1e-9)
        near = any(abs(b - m.y_values[j]) < 1e-3 * span for b in m.boundaries[i])
        if not near:
            assert a.stable == bool(m.stable[j, i])
            checked += 1
    assert checked >= 4


def test_boundaries_are_exact_whatever_the_grid():
    # the same column with 3 or 400 y values gives the same boundaries, and
    # eigenvalues just beside each boundary straddle the unit circle
    d = _design(**_PR)
    x = maps.Axis("fr/fs", 0.06, 0.3, 5)
    coarse = maps.compute_map(d, maps.MapSpec(x, maps.Axis("Hi", -20.0, 70.0, 3)))
    fine = maps.compute_map(d, maps.MapSpec(x, maps.Axis("Hi", -20.0, 70.0, 400)))
    span = 90.0
    assert any(len(b) for b in coarse.boundaries)
    for bc, bf, xv in zip(coarse.boundaries, fine.boundaries, coarse.x_values):
        assert len(bc) == len(bf)
        for u, v in zip(bc, bf):
            assert abs(u - v) <= 1e-7 * span
            A = maps.closed_loop_matrices(d, {"fr/fs": np.full(2, xv), "Hi": np.array([u - 1e-5 * span, u + 1e-5 * span])})
            r = np.abs(np.linalg.eigvals(A)).max(axis=-1)
            assert (r[0] < 1.0) != (r[1] < 1.0)
    assert set(coarse.boundary_method) == {"exact"}


def test_ill_conditioned_polynomial_falls_back_to_eigenvalues():
    # 13th-harmonic PR at 50 kHz: order 18; roots of the characteristic
    # polynomial cluster near z = 1, so the map must take the slower path
    # and still agree with eigenvalues at every grid point
    l1, l2, fs = 0.9e-3, 0.35e-3, 50e3
    d = Design(
        Filter(l1, 3e-6, l2, 0.02, 0.01),
        Grid(50.0, 0.0),
        Sampling(fs, 1.0),
        Control("grid", "PR", Kp_V_per_A=0.06 * (l1 + l2) * fs, Kr=400.0, harmonics=(3, 5, 7, 9, 11, 13), Hi_V_per_A=0.3 * l1 * fs),
    )
    spec = maps.MapSpec(maps.Axis("fr/fs", 0.002, 0.49, 40), maps.Axis("Hi", -0.5 * l1 * fs, 1.5 * l1 * fs, 40))
    m = maps.compute_map(d, spec)
    X, Y = np.meshgrid(m.x_values, m.y_values)
    A = maps.closed_loop_matrices(d, {"fr/fs": X.ravel(), "Hi": Y.ravel()})
    ref = np.abs(np.linalg.eigvals(A)).max(axis=-1).reshape(X.shape)
    np.testing.assert_allclose(m.spectral_radius, ref, rtol=0, atol=1e-9)
    assert np.array_equal(m.stable, ref < 1.0 - m.tolerance)
    # boundaries still exact (candidates from the frequency response), each
    # one straddled by eigenvalues just beside it
    assert set(m.boundary_method) == {"exact"}
    span = spec.y.stop - spec.y.start
    xs, ys = [], []
    for x, bnd in zip(m.x_values, m.boundaries):
        for b in bnd:
            xs += [x, x]
            ys += [b - 1e-5 * span, b + 1e-5 * span]
    assert xs
    A = maps.closed_loop_matrices(d, {"fr/fs": np.array(xs), "Hi": np.array(ys)})
    r = np.abs(np.linalg.eigvals(A)).max(axis=-1).reshape(-1, 2)
    assert np.all((r[:, 0] < 1.0) != (r[:, 1] < 1.0))


# ---------------------------------------------------------------------------
# margins per grid point against the single-design analysis
# ---------------------------------------------------------------------------


def test_grid_margins_agree_with_analysis():
    d = _design(kind="PR", Kp_norm=0.05, Hi=10.0, Kr=600.0)
    spec = maps.MapSpec(maps.Axis("fr/fs", 0.05, 0.4, 14), maps.Axis("Hi", 0.0, 40.0, 14), maps.METRICS)
    m = maps.compute_map(d, spec)
    assert np.all(np.isnan(m.phase_margin_deg[~m.stable]))
    st = np.argwhere(m.stable)
    assert len(st) > 10
    rng = np.random.default_rng(5)
    for k in rng.choice(len(st), 6, replace=False):
        j, i = st[k]
        a = analyse(maps.point_design(d, {"fr/fs": m.x_values[i], "Hi": m.y_values[j]}))
        assert a.stable
        assert m.phase_margin_deg[j, i] == pytest.approx(a.phase_margin_deg, abs=1e-6)
        gm = a.gain_margin
        assert m.gain_margin_lower[j, i] == pytest.approx(gm.lower_factor, rel=1e-7, abs=1e-12)
        if gm.upper_factor is None:
            assert np.isinf(m.gain_margin_upper[j, i])
        else:
            assert m.gain_margin_upper[j, i] == pytest.approx(gm.upper_factor, rel=1e-7)
        assert m.sensitivity_peak[j, i] == pytest.approx(a.sensitivity_peak.value, rel=1e-6)
        assert m.sensitivity_peak_hz[j, i] == pytest.approx(a.sensitivity_peak.frequency_hz, rel=1e-4)


# ---------------------------------------------------------------------------
# parameters of map points
# ---------------------------------------------------------------------------


def test_fr_fs_axis_scales_capacitance_only():
    # the resonance formula of the lossless LCL (Liserre, Blaabjerg & Hansen,
    # IEEE Trans. Ind. Appl., vol. 41, no. 5, 2005) recovers the axis value;
    # inductors and gains stay fixed, so Hi*Ts/L1 is constant along the axis
    d = Design(
        Filter(L1, 5e-6, L2, damping=PassiveDamping("split-RC", Rd_ohm=4.0, Cd_F=2e-6)),
        Grid(50.0, 0.8e-3),
        Sampling(FS, 1.0),
        Control("grid", "PR", Kp_V_per_A=9.0, Kr=400.0, Hi_V_per_A=7.0),
    )
    ratios = np.array([0.01, 0.1, 0.3])
    p = maps.point_parameters(d, {"fr/fs": ratios})
    Lt = p["L2"] + p["Lg"]
    fr = np.sqrt((p["L1"] + Lt) / (p["L1"] * Lt * (p["C"] + p["Cd"]))) / (2 * math.pi)
    np.testing.assert_allclose(fr / p["fs"], ratios, rtol=1e-12)
    np.testing.assert_allclose(p["Cd"] / p["C"], 2e-6 / 5e-6, rtol=1e-12)
    for k in ("L1", "L2", "Lg", "Kp", "Hi", "fs"):
        assert np.ptp(p[k]) == 0
    pd = maps.point_design(d, {"fr/fs": 0.1, "Lg": 2e-3})
    assert maps.design_value(pd, "fr/fs") == pytest.approx(0.1, rel=1e-12)
    assert pd.grid.Lg_H == 2e-3


def test_axis_combinations_are_checked():
    with pytest.raises(ValueError):
        maps.check_axes("fr/fs", "C")
    with pytest.raises(ValueError):
        maps.check_axes("Hi", "Hi")
    with pytest.raises(ValueError):
        maps.check_axes("Hi", "R1")
