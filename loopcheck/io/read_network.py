"""Reading ``[grid_network]``, ``[feedforward]`` and measured grid-impedance CSV files.

Bad input raises :class:`loopcheck.io.casefile.CaseError` with one line naming
the file and the key.
"""

from __future__ import annotations

import math
import os

import numpy as np

from loopcheck.design.grid_network import KEYS, GridNetwork
from loopcheck.design.measured_grid import MAX_BYTES, MeasuredImpedance
from loopcheck.io.casefile import CaseError


def read_grid_network(case) -> GridNetwork | None:
    """The case's ``[grid_network]`` table, or None when it has none.

    Lg and Rg default to the [grid] table's values; units defaults to 1;
    ``measured`` (a CSV path, relative to the case file) excludes the
    component keys. Errors are one-line :class:`~loopcheck.io.casefile.CaseError`."""
    from loopcheck.io.casefile import CaseError, check_keys, read_quantity, read_string

    if "grid_network" not in case.tables:
        return None
    t = case.tables["grid_network"]
    w = case.where("grid_network")
    from loopcheck.engine.damping_text import is_filtered

    if is_filtered(case.design.control):
        raise CaseError(f"{case.where('control')} damping_filter: a [grid_network] is modelled with the measured "
                        f"capacitor current only, got {case.design.control.damping_filter.kind!r}")
    check_keys(t, KEYS, w)
    units = t.get("units", 1)
    if isinstance(units, bool) or not isinstance(units, int) or units < 1:
        raise CaseError(f"{w} units: expected a whole number of inverters, at least 1, got {units!r}")
    measured = read_string(t, "measured", w, default=None)
    if measured is not None:
        for k in ("Lg", "Rg", "C_shunt", "R_shunt"):
            if k in t:
                raise CaseError(f"{w} {k}: give either the components or measured, not both")
        base = os.path.dirname(case.path) if case.path and not case.path.startswith("<") else ""
        path = measured if os.path.isabs(measured) else os.path.join(base, measured)
        return GridNetwork(units=units, measured=read_measured_impedance(path))
    g = case.design.grid
    Lg = read_quantity(t, "Lg", "inductance", w, default=g.Lg_H, nonnegative=True)
    Rg = read_quantity(t, "Rg", "resistance", w, default=g.Rg_ohm, nonnegative=True)
    Cs = read_quantity(t, "C_shunt", "capacitance", w, default=0.0, nonnegative=True)
    Rs = read_quantity(t, "R_shunt", "resistance", w, default=0.0, nonnegative=True)
    if "R_shunt" in t and Cs == 0.0:
        raise CaseError(f"{w} R_shunt: given without C_shunt")
    if Cs > 0.0 and Lg <= 0.0:
        raise CaseError(f"{w} Lg: a shunt capacitance needs a series inductance Lg > 0 (else the PCC is the source)")
    return GridNetwork(Lg, Rg, Cs, Rs, units)


def read_feedforward(case):
    """The case's ``[feedforward]`` table as a
    :class:`loopcheck.engine.admittance.Feedforward`, or None when it has none.
    Keys: ``gain`` (ratio, default 1), ``cutoff`` (frequency of the
    first-order low-pass, default none)."""
    from loopcheck.engine.admittance import Feedforward
    from loopcheck.io.casefile import check_keys, read_quantity

    if "feedforward" not in case.tables:
        return None
    t = case.tables["feedforward"]
    w = case.where("feedforward")
    check_keys(t, ("gain", "cutoff"), w)
    gain = read_quantity(t, "gain", "ratio", w, default=1.0, nonnegative=True)
    cutoff = read_quantity(t, "cutoff", "frequency", w, default=None, positive=True)
    return Feedforward(gain, cutoff)


def _number(text: str, what: str, label: str, line: int) -> float:
    try:
        x = float(text)
    except ValueError:
        raise CaseError(f"{label}:{line}: {what} is not a number: {text.strip()!r}") from None
    if not math.isfinite(x):
        raise CaseError(f"{label}:{line}: {what} must be finite, got {text.strip()!r}")
    return x


def read_measured_impedance(path: str, label: str | None = None) -> MeasuredImpedance:
    """Read the CSV table at ``path``; ``label`` names it in messages."""
    label = label or str(path)
    try:
        with open(path, "rb") as fh:
            raw = fh.read(MAX_BYTES + 1)
    except FileNotFoundError:
        raise CaseError(f"{label}: cannot read the impedance table: no such file") from None
    except IsADirectoryError:
        raise CaseError(f"{label}: cannot read the impedance table: it is a directory") from None
    except OSError as exc:
        raise CaseError(f"{label}: cannot read the impedance table: {exc.strerror or exc}") from None
    if len(raw) > MAX_BYTES:
        raise CaseError(f"{label}: the impedance table is larger than {MAX_BYTES} bytes")
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise CaseError(f"{label}: not UTF-8 text (byte {exc.start})") from None
    f, m, p = [], [], []
    header_allowed = True
    for no, line in enumerate(text.splitlines(), start=1):
        s = line.strip()
        if not s or s.startswith("#"):
            continue
        cells = [c.strip() for c in s.split(",")]
        if header_allowed and all(_not_number(c) for c in cells):
            header_allowed = False
            continue  # a header row
        header_allowed = False
        if len(cells) != 3:
            raise CaseError(f"{label}:{no}: expected 3 columns (frequency Hz, magnitude ohm, phase deg), got {len(cells)}")
        fx = _number(cells[0], "frequency", label, no)
        mx = _number(cells[1], "magnitude", label, no)
        px = _number(cells[2], "phase", label, no)
        if fx <= 0:
            raise CaseError(f"{label}:{no}: frequency must be greater than zero, got {cells[0]}")
        if f and fx <= f[-1]:
            raise CaseError(f"{label}:{no}: frequencies must increase, {cells[0]} Hz follows {f[-1]:g} Hz")
        if mx < 0:
            raise CaseError(f"{label}:{no}: magnitude must not be negative, got {cells[1]}")
        f.append(fx)
        m.append(mx)
        p.append(px)
    if len(f) < 2:
        raise CaseError(f"{label}: the impedance table needs at least 2 rows, got {len(f)}")
    f = np.array(f)
    Z = np.array(m) * np.exp(1j * np.radians(np.array(p)))
    return MeasuredImpedance(label, f, Z)


def _not_number(cell: str) -> bool:
    try:
        float(cell)
    except ValueError:
        return True
    return False
