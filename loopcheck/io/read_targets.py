"""Reading the ``[targets]`` table (required phase and gain margins) into :class:`~loopcheck.design.weakgrid.Targets`.

Bad input raises :class:`loopcheck.io.casefile.CaseError` with one line naming
the file, the table and the key.
"""

from __future__ import annotations

import math

from loopcheck.design.weakgrid import (
    DEFAULT_GAIN_MARGIN_DB,
    DEFAULT_PHASE_MARGIN_DEG,
    MAX_TARGET_DB,
    Targets,
    shown_db,
)


def _read_angle_or_db(value, unit_names: tuple[str, ...], where: str, key: str, example: str) -> tuple[float, str]:
    from loopcheck.engine.units import UnitError, shown, split_quantity, to_float
    from loopcheck.io.casefile import CaseError

    if isinstance(value, bool) or not isinstance(value, (int, float, str)):
        raise CaseError(f'{where} {key}: expected a value such as "{example}", got {shown(value)}')
    if isinstance(value, (int, float)):
        x, unit = to_float(value), ""
    else:
        try:
            number, unit = split_quantity(value)
        except UnitError:
            raise CaseError(f'{where} {key}: expected a value such as "{example}", got {shown(value)}') from None
        x = to_float(number)
        if unit and unit not in unit_names:
            raise CaseError(f'{where} {key}: expected a value such as "{example}", got {shown(value)}')
    if not math.isfinite(x):
        raise CaseError(f'{where} {key}: expected a finite value such as "{example}", got {shown(value)}')
    return x, unit


def parse_targets(table: dict | None, where: str, *, phase_margin_deg: float | None = None,
                  gain_margin_db: float | None = None, sensitivity_peak_db: float | None = None) -> Targets:
    """Read the raw ``[targets]`` table and apply command-line overrides.

    Keys: ``phase_margin = "30 deg"`` (bare number: degrees),
    ``gain_margin = "3 dB"`` (bare number: dB; both sides),
    ``sensitivity_peak = "6 dB"`` (a bare number is the ratio max|1/(1+L)|,
    e.g. 2.0). Overrides in the keyword arguments win over the table
    (``sensitivity_peak_db`` in dB). Raises
    :class:`loopcheck.io.casefile.CaseError` (one line)."""
    from loopcheck.io.casefile import CaseError, check_keys

    table = table or {}
    check_keys(table, ("phase_margin", "gain_margin", "sensitivity_peak"), where)
    pm = DEFAULT_PHASE_MARGIN_DEG
    gm = DEFAULT_GAIN_MARGIN_DB
    smax = None
    if "phase_margin" in table:
        pm, _ = _read_angle_or_db(table["phase_margin"], ("deg", "\u00b0"), where, "phase_margin", "30 deg")
    if "gain_margin" in table:
        gm, _ = _read_angle_or_db(table["gain_margin"], ("dB",), where, "gain_margin", "3 dB")
    if "sensitivity_peak" in table:
        x, unit = _read_angle_or_db(table["sensitivity_peak"], ("dB",), where, "sensitivity_peak", "6 dB")
        if (x if unit == "dB" else 20.0 * math.log10(max(x, 1e-300))) > MAX_TARGET_DB:
            raise CaseError(f"{where} sensitivity_peak: at most {MAX_TARGET_DB:g} dB, got {shown_db(x, unit)}")
        smax = 10.0 ** (x / 20.0) if unit == "dB" else x
        if smax <= 1.0:
            raise CaseError(f"{where} sensitivity_peak: must exceed 0 dB (a ratio above 1), got {x:g}{' dB' if unit else ''}")
    if phase_margin_deg is not None:
        pm = phase_margin_deg
    if gain_margin_db is not None:
        gm = gain_margin_db
    if sensitivity_peak_db is not None:
        if sensitivity_peak_db > MAX_TARGET_DB:
            raise CaseError(f"--sensitivity-peak: at most {MAX_TARGET_DB:g} dB, got {sensitivity_peak_db:g} dB")
        smax = 10.0 ** (sensitivity_peak_db / 20.0)
        if smax <= 1.0:
            raise CaseError(f"the sensitivity-peak limit must exceed 0 dB, got {sensitivity_peak_db:g} dB")
    if not 0.0 < pm < 180.0:
        raise CaseError(f"{where} phase_margin: must lie between 0 and 180 deg, got {pm:g}")
    if not 0.0 < gm <= MAX_TARGET_DB:
        raise CaseError(f"{where} gain_margin: must lie above 0 dB and at most {MAX_TARGET_DB:g} dB, got {gm:g}")
    return Targets(pm, gm, smax)
