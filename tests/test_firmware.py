"""Tests of loopcheck.design.firmware: the exported difference equations against
outside references (python-control, scipy.signal, numpy, the Python
standard library), the quantiser against Python's own rounding, and the
coefficient-quantisation re-check.

Designs here are invented for the tests (no published example values).
"""

from __future__ import annotations

import math
import random
from decimal import ROUND_DOWN, ROUND_FLOOR, ROUND_HALF_EVEN, ROUND_HALF_UP, Decimal

import control as ct
import numpy as np
import pytest
import scipy.signal as ss

from loopcheck.engine.analysis import analyse
from loopcheck.io.casefile import CaseError
from loopcheck.engine.controller import controller_blocks, parallel
from loopcheck.design.firmware import FirmwareFormatError, FirmwareScaling, FirmwareSettings, NumberFormat, controller_frequency_response, controller_sections, export_controller, parse_number_format, quantise_value, round_scaled, run_difference_equations, section_poles
from loopcheck.io.read_firmware import read_firmware_settings
from loopcheck.engine.model import Control, Design, Filter, Grid, Sampling

FS = 20e3
TS = 1.0 / FS
F1 = 50.0


#: Invented sensor and modulator scaling: 20 mV/A and 50 mV/A into a 12-bit,
#: 3.3 V ADC; 5000 compare counts for duty 1 on a 700 V dc link.
SCALING = FirmwareScaling(0.02 * 4096 / 3.3, 0.05 * 4096 / 3.3, 5000 / 700)


def make_design(kind="PR", Kp=8.0, Ki=0.0, Kr=200.0, wc=0.0, harmonics=(5, 7), integrator="forward-euler",
                resonator="tustin-prewarp", Hi=12.0, fs=FS, delay=1.0):
    """An invented 20 kHz design (demo values, not from any publication)."""
    return Design(
        Filter(1.8e-3, 8.2e-6, 0.9e-3, 0.03, 0.02),
        Grid(F1, 0.2e-3),
        Sampling(fs, delay),
        Control("grid", kind, Kp, Ki, Kr, wc, tuple(harmonics), integrator, resonator, Hi),
        name="test",
    )


def z_inverse_coeffs(sysd):
    """(b, a) of a python-control discrete SISO tf in powers of z^-1, a0 = 1."""
    num = np.atleast_1d(np.squeeze(sysd.num[0][0])).astype(float)
    den = np.atleast_1d(np.squeeze(sysd.den[0][0])).astype(float)
    num = np.concatenate([np.zeros(den.size - num.size), num])
    return num / den[0], den[1:] / den[0]


def padded(x, n=3):
    return np.concatenate([np.asarray(x, dtype=float), np.zeros(n - len(x))])


# ---------------------------------------------------------------------------
# rounding and formats
# ---------------------------------------------------------------------------


def _tie_and_random_values():
    rng = random.Random(7)
    vals = [k + 0.5 for k in range(-20, 20)]  # exact ties
    vals += [rng.uniform(-1e6, 1e6) for _ in range(300)]
    vals += [rng.randint(-1000, 1000) / 4 for _ in range(200)]  # many ties and exact integers
    vals += [0.0, -0.0, 2.0**52 + 1, -(2.0**53), 0.49999999999999994, -0.5]
    return vals


def test_nearest_even_matches_python_round():
    # Python's round() on floats is correctly rounded, ties to even (Python
    # Language Reference, built-in round(); IEEE 754-2008 roundTiesToEven).
    for y in _tie_and_random_values():
        assert round_scaled(y, "nearest-even") == round(y), y


@pytest.mark.parametrize(
    "mode, decimal_mode",
    [("nearest-even", ROUND_HALF_EVEN), ("nearest-away", ROUND_HALF_UP), ("floor", ROUND_FLOOR), ("zero", ROUND_DOWN)],
)
def test_rounding_modes_match_decimal_module(mode, decimal_mode):
    # Python standard library decimal module, exact decimal arithmetic
    # (ROUND_HALF_UP there means ties away from zero, ROUND_DOWN toward zero).
    for y in _tie_and_random_values():
        expect = int(Decimal(y).quantize(Decimal(1), rounding=decimal_mode))
        assert round_scaled(y, mode) == expect, (mode, y)


def test_nearest_up_is_add_half_then_floor():
    # "add half an LSB, then arithmetic shift right" (common practice): floor(y + 1/2)
    # computed exactly with Decimal.
    for y in _tie_and_random_values():
        expect = int((Decimal(y) + Decimal("0.5")).to_integral_value(rounding=ROUND_FLOOR))
        assert round_scaled(y, "nearest-up") == expect, y


def test_fixed_point_value_is_integer_times_lsb():
    fmt, _ = parse_number_format("Q2.13")
    assert (fmt.word_bits, fmt.fraction_bits, fmt.integer_bits, fmt.c_type) == (16, 13, 2, "int16_t")
    v = quantise_value(-1.9997532649633212, fmt)
    # exact by hand: -1.99975326... * 8192 = -16381.98, nearest integer -16382
    assert v.integer == -16382
    assert v.value == -16382 / 8192
    with pytest.raises(FirmwareFormatError, match="needs at least 3 integer bits"):
        quantise_value(4.5, fmt)
    assert quantise_value(3.9998779296875, fmt).integer == 32767  # the largest Q2.13 value, 4 - 2^-13


def test_float32_quantisation_is_numpy_float32():
    fmt, _ = parse_number_format("float32")
    x = -1.9997532649633212
    assert quantise_value(x, fmt).value == float(np.float32(x))


def test_format_parsing_and_notes():
    fmt, notes = parse_number_format("Q15")
    assert (fmt.word_bits, fmt.fraction_bits) == (16, 15) and not notes
    fmt, notes = parse_number_format("Q1.31")  # the other Q convention: flagged
    assert fmt.word_bits == 33 and "Q0.31" in notes[0]
    with pytest.raises(ValueError):
        parse_number_format("Q40.40")
    with pytest.raises(ValueError):
        parse_number_format("int16")


# ---------------------------------------------------------------------------
# coefficients against python-control / scipy
# ---------------------------------------------------------------------------

_INTEGRATOR_METHODS = {"forward-euler": "euler", "backward-euler": "backward_diff", "tustin": "tustin"}


@pytest.mark.parametrize("method", list(_INTEGRATOR_METHODS))
def test_integrator_section_matches_python_control(method):
    # python-control sample_system (wrapping scipy.signal.cont2discrete) of Ki/s
    # with the same method; Franklin, Powell & Workman, "Digital Control of
    # Dynamic Systems", 3rd ed., 1998, ch. 6, for the three maps.
    Ki = 1500.0
    d = make_design(kind="PI", Ki=Ki, integrator=method)
    sec = controller_sections(d).sections[0]
    b, a = z_inverse_coeffs(ct.sample_system(ct.tf([Ki], [1, 0]), TS, method=_INTEGRATOR_METHODS[method]))
    np.testing.assert_allclose(padded(sec.b, 2), padded(b, 2), rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(sec.a, a, rtol=1e-12)


@pytest.mark.parametrize("wc", [0.0, 5.0])
@pytest.mark.parametrize("method", ["tustin-prewarp", "tustin", "zoh"])
def test_resonator_biquads_match_python_control(method, wc):
    # python-control 0.10.2 sample_system: 'tustin' with prewarp_frequency = w0
    # for the prewarped form, plain 'tustin', and 'zoh'. Continuous forms of
    # Teodorescu, Blaabjerg, Liserre & Loh, IEE Proc.-Electr. Power Appl. 153(5), 2006.
    Kr = 200.0 if wc == 0 else 20.0
    d = make_design(Kr=Kr, wc=wc, resonator=method)
    for s in controller_sections(d).sections:
        w0 = 2 * math.pi * s.tuned_frequency_hz
        num = [Kr, 0.0] if wc == 0 else [2 * Kr * wc, 0.0]
        cont = ct.tf(num, [1.0, 2 * wc, w0**2])
        kw = {"prewarp_frequency": w0} if method == "tustin-prewarp" else {}
        b, a = z_inverse_coeffs(ct.sample_system(cont, TS, method="zoh" if method == "zoh" else "tustin", **kw))
        scale = max(abs(b))
        np.testing.assert_allclose(np.asarray(s.b) / scale, b / scale, rtol=0, atol=1e-9)
        np.testing.assert_allclose(s.a, a, rtol=0, atol=1e-12)


def test_impulse_invariant_resonator_matches_scipy():
    # scipy.signal.cont2discrete(method="impulse"): H(z) = Ts * sum h(kTs) z^-k
    d = make_design(resonator="impulse-invariant", harmonics=(3,))
    for s in controller_sections(d).sections:
        w0 = 2 * math.pi * s.tuned_frequency_hz
        num, den, _ = ss.cont2discrete(([200.0, 0.0], [1.0, 0.0, w0**2]), TS, method="impulse")
        num = np.squeeze(num)
        np.testing.assert_allclose(s.b, num / den[0], rtol=0, atol=1e-12 * max(abs(num)))
        np.testing.assert_allclose(s.a, den[1:] / den[0], rtol=0, atol=1e-12)


def test_prewarped_sections_reproduce_the_continuous_response():
    # Bilinear transform with prewarping (A. V. Oppenheim and R. W. Schafer,
    # "Discrete-Time Signal Processing", 3rd ed., 2010, sec. 7.2 -- from memory
    # for the section): a section tuned at w0 maps z = e^{jwTs} to the
    # continuous frequency w_a = w0 tan(w Ts/2)/tan(w0 Ts/2), so
    #   * at its own w0 the section equals the continuous resonator exactly;
    #   * the whole controller at the fundamental and at each harmonic equals the
    #     sum of the continuous responses evaluated at each section's w_a.
    # Damped resonators (wc > 0) are used so the continuous response is finite at w0;
    # reference: scipy.signal.freqs of the continuous transfer functions.
    Kr, wc, Kp = 20.0, 5.0, 8.0
    d = make_design(Kp=Kp, Kr=Kr, wc=wc, harmonics=(5, 7, 11))
    coeffs = controller_sections(d)
    harmonics = [1, 5, 7, 11]
    for h in harmonics:
        w = 2 * math.pi * F1 * h
        got = controller_frequency_response(coeffs, F1 * h, TS)[0]
        expect = Kp
        for hj in harmonics:
            w0 = 2 * math.pi * F1 * hj
            wa = w0 * math.tan(w * TS / 2) / math.tan(w0 * TS / 2)
            _, H = ss.freqs([2 * Kr * wc, 0.0], [1.0, 2 * wc, w0**2], worN=[wa])
            expect = expect + H[0]
        assert abs(got - expect) <= 1e-9 * abs(expect), h
        # and plainly against the continuous controller at w itself: the other sections
        # are warped, but only by (w Ts)^2/12 relative in frequency (tan series),
        # where they are small; measured mismatch is below 1e-3 of |Gc|.
        _, Hc = ss.freqs([2 * Kr * wc, 0.0], [1.0, 2 * wc, w**2], worN=[w])
        plain = Kp + Hc[0] + sum(
            ss.freqs([2 * Kr * wc, 0.0], [1.0, 2 * wc, (2 * math.pi * F1 * hj) ** 2], worN=[w])[1][0]
            for hj in harmonics
            if hj != h
        )
        assert abs(got - plain) <= 1e-3 * abs(plain), h


def test_ideal_resonator_matches_continuous_off_resonance():
    # Ideal resonator Kr s/(s^2 + w0^2) is infinite at w0, so compare a little off
    # it (+-1 % and +-5 %) against the continuous response (python-control tf
    # evaluated at s = j w_a, the prewarp map of the test above).
    Kr = 200.0
    d = make_design(Kr=Kr, harmonics=())
    s = controller_sections(d).sections[0]
    w0 = 2 * math.pi * F1
    cont = ct.tf([Kr, 0.0], [1.0, 0.0, w0**2])
    for factor in (0.95, 0.99, 1.01, 1.05):
        w = factor * w0
        wa = w0 * math.tan(w * TS / 2) / math.tan(w0 * TS / 2)
        expect = complex(cont(1j * wa))
        sec = controller_frequency_response(dataclass_only(s), F1 * factor, TS)[0]
        assert abs(sec - expect) <= 1e-8 * abs(expect)
    # and the tuned peak sits exactly at w0: the pole angle is w0*Ts
    r, ang, cplx = section_poles(s.a)
    assert cplx and r == 1.0 and abs(ang - w0 * TS) < 1e-14


def dataclass_only(section):
    """A controller made of one section and no proportional gain."""
    from loopcheck.design.firmware import ControllerCoefficients

    return ControllerCoefficients("V/A", 0.0, 0.0, (section,))


# ---------------------------------------------------------------------------
# time domain against scipy.signal.dlsim / lfilter
# ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    "kw",
    [
        {},
        {"kind": "PI", "Ki": 2000.0, "integrator": "tustin"},
        {"kind": "PI", "Ki": 2000.0, "integrator": "forward-euler"},
        {"wc": 5.0, "Kr": 20.0, "resonator": "zoh"},
    ],
)
def test_difference_equations_equal_dlsim_of_engine_controller(kw):
    # scipy.signal.dlsim of the engine's controller state space (the blocks
    # the analysis uses), minus Hi*ic, against the exported equations run
    # sample by sample; and scipy.signal.lfilter on each exported section.
    d = make_design(**kw)
    coeffs = controller_sections(d)
    rng = np.random.default_rng(3)
    n = 1500
    e = rng.standard_normal(n) + np.sin(2 * np.pi * F1 * TS * np.arange(n))
    ic = rng.standard_normal(n)
    u = run_difference_equations(coeffs, e, ic)
    ctrl = parallel(controller_blocks(d.control, F1, TS))
    _, y, _ = ss.dlsim((ctrl.A, ctrl.B, ctrl.C, ctrl.D, TS), e)
    ref = y[:, 0] - d.control.Hi_V_per_A * ic
    np.testing.assert_allclose(u, ref, rtol=0, atol=1e-9 * np.max(np.abs(ref)))
    lf = coeffs.Kp * e - coeffs.Hi * ic
    for s in coeffs.sections:
        lf = lf + ss.lfilter(s.b, (1.0,) + s.a, e)
    np.testing.assert_allclose(u, lf, rtol=0, atol=1e-9 * np.max(np.abs(ref)))


# ---------------------------------------------------------------------------
# quantisation
# ---------------------------------------------------------------------------


def _independent_denominator(w0, wc, fs, fraction_bits, rounder=round):
    """Prewarped-Tustin denominator from python-control, rounded with Python's
    round() (or math.floor) to the given fraction bits, and its roots from numpy."""
    cont = ct.tf([2 * 20.0 * wc, 0.0], [1.0, 2 * wc, w0**2])
    _, a = z_inverse_coeffs(ct.sample_system(cont, 1 / fs, method="tustin", prewarp_frequency=w0))
    aq = [rounder(x * 2**fraction_bits) / 2**fraction_bits for x in a]
    return aq, np.roots([1.0] + aq)


def test_truncated_coarse_format_puts_a_50hz_resonator_pole_outside_the_circle():
    # A damped 50 Hz resonator (wc = 5 rad/s) sampled at 20 kHz has a1 = -1.99925 and
    # a2 = 0.99950 (python-control). A 16-bit word with 10 fraction bits (Q5.10) and
    # truncation toward -inf (floor) gives a1 = -2 and a2 = 1023/1024: z^2 - 2z + a2 has
    # the real roots 1 +- sqrt(1 - a2), so the resonance is gone and one pole lies at
    # 1 + 2^-5 = 1.03125, outside the unit circle (coefficient sensitivity of
    # direct-form poles: Oppenheim & Schafer 2010, sec. 6.8-6.9, from memory for the
    # section numbers; the arithmetic here is exact).
    wc = 5.0
    d = make_design(Kr=20.0, wc=wc, harmonics=())
    aq, roots = _independent_denominator(2 * math.pi * F1, wc, FS, 10, math.floor)
    assert aq[0] == -2.0 and aq[1] == 1023 / 1024
    predicted = 1.0 + math.sqrt(1.0 - aq[1])
    assert predicted == 1.03125
    assert np.max(np.abs(roots)) == pytest.approx(predicted, rel=1e-12)
    assert np.all(roots.imag == 0)  # real poles: no resonance left

    fmt, _ = parse_number_format("Q5.10", rounding="floor")
    ex = export_controller(d, FirmwareSettings(number_format=fmt))
    p = ex.recheck.poles[0]
    assert p.complex_before and not p.complex_after
    assert p.radius_before < 1.0
    assert p.radius_after == pytest.approx(predicted, rel=1e-12)
    text = " ".join(ex.recheck.warnings)
    assert "resonance is lost" in text and "OUTSIDE the unit circle" in text


def test_rounded_coarse_format_turns_the_resonator_into_an_integrator():
    # Same resonator, Q5.10 with round-to-nearest-even: a1 = -2047/1024 and
    # a2 = 1023/1024, so 1 + a1 + a2 = 0: the roots are exactly 1 and a2 (sum
    # -a1 = 1 + a2, product a2). The resonance at 50 Hz is replaced by a pole on
    # the unit circle at z = 1 (numpy roots as the independent reference).
    wc = 5.0
    d = make_design(Kr=20.0, wc=wc, harmonics=())
    aq, roots = _independent_denominator(2 * math.pi * F1, wc, FS, 10)
    assert aq == [-2047 / 1024, 1023 / 1024]
    assert sorted(np.abs(roots)) == pytest.approx([1023 / 1024, 1.0], abs=1e-12)
    fmt, _ = parse_number_format("Q5.10")
    ex = export_controller(d, FirmwareSettings(number_format=fmt))
    p = ex.recheck.poles[0]
    assert not p.complex_after and p.radius_after == pytest.approx(1.0, abs=1e-12)
    text = " ".join(ex.recheck.warnings)
    assert "resonance is lost" in text and "onto the unit circle" in text


def test_moderate_format_moves_the_resonator_pole_by_the_predicted_amount():
    # Q2.13 (16-bit): the damped resonator keeps complex poles; radius and angle
    # follow from the rounded a1, a2 as sqrt(a2) and acos(-a1/(2 sqrt(a2)))
    # (numpy roots as the independent reference).
    wc = 5.0
    d = make_design(Kr=20.0, wc=wc, harmonics=())
    aq, roots = _independent_denominator(2 * math.pi * F1, wc, FS, 13)
    fmt, _ = parse_number_format("Q2.13")
    ex = export_controller(d, FirmwareSettings(SCALING, fmt))
    p = ex.recheck.poles[0]
    r_np = float(np.max(np.abs(roots)))
    f_np = float(np.max(np.angle(roots))) * FS / (2 * math.pi)
    assert p.radius_after == pytest.approx(r_np, rel=1e-12)
    if p.complex_after:
        assert p.radius_after == pytest.approx(math.sqrt(aq[1]), rel=1e-12)
        assert p.frequency_after_hz == pytest.approx(f_np, rel=1e-9)
    assert p.radius_after != p.radius_before


def test_ideal_resonator_frequency_shift_in_q2_13():
    # Ideal resonator: a2 = 1 is exact in any format with an integer bit, a1 =
    # -2 cos(w0 Ts) = -1.99975 rounds to -16382/8192, so the pole stays on the
    # circle at acos(16382/16384) rad/sample = 49.74 Hz instead of 50 Hz.
    d = make_design(harmonics=())
    fmt, _ = parse_number_format("Q2.13")
    ex = export_controller(d, FirmwareSettings(SCALING, fmt))
    p = ex.recheck.poles[0]
    expect_hz = math.acos(16382 / 16384) * FS / (2 * math.pi)
    roots = np.roots([1.0, -16382 / 8192, 1.0])
    assert p.frequency_after_hz == pytest.approx(expect_hz, rel=1e-9)
    assert p.frequency_after_hz == pytest.approx(np.max(np.angle(roots)) * FS / (2 * math.pi), rel=1e-9)
    assert p.radius_after == 1.0
    assert any("pole frequency moved" in w for w in ex.recheck.warnings)
    # the fundamental is no longer tracked exactly: a finite error at 50 Hz
    assert ex.recheck.before.fundamental_error < 1e-9 < ex.recheck.after.fundamental_error


def test_q2_29_changes_nothing_that_matters():
    d = make_design()
    fmt, _ = parse_number_format("Q2.29")
    ex = export_controller(d, FirmwareSettings(SCALING, fmt))
    assert ex.recheck.after.stable and not ex.recheck.warnings
    for p in ex.recheck.poles:
        assert abs(p.shift_fraction) < 1e-5


@pytest.mark.parametrize(
    "kw",
    [
        {},
        {"wc": 5.0, "Kr": 20.0, "resonator": "zoh"},
        {"delay": 0.5, "Hi": 6.0},
        {"kind": "PI", "Ki": 2000.0},
        {"kind": "PI", "Ki": 2000.0, "integrator": "tustin", "Hi": 8.0},
    ],
)
def test_exact_figures_agree_with_the_engine_analysis(kw):
    # the re-check's "exact" loop (controller rebuilt from the exported
    # sections) must give the engine's own verdict and margins
    d = make_design(**kw)
    ex = export_controller(d)
    a = analyse(d)
    b = ex.recheck.before
    assert b.verdict == a.verdict
    assert b.spectral_radius == pytest.approx(a.spectral_radius, abs=1e-10)
    if a.stable:
        assert b.phase_margin_deg == pytest.approx(a.phase_margin_deg, abs=1e-6)
        assert b.gain_margin.upper_factor == pytest.approx(a.gain_margin.upper_factor, rel=1e-7)
        assert b.gain_margin.lower_factor == pytest.approx(a.gain_margin.lower_factor, rel=1e-7, abs=1e-12)
    assert ex.recheck.after is None  # float64: nothing quantised


def test_firmware_units_scale_by_modulator_over_sensor():
    # counts per ampere = sensor V/A * 2^bits / full-scale V (ADC transfer,
    # common practice); compare counts per volt = period / Vdc.
    d = make_design()
    rd, _ = read_firmware_settings(
        {
            "current_sensor": "20 mV/A",
            "ic_sensor": "50 mV/A",
            "adc_bits": 12,
            "adc_full_scale": "3.3 V",
            "dc_link": "700 V",
            "pwm_period_counts": 5000,
        },
        "x.toml: [firmware]",
    )
    sc = rd.scaling
    assert sc.current_counts_per_A == pytest.approx(0.02 * 4096 / 3.3, rel=1e-15)
    assert sc.ic_counts_per_A == pytest.approx(0.05 * 4096 / 3.3, rel=1e-15)
    assert sc.modulator_counts_per_V == pytest.approx(5000 / 700, rel=1e-15)
    ex = export_controller(d, rd)
    # hand arithmetic: 8 V/A * (5000/700 count/V) / (24.8242... count/A)
    assert ex.firmware.Kp == pytest.approx(8 * (5000 / 700) / (0.02 * 4096 / 3.3), rel=1e-14)
    assert ex.firmware.Hi == pytest.approx(12 * (5000 / 700) / (0.05 * 4096 / 3.3), rel=1e-14)
    assert ex.firmware.sections[0].a == ex.si.sections[0].a
    # the loop in firmware units is the same loop
    assert ex.recheck.before.spectral_radius == pytest.approx(analyse(d).spectral_radius, abs=1e-10)


@pytest.mark.parametrize(
    "table, key",
    [
        ({"current_counts_per_A": 25}, "modulator_counts_per_V"),
        ({"current_counts_per_A": 25, "current_sensor": "20 mV/A", "modulator_counts_per_V": 7}, "current_counts_per_A"),
        ({"current_sensor": "20 mV/A", "modulator_counts_per_V": 7}, "current_sensor"),
        ({"format": "Q2.2.2"}, "format"),
        ({"rounding": "up"}, "rounding"),
        ({"prefix": "9X"}, "prefix"),
        ({"adc_bits": 12.5}, "adc_bits"),
        ({"dc_link": "700 V", "current_counts_per_A": 25}, "pwm_period_counts"),
        ({"formt": "Q2.13"}, "formt"),
    ],
)
def test_firmware_table_errors_name_file_and_key(table, key):
    with pytest.raises(CaseError) as exc:
        read_firmware_settings(table, "cases/x.toml: [firmware]")
    msg = str(exc.value)
    assert msg.startswith(f"cases/x.toml: [firmware] {key}:") and "\n" not in msg


def test_format_that_cannot_hold_a1_is_reported():
    d = make_design()
    with pytest.raises(FirmwareFormatError) as exc:
        export_controller(d, FirmwareSettings(number_format=NumberFormat("fixed", 16, 15)))
    assert "does not fit Q0.15" in str(exc.value) and exc.value.key == "format"


def test_scaling_dataclass_ratios():
    sc = FirmwareScaling(current_counts_per_A=25.0, ic_counts_per_A=50.0, modulator_counts_per_V=10.0)
    assert (sc.fb_scale, sc.ic_scale) == (0.4, 0.2)
