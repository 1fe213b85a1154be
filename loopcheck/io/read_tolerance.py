"""Reading the ``[tolerance]`` table of a case file into a :class:`~loopcheck.design.tolerance.ToleranceSpec`.

Bad input raises :class:`loopcheck.io.casefile.CaseError` with one line naming
the file, the table and the key.
"""

from __future__ import annotations

from loopcheck.design.tolerance import (
    _DAMPING_USES,
    COMPONENTS,
    DISTRIBUTIONS,
    ComponentTolerance,
    ToleranceSpec,
)
from loopcheck.engine.units import UnitError, parse_tolerance, shown


def parse_tolerance_table(table: dict | None, where: str, design=None) -> ToleranceSpec:
    """Read the raw ``[tolerance]`` table (as tomllib returned it).

    ``where`` is the message prefix (``"cases/x.toml: [tolerance]"``). With a
    ``design``, tolerances on passive-damping parts the design does not have
    are errors. Raises :class:`loopcheck.io.casefile.CaseError`."""
    from loopcheck.io.casefile import CaseError, check_keys, read_choice

    if not table:
        return ToleranceSpec()
    allowed = ("distribution",) + tuple(COMPONENTS)
    check_keys(table, allowed, where)
    default = read_choice(table, "distribution", DISTRIBUTIONS, where, "uniform")
    used = _DAMPING_USES.get(design.filter.damping.kind, ()) if design is not None else ("Rd", "Cd", "Ld")
    out = []
    for key in COMPONENTS:
        if key not in table:
            continue
        if key in ("Rd", "Cd", "Ld") and key not in used:
            kind = design.filter.damping.kind if design is not None else "none"
            raise CaseError(f'{where} {key}: the design has no {COMPONENTS[key][1]} (passive damping kind "{kind}")')
        value = table[key]
        dist = default
        if isinstance(value, dict):
            inner = f"{where} {key}"
            check_keys(value, ("band", "distribution"), inner + ":")
            if "band" not in value:
                raise CaseError(f'{inner}: band: missing; expected a tolerance in % (e.g. "\u00b110 %")')
            dist = read_choice(value, "distribution", DISTRIBUTIONS, inner + ":", default)
            value = value["band"]
        try:
            low, high = parse_tolerance(value)
        except UnitError as exc:
            raise CaseError(f"{where} {key}: {exc}") from None
        if low <= -1.0:
            raise CaseError(f"{where} {key}: a deviation of {100 * low:g} % leaves nothing of the part, got {shown(value)}")
        if high > 1.0:
            raise CaseError(f"{where} {key}: a deviation of {100 * high:+g} % is not a component tolerance "
                            f"(at most +100 %), got {shown(value)}")
        if low == 0.0 and high == 0.0:
            continue  # zero tolerance: no variation
        out.append(ComponentTolerance(key, low, high, dist))
    return ToleranceSpec(tuple(out))
