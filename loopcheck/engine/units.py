"""Quantities with SI units and prefixes, as written in case files.

A case file writes a physical value as a string such as ``"1.8 mH"``,
``"10 uF"`` (also ``"10 µF"`` with the micro sign U+00B5 or the Greek mu
U+03BC), ``"20 mOhm"`` / ``"20 mΩ"``, ``"10 kHz"``, ``"6 V/A"``,
``"3000 V/A/s"``, ``"0 rad/s"``, ``"10 kVA"``, ``"400 V"``. A bare number
(TOML integer or float, or a string holding only a number) is taken in the
SI base unit of the expected quantity.

Every key of a case file expects one *dimension* (see :data:`DIMENSIONS`);
a value written in another unit is an error that names the expected unit,
e.g. ``expected a capacitance in F (e.g. "10 uF"), got "10 mH"``.

The parser is small and hand-written: the number is read as a
:class:`decimal.Decimal` and scaled by the prefix's power of ten before it is
turned into a float, so ``"10 uF"`` gives exactly the float nearest to
1e-5 F (no ``9.999999999999999e-06``).

Pure functions, no printing; errors raise :class:`UnitError` with a message
that the case-file reader prefixes with the file, table and key.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from decimal import Decimal, InvalidOperation

__all__ = [
    "DIMENSIONS",
    "Dimension",
    "UnitError",
    "expected_text",
    "format_quantity",
    "parse_quantity",
    "parse_quantity_unit",
    "parse_tolerance",
    "split_quantity",
]

#: SI prefixes understood in front of a unit, as powers of ten.
#: Micro has three spellings: ASCII "u", the micro sign U+00B5 and Greek mu U+03BC.
PREFIXES: dict[str, int] = {
    "p": -12,
    "n": -9,
    "u": -6,
    "\u00b5": -6,
    "\u03bc": -6,
    "m": -3,
    "k": 3,
    "M": 6,
    "G": 9,
}


class UnitError(ValueError):
    """A value that cannot be read as the expected quantity (one-line message)."""


@dataclass(frozen=True)
class Dimension:
    """A kind of quantity a case-file key expects.

    name: short identifier used in code (``"inductance"``).
    described: how error messages name it (``"an inductance"``).
    base_unit: the SI unit values are returned in (``"H"``).
    spellings: accepted spellings of the base unit, after removing blanks
    (``"Ohm"``, ``"ohm"``, ``"Ω"``); a prefix may stand in front of each when
    ``prefixable``. ``example``: a valid value shown in error messages.
    ``scale``: factor from the written unit to the returned value (0.01 for
    percent, which is returned as a fraction; a bare number is already a
    fraction and is not scaled).
    """

    name: str
    described: str
    base_unit: str
    spellings: tuple[str, ...]
    example: str
    prefixable: bool = True
    scale: float = 1.0


_OHM = ("Ohm", "ohm", "Ohms", "ohms", "\u03a9", "\u2126")

#: The dimensions known to case files, by name.
DIMENSIONS: dict[str, Dimension] = {
    d.name: d
    for d in (
        Dimension("inductance", "an inductance", "H", ("H",), "1.8 mH"),
        Dimension("capacitance", "a capacitance", "F", ("F",), "10 uF"),
        Dimension("resistance", "a resistance", "Ohm", _OHM, "20 mOhm"),
        Dimension("frequency", "a frequency", "Hz", ("Hz",), "10 kHz"),
        Dimension("angular_frequency", "an angular frequency", "rad/s", ("rad/s",), "5 rad/s"),
        Dimension("gain", "a gain", "V/A", ("V/A",), "6 V/A"),
        Dimension(
            "integral_gain",
            "an integral gain",
            "V/A/s",
            ("V/A/s", "V/(A*s)", "V/(As)", "V/(A\u00b7s)", "V/As", "V/(A.s)"),
            "3000 V/A/s",
        ),
        Dimension("voltage", "a voltage", "V", ("V",), "400 V"),
        Dimension("current", "a current", "A", ("A",), "40 A"),
        Dimension("apparent_power", "an apparent power", "VA", ("VA",), "10 kVA"),
        Dimension("power", "a power", "W", ("W",), "250 W"),
        Dimension("time", "a time", "s", ("s",), "50 us"),
        Dimension("percent", "a percentage", "%", ("%",), "10 %", prefixable=False, scale=0.01),
        Dimension("ratio", "a plain number", "", (), "0.5", prefixable=False),
    )
}

_NUMBER = re.compile(r"^\s*([+-]?(?:\d[\d_]*(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?)\s*(.*?)\s*$", re.DOTALL)


def _dimension(dimension: str | Dimension) -> Dimension:
    if isinstance(dimension, Dimension):
        return dimension
    try:
        return DIMENSIONS[dimension]
    except KeyError:
        raise ValueError(f"unknown dimension {dimension!r}; known: {', '.join(DIMENSIONS)}") from None


def expected_text(dimension: str | Dimension) -> str:
    """How error messages describe what a key expects, e.g.
    ``a capacitance in F (e.g. "10 uF")``."""
    d = _dimension(dimension)
    if d.name == "ratio":
        return f'a plain number (e.g. {d.example})'
    return f'{d.described} in {d.base_unit} (e.g. "{d.example}")'


#: Longer quoted values are cut in messages (a message stays one readable line).
SHOWN_MAX_CHARS = 60


def shown(value: object) -> str:
    """A case-file value as error messages quote it (TOML spelling): line
    breaks and other control characters escaped (``\\n``), long texts and
    numbers cut to :data:`SHOWN_MAX_CHARS` characters with ``...``."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        text = "".join(c if c.isprintable() else repr(c)[1:-1] for c in value)
        if len(text) > SHOWN_MAX_CHARS:
            text = text[: SHOWN_MAX_CHARS - 3] + "..."
        return f'"{text}"'
    if isinstance(value, dict):
        return "a table"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, int) and abs(value) >= 10**SHOWN_MAX_CHARS:
        return f"a whole number of more than {SHOWN_MAX_CHARS} digits"
    return str(value)


def split_quantity(text: str) -> tuple[Decimal, str]:
    """Split ``"1.8 mH"`` into ``(Decimal("1.8"), "mH")``.

    Blanks inside the unit are removed (``"V / A"`` -> ``"V/A"``). Raises
    :class:`UnitError` when the string does not start with a number.
    """
    m = _NUMBER.match(text)
    if not m:
        raise UnitError(f'not a number with a unit: {shown(text)}')
    try:
        number = Decimal(m.group(1).replace("_", ""))
    except InvalidOperation:  # pragma: no cover - the regex admits only valid numbers
        raise UnitError(f'not a number with a unit: {shown(text)}') from None
    unit = re.sub(r"\s+", "", m.group(2))
    return number, unit


def to_float(value) -> float:
    """``float(value)`` for a TOML number or a Decimal; inf instead of an
    OverflowError for a whole number beyond the double range."""
    try:
        return float(value)
    except (OverflowError, ArithmeticError):
        return math.inf if value > 0 else -math.inf


def _finite_float(number: Decimal) -> float:
    """``float(number)``; inf for a magnitude beyond the double range (the
    callers refuse it), 0.0 below the smallest double."""
    try:
        return float(number)
    except (ArithmeticError, ValueError):
        return math.inf


def _unit_exponent(unit: str, d: Dimension) -> int | None:
    """Power of ten of ``unit`` relative to the dimension's base unit, or None."""
    if unit in d.spellings:
        return 0
    if d.prefixable and len(unit) > 1 and unit[0] in PREFIXES and unit[1:] in d.spellings:
        return PREFIXES[unit[0]]
    return None


def parse_quantity_unit(value: object, dimension: str | Dimension) -> tuple[float, str]:
    """Read ``value`` as a quantity of ``dimension``.

    Returns ``(value_in_SI_base_unit, unit_as_written)``; the unit is ``""``
    for a bare number. Raises :class:`UnitError` (one line) for anything else:
    a wrong unit, a non-numeric string, a boolean, a list or table, or a
    non-finite number.
    """
    d = _dimension(dimension)
    if isinstance(value, bool) or not isinstance(value, (int, float, str)):
        raise UnitError(f"expected {expected_text(d)}, got {shown(value)}")
    if isinstance(value, (int, float)):
        try:
            x = float(value)
        except OverflowError:  # a whole number beyond the range of a double
            x = math.inf
        if not math.isfinite(x):
            raise UnitError(f"expected {expected_text(d)}, got {shown(value)} (not a finite number)")
        return x, ""
    try:
        number, unit = split_quantity(value)
    except UnitError:
        raise UnitError(f"expected {expected_text(d)}, got {shown(value)}") from None
    if unit == "":
        x_exact = number  # a bare number is in the base unit (a fraction for percent)
    else:
        exponent = _unit_exponent(unit, d)
        if exponent is None:
            raise UnitError(f"expected {expected_text(d)}, got {shown(value)}")
        try:
            x_exact = number.scaleb(exponent)
            if d.scale != 1.0:
                x_exact = x_exact * Decimal(repr(d.scale))
        except ArithmeticError:  # decimal.Overflow: an exponent beyond the decimal context
            x_exact = Decimal("Infinity")
    x = _finite_float(x_exact)
    if not math.isfinite(x):
        raise UnitError(f"expected {expected_text(d)}, got {shown(value)} (not a finite number)")
    return x, unit


def parse_quantity(value: object, dimension: str | Dimension) -> float:
    """Read ``value`` (``"1.8 mH"``, ``1.8e-3``, ``"1.8e-3"``) as a quantity of
    ``dimension`` and return it in the SI base unit (H, F, Ohm, Hz, rad/s,
    V/A, V/A/s, V, A, VA, W, s; percent as a fraction).

    >>> parse_quantity("10 uF", "capacitance")
    1e-05
    >>> parse_quantity("20 m\u03a9", "resistance")
    0.02
    >>> parse_quantity(50, "frequency")
    50.0
    """
    return parse_quantity_unit(value, dimension)[0]


_PM = ("\u00b1", "+-", "+/-")


def parse_tolerance(value: object) -> tuple[float, float]:
    """Read a component tolerance and return ``(low, high)`` as fractions,
    ``low <= 0 <= high``.

    Accepted: ``"±10 %"`` (also ``"+-10 %"``, ``"+/-10 %"``) -> (-0.1, 0.1);
    an unsigned ``"10 %"`` means the same; ``"-20 %"`` -> (-0.2, 0.0)
    (one-sided, e.g. an inductor losing inductance at high current);
    ``"+5 %"`` -> (0.0, 0.05); two one-sided parts separated by ``/`` or
    ``,``: ``"-20 % / +5 %"`` -> (-0.2, 0.05). A bare number is a fraction
    (``0.1`` = ±10 %).
    """
    if isinstance(value, bool) or not isinstance(value, (int, float, str)):
        raise UnitError(f'expected a tolerance in % (e.g. "\u00b110 %"), got {shown(value)}')
    if isinstance(value, (int, float)):
        try:
            x = abs(float(value))
        except OverflowError:
            x = math.inf
        if not math.isfinite(x):
            raise UnitError(f'expected a tolerance in % (e.g. "\u00b110 %"), got {shown(value)}')
        return -x, x
    text = value.strip()
    for pm in _PM:
        if text.startswith(pm):
            x = abs(_tolerance_part(text[len(pm):], value))
            return -x, x
    parts = [p for p in re.split(r"\s*[/,]\s*(?=[+-])", text) if p]
    if len(parts) == 1:
        p = parts[0]
        x = _tolerance_part(p, value)
        if p.startswith("-"):
            return x, 0.0
        if p.startswith("+"):
            return 0.0, x
        return -abs(x), abs(x)
    if len(parts) == 2:
        a, b = (_tolerance_part(p, value) for p in parts)
        low, high = min(a, b), max(a, b)
        if low > 0 or high < 0:
            raise UnitError(f'expected a tolerance with one negative and one positive part, got {shown(value)}')
        return low, high
    raise UnitError(f'expected a tolerance in % (e.g. "\u00b110 %"), got {shown(value)}')


def _tolerance_part(text: str, original: str) -> float:
    try:
        number, unit = split_quantity(text)
    except UnitError:
        raise UnitError(f'expected a tolerance in % (e.g. "\u00b110 %"), got {shown(original)}') from None
    if unit in ("%", ""):
        try:
            x = _finite_float(number / 100 if unit == "%" else number)
        except ArithmeticError:
            x = math.inf
        if not math.isfinite(x):
            raise UnitError(f'expected a tolerance in % (e.g. "\u00b110 %"), got {shown(original)} (not a finite number)')
        return x
    raise UnitError(f'expected a tolerance in % (e.g. "\u00b110 %"), got {shown(original)}')


_ENGINEERING = ((12, "T"), (9, "G"), (6, "M"), (3, "k"), (0, ""), (-3, "m"), (-6, "u"), (-9, "n"), (-12, "p"))


def format_quantity(value: float | None, unit: str, digits: int = 4, prefix: bool = True) -> str:
    """Format ``value`` (SI base unit) with an engineering prefix, ASCII only:
    ``format_quantity(1.8e-3, "H")`` -> ``"1.8 mH"``,
    ``format_quantity(1666.67, "Hz")`` -> ``"1.667 kHz"``. ``digits`` is the
    number of significant digits; ``prefix=False`` keeps the base unit
    (for gains in V/A). None and non-finite values give ``"n/a"`` / ``"inf"``."""
    if value is None:
        return "n/a"
    if not math.isfinite(value):
        return ("-inf " if value < 0 else "inf ") + unit if unit else ("-inf" if value < 0 else "inf")
    sep = " " if unit else ""
    if not prefix or value == 0:
        return f"{value:.{digits}g}{sep}{unit}"
    exp3 = int(math.floor(math.log10(abs(value)) / 3.0)) * 3
    exp3 = max(-12, min(12, exp3))
    mantissa = value / 10.0**exp3
    text = f"{mantissa:.{digits}g}"
    if abs(float(text)) >= 1000.0 and exp3 < 12:  # rounding carried over, e.g. 999.99 -> 1000
        exp3 += 3
        text = f"{value / 10.0**exp3:.{digits}g}"
    name = dict(_ENGINEERING)[exp3]
    return f"{text}{sep}{name}{unit}"
