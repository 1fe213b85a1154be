"""A measured grid impedance (CSV) and the frequency-response Nyquist count
(loopcheck.design.measured_grid).

Outside references: J. Sun, "Impedance-based stability criterion for
grid-connected inverters", IEEE Trans. Power Electron., vol. 26, no. 11,
2011 (from memory) for the count; the exact eigenvalue verdict of the same
network given as components (loopcheck.design.grid_network, itself checked against
the engine and the coupled model) as the reference verdict. The "measured"
tables are made from invented component networks.
"""

import math

import numpy as np
import pytest

from loopcheck.io.casefile import CaseError
from loopcheck.design.grid_network import GridNetwork, exact_verdict, network_impedance
from loopcheck.design.measured_grid import measured_verdict
from loopcheck.io.read_network import read_measured_impedance
from loopcheck.engine.model import Control, Design, Filter, Grid, Sampling


def design(fs=20e3, L1=1.5e-3, C=10e-6, L2=0.5e-3, Kp=10.0, Hi=10.0):
    return Design(Filter(L1, C, L2, 0.02, 0.01), Grid(50.0), Sampling(fs, 1.0),
                  Control("grid", "PR", Kp, Kr=300.0, Hi_V_per_A=Hi))


def write_table(path, net, f, header=True):
    Z = network_impedance(net, 2j * math.pi * f)
    rows = [f"{x:.12g}, {abs(z):.12g}, {math.degrees(np.angle(z)):.12g}" for x, z in zip(f, Z)]
    text = ("# invented network\nfrequency_hz, magnitude_ohm, phase_deg\n" if header else "") + "\n".join(rows) + "\n"
    path.write_text(text)
    return path


@pytest.mark.parametrize(
    "net",
    [GridNetwork(1e-3, 0.0, 5e-6, 0.0), GridNetwork(1e-3, 0.0, 5e-6, 0.5), GridNetwork(3e-3, 0.05),
     GridNetwork(0.5e-3, 0.02, 20e-6, 0.1)],
)
def test_measured_table_of_a_component_network_gives_the_exact_verdict(tmp_path, net):
    """A table sampled from a component network (200 rows, 10 Hz .. 3 fs)
    gives the exact eigenvalue verdict of that network."""
    d = design()
    f = np.geomspace(10.0, 3 * d.sampling.fs_hz, 200)
    meas = read_measured_impedance(str(write_table(tmp_path / "z.csv", net, f)))
    assert meas.frequency_hz.size == 200
    mv = measured_verdict(d, meas)
    assert mv.verdict == exact_verdict(d, net).verdict
    assert all(ok for _, ok in mv.conditions)


def test_measured_table_interpolation_is_close_to_the_network(tmp_path):
    net = GridNetwork(1e-3, 0.1, 5e-6, 0.5)
    f = np.geomspace(10.0, 60e3, 400)
    meas = read_measured_impedance(str(write_table(tmp_path / "z.csv", net, f, header=False)))
    fx = np.geomspace(12.0, 50e3, 300)
    Z = network_impedance(net, 2j * math.pi * fx)
    err = np.abs(meas.interpolate(fx) - Z) / np.abs(Z)
    near = np.abs(fx / net.resonance_hz() - 1) < 0.1  # rows 2.4 % apart, resonance bandwidth about 4 %
    assert err[~near].max() < 5e-3 and err[near].max() < 0.1


def test_non_passive_table_is_not_applicable(tmp_path):
    """Sun's count needs a passive grid: a row with phase beyond 90 deg makes
    the verdict 'not applicable' and says why."""
    p = tmp_path / "z.csv"
    p.write_text("50, 0.3, 80\n1000, 2.0, 95\n5000, 9.0, 85\n")
    mv = measured_verdict(design(), read_measured_impedance(str(p)))
    assert mv.verdict == "not applicable" and not mv.grid_passive
    assert ("grid passive on every row (Re Zg >= 0)", False) in mv.conditions


@pytest.mark.parametrize(
    "text,line,fragment",
    [
        ("50, 0.3, 80\n100, abc, 80\n", 2, "magnitude is not a number"),
        ("# c\nf,m,p\n50, 0.3\n", 3, "expected 3 columns"),
        ("50, 0.3, 80\n40, 0.3, 80\n", 2, "frequencies must increase"),
        ("-5, 0.3, 80\n", 1, "frequency must be greater than zero"),
        ("50, -0.3, 80\n60, 1, 1\n", 1, "magnitude must not be negative"),
        ("50, 0.3, nan\n", 1, "phase must be finite"),
    ],
)
def test_bad_rows_name_file_and_line(tmp_path, text, line, fragment):
    p = tmp_path / "bad.csv"
    p.write_text(text)
    with pytest.raises(CaseError) as exc:
        read_measured_impedance(str(p))
    msg = str(exc.value)
    assert msg.startswith(f"{p}:{line}: ") and fragment in msg and "\n" not in msg


def test_too_short_and_missing(tmp_path):
    p = tmp_path / "one.csv"
    p.write_text("50, 1, 1\n")
    with pytest.raises(CaseError, match="at least 2 rows"):
        read_measured_impedance(str(p))
    with pytest.raises(CaseError, match="no such file"):
        read_measured_impedance(str(tmp_path / "none.csv"))
