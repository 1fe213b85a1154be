"""Reading the ``[scenario]`` table and ``--event`` options into the time-domain scenario.

Pure parsing into the frozen dataclasses of :mod:`loopcheck.timedomain.scenario`
(SI units inside); bad input raises :class:`loopcheck.io.casefile.CaseError`
with a one-line message naming the file, the table and the key.
"""

from __future__ import annotations

import math
import re

from loopcheck.engine.units import to_float
from loopcheck.io.casefile import CaseError, check_keys, read_choice, read_quantity
from loopcheck.timedomain.scenario import (
    _EVENT_KEYS,
    DEFAULT_DURATION_S,
    DEFAULT_POINTS,
    EVENT_FREQUENCY_HZ,
    EVENT_KINDS,
    EVENT_MAX_A,
    EVENT_MAX_LG_H,
    EVENT_MAX_V,
    SCENARIO_KEYS,
    Event,
    GridHarmonic,
    Scenario,
    _with_events,
    default_scenario,
)


def _angle(t: dict, key: str, w: str, default=None):
    if key not in t:
        return default
    v = t[key]
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(to_float(v)):
        raise CaseError(f"{w} {key}: expected an angle in degrees as a plain number (e.g. 30), got {_show(v)}")
    return float(v)


def _whole(t: dict, key: str, w: str, default: int, lo: int, hi: int) -> int:
    if key not in t:
        return default
    v = t[key]
    if isinstance(v, str) and re.fullmatch(r"\s*\d+\s*", v):
        v = int(v)
    if isinstance(v, bool) or not isinstance(v, int) or not lo <= v <= hi:
        raise CaseError(f"{w} {key}: expected a whole number from {lo} to {hi}, got {_show(v)}")
    return v


def _show(v) -> str:
    from loopcheck.engine.units import shown

    return shown(v)


def parse_event(t: dict, w: str) -> Event:
    """One event table (``[[scenario.events]]`` entry or a ``--event``
    option turned into a dict) -> :class:`Event`. ``w`` prefixes messages."""
    if not isinstance(t, dict):
        raise CaseError(f"{w}: expected a table with at and kind, got {_show(t)}")
    kind = read_choice(t, "kind", EVENT_KINDS, w)
    check_keys(t, ("at", "kind") + _EVENT_KEYS[kind], w)
    at = read_quantity(t, "at", "time", w, nonnegative=True)
    if kind == "reference-step":
        peak = read_quantity(t, "peak", "current", w, None, nonnegative=True, maximum=EVENT_MAX_A)
        ph = _angle(t, "phase_deg", w)
        if peak is None and ph is None:
            raise CaseError(f"{w} peak: a reference-step needs peak (e.g. \"30 A\") and/or phase_deg")
        return Event(at, kind, peak_A=peak, phase_deg=ph)
    if kind == "grid-voltage-step":
        return Event(at, kind, peak_V=read_quantity(t, "peak", "voltage", w, nonnegative=True, maximum=EVENT_MAX_V))
    if kind == "grid-phase-jump":
        ang = _angle(t, "by_deg", w)
        if ang is None:
            raise CaseError(f"{w} by_deg: missing; expected the jump angle in degrees (e.g. 20)")
        return Event(at, kind, angle_deg=ang)
    if kind == "grid-inductance-step":
        return Event(at, kind, Lg_H=read_quantity(t, "Lg", "inductance", w, nonnegative=True, maximum=EVENT_MAX_LG_H))
    if kind == "resonance-burst":
        return Event(
            at,
            kind,
            peak_V=read_quantity(t, "peak", "voltage", w, None, positive=True, maximum=EVENT_MAX_V),
            cycles=_whole(t, "cycles", w, 3, 1, 1000),
            frequency_hz=read_quantity(t, "frequency", "frequency", w, None, positive=True,
                                       minimum=EVENT_FREQUENCY_HZ[0], maximum=EVENT_FREQUENCY_HZ[1]),
        )
    return Event(
        at,
        kind,
        peak_V=read_quantity(t, "peak", "voltage", w, None, minimum=-EVENT_MAX_V, maximum=EVENT_MAX_V),
        width_s=read_quantity(t, "width", "time", w, None, positive=True, maximum=10.0),
    )


def parse_event_option(text: str, label: str = "--event") -> Event:
    """Parse a command-line event such as ``"resonance-burst at=20ms peak=15V"``
    (the kind first, then key=value words)."""
    words = text.split()
    if not words:
        raise CaseError(f'{label}: empty; expected e.g. "resonance-burst at=20ms peak=15V"')
    t: dict = {"kind": words[0]}
    for word in words[1:]:
        if "=" not in word:
            raise CaseError(f'{label} "{text}": expected key=value words after the kind, got "{word}"')
        k, v = word.split("=", 1)
        t[k] = _number_or_text(v)
    return parse_event(t, f"{label} \"{text}\":")


def _number_or_text(v: str):
    try:
        return int(v)
    except ValueError:
        pass
    try:
        return float(v)
    except ValueError:
        return v


def parse_scenario(table: dict | None, where: str = "<scenario>:", extra_events=()) -> Scenario:
    """Read a raw ``[scenario]`` table (as tomllib returned it; None or {}
    gives the default scenario) and append ``extra_events`` (from options).

    ``where`` prefixes messages, e.g. ``"cases/x.toml: [scenario]"``."""
    if not table:
        base = default_scenario() if not extra_events else Scenario()
        return _with_events(base, tuple(extra_events))
    w = where
    check_keys(table, SCENARIO_KEYS, w)
    duration = read_quantity(table, "duration", "time", w, DEFAULT_DURATION_S, positive=True)
    if duration > 10.0:
        raise CaseError(f"{w} duration: at most 10 s can be simulated, got {_show(table['duration'])}")
    points = _whole(table, "points_per_sample", w, DEFAULT_POINTS, 1, 200)
    phases = None
    if "phases" in table:
        phases = _whole(table, "phases", w, 3, 1, 3)
        if phases == 2:
            raise CaseError(f"{w} phases: expected 1 or 3, got 2")
    start = read_choice(table, "start", ("steady", "rest"), w, "steady")
    grid_peak = read_quantity(table, "grid_peak", "voltage", w, None, nonnegative=True, maximum=EVENT_MAX_V)
    grid_phase = _angle(table, "grid_phase_deg", w, 0.0)
    harmonics = []
    raw = table.get("grid_harmonics", [])
    if not isinstance(raw, list):
        raise CaseError(f"{w} grid_harmonics: expected a list of tables such as [{{order = 5, share = \"3 %\"}}], got {_show(raw)}")
    for i, h in enumerate(raw, 1):
        wh = f"{w} grid_harmonics[{i}]"
        if not isinstance(h, dict):
            raise CaseError(f"{wh}: expected a table such as {{order = 5, share = \"3 %\"}}, got {_show(h)}")
        check_keys(h, ("order", "share", "phase_deg"), wh)
        if "order" not in h:
            raise CaseError(f"{wh} order: missing; expected a whole number >= 2")
        order = _whole(h, "order", wh, 0, 2, 1000)
        share = read_quantity(h, "share", "percent", wh, nonnegative=True)
        harmonics.append(GridHarmonic(order, share, _angle(h, "phase_deg", wh, 0.0)))
    ref_peak = read_quantity(table, "reference_peak", "current", w, None, nonnegative=True, maximum=EVENT_MAX_A)
    ref_phase = _angle(table, "reference_phase_deg", w, 0.0)
    trip = read_quantity(table, "trip_current", "current", w, None, positive=True, maximum=EVENT_MAX_A)
    events = []
    raw_events = table.get("events", [])
    if not isinstance(raw_events, list):
        raise CaseError(f"{w} events: expected [[scenario.events]] tables, got {_show(raw_events)}")
    for i, e in enumerate(raw_events, 1):
        we = f"{w} events[{i}]"
        ev = parse_event(e, we)
        if ev.time_s >= duration:
            raise CaseError(f"{we} at: {ev.time_s:g} s is not before the end of the simulation ({duration:g} s)")
        events.append(ev)
    sc = Scenario(
        duration_s=duration,
        points_per_sample=points,
        start=start,
        grid_peak_V=grid_peak,
        grid_phase_deg=grid_phase,
        grid_harmonics=tuple(harmonics),
        reference_peak_A=ref_peak,
        reference_phase_deg=ref_phase,
        trip_current_A=trip,
        events=tuple(events),
        phases=phases,
    )
    return _with_events(sc, tuple(extra_events))
