"""The current controller as the firmware runs it: difference equations,
firmware units, quantised coefficients and a stability re-check.

Conventions (the same in the C header, the JSON and ``docs/firmware.md``)
----------------------------------------------------------------------------
Per sampling period ``Ts`` [s], at sample k, in this order:

1. sample the regulated current ``i_fb`` (grid-side i2 or converter-side i1)
   and the capacitor current ``ic``;
2. ``e[k] = i_ref[k] - i_fb[k]``;
3. every *section* j (the integrator, or one resonator per harmonic) runs
   the direct form I recurrence::

       y_j[k] = b0_j*e[k] + b1_j*e[k-1] + b2_j*e[k-2] - a1_j*y_j[k-1] - a2_j*y_j[k-2]

   (a0 = 1; the integrator is first order: b2 = a2 = 0 and a1 = -1);
4. ``uc[k] = Kp*e[k] + sum_j y_j[k]``;
5. ``u[k] = uc[k] - Hi*ic[k]`` (capacitor-current feedback, the damping gain);
6. ``u[k]`` is handed to the modulator so that it takes effect at
   ``(k + delay)*Ts`` (``delay`` = the case's computation delay in sampling
   periods; 1 means the next period);
7. shift the histories: ``e[k-2] <- e[k-1]``, ``e[k-1] <- e[k]``,
   ``y_j[k-2] <- y_j[k-1]``, ``y_j[k-1] <- y_j[k]``. All histories start at 0.

In SI the gains are volts of converter voltage per ampere (the modulator
gain folded in, as in the engine). With a ``[firmware]`` table giving the
sensor and modulator scaling, the same equations are also given in
*firmware units*: ``e`` and ``ic`` in ADC counts, ``u`` in modulator compare
counts, every gain in counts per count (``[count/count]``).

Direct form I is used because its only states are past inputs and outputs
(easy to inspect and to saturate) and, in fixed point, a wide accumulator
needs a single rounding per output (common practice; A. V. Oppenheim and
R. W. Schafer, "Discrete-Time Signal Processing", 3rd ed., Pearson, 2010,
ch. 6, structures for discrete-time systems -- from memory for the chapter).

Quantisation
------------
The re-check models *coefficient* quantisation only: every gain and
section coefficient is rounded to the chosen format, the controller is
rebuilt from the rounded values and the closed loop is analysed again
(closed-loop eigenvalues for the verdict, the margin routines of
:mod:`loopcheck.engine.margins` for the margins). Signal word lengths, rounding of
products, overflow and limit cycles in the firmware are *not* modelled.

The denominator of a lightly damped resonator at a low frequency relative to
fs has ``a1 = -2 r cos(theta)`` close to -2 and ``a2 = r^2`` close to 1, so
rounding them moves the pole radius ``sqrt(a2)`` and angle
``acos(-a1 / (2 sqrt(a2)))`` a long way (Oppenheim and Schafer, 2010,
sec. 6.8-6.9, coefficient quantisation -- from memory for the section
numbers); a pole can land on or outside the unit circle, or the pair can
become real and the resonance is gone.

Pure computation: nothing here prints.
"""

from __future__ import annotations

import dataclasses
import math
import re
from dataclasses import dataclass

import numpy as np

from loopcheck.engine.analysis import analyse_loop
from loopcheck.engine.controller import DiscreteSS, controller_blocks, parallel, proportional_block
from loopcheck.engine.loop import build_loop
from loopcheck.engine.model import Design
from loopcheck.engine.results import GainMargin
from loopcheck.engine.verdict import TOLERANCE

__all__ = [
    "ROUNDING_MODES",
    "DEFAULT_PEAK_SHIFT_LIMIT",
    "FirmwareFormatError",
    "NumberFormat",
    "FirmwareSettings",
    "FirmwareScaling",
    "GAIN_ERROR_LIMIT",
    "FIRMWARE_KEYS",
    "controller_frequency_response",
    "Section",
    "ControllerCoefficients",
    "QValue",
    "QSection",
    "QuantisedController",
    "LoopFigures",
    "PoleShift",
    "Recheck",
    "FirmwareExport",
    "parse_number_format",
    "round_scaled",
    "quantise_value",
    "controller_sections",
    "scale_to_firmware",
    "quantise_controller",
    "section_poles",
    "section_block",
    "loop_figures",
    "recheck",
    "export_controller",
    "run_difference_equations",
    "read_firmware_settings",
]

#: Rounding modes of the coefficient quantiser (applied to x * 2^fraction_bits):
#: ``nearest-even`` ties to the even integer (IEEE 754 default, Python's round());
#: ``nearest-away`` ties away from zero; ``nearest-up`` ties toward +infinity,
#: i.e. floor(y + 1/2), what adding half an LSB before an arithmetic right shift
#: gives; ``floor`` toward -infinity (a plain arithmetic right shift);
#: ``zero`` toward zero (truncation of the magnitude).
ROUNDING_MODES = ("nearest-even", "nearest-away", "nearest-up", "floor", "zero")

#: Default limit on how far quantisation may move a resonator pole's
#: frequency before a warning, as a fraction of the tuned frequency
#: (0.1 %: 0.05 Hz at 50 Hz). A loopcheck default, not a standard value.
DEFAULT_PEAK_SHIFT_LIMIT = 1e-3


class FirmwareFormatError(ValueError):
    """A coefficient cannot be represented in the chosen number format.

    ``key`` names the ``[firmware]`` key the user must change."""

    def __init__(self, message: str, key: str = "format"):
        super().__init__(message)
        self.key = key


# ---------------------------------------------------------------------------
# number formats and rounding
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class NumberFormat:
    """How the firmware stores coefficients.

    kind: ``"float64"`` (no rounding beyond double precision), ``"float32"``
    (IEEE 754 single, round to nearest even) or ``"fixed"`` (signed two's
    complement integers with ``fraction_bits`` bits after the binary point:
    the stored integer q stands for q * 2^-fraction_bits).
    word_bits: total bits including the sign (fixed); 32 or 64 for floats.
    rounding: one of :data:`ROUNDING_MODES` (fixed only).
    """

    kind: str = "float64"
    word_bits: int = 64
    fraction_bits: int = 0
    rounding: str = "nearest-even"

    @property
    def is_fixed(self) -> bool:
        return self.kind == "fixed"

    @property
    def integer_bits(self) -> int:
        """Bits before the binary point, sign bit not counted (fixed)."""
        return self.word_bits - 1 - self.fraction_bits

    @property
    def lsb(self) -> float:
        """Value of one least significant bit [same unit as the coefficient]."""
        return math.ldexp(1.0, -self.fraction_bits)

    @property
    def int_min(self) -> int:
        return -(1 << (self.word_bits - 1))

    @property
    def int_max(self) -> int:
        return (1 << (self.word_bits - 1)) - 1

    @property
    def c_type(self) -> str:
        """Smallest C99 exact-width signed type holding the word (fixed),
        or ``float`` / ``double``."""
        if self.kind == "float32":
            return "float"
        if self.kind == "float64":
            return "double"
        for bits in (8, 16, 32, 64):
            if self.word_bits <= bits:
                return f"int{bits}_t"
        raise ValueError("word longer than 64 bits")  # pragma: no cover - rejected when read

    @property
    def range_text(self) -> str:
        """Exact representable range, e.g. ``-4 .. 4 - 2^-13`` (fixed)."""
        return f"{-(2.0**self.integer_bits):g} .. {2.0**self.integer_bits:g} - 2^-{self.fraction_bits}"

    @property
    def label(self) -> str:
        """Short name: ``Q2.13``, ``float32``, ``float64``."""
        if self.is_fixed:
            return f"Q{self.integer_bits}.{self.fraction_bits}"
        return self.kind

    @property
    def description(self) -> str:
        """One line stating exactly what the format means."""
        if self.is_fixed:
            return (
                f"{self.label}: signed two's complement, {self.word_bits}-bit word (1 sign + {self.integer_bits} integer "
                f"+ {self.fraction_bits} fraction bits), value = integer * 2^-{self.fraction_bits}, "
                f"range {self.range_text}, LSB {self.lsb:.6g}, rounding {self.rounding}"
            )
        if self.kind == "float32":
            return "float32: IEEE 754 single precision, round to nearest even"
        return "float64: IEEE 754 double precision (coefficients as computed)"


_Q_PATTERN = re.compile(r"^[Qq](?:(\d+)\.)?(\d+)$")


def parse_number_format(text: str, rounding: str = "nearest-even") -> tuple[NumberFormat, list[str]]:
    """Read ``"Q2.13"``, ``"Q15"``, ``"float32"`` or ``"float64"``.

    ``Qm.n`` means m integer bits *not counting the sign* and n fraction bits,
    a word of 1 + m + n bits (``Q15`` = ``Q0.15``, 16 bits). Returns the format
    and notes (e.g. when the word length is not 8/16/32/64 bits, which hints
    that the other Q convention, sign counted in m, was meant). Raises
    ValueError with a one-line message."""
    t = text.strip()
    low = t.lower()
    if low in ("float32", "float64"):
        return NumberFormat(kind=low, word_bits=32 if low == "float32" else 64), []
    m = _Q_PATTERN.match(t)
    if not m:
        raise ValueError(f'expected "Q<integer bits>.<fraction bits>" (e.g. "Q2.29"), "float32" or "float64", got "{text}"')
    ib = int(m.group(1)) if m.group(1) is not None else 0
    fb = int(m.group(2))
    word = 1 + ib + fb
    if word > 64:
        raise ValueError(f'"{text}" needs a {word}-bit word (1 sign + {ib} + {fb} bits); at most 64 bits are supported')
    if word < 2:
        raise ValueError(f'"{text}" leaves no magnitude bits')
    if rounding not in ROUNDING_MODES:
        raise ValueError(f"unknown rounding {rounding!r}")
    notes = []
    if word not in (8, 16, 32, 64):
        notes.append(
            f'"{text}" is read as a {word}-bit word (1 sign + {ib} integer + {fb} fraction bits); '
            f"if the sign was counted in the integer bits, write Q{max(ib - 1, 0)}.{fb}"
        )
    return NumberFormat(kind="fixed", word_bits=word, fraction_bits=fb, rounding=rounding), notes


def round_scaled(y: float, mode: str) -> int:
    """Round the real number y (already scaled by 2^fraction_bits) to an
    integer with the given rounding mode (see :data:`ROUNDING_MODES`).

    Works on the exact binary value of y: floor and the fractional part of a
    finite double are exact."""
    if not math.isfinite(y):
        raise ValueError("cannot round a non-finite value")
    fl = math.floor(y)
    frac = y - fl  # exact: y and floor(y) share the exponent range
    if mode == "floor":
        return fl
    if mode == "zero":
        return fl if y >= 0 or frac == 0 else fl + 1
    if frac > 0.5:
        return fl + 1
    if frac < 0.5:
        return fl
    # an exact tie
    if mode == "nearest-even":
        return fl if fl % 2 == 0 else fl + 1
    if mode == "nearest-away":
        return fl + 1 if y > 0 else fl
    if mode == "nearest-up":
        return fl + 1
    raise ValueError(f"unknown rounding mode {mode!r}")


@dataclass(frozen=True)
class QValue:
    """One coefficient before and after quantisation.

    ideal: the exact value; value: what the firmware stores, as a real
    number; integer: the stored integer (fixed point) or None (floats);
    relative_error: (value - ideal)/ideal [-] (0 when the ideal value is 0,
    which every format stores exactly; -1 when a non-zero coefficient
    rounds to 0). Unit of ideal and value: that of the coefficient."""

    ideal: float
    value: float
    integer: int | None
    relative_error: float


def quantise_value(x: float, fmt: NumberFormat, what: str = "coefficient") -> QValue:
    """Quantise one coefficient. Raises :class:`FirmwareFormatError` when it
    does not fit the format (``what`` names it in the message)."""
    x = float(x)
    if fmt.kind == "float64":
        return QValue(x, x, None, 0.0)
    if fmt.kind == "float32":
        with np.errstate(over="ignore"):
            v32 = np.float32(x)
        if not np.isfinite(v32):
            raise FirmwareFormatError(f"{what} = {x:.10g} overflows float32")
        v = float(v32)
    else:
        q = round_scaled(math.ldexp(x, fmt.fraction_bits), fmt.rounding)
        if q < fmt.int_min or q > fmt.int_max:
            need = _integer_bits_needed(x)
            raise FirmwareFormatError(
                f"{what} = {x:.10g} does not fit {fmt.label} (range {fmt.range_text}); "
                f"it needs at least {need} integer bits"
            )
        v = math.ldexp(float(q), -fmt.fraction_bits)
        return QValue(x, v, q, _rel(v, x))
    return QValue(x, v, None, _rel(v, x))


def _integer_bits_needed(x: float) -> int:
    """Integer bits (sign not counted) so that x fits a signed word."""
    m = 0
    while not (-(2.0**m) <= x < 2.0**m):
        m += 1
    return m


def _rel(v: float, x: float) -> float:
    return 0.0 if x == 0.0 else (v - x) / x


# ---------------------------------------------------------------------------
# the controller as sections
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class Section:
    """One dynamic part of the controller in direct form I.

    y[k] = b0 e[k] + b1 e[k-1] (+ b2 e[k-2]) - a1 y[k-1] (- a2 y[k-2]).

    name: ``"I"`` (integrator) or ``"R<h>"`` (resonator at harmonic h);
    kind: ``"integrator"`` or ``"resonator"``; harmonic: h (None for the
    integrator); tuned_frequency_hz: h * fundamental [Hz] (None for the
    integrator); method: the discretisation method;
    b: numerator (b0, b1[, b2]) [gain unit of the enclosing
    :class:`ControllerCoefficients`]; a: (a1[, a2]) [-], a0 = 1 implied.
    """

    name: str
    kind: str
    harmonic: int | None
    tuned_frequency_hz: float | None
    method: str
    b: tuple[float, ...]
    a: tuple[float, ...]

    @property
    def order(self) -> int:
        return len(self.a)


@dataclass(frozen=True)
class ControllerCoefficients:
    """The whole controller: ``u = Kp e + sum(sections) - Hi ic``.

    gain_unit: ``"V/A"`` (SI: converter volts per ampere) or ``"count/count"``
    (firmware units: modulator counts per ADC count); Kp, Hi and every
    section numerator are in that unit, the denominators are dimensionless.
    """

    gain_unit: str
    Kp: float
    Hi: float
    sections: tuple[Section, ...]


def _tustin_resonator(bc: float, w0: float, wc: float, T: float) -> tuple[tuple[float, ...], tuple[float, ...]]:
    """Closed-form bilinear transform of bc*s/(s^2 + 2 wc s + w0^2) with
    s = (2/T)(z-1)/(z+1): b = bc*K/a0 * (1, 0, -1),
    a = (2 (w0^2 - K^2)/a0, (K^2 - 2 wc K + w0^2)/a0), K = 2/T,
    a0 = K^2 + 2 wc K + w0^2 (so a2 = 1 exactly for wc = 0).

    References
    ----------
    .. [1] A. V. Oppenheim and R. W. Schafer, "Discrete-Time Signal
       Processing", 3rd ed., Pearson, 2010, sec. 7.2 (bilinear
       transformation) -- from memory for the section number.
    """
    K = 2.0 / T
    a0 = K * K + 2.0 * wc * K + w0 * w0
    g = bc * K / a0
    return (g, 0.0, -g), (2.0 * (w0 * w0 - K * K) / a0, (K * K - 2.0 * wc * K + w0 * w0) / a0)


def _exp_denominator(w0: float, wc: float, Ts: float) -> tuple[float, float]:
    """Denominator (a1, a2) with the poles e^{p Ts} of s^2 + 2 wc s + w0^2
    (step- and impulse-invariant methods map poles this way)."""
    a2 = math.exp(-2.0 * wc * Ts)
    if wc < w0:
        wd = math.sqrt(w0 * w0 - wc * wc)
        a1 = -2.0 * math.exp(-wc * Ts) * math.cos(wd * Ts)
    else:
        r = math.sqrt(wc * wc - w0 * w0)
        a1 = -(math.exp((-wc + r) * Ts) + math.exp((-wc - r) * Ts))
    return a1, a2


def _numerator_from_block(block: DiscreteSS, a1: float, a2: float) -> tuple[float, float, float]:
    """Numerator of C (zI - A)^-1 B + D for a 2-state block over the monic
    denominator z^2 + a1 z + a2: D*(z^2 + a1 z + a2) + C adj(zI - A) B."""
    A = np.asarray(block.A, dtype=float).reshape(2, 2)
    B = np.asarray(block.B, dtype=float).reshape(2, 1)
    C = np.asarray(block.C, dtype=float).reshape(1, 2)
    D = float(np.asarray(block.D).reshape(()))
    adj0 = np.array([[-A[1, 1], A[0, 1]], [A[1, 0], -A[0, 0]]])
    CB = float((C @ B).reshape(()))
    Cadj0B = float((C @ adj0 @ B).reshape(()))
    return D, CB + D * a1, Cadj0B + D * a2


def controller_sections(design: Design) -> ControllerCoefficients:
    """The design's discrete controller as direct-form-I sections, in SI
    (gains [V/A]), for the case's sampling period.

    Integrator Ki/s (Franklin, Powell and Workman, "Digital Control of
    Dynamic Systems", 3rd ed., 1998, ch. 6): forward Euler b = (0, Ki Ts),
    backward Euler b = (Ki Ts, 0), Tustin b = (Ki Ts/2, Ki Ts/2); a1 = -1.
    Resonators (Yepes et al., IEEE Trans. Power Electron. 25(7), 2010):
    Tustin and prewarped Tustin in closed form (:func:`_tustin_resonator`,
    prewarp T = 2 tan(w0 Ts/2)/w0); step- and impulse-invariant ones with
    the exact pole map z = e^{p Ts} and the engine's numerator.

    References
    ----------
    .. [1] G. F. Franklin, J. D. Powell and M. L. Workman, "Digital Control
       of Dynamic Systems", 3rd ed., Addison-Wesley, 1998, ch. 6.
    .. [2] A. G. Yepes, F. D. Freijedo, J. Doval-Gandoy, O. Lopez, J. Malvar
       and P. Fernandez-Comesana, "Effects of Discretization Methods on the
       Performance of Resonant Controllers", IEEE Trans. Power Electron.,
       vol. 25, no. 7, pp. 1692-1712, 2010.
    """
    c = design.control
    Ts = design.sampling.Ts_s
    f1 = design.grid.f_hz
    blocks = controller_blocks(c, f1, Ts, keep_inert=True)
    Kp = float(np.asarray(blocks[0].D).reshape(()))
    sections: list[Section] = []
    if c.kind == "PI":
        blk = blocks[1]
        D = float(np.asarray(blk.D).reshape(()))
        CB = float((np.asarray(blk.C) @ np.asarray(blk.B)).reshape(()))
        sections.append(Section("I", "integrator", None, None, c.integrator, (D, CB - D), (-1.0,)))
    elif c.kind == "PR":
        for h, blk in zip((1,) + tuple(c.harmonics), blocks[1:]):
            w0 = 2.0 * math.pi * f1 * h
            wc = c.wc_rad_s
            bc = 2.0 * c.Kr * wc if wc > 0 else c.Kr
            if c.resonator in ("tustin", "tustin-prewarp"):
                T = Ts if c.resonator == "tustin" else 2.0 * math.tan(w0 * Ts / 2.0) / w0
                b, a = _tustin_resonator(bc, w0, wc, T)
            else:
                a1, a2 = _exp_denominator(w0, wc, Ts)
                b, a = _numerator_from_block(blk, a1, a2), (a1, a2)
            sections.append(Section(f"R{h}", "resonator", h, f1 * h, c.resonator, tuple(b), tuple(a)))
    return ControllerCoefficients("V/A", Kp, float(c.Hi_V_per_A), tuple(sections))


def scale_to_firmware(si: ControllerCoefficients, fb_scale: float, ic_scale: float) -> ControllerCoefficients:
    """The same controller in firmware units [count/count].

    fb_scale = modulator counts per volt / feedback-current counts per
    ampere; ic_scale the same with the capacitor-current counts per ampere
    (both [count/count per V/A]). Numerators, Kp scale by fb_scale, Hi by
    ic_scale; denominators are unchanged."""
    secs = tuple(dataclasses.replace(s, b=tuple(x * fb_scale for x in s.b)) for s in si.sections)
    return ControllerCoefficients("count/count", si.Kp * fb_scale, si.Hi * ic_scale, secs)


@dataclass(frozen=True)
class QSection:
    """A section with quantised coefficients: ``ideal`` the exact section,
    b (b0, b1[, b2]) and a (a1[, a2]) as stored."""

    ideal: Section
    b: tuple[QValue, ...]
    a: tuple[QValue, ...]

    @property
    def name(self) -> str:
        return self.ideal.name


@dataclass(frozen=True)
class QuantisedController:
    """The controller the firmware stores: ``number_format`` applied to the
    coefficients in ``gain_unit`` (firmware units when a scaling was given,
    else V/A)."""

    number_format: NumberFormat
    gain_unit: str
    Kp: QValue
    Hi: QValue
    sections: tuple[QSection, ...]

    def as_coefficients(self) -> ControllerCoefficients:
        """The stored values as a :class:`ControllerCoefficients` (same unit)."""
        secs = tuple(
            dataclasses.replace(qs.ideal, b=tuple(v.value for v in qs.b), a=tuple(v.value for v in qs.a))
            for qs in self.sections
        )
        return ControllerCoefficients(self.gain_unit, self.Kp.value, self.Hi.value, secs)

    def values(self) -> list[tuple[str, QValue]]:
        """Every stored coefficient with its name (``Kp``, ``Hi``, ``R1.b0``, ``R1.a1`` ...)."""
        out = [("Kp", self.Kp), ("Hi", self.Hi)]
        for qs in self.sections:
            out += [(f"{qs.name}.b{i}", v) for i, v in enumerate(qs.b)]
            out += [(f"{qs.name}.a{i + 1}", v) for i, v in enumerate(qs.a)]
        return out


def quantise_controller(coeffs: ControllerCoefficients, fmt: NumberFormat) -> QuantisedController:
    """Quantise every gain and section coefficient (raises
    :class:`FirmwareFormatError` naming the first one that does not fit)."""
    u = coeffs.gain_unit
    Kp = quantise_value(coeffs.Kp, fmt, f"Kp ({u})")
    Hi = quantise_value(coeffs.Hi, fmt, f"Hi ({u})")
    secs = []
    for s in coeffs.sections:
        b = tuple(quantise_value(x, fmt, f"section {s.name} b{i} ({u})") for i, x in enumerate(s.b))
        a = tuple(quantise_value(x, fmt, f"section {s.name} a{i + 1}") for i, x in enumerate(s.a))
        secs.append(QSection(s, b, a))
    return QuantisedController(fmt, u, Kp, Hi, tuple(secs))


# ---------------------------------------------------------------------------
# poles and state-space blocks of sections
# ---------------------------------------------------------------------------


def section_poles(a: tuple[float, ...]) -> tuple[float, float, bool]:
    """Largest pole radius [-], pole angle [rad/sample] and whether the poles
    are a complex pair, for the denominator 1 + a1 z^-1 (+ a2 z^-2).

    Complex pair (a1^2 < 4 a2): radius sqrt(a2), angle
    atan2(sqrt(4 a2 - a1^2), -a1) (= acos(-a1/(2 sqrt(a2)))). Real poles:
    the larger magnitude of (-a1 +- sqrt(a1^2 - 4 a2))/2 and angle 0 or pi.
    """
    if len(a) == 1:
        p = -a[0]
        return abs(p), (0.0 if p >= 0 else math.pi), False
    a1, a2 = a
    disc = a1 * a1 - 4.0 * a2
    if disc < 0.0:
        return math.sqrt(a2), math.atan2(math.sqrt(-disc), -a1), True
    sq = math.sqrt(disc)
    roots = ((-a1 + sq) / 2.0, (-a1 - sq) / 2.0)
    p = max(roots, key=abs)
    return abs(p), (0.0 if p >= 0 else math.pi), False


def section_block(s: Section, scale: float = 1.0) -> DiscreteSS:
    """Controllable-canonical state space of a section, numerator divided by
    ``scale`` (to go back from firmware units to V/A)."""
    b = [x / scale for x in s.b]
    a = list(s.a)
    n = len(a)
    b = b + [0.0] * (n + 1 - len(b))
    A = np.zeros((n, n))
    A[0, :] = [-x for x in a]
    if n > 1:
        A[1:, :-1] = np.eye(n - 1)
    B = np.zeros((n, 1))
    B[0, 0] = 1.0
    C = np.array([[b[i + 1] - b[0] * a[i] for i in range(n)]])
    D = np.array([[b[0]]])
    return DiscreteSS(A, B, C, D)


def _section_response(s: Section, z: np.ndarray, scale: float = 1.0) -> np.ndarray:
    """b(z^-1)/a(z^-1) at the points z (low order, evaluated directly)."""
    zi = 1.0 / z
    num = sum((bk / scale) * zi**k for k, bk in enumerate(s.b))
    den = 1.0 + sum(ak * zi ** (k + 1) for k, ak in enumerate(s.a))
    with np.errstate(all="ignore"):
        return num / den


def controller_frequency_response(coeffs: ControllerCoefficients, f_hz, Ts_s: float, scale: float = 1.0) -> np.ndarray:
    """Kp + sum of sections at z = e^{j 2 pi f Ts} (complex, gain unit of
    ``coeffs`` divided by ``scale``); the damping gain is not included."""
    z = np.exp(1j * 2.0 * math.pi * np.atleast_1d(np.asarray(f_hz, dtype=float)) * Ts_s)
    return _ctrl_at(coeffs, z, scale)


# ---------------------------------------------------------------------------
# re-check
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class LoopFigures:
    """Verdict and margins of the loop with a given controller.

    verdict / stable / spectral_radius [-]: from the closed-loop eigenvalues;
    phase_margin_deg [deg]: smallest |phase margin| over the gain crossovers
    (None when not stable or no crossover); crossover_hz: frequencies of the
    gain crossovers [Hz]; gain_margin: the stable interval of controller-gain
    factor containing 1 (None when not stable); sensitivity_peak [-] and
    sensitivity_peak_hz [Hz]: max |1/(1+L)|; fundamental_error [-]:
    |1/(1+L)| at the fundamental, the steady-state tracking error ratio
    there (0 with an ideal resonator exactly on the fundamental)."""

    verdict: str
    stable: bool
    spectral_radius: float
    phase_margin_deg: float | None
    crossover_hz: tuple[float, ...]
    gain_margin: GainMargin | None
    sensitivity_peak: float
    sensitivity_peak_hz: float
    fundamental_error: float


@dataclass(frozen=True)
class PoleShift:
    """Where quantisation moved the poles of one section.

    radius_* [-]: largest pole magnitude; frequency_*_hz [Hz]: pole angle
    converted to frequency (0 for real poles); complex_* whether the poles
    are a complex pair; shift_fraction: (frequency_after - frequency_before)
    / tuned frequency [-] (None for the integrator)."""

    section: str
    tuned_frequency_hz: float | None
    radius_before: float
    radius_after: float
    frequency_before_hz: float
    frequency_after_hz: float
    complex_before: bool
    complex_after: bool
    shift_fraction: float | None


@dataclass(frozen=True)
class Recheck:
    """Loop figures before and after quantisation, pole movements and warnings.

    after is None when nothing was quantised (float64). peak_shift_limit:
    the fraction of the tuned frequency a resonator pole may move before a
    warning [-]."""

    before: LoopFigures
    after: LoopFigures | None
    poles: tuple[PoleShift, ...]
    peak_shift_limit: float
    warnings: tuple[str, ...]


def loop_figures(design: Design, coeffs: ControllerCoefficients, fb_scale: float = 1.0, ic_scale: float = 1.0,
                 tol: float = TOLERANCE) -> LoopFigures:
    """Analyse the design's loop with the controller ``coeffs`` (divided by
    the scales to get back to V/A) instead of the design's own.

    The plant, delay and damping loop come from :func:`loopcheck.engine.loop.build_loop`
    (with Hi = coeffs.Hi / ic_scale); the controller is rebuilt from the
    sections and connected with :func:`loopcheck.engine.loop.series_open_loop`.
    Verdict and margins by :func:`loopcheck.engine.analysis.analyse_loop`, the
    same code as for the design itself (see :mod:`loopcheck.engine.margins` for the
    methods and references)."""
    Hi = coeffs.Hi / ic_scale
    # a section whose numerator is all zero (Ki or Kr = 0, or quantised to 0)
    # never reaches the output: its pole is unobservable and must not decide
    # the verdict (see loopcheck.engine.controller.controller_blocks)
    blocks = [proportional_block(coeffs.Kp / fb_scale)] + [
        section_block(s, fb_scale) for s in coeffs.sections if any(x != 0.0 for x in s.b)
    ]
    base = build_loop(design, Hi_V_per_A=Hi)
    loop = dataclasses.replace(base, controller=parallel(blocks), blocks=tuple(blocks))
    a = analyse_loop(design, loop, tol)
    z1 = np.array([np.exp(1j * 2 * math.pi * design.grid.f_hz * design.sampling.Ts_s)])
    with np.errstate(all="ignore"):
        L1 = _ctrl_at(coeffs, z1, fb_scale)[0] * loop.plant_response(z1)[0]
        e1 = abs(1.0 / (1.0 + L1)) if np.isfinite(L1) else 0.0
    return LoopFigures(
        verdict=a.verdict,
        stable=a.stable,
        spectral_radius=a.spectral_radius,
        phase_margin_deg=a.phase_margin_deg,
        crossover_hz=tuple(c.frequency_hz for c in a.crossovers),
        gain_margin=a.gain_margin,
        sensitivity_peak=a.sensitivity_peak.value,
        sensitivity_peak_hz=a.sensitivity_peak.frequency_hz,
        fundamental_error=float(e1),
    )


def _ctrl_at(coeffs: ControllerCoefficients, z: np.ndarray, scale: float) -> np.ndarray:
    out = np.full(z.shape, coeffs.Kp / scale, dtype=complex)
    for s in coeffs.sections:
        out = out + _section_response(s, z, scale)
    return out


#: Relative change of a gain (Kp, Hi, a section's numerator) caused by
#: quantisation above which a warning is given (1 %; a loopcheck default).
GAIN_ERROR_LIMIT = 0.01


def _pole_shifts(q: QuantisedController, Ts: float) -> list[PoleShift]:
    to_hz = 1.0 / (2.0 * math.pi * Ts)
    out = []
    for qs in q.sections:
        s = qs.ideal
        rb, tb, cb = section_poles(s.a)
        ra, ta, ca = section_poles(tuple(v.value for v in qs.a))
        shift = None
        if s.tuned_frequency_hz:
            shift = (ta - tb) * to_hz / s.tuned_frequency_hz
        out.append(PoleShift(s.name, s.tuned_frequency_hz, rb, ra, tb * to_hz, ta * to_hz, cb, ca, shift))
    return out


def recheck(design: Design, stored: ControllerCoefficients, q: QuantisedController | None,
            fb_scale: float = 1.0, ic_scale: float = 1.0,
            peak_shift_limit: float = DEFAULT_PEAK_SHIFT_LIMIT, tol: float = TOLERANCE) -> Recheck:
    """Compare the loop with the exact coefficients ``stored`` and with the
    quantised ones ``q`` (None or float64: no quantisation, ``after`` None).

    Warnings (one line each) when: the quantised closed loop is not stable;
    a resonator's poles became real (resonance lost); a pole moved outside
    the unit circle or from inside onto it; a resonator pole's frequency
    moved by more than ``peak_shift_limit`` of its tuned frequency; a
    non-zero coefficient rounded to zero; a gain changed by more than
    :data:`GAIN_ERROR_LIMIT`."""
    Ts = design.sampling.Ts_s
    before = loop_figures(design, stored, fb_scale, ic_scale, tol)
    warnings: list[str] = []
    if not before.stable:
        warnings.append(
            f"the design itself is {before.verdict.upper()} (exact coefficients, spectral radius "
            f"{before.spectral_radius:.9f}): do not run this controller"
        )
    if q is None or q.number_format.kind == "float64":
        poles = []
        for s in stored.sections:
            r, t, c = section_poles(s.a)
            f = t / (2 * math.pi * Ts)
            poles.append(PoleShift(s.name, s.tuned_frequency_hz, r, r, f, f, c, c, 0.0 if s.tuned_frequency_hz else None))
        return Recheck(before, None, tuple(poles), peak_shift_limit, tuple(warnings))
    after = loop_figures(design, q.as_coefficients(), fb_scale, ic_scale, tol)
    poles = _pole_shifts(q, Ts)
    fmt = q.number_format.label
    if before.stable and not after.stable:
        warnings.append(
            f"with the {fmt} coefficients the closed loop is {after.verdict.upper()} (spectral radius "
            f"{after.spectral_radius:.9f}, exact {before.spectral_radius:.9f}): do not run this controller"
        )
    elif not before.stable and after.stable:
        warnings.append(
            f"with the {fmt} coefficients the loop happens to be stable (spectral radius {after.spectral_radius:.9f}), "
            f"but the exact design is not: a controller this sensitive to rounding is no design to run"
        )
    for p in poles:
        if p.tuned_frequency_hz is None:
            if p.radius_after > 1.0 + tol:
                warnings.append(f"integrator {p.section}: its pole moved outside the unit circle (radius {p.radius_after:.9f})")
            continue
        label = f"resonator {p.section} ({p.tuned_frequency_hz:g} Hz)"
        if p.complex_before and not p.complex_after:
            warnings.append(
                f"{label}: with {fmt} the poles became real (largest radius {p.radius_after:.9f}): "
                f"the resonance is lost"
            )
        if p.radius_after > 1.0 + tol:
            warnings.append(
                f"{label}: a pole moved OUTSIDE the unit circle (radius {p.radius_before:.9f} -> {p.radius_after:.9f}): "
                f"the section is unstable on its own and grows whenever the loop is open or saturated"
            )
        elif p.radius_before < 1.0 - tol and p.radius_after >= 1.0 - tol:
            warnings.append(
                f"{label}: its poles moved from inside onto the unit circle (radius {p.radius_before:.9f} -> "
                f"{p.radius_after:.9f}): the damping of the damped resonator is lost"
            )
        if p.complex_before and p.complex_after and abs(p.shift_fraction) > peak_shift_limit:
            warnings.append(
                f"{label}: the pole frequency moved from {p.frequency_before_hz:.4f} Hz to {p.frequency_after_hz:.4f} Hz "
                f"({100 * p.shift_fraction:+.3f} % of the tuned frequency, limit {100 * peak_shift_limit:g} %)"
            )
    for name, v in q.values():
        if v.ideal != 0.0 and v.value == 0.0:
            unit = "" if ".a" in name else f" {q.gain_unit}"
            warnings.append(f"{name} = {v.ideal:.6g}{unit} rounds to zero in {fmt}")
    for name, v in (("Kp", q.Kp), ("Hi", q.Hi)):
        if v.value != 0.0 and abs(v.relative_error) > GAIN_ERROR_LIMIT:
            warnings.append(f"{name} changes by {100 * v.relative_error:+.2f} % in {fmt} ({v.ideal:.6g} -> {v.value:.6g} {q.gain_unit})")
    for qs in q.sections:
        worst = max((v for v in qs.b if v.value != 0.0), key=lambda v: abs(v.relative_error), default=None)
        if worst is not None and abs(worst.relative_error) > GAIN_ERROR_LIMIT:
            warnings.append(
                f"section {qs.name}: its numerator changes by up to {100 * worst.relative_error:+.2f} % in {fmt} "
                f"(the section's gain moves by about as much)"
            )
    return Recheck(before, after, tuple(poles), peak_shift_limit, tuple(warnings))


# ---------------------------------------------------------------------------
# settings and the whole export
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class FirmwareScaling:
    """Sensor and modulator scaling.

    current_counts_per_A [count/A]: ADC counts per ampere of the regulated
    current; ic_counts_per_A [count/A]: the same for the capacitor current;
    modulator_counts_per_V [count/V]: compare counts per volt of converter
    voltage; notes: how each number was obtained (for the header)."""

    current_counts_per_A: float
    ic_counts_per_A: float
    modulator_counts_per_V: float
    notes: tuple[str, ...] = ()

    @property
    def fb_scale(self) -> float:
        """Controller gain in count/count per V/A."""
        return self.modulator_counts_per_V / self.current_counts_per_A

    @property
    def ic_scale(self) -> float:
        """Damping gain in count/count per V/A."""
        return self.modulator_counts_per_V / self.ic_counts_per_A


@dataclass(frozen=True)
class FirmwareSettings:
    """What a ``[firmware]`` table asks for.

    scaling: None for an export in SI only; number_format: coefficient
    format; c_prefix: prefix of every C symbol; peak_shift_limit [-]: see
    :class:`Recheck`."""

    scaling: FirmwareScaling | None = None
    number_format: NumberFormat = NumberFormat()
    c_prefix: str = "LC_"
    peak_shift_limit: float = DEFAULT_PEAK_SHIFT_LIMIT


@dataclass(frozen=True)
class FirmwareExport:
    """Everything the firmware needs, plus the re-check.

    fs_hz [Hz], Ts_s [s], delay_samples [sampling periods], f1_hz [Hz];
    feedback: ``"grid"`` (i2) or ``"converter"`` (i1) regulated;
    si: the controller in V/A; firmware: in count/count (None without a
    scaling); quantised: the stored coefficients (of ``firmware`` when
    given, else of ``si``); recheck: the loop before and after."""

    name: str
    fs_hz: float
    Ts_s: float
    delay_samples: float
    f1_hz: float
    feedback: str
    controller_kind: str
    integrator_method: str
    resonator_method: str
    si: ControllerCoefficients
    settings: FirmwareSettings
    firmware: ControllerCoefficients | None
    quantised: QuantisedController
    recheck: Recheck

    @property
    def stored(self) -> ControllerCoefficients:
        """The exact coefficients in the unit the firmware uses."""
        return self.firmware if self.firmware is not None else self.si


def export_unsupported(design: Design) -> str | None:
    """Why the firmware export cannot write ``design`` (one line naming the
    case key), or None: the exported difference equations hold the plain
    measured capacitor current, not a damping filter H(z)."""
    from loopcheck.engine.damping_text import is_filtered

    if is_filtered(design.control):
        return (f"[control] damping_filter: the firmware export writes the measured capacitor current only, "
                f"got {design.control.damping_filter.kind!r}; check, map, grid and pick model the filter exactly")
    return None


def export_controller(design: Design, settings: FirmwareSettings | None = None) -> FirmwareExport:
    """Difference equations, firmware units, quantisation and re-check of a
    design. Raises :class:`FirmwareFormatError` when a coefficient does not
    fit the chosen format, ValueError for a design it cannot export
    (:func:`export_unsupported`)."""
    if (why := export_unsupported(design)) is not None:
        raise ValueError(why)
    settings = settings or FirmwareSettings()
    si = controller_sections(design)
    sc = settings.scaling
    fb, ic = (sc.fb_scale, sc.ic_scale) if sc is not None else (1.0, 1.0)
    fw = scale_to_firmware(si, fb, ic) if sc is not None else None
    stored = fw if fw is not None else si
    q = quantise_controller(stored, settings.number_format)
    rc = recheck(design, stored, q, fb, ic, settings.peak_shift_limit)
    c = design.control
    return FirmwareExport(
        name=design.name,
        fs_hz=design.sampling.fs_hz,
        Ts_s=design.sampling.Ts_s,
        delay_samples=design.sampling.delay,
        f1_hz=design.grid.f_hz,
        feedback=c.feedback,
        controller_kind=c.kind,
        integrator_method=c.integrator,
        resonator_method=c.resonator,
        si=si,
        settings=settings,
        firmware=fw,
        quantised=q,
        recheck=rc,
    )


def run_difference_equations(coeffs: ControllerCoefficients, e, ic=None) -> np.ndarray:
    """Run the exported equations sample by sample exactly as documented
    (direct form I, order of operations in the module docstring), from zero
    histories. e, ic: input sequences (same unit as the coefficients expect:
    A for V/A, counts for count/count); returns u (V or counts).

    A reference for tests and for comparing a firmware implementation; it is
    a plain loop on purpose (the recurrence is sequential)."""
    e = np.asarray(e, dtype=float)
    ic = np.zeros_like(e) if ic is None else np.asarray(ic, dtype=float)
    secs = [(list(s.b) + [0.0] * (3 - len(s.b)), list(s.a) + [0.0] * (2 - len(s.a))) for s in coeffs.sections]
    y1 = [0.0] * len(secs)
    y2 = [0.0] * len(secs)
    e1 = e2 = 0.0
    u = np.empty_like(e)
    for k in range(e.size):
        ek = float(e[k])
        uc = coeffs.Kp * ek
        for j, (b, a) in enumerate(secs):
            yk = b[0] * ek + b[1] * e1 + b[2] * e2 - a[0] * y1[j] - a[1] * y2[j]
            uc += yk
            y2[j] = y1[j]
            y1[j] = yk
        u[k] = uc - coeffs.Hi * float(ic[k])
        e2 = e1
        e1 = ek
    return u


# ---------------------------------------------------------------------------
# the [firmware] table
# ---------------------------------------------------------------------------

#: Keys of the ``[firmware]`` table (see docs/firmware.md).
FIRMWARE_KEYS = (
    "current_counts_per_A",
    "current_sensor",
    "adc_bits",
    "adc_full_scale",
    "ic_counts_per_A",
    "ic_sensor",
    "modulator_counts_per_V",
    "dc_link",
    "pwm_period_counts",
    "format",
    "rounding",
    "prefix",
    "peak_shift_limit",
)

_C_IDENT = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")  # used with fullmatch: "$" would accept a trailing newline
#: Longest accepted C symbol prefix [characters].
PREFIX_MAX_CHARS = 32
#: Range of the firmware scalings (count/A, count/V) that are exported.
SCALE_LIMITS = (1e-6, 1e12)


