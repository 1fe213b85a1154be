"""Unit strings of case files against the SI definitions.

Prefix values and unit symbols: BIPM, "The International System of Units
(SI)", SI Brochure, 9th edition, 2019, Table 7 (SI prefixes) and Table 4
(coherent derived units: H, F, Ohm, Hz, V, W). Character identities: The
Unicode Standard, code charts (U+00B5 MICRO SIGN, U+03BC GREEK SMALL LETTER
MU, U+03A9 GREEK CAPITAL LETTER OMEGA, U+2126 OHM SIGN).
"""

import math

import pytest

from loopcheck.engine.units import (
    DIMENSIONS,
    UnitError,
    expected_text,
    format_quantity,
    parse_quantity,
    parse_quantity_unit,
    parse_tolerance,
)


@pytest.mark.parametrize(
    "text, dimension, expected",
    [
        # SI Brochure 2019, Table 7: m = 1e-3, u/micro = 1e-6, k = 1e3, M = 1e6, n = 1e-9, p = 1e-12
        ("1.8 mH", "inductance", 1.8e-3),
        ("10 uF", "capacitance", 10e-6),
        ("10 \u00b5F", "capacitance", 10e-6),  # micro sign U+00B5
        ("10 \u03bcF", "capacitance", 10e-6),  # Greek mu U+03BC (the SI symbol)
        ("20 mOhm", "resistance", 20e-3),
        ("20 m\u03a9", "resistance", 20e-3),  # Greek capital omega
        ("20 m\u2126", "resistance", 20e-3),  # ohm sign U+2126
        ("1.5 ohm", "resistance", 1.5),
        ("10 kHz", "frequency", 10e3),
        ("50 Hz", "frequency", 50.0),
        ("6 V/A", "gain", 6.0),
        ("3000 V/A/s", "integral_gain", 3000.0),
        ("3 kV/A/s", "integral_gain", 3000.0),
        ("600 V/(A*s)", "integral_gain", 600.0),
        ("0 rad/s", "angular_frequency", 0.0),
        ("10 kVA", "apparent_power", 10e3),
        ("2.5 MVA", "apparent_power", 2.5e6),
        ("400 V", "voltage", 400.0),
        ("47 nF", "capacitance", 47e-9),
        ("220 pF", "capacitance", 220e-12),
        ("50 us", "time", 50e-6),
        ("10 %", "percent", 0.10),
        ("1.8mH", "inductance", 1.8e-3),  # no blank between number and unit
        ("  1.8   mH ", "inductance", 1.8e-3),
        ("1.8e-3 H", "inductance", 1.8e-3),
        ("-3 V/A", "gain", -3.0),
        ("1_000 Hz", "frequency", 1000.0),  # TOML-style digit separator
    ],
)
def test_prefixed_units_give_si_values(text, dimension, expected):
    # Exact decimal scaling: the result is the float nearest to the decimal value.
    assert parse_quantity(text, dimension) == expected


def test_micro_is_exact_decimal_scaling():
    # 10 * 1e-6 in binary floating point is 9.999999999999999e-06; the parser
    # scales in decimal first (SI Brochure: the prefix is a decimal factor).
    assert parse_quantity("10 uF", "capacitance") == float("1e-5")
    assert parse_quantity("2.2 uF", "capacitance") == float("2.2e-6")


@pytest.mark.parametrize("value", [1.8, 2, "1.8", "2e-3"])
def test_bare_number_is_si_base_unit(value):
    # A bare number is in the SI base unit (henry here).
    x, unit = parse_quantity_unit(value, "inductance")
    assert x == float(value) and unit == ""


@pytest.mark.parametrize(
    "text, dimension",
    [
        ("10 mH", "capacitance"),
        ("10 uF", "inductance"),
        ("10 kHz", "angular_frequency"),
        ("5 rad/s", "frequency"),
        ("6 V/A/s", "gain"),
        ("6 V/A", "integral_gain"),
        ("10 mHz", "inductance"),
        ("10 kW", "apparent_power"),
        ("10 xF", "capacitance"),  # unknown prefix
        ("10 MF", "voltage"),
        ("10 % ", "gain"),
        ("5 m%", "percent"),  # percent takes no prefix
    ],
)
def test_wrong_unit_names_expected_unit(text, dimension):
    with pytest.raises(UnitError) as info:
        parse_quantity(text, dimension)
    msg = str(info.value)
    assert "\n" not in msg
    assert msg == f'expected {expected_text(dimension)}, got "{text}"'
    assert DIMENSIONS[dimension].base_unit in msg


def test_capacitance_message_matches_the_documented_wording():
    with pytest.raises(UnitError, match=r'^expected a capacitance in F \(e\.g\. "10 uF"\), got "10 mH"$'):
        parse_quantity("10 mH", "capacitance")


@pytest.mark.parametrize("value", ["abc", "", "mH", "1.8.2 mH", "nan", "inf H", True, False, [1, 2], {"a": 1}])
def test_non_numeric_values_are_errors(value):
    with pytest.raises(UnitError):
        parse_quantity(value, "inductance")


@pytest.mark.parametrize("value", [math.nan, math.inf, -math.inf])
def test_non_finite_numbers_are_errors(value):
    with pytest.raises(UnitError, match="finite"):
        parse_quantity(value, "inductance")


@pytest.mark.parametrize(
    "text, expected",
    [
        ("\u00b110 %", (-0.10, 0.10)),
        ("+-10 %", (-0.10, 0.10)),
        ("+/-5%", (-0.05, 0.05)),
        ("10 %", (-0.10, 0.10)),
        ("-20 %", (-0.20, 0.0)),
        ("+5 %", (0.0, 0.05)),
        ("-20 % / +5 %", (-0.20, 0.05)),
        ("+5 %, -20 %", (-0.20, 0.05)),
        (0.1, (-0.1, 0.1)),
    ],
)
def test_tolerances(text, expected):
    low, high = parse_tolerance(text)
    assert low == pytest.approx(expected[0], abs=1e-15) and high == pytest.approx(expected[1], abs=1e-15)


@pytest.mark.parametrize("text", ["10 mH", "abc", "+5 % / +6 %", True, "-1 % / -2 % / +3 %"])
def test_bad_tolerances(text):
    with pytest.raises(UnitError):
        parse_tolerance(text)


@pytest.mark.parametrize(
    "value, unit, kwargs, expected",
    [
        (1.8e-3, "H", {}, "1.8 mH"),
        (10e-6, "F", {}, "10 uF"),
        (1666.6667, "Hz", {}, "1.667 kHz"),
        (999.99, "Hz", {}, "1 kHz"),  # rounding carries into the next prefix
        (0.0, "H", {}, "0 H"),
        (12.566, "V/A", {"prefix": False}, "12.57 V/A"),
        (None, "Hz", {}, "n/a"),
        (-0.02, "Ohm", {}, "-20 mOhm"),
    ],
)
def test_format_quantity(value, unit, kwargs, expected):
    assert format_quantity(value, unit, **kwargs) == expected


@pytest.mark.parametrize("text", ["1.8 mH", "10 uF", "20 mOhm", "10 kHz", "47 nF", "2.2 MVA", "400 V"])
def test_format_then_parse_round_trips(text):
    # Symbols are the SI ones (ASCII u for micro), so formatted values read back.
    dimension = {"H": "inductance", "F": "capacitance", "Ohm": "resistance", "Hz": "frequency",
                 "VA": "apparent_power", "V": "voltage"}
    unit = text.split()[1]
    base = next(b for b in sorted(dimension, key=len, reverse=True) if unit.endswith(b))
    x = parse_quantity(text, dimension[base])
    assert parse_quantity(format_quantity(x, base), dimension[base]) == pytest.approx(x, rel=1e-12)
