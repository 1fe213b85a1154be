"""The verdict over everything a case declares, read from the case file.

Bad input raises :class:`loopcheck.io.casefile.CaseError` with one line naming
the file and the key.
"""

from __future__ import annotations

from loopcheck.design.range_verdict import RangeVerdict, range_verdict


def case_range_verdict(case) -> RangeVerdict:
    """:func:`range_verdict` of a case with everything it declares: Lg or SCR
    range, ``[tolerance]`` corners, ``[grid_network]`` and ``[feedforward]``.
    Raises :class:`loopcheck.io.casefile.CaseError` for a bad table."""
    from loopcheck.io.read_network import read_feedforward, read_grid_network
    from loopcheck.io.read_tolerance import parse_tolerance_table

    tables = getattr(case, "tables", {}) or {}
    spec = parse_tolerance_table(tables.get("tolerance"), case.where("tolerance"), case.design)
    return range_verdict(case.design, spec, read_grid_network(case), read_feedforward(case))
