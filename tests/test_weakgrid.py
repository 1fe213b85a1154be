"""Weak-grid sweep: resonance and critical crossing against their closed
forms, exact stable Lg intervals against independent computations, batched
margins against the single-design reference, and the critical-frequency
behaviour reported in the literature.

Designs here are invented test scenarios (random or hand-picked), not
published examples, except where a check value is labelled otherwise.
"""

import math

import numpy as np
import pytest
from scipy.optimize import brentq
from scipy.signal import cont2discrete

from loopcheck.engine.analysis import analyse
from loopcheck.io.casefile import CaseError
from loopcheck.engine.loop import build_loop
from loopcheck.engine.model import Control, Design, Filter, Grid, PassiveDamping, Sampling
from loopcheck.engine.plant import lcl_state_space
from loopcheck.design.weakgrid import Targets, critical_crossing_lg, evaluate_points, robustness_index, stable_lg_intervals, sweep_grid
from loopcheck.io.read_targets import parse_targets


def _design(L1=1.2e-3, C=10e-6, L2=0.5e-3, fs=20e3, delay=1.0, feedback="grid", kind="PR", Kp=2.5, Kr=200.0,
            Hi=6.0, Lg=0.0, R1=0.0, Ki=0.0, harmonics=(), damping=None, wc=0.0):
    return Design(
        Filter(L1, C, L2, R1_ohm=R1, damping=damping or PassiveDamping()),
        Grid(50.0, Lg),
        Sampling(fs, delay),
        Control(feedback, kind, Kp_V_per_A=Kp, Ki_V_per_As=Ki, Kr=Kr, wc_rad_s=wc, harmonics=harmonics, Hi_V_per_A=Hi),
    )


def _radius(design, Lg):
    """Closed-loop spectral radius from the engine's single-loop builder (the reference path)."""
    A = build_loop(design, Lg_H=np.atleast_1d(np.asarray(Lg, float))).closed_loop_matrix()
    return np.abs(np.linalg.eigvals(A)).max(axis=-1)


def _reference_boundaries(design, lo, hi, n=1201):
    """Independent stability boundaries: dense eigenvalue scan, then brentq
    on spectral radius - 1 (written here, not using the adaptive scan)."""
    Lg = np.linspace(lo, hi, n)
    r = _radius(design, Lg)
    st = r < 1.0 - 1e-9
    k = np.nonzero(st[:-1] != st[1:])[0]
    return [brentq(lambda x: _radius(design, x)[0] - 1.0, Lg[i], Lg[i + 1], xtol=1e-12 * (hi - lo)) for i in k]


# ---------------------------------------------------------------------------
# closed forms
# ---------------------------------------------------------------------------


def test_resonance_against_closed_form_and_state_space():
    """Resonance of L1-C-(L2+Lg): f_r = sqrt((L1+L2+Lg)/(L1 (L2+Lg) C))/(2 pi)
    (M. Liserre, F. Blaabjerg and S. Hansen, "Design and Control of an
    LCL-Filter-Based Three-Phase Active Rectifier", IEEE Trans. Ind. Appl.,
    vol. 41, no. 5, pp. 1281-1291, 2005; formula from memory), and the
    imaginary part of the eigenvalues of the lossless circuit (Kirchhoff,
    common practice) as a second, independent route."""
    d = _design()
    res = sweep_grid(d, (0.0, 8e-3), n_points=9)
    L1, C, L2 = 1.2e-3, 10e-6, 0.5e-3
    for lg, fr in zip(res.nominal.Lg_H, res.nominal.resonance_hz):
        closed = math.sqrt((L1 + L2 + lg) / (L1 * (L2 + lg) * C)) / (2 * math.pi)
        assert fr == pytest.approx(closed, rel=1e-12)
        A = lcl_state_space(L1, C, L2 + lg).A
        w = np.abs(np.linalg.eigvals(A).imag).max()
        assert fr == pytest.approx(w / (2 * math.pi), rel=1e-9)
    # resonance falls monotonically with Lg (derived from the formula)
    assert np.all(np.diff(res.nominal.resonance_hz) < 0)


def test_critical_crossing_check_value():
    """Lg* = (L1 + L2 - w^2 L1 L2 C)/(w^2 L1 C - 1) for L1 = L2 = 1 mH,
    C = 10 uF, w = 2 pi fs/6, fs = 10 kHz: 9.3495 mH (derived: the resonance
    formula below solved for Lg, evaluated by hand; not a published number)."""
    lg = critical_crossing_lg(1e-3, 10e-6, 1e-3, 10e3 / 6)
    assert lg == pytest.approx(9.3495e-3, abs=5e-8)
    # round trip through the resonance formula (Liserre et al. 2005, from memory)
    fr = math.sqrt((2e-3 + lg) / (1e-3 * (1e-3 + lg) * 10e-6)) / (2 * math.pi)
    assert fr == pytest.approx(10e3 / 6, rel=1e-12)


def test_critical_crossing_none_when_unreachable():
    # f above the resonance without grid: never crossed
    assert critical_crossing_lg(1e-3, 10e-6, 1e-3, 3000.0) is None
    # f below the limit 1/(2 pi sqrt(L1 C)) = 1591.5 Hz the resonance approaches
    assert critical_crossing_lg(1e-3, 10e-6, 1e-3, 1500.0) is None
    assert critical_crossing_lg(1e-3, 10e-6, 1e-3, 1600.0) > 0


# ---------------------------------------------------------------------------
# exact stable intervals
# ---------------------------------------------------------------------------


def _random_designs(n_with, n_without, seed=20):
    rng = np.random.default_rng(seed)
    out_with, out_without = [], []
    while len(out_with) < n_with or len(out_without) < n_without:
        L1 = rng.uniform(0.5e-3, 3e-3)
        L2 = rng.uniform(0.2e-3, 1.5e-3)
        C = rng.uniform(2e-6, 15e-6)
        fs = float(rng.choice([8e3, 10e3, 12e3, 16e3, 20e3]))
        delay = float(rng.choice([1.0, 0.75, 0.5]))
        kind = str(rng.choice(["P", "PI", "PR"]))
        fb = str(rng.choice(["grid", "converter"]))
        Kp = rng.uniform(0.05, 0.4) * (L1 + L2) * fs
        Hi = rng.uniform(-0.2, 0.8) * L1 * fs
        d = _design(L1, C, L2, fs, delay, fb, kind, Kp, Kp * 200, Hi, R1=rng.uniform(0, 0.05), Ki=Kp * 300,
                    harmonics=(5,))
        if math.sqrt((L1 + L2) / (L1 * L2 * C)) / (2 * math.pi) > 0.45 * fs:
            continue
        ref = _reference_boundaries(d, 0.0, 15e-3)
        if ref and len(out_with) < n_with:
            out_with.append((d, ref))
        elif not ref and len(out_without) < n_without:
            out_without.append((d, ref))
    return out_with + out_without


@pytest.mark.parametrize("design,ref", _random_designs(5, 2))
def test_intervals_match_dense_scan_with_bisection(design, ref):
    """Done-when of the weak-grid feature: for random designs the stable Lg
    intervals agree with an independent computation (dense eigenvalue scan
    plus brentq, above) to 0.1 % of the range at the endpoints."""
    span = 15e-3
    scan = stable_lg_intervals(design, (0.0, span))[0]
    assert len(scan.boundaries_H) == len(ref)
    for a, b in zip(scan.boundaries_H, ref):
        assert abs(a - b) <= 1e-3 * span
    # the intervals are consistent with the verdict on either side of every end
    for lo_, hi_ in scan.stable_intervals_H:
        mid = 0.5 * (lo_ + hi_)
        assert _radius(design, mid)[0] < 1.0
    if not scan.stable_intervals_H:
        assert _radius(design, 0.5 * span)[0] >= 1.0 - 1e-9


def test_coarse_start_still_finds_every_change():
    """The adaptive refinement, not the initial grid, guarantees the result:
    starting from only 3 samples it finds the same boundaries as the dense
    independent scan (design with two boundaries in the range)."""
    d = _design(L1=2.15e-3, C=12e-6, L2=0.52e-3, fs=20e3, feedback="converter", kind="PR", Kp=3.84, Kr=768.0,
                Hi=26.9, R1=0.008, harmonics=(5,))
    ref = _reference_boundaries(d, 0.0, 15e-3)
    coarse = stable_lg_intervals(d, (0.0, 15e-3), n_initial=3)[0]
    assert len(ref) == 2
    assert len(coarse.boundaries_H) == len(ref)
    for a, b in zip(coarse.boundaries_H, ref):
        assert abs(a - b) <= 1e-6 * 15e-3


def _scipy_closed_loop_radius(L1, C, L2, R1, fs, Kp, Hi, Lg):
    """Independent sampled-data model built with scipy.signal.cont2discrete
    (ZOH) plus one sample of computation delay, P control of i2 and
    capacitor-current feedback: u[k] = -Kp i2[k] - Hi (i1[k] - i2[k]),
    applied at k+1 (common practice for a one-sample delay)."""
    L2t = L2 + Lg
    A = np.array([[-R1 / L1, -1 / L1, 0.0], [1 / C, 0.0, -1 / C], [0.0, 1 / L2t, 0.0]])
    B = np.array([[1 / L1], [0.0], [0.0]])
    Phi, Gam, *_ = cont2discrete((A, B, np.eye(3), np.zeros((3, 1))), 1 / fs, method="zoh")
    K = np.array([[Hi, 0.0, Kp - Hi]])  # u = -K x with x = [i1, vc, i2]
    M = np.zeros((4, 4))
    M[:3, :3] = Phi
    M[:3, 3:] = Gam
    M[3:, :3] = -K
    return np.abs(np.linalg.eigvals(M)).max()


def test_boundary_against_scipy_built_model():
    """The Lg where stability is lost, against a loop assembled in the test
    from scipy.signal.cont2discrete (independent of the engine's exact-ZOH
    code). Design (invented): resonance above fs/6 on a stiff grid, no
    damping, so weak grid destabilises it."""
    L1, C, L2, R1, fs, Kp = 1.2e-3, 10e-6, 0.4e-3, 0.03, 12e3, 4.0
    d = _design(L1, C, L2, fs, 1.0, "grid", "P", Kp, 0.0, 0.0, R1=R1)
    scan = stable_lg_intervals(d, (0.0, 2e-3))[0]
    ref = brentq(lambda lg: _scipy_closed_loop_radius(L1, C, L2, R1, fs, Kp, 0.0, lg) - 1.0, 1e-6, 2e-3, xtol=1e-13)
    assert len(scan.stable_intervals_H) == 1
    assert scan.stable_intervals_H[0][0] == 0.0
    assert scan.stable_intervals_H[0][1] == pytest.approx(ref, abs=1e-3 * 2e-3)
    # and with damping: the same model with Hi
    d2 = _design(L1, C, L2, fs, 1.0, "grid", "P", Kp, 0.0, 3.0, R1=R1)
    r_engine = evaluate_points(d2, np.array([0.0, 1e-3, 2e-3]), margins=False).spectral_radius
    r_scipy = [_scipy_closed_loop_radius(L1, C, L2, R1, fs, Kp, 3.0, lg) for lg in (0.0, 1e-3, 2e-3)]
    assert np.allclose(r_engine, r_scipy, rtol=1e-9)


def test_grid_feedback_boundary_tends_to_critical_crossing():
    """Grid-current feedback without damping is stable while the resonance
    lies above the critical frequency fs/6 and unstable below it, in the
    limit of small controller gain (S. G. Parker, B. P. McGrath and
    D. G. Holmes, "Regions of Active Damping Control for LCL Filters", IEEE
    Trans. Ind. Appl., vol. 50, no. 1, pp. 424-432, 2014, from memory; as a
    limit of small gain it is derived: the damping that the resonant term of
    Kp*G_i2 lends the resonant poles changes sign where the delay-and-hold
    phase -(delay + 1/2) w Ts passes -90 deg).
    So the Lg where stability is lost tends to the closed form Lg* as Kp -> 0
    (L1 = L2 = 1 mH, C = 10 uF, fs = 10 kHz)."""
    L1 = L2 = 1e-3
    lg_star = critical_crossing_lg(L1, 10e-6, L2, 10e3 / 6)
    ends = []
    for kfac in (0.05, 0.02, 0.005):
        d = _design(L1, 10e-6, L2, 10e3, 1.0, "grid", "P", kfac * (L1 + L2) * 10e3, 0.0, 0.0)
        iv = stable_lg_intervals(d, (0.0, 20e-3))[0].stable_intervals_H
        assert len(iv) == 1 and iv[0][0] == 0.0
        ends.append(iv[0][1])
    assert ends[0] < ends[1] < ends[2] < lg_star
    assert ends[2] == pytest.approx(lg_star, rel=0.015)


def test_fractional_delay_moves_the_critical_frequency():
    """With a computation delay of 0.75 samples the critical frequency is
    fs/(4*0.75 + 2) = fs/5 (Pan, Ruan, Bao, Li and Wang, IEEE Trans. Power
    Electron., vol. 29, no. 7, pp. 3414-3427, 2014, from memory, for the
    general idea; the formula fs/(4*delay + 2) is derived: the delay and the
    hold lag by (delay + 1/2) w Ts, which reaches 90 deg there). Small-gain
    grid-current feedback loses stability close to where the resonance
    crosses fs/5."""
    L1 = L2 = 1e-3
    d = _design(L1, 10e-6, L2, 10e3, 0.75, "grid", "P", 0.005 * (L1 + L2) * 10e3, 0.0, 0.0)
    lg5 = critical_crossing_lg(L1, 10e-6, L2, 10e3 / 5)
    iv = stable_lg_intervals(d, (0.0, 3e-3))[0].stable_intervals_H
    assert len(iv) == 1 and iv[0][1] == pytest.approx(lg5, rel=0.03)


# ---------------------------------------------------------------------------
# batched margins against the single-design reference
# ---------------------------------------------------------------------------


def _margin_designs(n=10, seed=5):
    rng = np.random.default_rng(seed)
    out = []
    dampings = [PassiveDamping(), PassiveDamping("series-R", Rd_ohm=0.5),
                PassiveDamping("split-RC", Rd_ohm=3.0, Cd_F=4.7e-6)]
    while len(out) < n:
        L1 = rng.uniform(0.5e-3, 3e-3)
        L2 = rng.uniform(0.2e-3, 1.5e-3)
        C = rng.uniform(2e-6, 15e-6)
        fs = float(rng.choice([10e3, 16e3, 20e3]))
        kind = str(rng.choice(["P", "PR"]))
        Kp = rng.uniform(0.05, 0.3) * (L1 + L2) * fs
        d = _design(L1, C, L2, fs, float(rng.choice([1.0, 0.5])), str(rng.choice(["grid", "converter"])), kind, Kp,
                    Kp * rng.uniform(20, 200), rng.uniform(0.0, 0.5) * L1 * fs, Lg=rng.uniform(0, 6e-3),
                    R1=0.02, harmonics=[(), (5, 7)][int(rng.integers(2))], damping=dampings[int(rng.integers(3))])
        if math.sqrt((L1 + L2) / (L1 * L2 * C)) / (2 * math.pi) > 0.45 * fs:
            continue
        a = analyse(d)
        if a.stable and a.gain_margin is not None:
            out.append((d, a))
    return out


def test_batched_margins_match_analyse():
    """Vectorised margins against loopcheck.engine.analysis.analyse (the
    single-design reference, itself tested against python-control and
    scipy) on random stable designs with passive damping variants."""
    designs = _margin_designs()
    for d, a in designs:
        m = evaluate_points(d, d.grid.Lg_H)
        assert bool(m.stable)
        assert float(m.spectral_radius) == pytest.approx(a.spectral_radius, abs=1e-12)
        pm = math.inf if a.phase_margin_deg is None else a.phase_margin_deg
        assert float(m.phase_margin_deg) == pytest.approx(pm, abs=1e-6)
        assert float(m.gm_lower_factor) == pytest.approx(a.gain_margin.lower_factor, rel=1e-7, abs=1e-12)
        up = math.inf if a.gain_margin.upper_factor is None else a.gain_margin.upper_factor
        assert float(m.gm_upper_factor) == pytest.approx(up, rel=1e-7)
        # sampled peaks can only be underestimated: never below the reference,
        # and the value is confirmed by a dense evaluation of the engine's own
        # loop response around the frequency found
        s, fs_hz = float(m.sensitivity_peak), float(m.sensitivity_peak_hz)
        assert s >= a.sensitivity_peak.value * (1 - 1e-9)
        f = np.linspace(fs_hz - 2.0, fs_hz + 2.0, 4001)
        dense = 1 / np.abs(1 + build_loop(d).loop_response(np.exp(2j * np.pi * f * d.sampling.Ts_s)))
        assert s == pytest.approx(dense.max(), rel=1e-6)
        assert s == pytest.approx(a.sensitivity_peak.value, rel=2e-3)


def test_batch_shapes_and_broadcast():
    d = _design()
    Lg = np.linspace(0, 6e-3, 5)
    Hi = np.array([4.0, 6.0, 8.0])
    m = evaluate_points(d, Lg[None, :], None, Hi[:, None])
    assert m.stable.shape == (3, 5)
    one = evaluate_points(d, Lg[2], None, Hi[1])
    assert float(one.phase_margin_deg) == pytest.approx(float(m.phase_margin_deg[1, 2]), abs=1e-9)


# ---------------------------------------------------------------------------
# sweep, worst point, targets
# ---------------------------------------------------------------------------


def test_worst_point_is_no_better_than_any_table_row():
    d = _design()
    res = sweep_grid(d, (0.0, 6e-3), n_points=13)
    idx = robustness_index(res.nominal.margins, res.targets)
    assert res.nominal.scan.fully_stable
    assert res.nominal.worst.index <= idx.min() + 1e-9
    assert res.nominal.worst.index == pytest.approx(idx.min(), rel=0.05)


def test_unstable_range_reports_unstable_worst_point():
    d = _design(1.2e-3, 10e-6, 0.4e-3, 12e3, 1.0, "grid", "PR", 4.0, 300.0, 0.0, R1=0.03)
    res = sweep_grid(d, (0.0, 2e-3), n_points=5)
    w = res.nominal.worst
    assert not bool(w.margins.stable) and w.index == -math.inf
    assert w.shortfalls[0].startswith("unstable")
    assert not any(lo <= w.Lg_H <= hi for lo, hi in res.nominal.scan.stable_intervals_H)


def test_parse_targets_units_and_errors():
    t = parse_targets({"phase_margin": "45 deg", "gain_margin": "6 dB", "sensitivity_peak": "6 dB"}, "x.toml: [targets]")
    assert t.phase_margin_deg == 45.0 and t.gain_margin_db == 6.0
    assert t.sensitivity_peak_max == pytest.approx(10 ** (6 / 20))
    assert parse_targets(None, "x") == Targets()
    assert parse_targets({"sensitivity_peak": 2.0}, "x").sensitivity_peak_max == 2.0
    with pytest.raises(CaseError, match=r"x.toml: \[targets\] phase_margin"):
        parse_targets({"phase_margin": "30 dB"}, "x.toml: [targets]")
    with pytest.raises(CaseError, match="gain_margn"):
        parse_targets({"gain_margn": "3 dB"}, "x.toml: [targets]")
    with pytest.raises(CaseError, match="sensitivity_peak"):
        parse_targets({"sensitivity_peak": "-1 dB"}, "x.toml: [targets]")


def test_lossless_integrator_at_z_equal_one_is_no_gain_limit_in_sweeps():
    # Lossless filter with large inductors: the plant integrator sits at z = 1,
    # where rounding leaves |L| merely huge (~1e11). z = 1 is then no
    # real-axis crossing: with a P controller the integrator pole moves
    # inside for every small controller gain (elementary root locus; common
    # practice), so the gain may fall to 0. The batched margins of the
    # weak-grid sweep and of the map must say so, like analyse() does.
    from loopcheck.design import maps

    L1, C = 0.007498942093324558, 2.955203238012614e-07
    d = Design(
        Filter(L1, C, L1, damping=PassiveDamping("series-R", 1.0)), Grid(50.0, 0.0, Lg_range_H=(0.0, 1e-4)),
        Sampling(19125.0, 0.5), Control("grid", "P", Kp_V_per_A=0.2868345350696644),
    )
    assert analyse(d).gain_margin.lower_factor == 0.0
    assert sweep_grid(d).worst.margins.gm_lower_factor == 0.0
    spec = maps.MapSpec(maps.Axis("Kp", 0.2, 0.3, 3), maps.Axis("Hi", 0.0, 0.1, 3), metrics=("gain-margin",))
    m = maps.compute_map(d, spec)
    assert m.stable.all()
    assert np.all(m.gain_margin_lower == 0.0)
