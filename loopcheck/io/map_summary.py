"""Text on a map's design point (pure string building, shared by the
``map`` command and the report): its verdict and the stable interval(s)
of the y parameter along the whole line through it (see
:mod:`loopcheck.design.design_line`), never clipped to the drawn range."""

from __future__ import annotations


def _q(value: float, name: str) -> str:
    from loopcheck.design.maps import AXIS_UNITS
    from loopcheck.engine.units import format_quantity

    unit = AXIS_UNITS[name]
    if not unit:
        return f"{value:.4g}"
    return format_quantity(value, unit, prefix=unit not in ("V/A", "V/A/s"))


def _edge(v: float, kind: str, name: str) -> str:
    if kind == "none":
        return "no lower bound" if v < 0 else "no upper bound"
    return f"{_q(v, name)} ({kind})"


def design_point_lines(smap) -> list[str]:
    """Text lines on the design point: its verdict and the stable y
    interval(s) along the whole line through it at the design's x (not
    clipped to the drawn range); for a design that is not stable, the
    nearest stable intervals and how far the design is from them. Shared by
    ``map`` and the report."""
    xn, yn = smap.x.name, smap.y.name
    dl = smap.design_line
    verdict = "stable" if smap.design_stable else "NOT stable"
    out = [f"  design point: {xn} = {_q(smap.design_x, xn)}, {yn} = {_q(smap.design_y, yn)}: {verdict}"]
    if dl is None:
        return out
    where = "on the whole gain line" if smap.y.is_gain else (
        f"searched {_q(dl.searched[0], yn)} .. {_q(dl.searched[1], yn)}")
    y0 = dl.design_value
    if dl.stable and dl.containing is not None:
        iv = dl.containing
        room = []
        if iv.low_kind == "boundary":
            room.append(f"{_q(y0 - iv.low, yn)} above the lower boundary")
        if iv.high_kind == "boundary":
            room.append(f"{_q(iv.high - y0, yn)} below the upper boundary")
        room_text = "the design is " + " and ".join(room) if room else "no stability boundary found on this line"
        out.append(f"  stable {yn} at this {xn} ({where}): {_edge(iv.low, iv.low_kind, yn)} .. "
                   f"{_edge(iv.high, iv.high_kind, yn)}; {room_text}")
    elif dl.nearest:
        parts = []
        for iv in dl.nearest:
            side = "above" if iv.low > y0 else "below"
            gap = iv.distance(y0)
            parts.append(f"{_edge(iv.low, iv.low_kind, yn)} .. {_edge(iv.high, iv.high_kind, yn)} "
                         f"({_q(gap, yn)} {side} the design)")
        out.append(f"  nearest stable {yn} at this {xn} ({where}): " + "; ".join(parts))
    else:
        out.append(f"  no stable {yn} at this {xn} ({where})")
    return out
