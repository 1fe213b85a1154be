"""Read a TOML case file into a :class:`Case`.

A case file describes one current-loop design in four core tables,
``[filter]`` (with the optional sub-table ``[filter.damping]``), ``[grid]``,
``[sampling]`` and ``[control]``; values are strings with SI units and
prefixes (``"1.8 mH"``, ``"10 uF"``) or bare numbers in the SI base unit
(see :mod:`loopcheck.engine.units`). The complete reference is
``docs/case-file.md``.

Optional tables (``[map]``, ``[tolerance]``, ``[firmware]``, ``[scenario]``,
``[targets]``, ``[pwm]``, ``[harmonics]``, ``[report]``) are kept raw in
:attr:`Case.tables` for the modules that use them; those modules read them
with the helpers below (:func:`check_keys`, :func:`read_quantity`,
:func:`read_choice`, :func:`read_pair`, ...) so every error has the same
one-line form::

    cases/x.toml: [filter] C: expected a capacitance in F (e.g. "10 uF"), got "10 mH"

Bad input raises :class:`CaseError`; implausible but possible values are
returned as warnings (:attr:`Case.warnings`). Nothing here prints.
"""

from __future__ import annotations

import difflib
import math
import os
import tomllib
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any

from loopcheck.engine.model import (
    DAMPING_FILTERS,
    DAMPING_SIGNALS,
    DampingFilter,
    MAX_DELAY_SAMPLES,
    CONTROLLER_KINDS,
    FEEDBACK_KINDS,
    INTEGRATOR_METHODS,
    PASSIVE_KINDS,
    RESONATOR_METHODS,
    Control,
    Design,
    Filter,
    Grid,
    PassiveDamping,
    Sampling,
)
from loopcheck.engine.scr import lg_from_scr
from loopcheck.engine.units import UnitError, expected_text, parse_quantity_unit, shown

__all__ = [
    "CORE_TABLES",
    "OPTIONAL_TABLES",
    "REQUIRED",
    "Case",
    "CaseError",
    "case_from_string",
    "check_keys",
    "read_case",
    "read_choice",
    "read_int_list",
    "read_pair",
    "read_quantity",
    "read_string",
    "read_table",
    "where",
]

#: The tables every case file has.
CORE_TABLES = ("filter", "grid", "sampling", "control")
#: Optional tables, kept raw in :attr:`Case.tables` for the modules that read them.
OPTIONAL_TABLES = ("map", "tolerance", "firmware", "scenario", "targets", "pwm", "harmonics", "report", "grid_network", "feedforward")
#: Plain keys allowed at the top of the file.
TOP_KEYS = ("name", "description")
#: Largest whole number in a list read by :func:`read_int_list`.
INT_LIST_MAX = 1_000_000
#: At most this many harmonic resonators in [control] harmonics.
MAX_HARMONICS = 12
#: Longest accepted ``name`` [characters].
NAME_MAX_CHARS = 200
#: Larger files are refused (a case file is a few hundred bytes).
MAX_CASE_BYTES = 1_000_000


class CaseError(Exception):
    """Bad input in a case file. The message is one line naming the file, the
    table and the key."""


class _Required:
    def __repr__(self) -> str:
        return "REQUIRED"


#: Default marker for :func:`read_quantity` and friends: the key must be present.
REQUIRED: Any = _Required()


@dataclass(frozen=True)
class Case:
    """A case file read and checked.

    path: the file as given (used in every message);
    design: the current-loop design (SI units inside);
    tables: raw optional tables by name (``"map"``, ``"tolerance"``, ...),
    as tomllib returned them, for the modules that parse them;
    warnings: one-line messages about implausible values (the CLI prints
    them to stderr);
    description: the optional free-text ``description`` key.
    """

    path: str
    design: Design
    tables: dict = field(default_factory=dict)
    warnings: tuple[str, ...] = ()
    description: str = ""

    def where(self, table: str) -> str:
        """Message prefix for a table of this case, e.g. ``"cases/x.toml: [map]"``."""
        return where(self.path, table)


# ---------------------------------------------------------------------------
# helpers shared with the modules that read their own tables
# ---------------------------------------------------------------------------


def where(path: str, table: str | None) -> str:
    """Prefix of messages about ``table`` in the file ``path``:
    ``where("cases/x.toml", "filter")`` -> ``"cases/x.toml: [filter]"``;
    ``table=None`` gives ``"cases/x.toml:"`` for top-level keys."""
    return f"{path}:" if not table else f"{path}: [{table}]"


def _fail(where_: str, key: str, detail: str) -> CaseError:
    return CaseError(f"{where_} {key}: {detail}")


def _did_you_mean(name: str, allowed: Iterable[str]) -> str:
    allowed = list(allowed)
    # another capitalisation or swapped letters ("l1", "1L" for L1) first:
    # difflib scores "1L" as close to "R1" as to "L1"
    for same in (lambda a: a.lower() == name.lower(), lambda a: sorted(a.lower()) == sorted(name.lower())):
        hits = [a for a in allowed if same(a)]
        if hits:
            return hits[0]
    close = difflib.get_close_matches(name, allowed, n=1, cutoff=0.5)
    return close[0] if close else ""


def check_keys(table: dict, allowed: Iterable[str], where: str) -> None:
    """Raise :class:`CaseError` for the first key of ``table`` not in
    ``allowed``, with a did-you-mean suggestion and the allowed keys."""
    allowed = list(allowed)
    for key in table:
        if key not in allowed:
            hint = _did_you_mean(key, allowed)
            tip = f'did you mean "{hint}"? ' if hint else ""
            raise _fail(where, key, f"unknown key; {tip}(allowed: {', '.join(allowed)})")


def read_table(data: dict, key: str, where: str, required: bool = True) -> dict:
    """The sub-table ``data[key]`` (``{}`` when absent and not required)."""
    if key not in data:
        if required:
            raise CaseError(f"{where} [{key}]: missing table")
        return {}
    value = data[key]
    if not isinstance(value, dict):
        raise _fail(where, key, f"expected a table ([{key}]), got {shown(value)}")
    return value


def read_quantity(
    table: dict,
    key: str,
    dimension: str,
    where: str,
    default: Any = REQUIRED,
    *,
    positive: bool = False,
    nonnegative: bool = False,
    minimum: float | None = None,
    maximum: float | None = None,
) -> float:
    """Read ``table[key]`` as a quantity of ``dimension`` (a name from
    :data:`loopcheck.engine.units.DIMENSIONS`: ``"inductance"``, ``"capacitance"``,
    ``"resistance"``, ``"frequency"``, ``"angular_frequency"``, ``"gain"``,
    ``"integral_gain"``, ``"voltage"``, ``"current"``, ``"apparent_power"``,
    ``"power"``, ``"time"``, ``"percent"``, ``"ratio"``) and return it in the
    SI base unit.

    ``default`` is returned (as is) when the key is absent; with the default
    :data:`REQUIRED` a missing key is an error. ``positive`` (> 0),
    ``nonnegative`` (>= 0), ``minimum`` and ``maximum`` (inclusive, SI) are
    checked. Every failure raises :class:`CaseError` with the message
    ``"<where> <key>: <what is wrong>"``.
    """
    if key not in table:
        if default is REQUIRED:
            raise _fail(where, key, f"missing; expected {expected_text(dimension)}")
        return default
    value = table[key]
    try:
        x, _unit = parse_quantity_unit(value, dimension)
    except UnitError as exc:
        raise _fail(where, key, str(exc)) from None
    _check_range(x, value, key, where, positive, nonnegative, minimum, maximum)
    return x


def _check_range(x, value, key, where_, positive, nonnegative, minimum, maximum) -> None:
    if positive and not x > 0:
        raise _fail(where_, key, f"must be greater than zero, got {shown(value)}")
    if nonnegative and x < 0:
        raise _fail(where_, key, f"must not be negative, got {shown(value)}")
    if minimum is not None and x < minimum:
        raise _fail(where_, key, f"must be at least {minimum:g}, got {shown(value)}")
    if maximum is not None and x > maximum:
        raise _fail(where_, key, f"must be at most {maximum:g}, got {shown(value)}")


def read_pair(
    table: dict,
    key: str,
    dimension: str,
    where: str,
    default: Any = REQUIRED,
    *,
    positive: bool = False,
    nonnegative: bool = False,
    ordered: bool = True,
) -> tuple[float, float]:
    """Read a two-element list of quantities such as
    ``Lg_range = ["0 mH", "4 mH"]`` and return ``(low, high)`` in SI.
    With ``ordered`` the first must not exceed the second."""
    if key not in table:
        if default is REQUIRED:
            raise _fail(where, key, f"missing; expected a list of two values, each {expected_text(dimension)}")
        return default
    value = table[key]
    if not isinstance(value, list) or len(value) != 2:
        raise _fail(where, key, f"expected a list of two values [from, to], got {shown(value)}")
    out = []
    for item in value:
        try:
            x, _unit = parse_quantity_unit(item, dimension)
        except UnitError as exc:
            raise _fail(where, key, str(exc)) from None
        _check_range(x, item, key, where, positive, nonnegative, None, None)
        out.append(x)
    if ordered and out[0] > out[1]:
        raise _fail(where, key, f"the first value must not exceed the second, got [{shown(value[0])}, {shown(value[1])}]")
    return out[0], out[1]


def read_choice(table: dict, key: str, choices: Sequence[str], where: str, default: Any = REQUIRED) -> str:
    """Read a string that must be one of ``choices`` (did-you-mean on a miss)."""
    allowed = ", ".join(f'"{c}"' for c in choices)
    if key not in table:
        if default is REQUIRED:
            raise _fail(where, key, f"missing; expected one of {allowed}")
        return default
    value = table[key]
    if not isinstance(value, str) or value not in choices:
        hint = _did_you_mean(value, choices) if isinstance(value, str) else ""
        tip = f'; did you mean "{hint}"?' if hint else ""
        raise _fail(where, key, f"expected one of {allowed}, got {shown(value)}{tip}")
    return value


def read_string(table: dict, key: str, where: str, default: Any = REQUIRED) -> str:
    """Read a free-text string."""
    if key not in table:
        if default is REQUIRED:
            raise _fail(where, key, "missing; expected a text in quotes")
        return default
    value = table[key]
    if not isinstance(value, str):
        raise _fail(where, key, f"expected a text in quotes, got {shown(value)}")
    return value


def read_int_list(
    table: dict, key: str, where: str, default: Any = REQUIRED, *, minimum: int | None = None
) -> tuple[int, ...]:
    """Read a list of whole numbers such as ``harmonics = [3, 5, 7]``;
    duplicates and values below ``minimum`` are errors."""
    if key not in table:
        if default is REQUIRED:
            raise _fail(where, key, "missing; expected a list of whole numbers such as [3, 5, 7]")
        return default
    value = table[key]
    if not isinstance(value, list) or any(isinstance(v, bool) or not isinstance(v, int) for v in value):
        raise _fail(where, key, f"expected a list of whole numbers such as [3, 5, 7], got {shown(value)}")
    if len(set(value)) != len(value):
        raise _fail(where, key, f"lists a number twice: {shown(value) if len(str(value)) > 60 else value}")
    if minimum is not None:
        for v in value:
            if v < minimum:
                raise _fail(where, key, f"values must be at least {minimum}, got {shown(v)}")
    for v in value:
        if abs(v) > INT_LIST_MAX:
            raise _fail(where, key, f"values must be at most {INT_LIST_MAX:,}, got {shown(v)}")
    return tuple(value)


# ---------------------------------------------------------------------------
# reading a whole case
# ---------------------------------------------------------------------------


def read_case(path: str | os.PathLike) -> Case:
    """Read and check the case file at ``path`` (TOML, UTF-8).

    Raises :class:`CaseError` for anything unreadable or invalid."""
    label = str(path)
    try:
        with open(path, "rb") as fh:
            raw = fh.read(MAX_CASE_BYTES + 1)
    except FileNotFoundError:
        raise CaseError(f"{label}: cannot read the case file: no such file") from None
    except IsADirectoryError:
        raise CaseError(f"{label}: cannot read the case file: it is a directory") from None
    except OSError as exc:
        raise CaseError(f"{label}: cannot read the case file: {exc.strerror or exc}") from None
    except (MemoryError, ValueError) as exc:  # e.g. an embedded NUL in the name, no memory left
        raise CaseError(f"{label}: cannot read the case file: {type(exc).__name__}: {exc}") from None
    if len(raw) > MAX_CASE_BYTES:
        raise CaseError(f"{label}: the case file is larger than {MAX_CASE_BYTES} bytes; not a case file?")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise CaseError(f"{label}: not UTF-8 text (byte {exc.start})") from None
    return case_from_string(text, label)


def case_from_string(text: str, path_label: str = "<string>") -> Case:
    """Parse case-file text; ``path_label`` is used in messages."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        msg = str(exc).splitlines()[0] if str(exc) else "syntax error"
        msg = msg[0].lower() + msg[1:] if msg else msg
        raise CaseError(f"{path_label}: not valid TOML: {msg}") from None
    except RecursionError:
        line = _line_of(text, r"(?:[\[{]\s*){100,}")
        raise CaseError(f"{path_label}: not a case file: arrays or tables nested too deeply{line}") from None
    except ValueError as exc:  # e.g. Python's limit on the digits of an integer
        if "digits" in str(exc):
            line = _line_of(text, r"\d[\d_]{1000,}")
            raise CaseError(f"{path_label}: not a case file: a whole number with too many digits{line} "
                            f"(write it as a float or with a unit prefix)") from None
        raise CaseError(f"{path_label}: not valid TOML: {exc}") from None
    except MemoryError:
        raise CaseError(f"{path_label}: not a case file: too large to read") from None
    return parse_case(data, path_label)


def _line_of(text: str, pattern: str) -> str:
    """`` (line N)`` for the first match of ``pattern`` in ``text``, or ""."""
    import re

    m = re.search(pattern, text)
    return f" (line {text.count(chr(10), 0, m.start()) + 1})" if m else ""


def parse_case(data: dict, path_label: str) -> Case:
    """Check the parsed TOML ``data`` and build the :class:`Case`."""
    top = where(path_label, None)
    for key, value in data.items():
        if key in TOP_KEYS or key in CORE_TABLES or key in OPTIONAL_TABLES:
            continue
        tables = CORE_TABLES + OPTIONAL_TABLES
        if isinstance(value, dict):
            hint = _did_you_mean(key, tables)
            tip = f"did you mean [{hint}]? " if hint else ""
            raise CaseError(f"{top} [{key}]: unknown table; {tip}(known: {', '.join(tables)})")
        hint = _did_you_mean(key, TOP_KEYS + tables)
        tip = f'did you mean "{hint}"? ' if hint else ""
        raise _fail(top, key, f"unknown key; {tip}(allowed at the top: {', '.join(TOP_KEYS)} and the tables)")
    warnings: list[str] = []
    name = read_string(data, "name", top, default="")
    if len(name) > NAME_MAX_CHARS:
        raise _fail(top, "name", f"at most {NAME_MAX_CHARS} characters (it titles every figure), got {len(name)}")
    description = read_string(data, "description", top, default="")
    filt = _read_filter(read_table(data, "filter", top), where(path_label, "filter"), warnings)
    grid = _read_grid(read_table(data, "grid", top), where(path_label, "grid"), warnings)
    sampling = _read_sampling(read_table(data, "sampling", top), where(path_label, "sampling"), warnings)
    control = _read_control(read_table(data, "control", top), where(path_label, "control"), warnings, grid, sampling, filt.C_F)
    if not name:
        name = os.path.splitext(os.path.basename(path_label))[0]
    design = Design(filter=filt, grid=grid, sampling=sampling, control=control, name=name)
    check_plausible(design, path_label)
    _check_resonance(design, path_label, warnings)
    tables = {k: read_table(data, k, top) for k in OPTIONAL_TABLES if k in data}
    return Case(path=path_label, design=design, tables=tables, warnings=tuple(warnings), description=description)


# --- plausibility ------------------------------------------------------------

#: Thresholds of the plausibility warnings (not errors: unusual designs exist).
L_MAX_H = 0.1  # inductors above 100 mH are not LCL-filter parts
L_MIN_H = 1e-6
C_MAX_F = 1e-3
C_MIN_F = 10e-9
FS_MIN_HZ = 1e3
FS_MAX_HZ = 200e3
R_MAX_OHM = 10.0
F1_RANGE_HZ = (40.0, 70.0)


#: Hard limits (errors): values outside these ranges are refused, because no
#: LCL-filtered converter has them and the numerics (matrix exponentials,
#: eigenvalues, simulation step counts) are not meant for them. Documented in
#: docs/case-file.md ("Plausibility ranges").
L_LIMITS_H = (1e-9, 10.0)  # L1, L2, Ld; Lg and Lg_range at most the upper end
C_LIMITS_F = (1e-12, 1.0)  # C, Cd
R_MAX_LIMIT_OHM = 1e3  # R1, R2, Rg, Rd
FS_LIMITS_HZ = (100.0, 10e6)
F1_LIMITS_HZ = (1.0, 1e3)
S_LIMITS_VA = (1.0, 1e10)
V_LIMITS_V = (1.0, 1e7)
SCR_LIMITS = (0.01, 1e6)
#: Gains relative to the filter's own impedance scale Z = 2*pi*fs*(L1 + L2)
#: [V/A]: |Kp| and |Hi| from 1e-6 Z to 100 Z; Ki, Kr (V/A/s) at most
#: 100 Z * 2*pi*fs; wc at most pi*fs (the Nyquist frequency in rad/s).
GAIN_SPAN = (1e-6, 100.0)


def gain_scale_V_per_A(design: Design) -> float:
    """The impedance scale Z = 2*pi*fs*(L1 + L2) [V/A] that bounds the gains."""
    return 2.0 * math.pi * design.sampling.fs_hz * (design.filter.L1_H + design.filter.L2_H)


def check_plausible(design: Design, path_label: str) -> None:
    """Raise :class:`CaseError` (one line naming table and key) for a value
    outside the ranges this tool analyses (see the ``*_LIMITS`` constants
    and docs/case-file.md)."""
    f, g, s, c = design.filter, design.grid, design.sampling, design.control
    wf, wg, wsm, wct = (where(path_label, t) for t in ("filter", "grid", "sampling", "control"))
    wd = where(path_label, "filter.damping")

    def out_of(wh, key, value, lo, hi, unit):
        if not lo <= value <= hi:
            raise CaseError(
                f"{wh} {key}: {value:g} {unit} is outside the range this tool analyses "
                f"({lo:g} to {hi:g} {unit}; see docs/case-file.md, plausibility ranges)"
            )

    out_of(wf, "L1", f.L1_H, *L_LIMITS_H, "H")
    out_of(wf, "L2", f.L2_H, *L_LIMITS_H, "H")
    out_of(wf, "C", f.C_F, *C_LIMITS_F, "F")
    out_of(wf, "R1", f.R1_ohm, 0.0, R_MAX_LIMIT_OHM, "Ohm")
    out_of(wf, "R2", f.R2_ohm, 0.0, R_MAX_LIMIT_OHM, "Ohm")
    d = f.damping
    if d.kind != "none":
        out_of(wd, "Rd", d.Rd_ohm, 0.0, R_MAX_LIMIT_OHM, "Ohm")
    if d.kind in ("split-RC", "split-RLC"):
        out_of(wd, "Cd", d.Cd_F, *C_LIMITS_F, "F")
    if d.kind == "split-RLC":
        out_of(wd, "Ld", d.Ld_H, *L_LIMITS_H, "H")
    for key, value in [("Lg", g.Lg_H)] + [("Lg_range", v) for v in (g.Lg_range_H or ())]:
        out_of(wg, key, value, 0.0, L_LIMITS_H[1], "H")
        if 0.0 < value < L_LIMITS_H[0]:
            raise CaseError(f"{wg} {key}: a grid inductance is 0 or at least {L_LIMITS_H[0]:g} H, got {value:g} H "
                            f"(see docs/case-file.md, plausibility ranges)")
    out_of(wg, "Rg", g.Rg_ohm, 0.0, R_MAX_LIMIT_OHM, "Ohm")
    out_of(wsm, "fs", s.fs_hz, *FS_LIMITS_HZ, "Hz")
    z = gain_scale_V_per_A(design)
    lo, hi = GAIN_SPAN[0] * z, GAIN_SPAN[1] * z
    out_of(wct, "Kp", c.Kp_V_per_A, lo, hi, "V/A")
    out_of(wct, "Hi", abs(c.Hi_V_per_A), 0.0, hi, "V/A (magnitude)")
    w_nyq = math.pi * s.fs_hz
    out_of(wct, "Ki", c.Ki_V_per_As, 0.0, hi * 2.0 * w_nyq, "V/A/s")
    kr_hi = hi if c.wc_rad_s > 0 else hi * 2.0 * w_nyq
    out_of(wct, "Kr", c.Kr, 0.0, kr_hi, "V/A" if c.wc_rad_s > 0 else "V/A/s")
    out_of(wct, "wc", c.wc_rad_s, 0.0, w_nyq, "rad/s")


def override_problem(design: Design, name: str, value: float) -> str | None:
    """Why ``value`` given for ``name`` on the command line or as a sweep
    end (L1, L2, C, Lg, fs, Kp, Hi, Ki, Kr) lies outside the plausibility
    ranges of :func:`check_plausible` for ``design``, or None. Gains may be
    zero (a sweep may start there); only their size is bounded."""
    f = design.filter
    z = gain_scale_V_per_A(design)
    if name == "fs":
        z = 2.0 * math.pi * value * (f.L1_H + f.L2_H)
    ranges = {
        "L1": (L_LIMITS_H, "H"), "L2": (L_LIMITS_H, "H"), "C": (C_LIMITS_F, "F"), "Lg": ((0.0, L_LIMITS_H[1]), "H"),
        "fs": (FS_LIMITS_HZ, "Hz"), "Kp": ((0.0, GAIN_SPAN[1] * z), "V/A"), "Hi": ((0.0, GAIN_SPAN[1] * z), "V/A"),
        "Ki": ((0.0, GAIN_SPAN[1] * z * 2.0 * math.pi * design.sampling.fs_hz), "V/A/s"),
        "Kr": ((0.0, GAIN_SPAN[1] * z * 2.0 * math.pi * design.sampling.fs_hz), "V/A/s"),
    }
    if name not in ranges:
        return None
    (lo, hi), unit = ranges[name]
    x = abs(value) if name in ("Hi", "Kp", "Ki", "Kr") else value
    if name == "Lg" and 0.0 < x < L_LIMITS_H[0]:
        return f"Lg = {value:g} H: a grid inductance is 0 or at least {L_LIMITS_H[0]:g} H (see docs/case-file.md)"
    if not (math.isfinite(x) and lo <= x <= hi):
        return (f"{name} = {value:g} {unit} is outside the range this tool analyses ({lo:g} to {hi:g} {unit}"
                f"{' in magnitude' if name == 'Hi' else ''}; see docs/case-file.md, plausibility ranges)")
    return None


def _bare(table: dict, key: str) -> bool:
    v = table.get(key)
    if isinstance(v, (int, float)) and not isinstance(v, bool):
        return True
    if isinstance(v, str):
        try:
            return parse_quantity_unit(v, "ratio")[1] == ""
        except UnitError:
            return False
    return False


def _warn_inductance(table, key, value_H, where_, warnings, what) -> None:
    if value_H > L_MAX_H:
        if _bare(table, key):
            warnings.append(
                f'{where_} {key}: the bare number {shown(table[key])} is read as {value_H:g} H, implausible for '
                f'{what}; write the unit (did you mean "{value_H:g} mH"?)'
            )
        else:
            warnings.append(f"{where_} {key}: {value_H:g} H is implausibly large for {what}")
    elif 0 < value_H < L_MIN_H:
        warnings.append(f"{where_} {key}: {value_H:g} H is implausibly small for {what}")


def _read_filter(t: dict, w: str, warnings: list[str]) -> Filter:
    check_keys(t, ("L1", "C", "L2", "R1", "R2", "damping"), w)
    L1 = read_quantity(t, "L1", "inductance", w, positive=True)
    C = read_quantity(t, "C", "capacitance", w, positive=True)
    L2 = read_quantity(t, "L2", "inductance", w, positive=True)
    R1 = read_quantity(t, "R1", "resistance", w, 0.0, nonnegative=True)
    R2 = read_quantity(t, "R2", "resistance", w, 0.0, nonnegative=True)
    _warn_inductance(t, "L1", L1, w, warnings, "a converter-side filter inductor")
    _warn_inductance(t, "L2", L2, w, warnings, "a grid-side filter inductor")
    if C > C_MAX_F:
        extra = f' (a bare number is in farad; did you mean "{C:g} uF"?)' if _bare(t, "C") else ""
        warnings.append(f"{w} C: {C:g} F is implausibly large for a filter capacitor{extra}")
    elif C < C_MIN_F:
        warnings.append(f"{w} C: {C:g} F is implausibly small for a filter capacitor")
    for key, R in (("R1", R1), ("R2", R2)):
        if R > R_MAX_OHM:
            warnings.append(f"{w} {key}: {R:g} Ohm is implausibly large for the resistance of a filter inductor")
    damping_where = w[: -len("[filter]")] + "[filter.damping]"
    damping = _read_damping(read_table(t, "damping", w, required=False), damping_where, warnings)
    return Filter(L1_H=L1, C_F=C, L2_H=L2, R1_ohm=R1, R2_ohm=R2, damping=damping)


_DAMPING_KEYS = {"none": (), "series-R": ("Rd",), "split-RC": ("Rd", "Cd"), "split-RLC": ("Rd", "Cd", "Ld")}


def _read_damping(t: dict, w: str, warnings: list[str]) -> PassiveDamping:
    if not t:
        return PassiveDamping()
    check_keys(t, ("kind", "Rd", "Cd", "Ld"), w)
    kind = read_choice(t, "kind", PASSIVE_KINDS, w)
    needed = _DAMPING_KEYS[kind]
    values = {"Rd": 0.0, "Cd": 0.0, "Ld": 0.0}
    dims = {"Rd": "resistance", "Cd": "capacitance", "Ld": "inductance"}
    for key in ("Rd", "Cd", "Ld"):
        if key in needed:
            values[key] = read_quantity(t, key, dims[key], w, positive=True)
        elif key in t:
            read_quantity(t, key, dims[key], w, nonnegative=True)  # still reject garbage
            warnings.append(f'{w} {key}: not used with kind = "{kind}"; ignored')
    return PassiveDamping(kind=kind, Rd_ohm=values["Rd"], Cd_F=values["Cd"], Ld_H=values["Ld"])


def _read_grid(t: dict, w: str, warnings: list[str]) -> Grid:
    check_keys(t, ("f", "Lg", "Rg", "Lg_range", "scr", "scr_range", "S", "V"), w)
    f = read_quantity(t, "f", "frequency", w, 50.0, positive=True, minimum=F1_LIMITS_HZ[0], maximum=F1_LIMITS_HZ[1])
    if not F1_RANGE_HZ[0] <= f <= F1_RANGE_HZ[1]:
        warnings.append(f"{w} f: a fundamental of {f:g} Hz is unusual for a public grid (50 or 60 Hz)")
    Rg = read_quantity(t, "Rg", "resistance", w, 0.0, nonnegative=True)
    if Rg > R_MAX_OHM:
        warnings.append(f"{w} Rg: {Rg:g} Ohm is implausibly large for a grid resistance")
    S = read_quantity(t, "S", "apparent_power", w, None, positive=True, minimum=S_LIMITS_VA[0], maximum=S_LIMITS_VA[1])
    V = read_quantity(t, "V", "voltage", w, None, positive=True, minimum=V_LIMITS_V[0], maximum=V_LIMITS_V[1])

    def need_rating(key: str) -> None:
        missing = [k for k, v in (("S", S), ("V", V)) if v is None]
        if missing:
            raise _fail(
                w, key,
                f"needs the rated power S (e.g. \"10 kVA\") and the line-to-line rms voltage V (e.g. \"400 V\") "
                f"in [grid]; missing: {', '.join(missing)}",
            )

    if "Lg" in t and "scr" in t:
        raise _fail(w, "scr", "give either Lg or scr, not both")
    if "scr" in t:
        need_rating("scr")
        scr = read_quantity(t, "scr", "ratio", w, positive=True, minimum=SCR_LIMITS[0], maximum=SCR_LIMITS[1])
        Lg = float(lg_from_scr(scr, S, V, f))
    else:
        Lg = read_quantity(t, "Lg", "inductance", w, 0.0, nonnegative=True)
        _warn_inductance(t, "Lg", Lg, w, warnings, "a grid inductance")

    if "Lg_range" in t and "scr_range" in t:
        raise _fail(w, "scr_range", "give either Lg_range or scr_range, not both")
    Lg_range = None
    if "Lg_range" in t:
        Lg_range = read_pair(t, "Lg_range", "inductance", w, nonnegative=True)
        if Lg_range[1] > L_MAX_H:
            warnings.append(f"{w} Lg_range: {Lg_range[1]:g} H is implausibly large for a grid inductance")
    elif "scr_range" in t:
        need_rating("scr_range")
        s_lo, s_hi = read_pair(t, "scr_range", "ratio", w, positive=True)
        for key_value in (s_lo, s_hi):
            _check_range(key_value, key_value, "scr_range", w, False, False, SCR_LIMITS[0], SCR_LIMITS[1])
        # a strong grid (high SCR) has a small inductance
        Lg_range = (float(lg_from_scr(s_hi, S, V, f)), float(lg_from_scr(s_lo, S, V, f)))
    if Lg_range is not None and not (Lg_range[0] <= Lg <= Lg_range[1]):
        warnings.append(
            f"{w} Lg: the nominal grid inductance {Lg * 1e3:.4g} mH lies outside the range "
            f"{Lg_range[0] * 1e3:.4g}..{Lg_range[1] * 1e3:.4g} mH"
        )
    return Grid(f_hz=f, Lg_H=Lg, Rg_ohm=Rg, Lg_range_H=Lg_range, S_VA=S, V_V=V)


def _read_sampling(t: dict, w: str, warnings: list[str]) -> Sampling:
    check_keys(t, ("fs", "delay"), w)
    fs = read_quantity(t, "fs", "frequency", w, positive=True)
    if fs < FS_MIN_HZ or fs > FS_MAX_HZ:
        warnings.append(f"{w} fs: a sampling frequency of {fs:g} Hz is unusual for a current loop (1 kHz to 200 kHz)")
    if "delay" in t:
        value = t["delay"]
        try:
            delay, _unit = parse_quantity_unit(value, "ratio")
        except UnitError:
            raise _fail(w, "delay", f"expected the total loop delay in sampling periods, a number from 0 to {MAX_DELAY_SAMPLES:g}, got {shown(value)}") from None
        if not 0.0 <= delay <= MAX_DELAY_SAMPLES:
            raise _fail(w, "delay", f"must lie between 0 and {MAX_DELAY_SAMPLES:g} sampling periods, got {shown(value)}")
    else:
        delay = 1.0
    return Sampling(fs_hz=fs, delay=delay)


_CONTROL_KEYS = ("feedback", "kind", "Kp", "Ki", "Kr", "wc", "harmonics", "integrator", "resonator", "Hi",
                 "damping_filter", "damping_lead", "damping_cutoff")
#: Longest explicit damping-filter coefficient list (order + 1).
MAX_FILTER_COEFFICIENTS = 9


def _coefficient_list(value, w: str, name: str) -> tuple[float, ...]:
    key = "damping_filter"
    if not isinstance(value, list) or not value:
        raise _fail(w, key, f"{name}: expected a non-empty list of numbers, got {shown(value)}")
    if len(value) > MAX_FILTER_COEFFICIENTS:
        raise _fail(w, key, f"{name}: at most {MAX_FILTER_COEFFICIENTS} coefficients, got {len(value)}")
    out = []
    for v in value:
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise _fail(w, key, f"{name}: expected finite numbers, got {shown(v)}")
        out.append(float(v))
    return tuple(out)


def _read_damping_filter(t: dict, w: str, sampling: Sampling, C_F: float) -> DampingFilter | None:
    """[control] damping_filter (preset name or {b, a, signal}), damping_lead, damping_cutoff."""
    key = "damping_filter"
    value = t.get(key, "measured")
    lead, cutoff = 0.5, 0.0
    if isinstance(value, dict):
        check_keys(value, ("b", "a", "signal"), f"{w} {key}:")
        if "b" not in value:
            raise _fail(w, key, "b: missing; expected the numerator coefficients in powers of z^-1, e.g. b = [1, -1]")
        b = _coefficient_list(value["b"], w, "b")
        a = _coefficient_list(value.get("a", [1.0]), w, "a")
        signal = value.get("signal", "ic")
        if signal not in DAMPING_SIGNALS:
            raise _fail(w, key, f"signal: expected one of \"ic\", \"vc\", got {shown(signal)}")
        if a[0] == 0.0:
            raise _fail(w, key, f"a: the first coefficient a0 must not be zero, got {list(a)}")
        if all(x == 0.0 for x in b):
            raise _fail(w, key, "b: all zero, the damping path would carry nothing (set Hi = 0 instead)")
        kind = "coefficients"
    elif isinstance(value, str):
        kind = read_choice(t, key, DAMPING_FILTERS[:-1], w, "measured")
        b, a, signal = (1.0,), (1.0,), ("vc" if kind in ("backward-euler", "tustin") else "ic")
    else:
        raise _fail(w, key, f"expected a preset name ({', '.join(DAMPING_FILTERS[:-1])}) or a table "
                            f"{{b = [...], a = [...], signal = \"ic\"}}, got {shown(value)}")
    if kind == "lead":
        lead = read_quantity(t, "damping_lead", "ratio", w, 0.5, minimum=0.0, maximum=2.0)
    elif "damping_lead" in t:
        raise _fail(w, "damping_lead", f'only used with damping_filter = "lead", got damping_filter = {shown(value)}')
    if kind == "high-pass":
        cutoff = read_quantity(t, "damping_cutoff", "frequency", w, positive=True)
        if cutoff >= sampling.fs_hz / 2.0:
            raise _fail(w, "damping_cutoff", f"must lie below fs/2 = {sampling.fs_hz / 2.0:g} Hz, got {shown(t['damping_cutoff'])}")
    elif "damping_cutoff" in t:
        raise _fail(w, "damping_cutoff", f'only used with damping_filter = "high-pass", got damping_filter = {shown(value)}')
    if kind == "measured":
        return None
    if kind == "coefficients" and len(a) > 1:
        import numpy as np

        poles = np.roots(np.array(a))
        if poles.size and np.max(np.abs(poles)) > 1.0 + 1e-9:
            worst = poles[int(np.argmax(np.abs(poles)))]
            raise _fail(w, key, f"a: the filter is unstable, pole at z = {complex(worst):.4g} "
                                f"(|z| = {abs(worst):.4g} > 1)")
    return DampingFilter(kind=kind, b=b, a=a, signal=signal, C_F=C_F, lead_samples=lead, cutoff_hz=cutoff)


def _read_resonant_gain(t: dict, w: str, wc: float, warnings: list[str]) -> float:
    value = t["Kr"]
    for dim in ("integral_gain", "gain"):
        try:
            Kr, unit = parse_quantity_unit(value, dim)
            break
        except UnitError:
            continue
    else:
        raise _fail(
            w, "Kr",
            f'expected a resonant gain in V/A/s (ideal resonator, wc = 0, e.g. "600 V/A/s") or in V/A '
            f'(damped resonator, wc > 0, e.g. "20 V/A"), got {shown(value)}',
        )
    if Kr < 0:
        raise _fail(w, "Kr", f"must not be negative, got {shown(value)}")
    if unit and wc > 0 and dim == "integral_gain":
        warnings.append(
            f"{w} Kr: given in V/A/s, but with wc > 0 the damped resonator 2*Kr*wc*s/(s^2+2*wc*s+w0^2) "
            f"takes Kr in V/A; the number {Kr:g} is used as V/A"
        )
    if unit and wc == 0 and dim == "gain":
        warnings.append(
            f"{w} Kr: given in V/A, but with wc = 0 the ideal resonator Kr*s/(s^2+w0^2) takes Kr in V/A/s; "
            f"the number {Kr:g} is used as V/A/s"
        )
    return Kr


def _read_control(t: dict, w: str, warnings: list[str], grid: Grid, sampling: Sampling, C_F: float = 0.0) -> Control:
    check_keys(t, _CONTROL_KEYS, w)
    feedback = read_choice(t, "feedback", FEEDBACK_KINDS, w)
    kind = read_choice(t, "kind", CONTROLLER_KINDS, w)
    Kp = read_quantity(t, "Kp", "gain", w, positive=True)
    Hi = read_quantity(t, "Hi", "gain", w, 0.0)
    integrator = read_choice(t, "integrator", INTEGRATOR_METHODS, w, "forward-euler")
    resonator = read_choice(t, "resonator", RESONATOR_METHODS, w, "tustin-prewarp")
    wc = read_quantity(t, "wc", "angular_frequency", w, 0.0, nonnegative=True)
    Ki = 0.0
    Kr = 0.0
    harmonics: tuple[int, ...] = ()
    if kind == "PI":
        Ki = read_quantity(t, "Ki", "integral_gain", w, nonnegative=True)
        if Ki == 0:
            warnings.append(
                f'{w} Ki: zero, so the "PI" controller is a plain P controller; the verdict and margins are '
                f'those of kind = "P" (the inert integrator is left out: it has no effect on the loop)'
            )
    elif "Ki" in t:
        read_quantity(t, "Ki", "integral_gain", w, nonnegative=True)
        warnings.append(f'{w} Ki: not used with kind = "{kind}"; ignored')
    if kind == "PR":
        if "Kr" not in t:
            raise _fail(w, "Kr", 'missing; expected a resonant gain in V/A/s (e.g. "600 V/A/s")')
        Kr = _read_resonant_gain(t, w, wc, warnings)
        if Kr == 0:
            warnings.append(
                f'{w} Kr: zero, so the "PR" controller is a plain P controller; the verdict and margins are '
                f'those of kind = "P" (the inert resonators are left out: they have no effect on the loop)'
            )
        harmonics = read_int_list(t, "harmonics", w, (), minimum=2)
        if len(harmonics) > MAX_HARMONICS:
            raise _fail(w, "harmonics", f"at most {MAX_HARMONICS} harmonic resonators are analysed "
                                        f"(the work grows with the cube of the loop order), got {len(harmonics)}")
        nyquist = sampling.fs_hz / 2.0
        for h in (1,) + harmonics:
            if h * grid.f_hz >= nyquist:
                key = "harmonics" if h > 1 else "kind"
                raise _fail(
                    w, key,
                    f"the resonator at {h} x {grid.f_hz:g} Hz = {h * grid.f_hz:g} Hz is at or above fs/2 = {nyquist:g} Hz",
                )
    else:
        for key in ("Kr", "wc", "harmonics"):
            if key in t:
                warnings.append(f'{w} {key}: not used with kind = "{kind}"; ignored')
    return Control(
        feedback=feedback,
        kind=kind,
        Kp_V_per_A=Kp,
        Ki_V_per_As=Ki,
        Kr=Kr,
        wc_rad_s=wc,
        harmonics=harmonics,
        integrator=integrator,
        resonator=resonator,
        Hi_V_per_A=Hi,
        damping_filter=_read_damping_filter(t, w, sampling, C_F),
    )


def _lcl_resonance_hz(L1: float, C: float, L2: float) -> float:
    """Lossless LCL resonance [Hz]; same formula as
    :func:`loopcheck.engine.model.resonance_hz` (Liserre, Blaabjerg and Hansen,
    IEEE Trans. Ind. Appl., 2005), without numpy."""
    return math.sqrt((L1 + L2) / (L1 * L2 * C)) / (2.0 * math.pi)


def _check_resonance(design: Design, path_label: str, warnings: list[str]) -> None:
    f = design.filter
    C = f.shunt_capacitance_F
    fr0 = _lcl_resonance_hz(f.L1_H, C, f.L2_H)
    fr = _lcl_resonance_hz(f.L1_H, C, f.L2_H + design.grid.Lg_H)
    nyq = design.sampling.fs_hz / 2.0
    ws = where(path_label, "sampling")
    if fr >= nyq:
        raise _fail(
            ws, "fs",
            f"the LCL resonance with Lg ({fr:.4g} Hz) is at or above fs/2 = {nyq:.4g} Hz; "
            f"the sampled loop cannot see it (raise fs or lower the resonance)",
        )
    if fr0 >= nyq:
        raise _fail(
            ws, "fs",
            f"the LCL resonance without Lg ({fr0:.4g} Hz) is at or above fs/2 = {nyq:.4g} Hz; "
            f"the sampled loop cannot see it on a stiff grid (raise fs or lower the resonance)",
        )
    f1 = design.grid.f_hz
    if fr < 10.0 * f1:
        warnings.append(
            f"{where(path_label, 'filter')} C: the LCL resonance {fr:.4g} Hz is below 10 times the fundamental "
            f"({10 * f1:g} Hz), a common LCL design limit (Liserre, Blaabjerg and Hansen, IEEE Trans. Ind. Appl. 2005)"
        )
