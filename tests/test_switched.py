"""The switched model (loopcheck.timedomain.switched): ideal carrier-based PWM in the
loop, integrated exactly between switching edges.

* Its grid-current sidebands against the harmonic model of
  loopcheck.harmonics.spectrum (double-Fourier/Bessel expressions of D. G. Holmes and
  T. A. Lipo, "Pulse Width Modulation for Power Converters", IEEE Press /
  Wiley, 2003, through the filter admittance). The two share no code for the
  modulator: here the PWM edges are found by comparing the references with
  the carrier in the time domain, with the controller in the loop. An
  agreement within 1 % supports the stated assumption that the sampled loop
  does not act on the sidebands (synchronous sampling).
* Its fundamental against the PR controller's zero steady-state error
  (D. N. Zmood and D. G. Holmes, IEEE Trans. Power Electron., vol. 18,
  no. 3, pp. 814-822, 2003).

Design values are invented for the tests.
"""

from __future__ import annotations

import numpy as np
import pytest

from loopcheck.harmonics.spectrum import PwmSpec
from loopcheck.engine.model import Control, Design, Filter, Grid, Sampling
from loopcheck.timedomain.scenario import Event, Scenario
from loopcheck.timedomain.switched import sideband_amplitudes, sideband_check, simulate_switched


def design(fs=16e3):
    return Design(
        Filter(L1_H=1.5e-3, C_F=15e-6, L2_H=0.8e-3, R1_ohm=0.02, R2_ohm=0.01),
        Grid(f_hz=50.0, S_VA=12e3, V_V=400.0),
        Sampling(fs_hz=fs),
        Control(kind="PR", Kp_V_per_A=11.0, Kr=1500.0, Hi_V_per_A=10.0),
        name="switched test",
    )


@pytest.mark.parametrize(
    "pwm, fs",
    [
        (PwmSpec(Vdc_V=700.0, fsw_hz=8e3, scheme="three-phase", update="double"), 16e3),
        (PwmSpec(Vdc_V=700.0, fsw_hz=16e3, scheme="full-bridge-unipolar", update="single"), 16e3),
    ],
    ids=["three-phase-double", "unipolar-single"],
)
def test_switched_sidebands_match_harmonic_model(pwm, fs):
    d = design(fs)
    sc = Scenario(duration_s=0.06, events=(), phases=pwm.phases)
    w = simulate_switched(d, pwm, sc)
    cmp_ = sideband_check(d, pwm, w, sc, count=4)
    assert cmp_ is not None and len(cmp_) == 4
    for sb in cmp_:
        assert abs(sb.difference) < 0.01, sb


def test_switched_fundamental_tracks_the_reference():
    d = design()
    pwm = PwmSpec(Vdc_V=700.0, fsw_hz=8e3, scheme="three-phase", update="double")
    sc = Scenario(duration_s=0.06, events=())
    w = simulate_switched(d, pwm, sc)
    ref_peak = np.sqrt(2) * 12e3 / (np.sqrt(3) * 400.0)
    fund = sideband_amplitudes(w, 50.0, [50.0])[0]
    assert fund == pytest.approx(ref_peak, rel=2e-3)
    assert w.model.startswith("switched") and not w.notes


def test_switched_model_reports_overmodulation_and_ignores_bursts():
    d = design()
    pwm = PwmSpec(Vdc_V=500.0, fsw_hz=8e3, scheme="three-phase", update="double")
    sc = Scenario(duration_s=0.005, events=(Event(0.001, "resonance-burst", peak_V=5.0),))
    w = simulate_switched(d, pwm, sc)
    assert any("overmodulation" in n for n in w.notes)
    assert any("ignored" in n for n in w.notes)
    assert sideband_check(d, pwm, w, sc) is None  # too short for two fundamental periods
