"""The fast modal path of the stability map (loopcheck.design.maps.gain_lines and
loopcheck.engine.map_kernels) checked against independent eigenvalue references.

Oracles: the closed loop rebuilt point by point with python-control
(tests/reference_loop.py: circuit equations, ``sample_system`` ZOH, explicit
delay state, ``feedback``; nothing of loopcheck's model code), and
numpy.linalg.eigvals (LAPACK) of the state-space matrices. Designs are
invented. The wide fr/fs range 0.002..0.49 is the hard case: resonator and
plant poles cluster near z = 1 at its low end.
"""

import numpy as np
import pytest

from loopcheck.engine import map_kernels
from loopcheck.design import maps
from loopcheck.engine.model import Control, Design, Filter, Grid, Sampling

from reference_loop import reference_loop, spectral_radius

# invented 10 kHz grid-side PR design with 3rd and 5th resonators
WIDE = Design(
    Filter(1.5e-3, 33e-6, 0.75e-3, 0.02, 0.01),
    Grid(50.0, 0.5e-3),
    Sampling(10e3, 1.0),
    Control("grid", "PR", Kp_V_per_A=5.0, Kr=300.0, harmonics=(3, 5), Hi_V_per_A=6.5),
    name="invented wide-range PR",
)


@pytest.fixture(params=["numba", "numpy"])
def backend(request, monkeypatch):
    """Run a test with the compiled kernels and with the numpy fallback."""
    if request.param == "numba":
        if map_kernels._JIT is None:
            pytest.skip("numba not installed")
    else:
        monkeypatch.setattr(map_kernels, "_JIT", None)
    return request.param


_ROWS_SPEC = maps.MapSpec(maps.Axis("fr/fs", 0.002, 0.49, 10), maps.Axis("Hi", 0.0, 20.0, 7))


@pytest.fixture(scope="module")
def python_control_radius():
    """Spectral radius of the python-control closed loop at every point of
    :data:`_ROWS_SPEC` ``[iy, ix]``."""
    xv, yv = _ROWS_SPEC.x.values(), _ROWS_SPEC.y.values()
    ref = np.empty((yv.size, xv.size))
    for ix, x in enumerate(xv):
        for iy, y in enumerate(yv):
            _, cl = reference_loop(maps.point_design(WIDE, {"fr/fs": x, "Hi": y}))
            ref[iy, ix] = spectral_radius(cl)
    return ref


def test_every_row_matches_python_control_over_the_wide_range(backend, python_control_radius):
    # reference: python-control closed loop per point (tests/reference_loop.py),
    # eigenvalues of its state matrix; every map point is compared, the
    # verdict wherever the reference radius is not within 1e-6 of 1
    m = maps.compute_map(WIDE, _ROWS_SPEC)
    assert set(m.boundary_method) == {"exact"}
    assert {ln for ln in m.boundary_path} == {"modal"}
    ref = python_control_radius
    np.testing.assert_allclose(m.spectral_radius, ref, rtol=0, atol=1e-8)
    away = np.abs(ref - 1.0) > 1e-6
    assert away.mean() > 0.9
    assert np.array_equal(m.stable[away], (ref < 1.0 - m.tolerance)[away])
    assert 0.05 < m.stable.mean() < 0.95  # both verdicts occur


def test_fine_map_over_the_wide_range_matches_eigenvalues(backend):
    # reference: numpy.linalg.eigvals at every point of the state-space
    # closed loop, and eigenvalues just beside every exact boundary
    spec = maps.MapSpec(maps.Axis("fr/fs", 0.002, 0.49, 70), maps.Axis("Hi", -2.0, 20.0, 120))
    m = maps.compute_map(WIDE, spec)
    X, Y = np.meshgrid(m.x_values, m.y_values)
    A = maps.closed_loop_matrices(WIDE, {"fr/fs": X.ravel(), "Hi": Y.ravel()})
    ref = np.abs(np.linalg.eigvals(A)).max(axis=-1).reshape(X.shape)
    np.testing.assert_allclose(m.spectral_radius, ref, rtol=0, atol=1e-9)
    away = np.abs(ref - 1.0) > 1e-7
    assert np.array_equal(m.stable[away], (ref < 1.0 - m.tolerance)[away])
    span = spec.y.stop - spec.y.start
    xs, bs = [], []
    for x, bnd in zip(m.x_values, m.boundaries):
        xs += [x] * len(bnd)
        bs += list(bnd)
    xs, bs = np.array(xs), np.array(bs)
    assert xs.size >= 70
    for side in (-1.0, 1.0):
        A = maps.closed_loop_matrices(WIDE, {"fr/fs": xs, "Hi": bs + side * 1e-6 * span})
        rad = np.abs(np.linalg.eigvals(A)).max(axis=-1)
        below = np.abs(np.linalg.eigvals(maps.closed_loop_matrices(
            WIDE, {"fr/fs": xs, "Hi": bs - side * 1e-6 * span}))).max(axis=-1)
        # the verdict changes across every boundary
        assert np.all((rad < 1.0 - m.tolerance) != (below < 1.0 - m.tolerance))


@pytest.mark.parametrize(
    "axis, control",
    [
        ("Hi", dict(kind="PR", Kp_V_per_A=5.0, Kr=300.0, harmonics=(3, 5), Hi_V_per_A=6.5)),
        ("Kp", dict(kind="PR", Kp_V_per_A=5.0, Kr=300.0, harmonics=(3, 5), Hi_V_per_A=6.5)),
        ("Kr", dict(kind="PR", Kp_V_per_A=5.0, Kr=300.0, harmonics=(3, 5), Hi_V_per_A=6.5)),
        ("Ki", dict(kind="PI", Kp_V_per_A=5.0, Ki_V_per_As=800.0, Hi_V_per_A=6.5)),
    ],
)
def test_gain_axes_enter_through_a_rank_one_term(axis, control):
    # fact of the state-space assembly (common practice): each gain scales
    # one input column or one output row, so A(y) - A(0) has rank one; the
    # modal path relies on it and checks it per line
    d = Design(WIDE.filter, WIDE.grid, WIDE.sampling, Control("grid", **control), name="invented")
    x = np.array([0.002, 0.05, 0.17, 0.3, 0.49])
    A0, A1 = maps._line_matrices(d, {"fr/fs": x}, axis, 10.0)
    u, v, ok = maps._rank_one(A1)
    assert ok.all()
    np.testing.assert_allclose(u[:, :, None] * v[:, None, :], A1, rtol=0, atol=1e-12 * np.abs(A1).max())
    # and A(y) = A0 + y A1 is the model at any gain
    A = maps.closed_loop_matrices(d, {"fr/fs": x, axis: 7.3})
    np.testing.assert_allclose(A0 + 7.3 * A1, A, rtol=0, atol=1e-11 * np.abs(A).max())


def test_balancing_conditions_the_modal_basis():
    # the balanced eigenvector matrix is well conditioned on the whole range
    # (unbalanced: condition up to about 1e6 from the mixed state units)
    x = np.geomspace(0.002, 0.49, 40)
    A0, A1 = maps._line_matrices(WIDE, {"fr/fs": x}, "Hi", 20.0)
    md = maps._modal_form(A0, A1, 0.0, 20.0)
    assert md.ok.all()
    assert md.cond.max() < 1e4
    # the modal residues reproduce the frequency response v^T (zI - A0)^-1 u
    u, v, _ = maps._rank_one(A1)
    z = np.exp(1j * np.array([1e-3, 0.03, 0.5, 2.0, 3.1]))
    for i in (0, 17, 39):
        direct = [v[i] @ np.linalg.solve(zz * np.eye(A0.shape[-1]) - A0[i], u[i]) for zz in z]
        G = maps._modal_G(md.mu[i : i + 1], md.r[i : i + 1], z[None, :])[0]
        np.testing.assert_allclose(G, direct, rtol=1e-7, atol=1e-9 * np.abs(direct).max())


def test_defective_line_falls_back_to_the_polynomial_path():
    # a Jordan block at z = 0.5 for every gain: no eigenvector basis, so the
    # line takes the polynomial path; both eigenvalues stay at 0.5 (stable)
    A0 = np.array([[[0.5, 1.0], [0.0, 0.5]]])
    A1 = np.array([[[0.0, 1.0], [0.0, 0.0]]])
    y = np.linspace(0.0, 3.0, 31)
    md = maps._modal_form(A0, A1, 0.0, 3.0)
    assert not md.ok[0]
    lines, radius = maps.gain_lines(A0, A1, y)
    assert lines[0].path == "polynomial"
    assert lines[0].intervals(0.0, 3.0) == ((0.0, 3.0),)
    np.testing.assert_allclose(radius[:, 0], 0.5, atol=1e-7)


def test_followed_roots_match_eigenvalues_on_a_lightly_damped_pair(backend):
    # a 2-state line whose roots meet on the real axis and split (a branch
    # point the follower must cross by re-seeding); reference: the
    # quadratic formula for det(zI - A0 - y A1) (common practice)
    A0 = np.array([[[0.9, 0.3], [-0.3, 0.9]]])
    A1 = np.array([[[0.0, 0.0], [1.0, 0.0]]])
    y = np.linspace(-1.0, 0.5, 300)  # not through the double root at y = 0.3 (eigenvalues lose half their digits there)
    lines, radius = maps.gain_lines(A0, A1, y)
    # z^2 - 1.8 z + 0.81 + 0.3 (0.3 - y) = 0
    c = 0.81 + 0.3 * (0.3 - y)
    disc = np.sqrt((1.8**2 - 4 * c).astype(complex))
    ref = np.maximum(np.abs((1.8 + disc) / 2), np.abs((1.8 - disc) / 2))
    np.testing.assert_allclose(radius[:, 0], ref, rtol=0, atol=1e-9)
    # |z|^2 = c < 1 for y > -1/3 while complex; the larger real root
    # 0.9 + sqrt(0.3 y - 0.09) < 1 for y < 1/3
    assert lines[0].path == "modal"
    ivs = lines[0].intervals(y[0], y[-1])
    assert len(ivs) == 1
    assert ivs[0] == pytest.approx((-1.0 / 3.0, 1.0 / 3.0), abs=1e-10)


def test_a_map_too_large_for_memory_is_refused_in_one_line(tmp_path):
    # 5000 x 5000 would need about 4 GB: one line naming the option, exit 2,
    # nothing written (the command's bad-input convention, common practice)
    from pathlib import Path

    from typer.testing import CliRunner

    from loopcheck.cli.main import app

    case = Path(__file__).resolve().parents[1] / "benchmarks" / "wide-range-pr.toml"
    png = tmp_path / "m.png"
    r = CliRunner().invoke(
        app, ["map", str(case), "--x-points", "5000", "--y-points", "5000", "-o", str(png)],
        env={"COLUMNS": "200", "NO_COLOR": "1"},
    )
    assert r.exit_code == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: --x-points: 5000 x 5000") and "memory" in lines[0]
    assert not png.exists() and "Traceback" not in r.stderr


def test_csv_text_round_trips_every_value():
    # the CSV numbers read back as the same doubles (repr is the shortest
    # round-trip text; Python language reference, common practice)
    import csv
    import io

    from loopcheck.io.map_table import csv_text

    spec = maps.MapSpec(maps.Axis("fr/fs", 0.002, 0.49, 7), maps.Axis("Hi", 0.0, 20.0, 5), ("phase-margin",))
    m = maps.compute_map(WIDE, spec)
    rows = list(csv.DictReader(io.StringIO(csv_text(m))))
    assert len(rows) == 35
    for k, row in enumerate(rows):
        ix, iy = divmod(k, 5)  # x outer, y inner
        assert float(row["fr/fs"]) == m.x_values[ix] and float(row["Hi"]) == m.y_values[iy]
        assert float(row["C"]) == m.parameters["C"][iy, ix]
        assert float(row["spectral_radius"]) == m.spectral_radius[iy, ix]
        assert row["stable"] == ("1" if m.stable[iy, ix] else "0")
        pm = m.phase_margin_deg[iy, ix]
        assert (row["phase_margin_deg"] == "") if np.isnan(pm) else (float(row["phase_margin_deg"]) == pm)


def test_controller_blocks_response_matches_their_state_space(backend):
    # reference: C (zI - A)^-1 B + D of every controller block, solved with
    # numpy.linalg (common practice), summed; PR with harmonics and PI
    for control in (WIDE.control, Control("grid", "PI", Kp_V_per_A=5.0, Ki_V_per_As=800.0, Hi_V_per_A=6.5)):
        d = Design(WIDE.filter, WIDE.grid, WIDE.sampling, control, name="invented")
        prm = maps.point_parameters(d, {"fr/fs": np.array([0.05, 0.2]), "Hi": np.array([3.0, 6.0])})
        data = maps._LoopData(d, prm)
        w = np.array([1e-4, 0.02, 0.4, 3.0])
        z = np.exp(1j * w)[None, :].repeat(2, axis=0)
        got = data.unit_controller(np.arange(2), z)
        ref = np.zeros(w.size, dtype=complex)
        for b in data.blocks:
            A, B, C, D = (np.asarray(m)[0] if np.ndim(m) == 3 else np.asarray(m) for m in (b.A, b.B, b.C, b.D))
            for k, zz in enumerate(z[0]):
                n = A.shape[-1]
                ref[k] += (C @ np.linalg.solve(zz * np.eye(n) - A, B))[0, 0] + D[0, 0] if n else D[0, 0]
        np.testing.assert_allclose(got[0], ref, rtol=1e-10)


def test_crossing_exactly_on_a_frequency_grid_point_is_found(backend):
    # the lossless damping loop at fr/fs = 0.12 has its resonance at
    # w = 0.24 pi, a point of the frequency grid, where Im G is exactly 0
    # (no sign change to bracket). Reference: the Jury-test closed form
    # 0 < k < 2 cos(theta) - 1 below the critical ratio, k = Hi sin(theta) /
    # (wr L1) (E. I. Jury, "Theory and Application of the z-Transform
    # Method", Wiley, 1964, derived with sympy in tests/test_maps.py;
    # Parker, McGrath and Holmes, IEEE Trans. Ind. Appl., vol. 50, no. 1,
    # 2014; from memory)
    from loopcheck.engine.discretize import discretize_plant
    from loopcheck.engine.plant import OUTPUT_IC, lcl_state_space

    L1, L2, FS, ratio = 1.9e-3, 0.7e-3, 12e3, 0.12
    theta = 2 * np.pi * ratio
    wr = theta * FS
    p = lcl_state_space(L1, (L1 + L2) / (L1 * L2 * wr**2), L2)
    dp = discretize_plant(p.A, p.B, p.C, 1.0 / FS, 1.0)
    A, B, cic = dp.A, dp.B, dp.C[OUTPUT_IC : OUTPUT_IC + 1, :]
    # the part the capacitor current observes (the lossless plant keeps an
    # unobservable pole at z = 1)
    O = np.vstack([cic @ np.linalg.matrix_power(A, i) for i in range(4)])
    _, s, Vt = np.linalg.svd(O)
    Q = Vt[: int(np.sum(s > 1e-9 * s[0]))]
    to_k = np.sin(theta) / (wr * L1)
    y = np.linspace(-4.0 / to_k, 4.0 / to_k, 7)
    lines, _ = maps.gain_lines((Q @ A @ Q.T)[None], (-(Q @ B) @ (cic @ Q.T))[None], y)
    ivs = lines[0].intervals(y[0], y[-1])
    assert len(ivs) == 1
    assert tuple(v * to_k for v in ivs[0]) == pytest.approx((0.0, 2 * np.cos(theta) - 1), abs=1e-9)
