"""``loopcheck map`` from the command line: outputs, the [map] table and
its one-line errors, and CSV rows recomputed independently with
python-control. All designs are invented."""

import csv
import json
import math
import pathlib
import subprocess
import sys

import numpy as np
import pytest
from typer.testing import CliRunner

from loopcheck.cli.main import app

ENV = {"COLUMNS": "200", "NO_COLOR": "1"}
REPO = pathlib.Path(__file__).resolve().parents[1]

CASE = """\
name = "invented 14 kHz grid-side PR"
[filter]
L1 = "2.0 mH"
C  = "10 uF"
L2 = "0.8 mH"
R1 = "15 mOhm"
R2 = "5 mOhm"
[grid]
f = "50 Hz"
Lg = "0.3 mH"
Lg_range = ["0 mH", "2.5 mH"]
[sampling]
fs = "14 kHz"
delay = 1
[control]
feedback = "grid"
kind = "PR"
Kp = "11 V/A"
Kr = "900 V/A/s"
Hi = "9 V/A"
"""

MAP = """
[map]
x = "fr/fs"
x_range = [0.002, 0.49]
x_points = 45
y = "Hi"
y_range = ["-14 V/A", "42 V/A"]
y_points = 40
"""


def run(args):
    return CliRunner().invoke(app, ["map", *map(str, args)], env=ENV)


@pytest.fixture
def case(tmp_path):
    p = tmp_path / "case.toml"
    p.write_text(CASE + MAP)
    return p


def _rows(path):
    with open(path, newline="") as fh:
        return list(csv.DictReader(fh))


def test_outputs_figure_csv_json(case, tmp_path):
    png, csvp = tmp_path / "out" / "map.png", tmp_path / "map.csv"
    r = run([case, "-o", png, "--csv", csvp, "--json"])
    assert r.exit_code == 0, r.stderr
    assert r.stderr == ""  # no progress bar outside a terminal, no warnings
    rec = json.loads(r.stdout)
    assert rec["x"]["name"] == "fr/fs" and rec["y"]["name"] == "Hi" and rec["y"]["unit"] == "V/A"
    assert len(rec["columns"]) == 45
    # the critical ratio for one sample of delay (common practice: fs/6)
    assert rec["critical_ratio"] == pytest.approx(1 / 6)
    assert rec["design_point"]["y"] == 9.0
    assert rec["design_point"]["stable"] is True
    for col in rec["columns"]:
        for a, b in col["stable_y_intervals"]:
            assert -14.0 <= a < b <= 42.0
        assert col["method"] in ("exact", "refined")
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    rows = _rows(csvp)
    assert len(rows) == 45 * 40
    assert list(rows[0]) == ["C", "Hi", "fr/fs", "stable", "spectral_radius"]
    assert {r["stable"] for r in rows} == {"0", "1"}
    # the stable flags of the CSV are the JSON intervals, column by column
    ys = np.linspace(-14.0, 42.0, 40)
    for i, col in enumerate(rec["columns"]):
        flags = [rows[i * 40 + j]["stable"] == "1" for j in range(40)]
        expect = [any(a < y < b or (a == y == -14.0) for a, b in col["stable_y_intervals"]) for y in ys]
        assert flags == expect


@pytest.mark.parametrize("suffix, magic", [(".svg", b"<?xml"), (".pdf", b"%PDF")])
def test_figure_format_follows_suffix(case, tmp_path, suffix, magic):
    out = tmp_path / f"map{suffix}"
    r = run([case, "-o", out, "--x-points", 12, "--y-points", 10, "--quiet"])
    assert r.exit_code == 0, r.stderr
    assert out.read_bytes()[: len(magic)] == magic
    assert "figure:" in r.stdout and "design point" in r.stdout


def _independent_radius(row: dict, case_values: dict) -> float:
    """Closed-loop spectral radius rebuilt from a CSV row with python-control
    (reference library): LCL state space from Kirchhoff's laws, ZOH with
    sample_system, one sample of computation delay as z^-1, the capacitor
    current fed back with -Hi, a Tustin-prewarped resonator Kr*s/(s^2+w0^2)
    (python-control's prewarp_frequency), closed with unity feedback."""
    import control as ct

    v = {**case_values, **{k: float(x) for k, x in row.items() if k not in ("stable", "spectral_radius", "fr/fs")}}
    Ts = 1.0 / v["fs"]
    L2t = v["L2"] + v["Lg"]
    A = [[-v["R1"] / v["L1"], -1.0 / v["L1"], 0.0], [1.0 / v["C"], 0.0, -1.0 / v["C"]], [0.0, 1.0 / L2t, -v["R2"] / L2t]]
    plant = ct.ss(A, [[1.0 / v["L1"]], [0.0], [0.0]], [[1.0, 0.0, -1.0], [0.0, 0.0, 1.0]], [[0.0], [0.0]])
    delayed = ct.sample_system(plant, Ts, method="zoh") * ct.ss([[0.0]], [[1.0]], [[1.0]], [[0.0]], Ts)
    inner = ct.feedback(delayed, np.array([[v["Hi"], 0.0]]))
    w0 = 2 * math.pi * v["f"]
    res = ct.sample_system(ct.ss(ct.tf([v["Kr"], 0.0], [1.0, 0.0, w0**2])), Ts, method="tustin", prewarp_frequency=w0)
    loop = ct.series(ct.parallel(res, ct.ss([], [], [], [[v["Kp"]]], Ts)), inner[1, 0])
    closed = ct.feedback(loop, 1)
    return float(np.max(np.abs(np.linalg.eigvals(closed.A))))


def test_csv_rows_recomputed_independently(case, tmp_path):
    # fr/fs from 0.002 to 0.49: every sampled row agrees with its stable flag
    # except within 1e-3 (relative to the y range) of a boundary
    csvp = tmp_path / "map.csv"
    r = run([case, "--csv", csvp, "--json", "-q"])
    assert r.exit_code == 0, r.stderr
    rec = json.loads(r.stdout)
    rows = _rows(csvp)
    base = {"L1": 2.0e-3, "L2": 0.8e-3, "Lg": 0.3e-3, "R1": 0.015, "R2": 0.005, "fs": 14e3, "Kp": 11.0, "Kr": 900.0, "f": 50.0}
    rng = np.random.default_rng(2)
    picks = list(rng.choice(len(rows), 30, replace=False))
    # and both ends of the fr/fs axis
    picks += [3, len(rows) - 5]
    compared = 0
    for k in picks:
        row = rows[k]
        col = rec["columns"][k // 40]
        assert float(row["fr/fs"]) == pytest.approx(col["x"], rel=1e-15)
        rho = _independent_radius(row, base)
        assert rho == pytest.approx(float(row["spectral_radius"]), rel=1e-8)
        y = float(row["Hi"])
        if any(abs(y - b) <= 1e-3 * 56.0 for b in col["boundaries"]):
            continue
        assert (rho < 1.0 - 1e-9) == (row["stable"] == "1")
        compared += 1
    assert compared >= 25


def test_metrics_in_csv(case, tmp_path):
    csvp = tmp_path / "m.csv"
    r = run([case, "--x-points", 8, "--y-points", 8, "--metric", "all", "--csv", csvp, "-q"])
    assert r.exit_code == 0, r.stderr
    rows = _rows(csvp)
    for key in ("phase_margin_deg", "gain_margin_lower_factor", "gain_margin_upper_factor", "sensitivity_peak"):
        assert key in rows[0]
    stable = [r for r in rows if r["stable"] == "1"]
    unstable = [r for r in rows if r["stable"] == "0"]
    assert stable and unstable
    assert all(r["phase_margin_deg"] == "" for r in unstable)
    # Bode's sensitivity integral, discrete-time form, forces max|S| >= 1 for a
    # stable strictly proper loop (H.-K. Sung and S. Hara, "Properties of
    # sensitivity and complementary sensitivity functions in single-input
    # single-output digital control systems", Int. J. Control, vol. 48,
    # no. 6, pp. 2429-2439, 1988; from memory)
    assert all(float(r["sensitivity_peak"]) >= 1.0 for r in stable)


def test_option_changes_axis_and_ignores_old_range(case):
    r = run([case, "--x", "Lg", "--y", "Kp", "--x-points", 6, "--y-points", 5, "--json"])
    assert r.exit_code == 0, r.stderr
    rec = json.loads(r.stdout)
    assert rec["x"]["name"] == "Lg"
    # the default Lg range is the case's Lg_range
    assert (rec["x"]["from"], rec["x"]["to"]) == (0.0, 0.0025)
    assert rec["design_point"]["x"] == pytest.approx(0.3e-3)


def test_weak_grid_demo_case_runs_and_agrees_with_check(tmp_path):
    case = REPO / "cases" / "commercial-30kva-weak-grid.toml"  # a demo case: its absence is a failure
    r = run([case, "--x", "Lg", "--y", "Hi", "--x-points", 10, "--y-points", 10, "--json", "-o", tmp_path / "w.png"])
    assert r.exit_code == 0, r.stderr
    rec = json.loads(r.stdout)
    chk = CliRunner().invoke(app, ["check", str(case), "--json"], env=ENV)
    assert chk.exit_code == 0
    assert rec["design_point"]["stable"] == json.loads(chk.stdout.splitlines()[0])["stable"]


# ---------------------------------------------------------------------------
# bad input: one line naming the file and key (or the option), exit 2,
# nothing written
# ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    "table, needle",
    [
        ('x = "fr/fs"\nx_rnage = [0.1, 0.2]', 'x_rnage: unknown key; did you mean "x_range"?'),
        ('x = "Lg"\nx_range = ["0 mH", "5 V/A"]', 'x_range: expected an inductance in H'),
        ('x = "fr/f"', 'x: expected one of'),
        ('x = "fr/fs"\ny = "C"', "both set the filter capacitance"),
        ('x = "fr/fs"\nx_range = [0.1, 0.6]', "fr/fs must lie between 0 and 0.499"),
        ('x_points = 1', "x_points: must lie between 2 and 5000"),
        ('y_points = 2.5', "y_points: expected a whole number"),
        ('x = "Lg"\nx_scale = "log"', "x_scale: a log scale needs a range above zero"),
        ('y = "Ki"', 'axis "Ki" needs a PI controller'),
        ('x = "fs"\nx_range = ["2 kHz", "20 kHz"]', "x_range: the LCL resonance reaches fs/2"),
        ('metrics = ["phase"]', "metrics: expected metric names"),
        ('y_range = ["40 V/A", "0 V/A"]', "y_range: the first value must be below the second"),
    ],
)
def test_bad_map_table(tmp_path, table, needle):
    p = tmp_path / "bad.toml"
    p.write_text(CASE + "\n[map]\n" + table + "\n")
    out, csvp = tmp_path / "m.png", tmp_path / "m.csv"
    r = run([p, "-o", out, "--csv", csvp])
    assert r.exit_code == 2
    assert r.stdout == ""
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1, r.stderr
    assert lines[0].startswith(f"error: {p}: [map] ")
    assert needle in lines[0]
    assert "Traceback" not in r.stderr
    assert not out.exists() and not csvp.exists()
    assert list(tmp_path.iterdir()) == [p]


@pytest.mark.parametrize(
    "args, needle",
    [
        (["--x-range", "0 V/A", "3 mH"], "--x-range: expected a plain number for fr/fs"),
        (["--x", "Lg", "--x-range", "0 V/A", "3 mH"], '--x-range: expected an inductance in H (e.g. "1.8 mH"), got "0 V/A"'),
        (["--y", "Hi", "--x", "Hi"], "--y: x and y are both 'Hi'"),
        (["--metric", "margins"], "--metric: expected metric names"),
        (["-o", "map.jpg"], "the figure must end in .png, .svg or .pdf"),
    ],
)
def test_bad_options(case, args, needle):
    r = run([case, *args])
    assert r.exit_code == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and needle in lines[0], r.stderr


def test_missing_case_file(tmp_path):
    r = run([tmp_path / "nope.toml"])
    assert r.exit_code == 2
    assert "no such file" in r.stderr


# ---------------------------------------------------------------------------
# layering
# ---------------------------------------------------------------------------


def test_command_module_imports_no_numerics():
    code = "import sys, loopcheck.cli.cmd_map, loopcheck.cli.main; print(sorted(m for m in ('numpy', 'scipy', 'matplotlib') if m in sys.modules))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=REPO, check=True)
    assert out.stdout.strip() == "[]"


def test_figure_reads_on_its_own(tmp_path):
    # the figure carries units on both axes, the design point, the critical
    # ratio on an fr/fs axis, the nominal Lg and the Lg range on an Lg axis,
    # and says how the fr/fs axis moves the resonance
    from loopcheck.io.casefile import case_from_string
    from loopcheck.figures.map_plot import map_figure
    from loopcheck.io.map_table import Overrides, map_spec
    from loopcheck.design.maps import compute_map

    case = case_from_string(CASE + MAP, "case.toml")

    def texts(fig):
        out = [t.get_text() for t in fig.texts]
        for ax in fig.axes:
            out += [ax.get_xlabel(), ax.get_ylabel(), ax.get_title()]
            leg = ax.get_legend()
            if leg is not None:
                out += [t.get_text() for t in leg.get_texts()]
        return "\n".join(out)

    spec = map_spec(case, Overrides(x_points=10, y_points=8))
    t = texts(map_figure(compute_map(case.design, spec)))
    for needle in (
        "resonance / sampling frequency fr/fs [-]",
        "capacitor-current gain Hi [V/A]",
        "critical fr/fs = 1/(4 delay + 2) = 1/6",
        "design point (stable)",
        "scaling the filter capacitor C with fs fixed",
        "stable: every closed-loop pole inside |z| < 1",
        "licensed engineering practice",
    ):
        assert needle in t
    spec = map_spec(case, Overrides(x="Lg", y="Kp", x_points=8, y_points=6))
    t = texts(map_figure(compute_map(case.design, spec)))
    for needle in ("grid inductance Lg [mH]", "proportional gain Kp [V/A]", "nominal Lg = 0.3 mH", "case Lg range 0..2.5 mH"):
        assert needle in t
    assert "critical fr/fs" not in t
