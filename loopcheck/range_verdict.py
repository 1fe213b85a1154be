"""The headline verdict over what the case declares, not only the nominal point.

A case that declares a grid-inductance range (``Lg_range``, or ``scr_range``
with the rating) or component tolerances promises that the loop stays
stable over all of it. A headline that says STABLE from the nominal point
alone misleads where the design fails over part of its own range. This
module states the range result beside the nominal verdict: the sub-ranges
of Lg where the nominal filter is not stable (exact ends from
:func:`loopcheck.weakgrid.stable_lg_intervals`: closed-loop eigenvalues
sampled adaptively, crossings located by bisection) and the tolerance
corners that are not stable somewhere over the range (or at the nominal Lg
when the case has no range).

Pure computation; the text helpers build strings and never print.
"""

from __future__ import annotations

from dataclasses import dataclass

from .model import Design


@dataclass(frozen=True)
class RangeVerdict:
    """Stability over the case's declared Lg range and tolerance corners.

    Lg_range_H: the declared range [H] (None: the case declares none);
    nominal_stable: verdict at the nominal Lg (closed-loop eigenvalues);
    unstable_Lg_H: the parts of the range where the nominal filter is not
    stable, ``((from, to), ...)`` [H];
    unstable_share: their total length over the range length [-] (0 for a
    single-point range);
    corners: number of tolerance corners checked; unstable_corners: labels
    of the corners not stable somewhere over the range (at the nominal Lg
    without a range)."""

    Lg_range_H: tuple[float, float] | None
    nominal_stable: bool
    unstable_Lg_H: tuple[tuple[float, float], ...]
    unstable_share: float
    corners: int
    unstable_corners: tuple[str, ...]

    @property
    def declared(self) -> bool:
        """True when the case declares a range or tolerances."""
        return self.Lg_range_H is not None or self.corners > 0

    @property
    def stable_everywhere(self) -> bool:
        """Stable at the nominal point, over the whole range and at every corner."""
        return self.nominal_stable and not self.unstable_Lg_H and not self.unstable_corners

    def to_dict(self) -> dict:
        return {
            "declared": self.declared,
            "stable_everywhere": self.stable_everywhere,
            "Lg_range_H": list(self.Lg_range_H) if self.Lg_range_H is not None else None,
            "unstable_Lg_H": [list(iv) for iv in self.unstable_Lg_H],
            "unstable_share": self.unstable_share,
            "corners": self.corners,
            "unstable_corners": list(self.unstable_corners),
            "headline": headline(self),
        }


def _complement(intervals, lo: float, hi: float) -> tuple[tuple[float, float], ...]:
    out, at = [], lo
    for a, b in sorted(intervals):
        if a > at:
            out.append((at, a))
        at = max(at, b)
    if at < hi:
        out.append((at, hi))
    return tuple(out)


def range_verdict(design: Design, tolerance=None) -> RangeVerdict:
    """Verdict over the design's declared Lg range (``design.grid.Lg_range_H``)
    and the corners of ``tolerance`` (a :class:`loopcheck.tolerance.ToleranceSpec`
    or None); see the module docstring."""
    import numpy as np

    from .tolerance import ComponentValues, ToleranceSpec, corner_values
    from .weakgrid import closed_loop_eigenvalues, stable_lg_intervals

    g = design.grid
    Lg_nom = g.Lg_H
    E = closed_loop_eigenvalues(design, np.array([Lg_nom]))
    from .verdict import TOLERANCE

    nominal_stable = bool(np.abs(E).max() < 1.0 - TOLERANCE)
    rng = g.Lg_range_H
    spec = tolerance or ToleranceSpec()
    labels, cvals = corner_values(design, spec) if spec else ([], None)
    lo, hi = (float(rng[0]), float(rng[1])) if rng is not None else (Lg_nom, Lg_nom)
    unstable, share = (), 0.0
    if rng is not None:
        scan = stable_lg_intervals(design, (lo, hi))[0]
        if hi > lo:
            unstable = _complement(scan.stable_intervals_H, lo, hi)
            share = sum(b - a for a, b in unstable) / (hi - lo)
        elif not scan.stable_intervals_H:
            unstable, share = ((lo, hi),), 1.0
    bad_corners: list[str] = []
    if labels:
        assert isinstance(cvals, ComponentValues)
        scans = stable_lg_intervals(design, (lo, hi), cvals)
        for label, sc in zip(labels, scans):
            full = (len(sc.stable_intervals_H) == 1 and sc.stable_intervals_H[0][0] <= lo
                    and sc.stable_intervals_H[0][1] >= hi)
            if not full:
                bad_corners.append(label)
    return RangeVerdict(None if rng is None else (lo, hi), nominal_stable, unstable, float(share),
                        len(labels), tuple(bad_corners))


def _mh(v: float) -> str:
    from .units import format_quantity

    return format_quantity(v, "H")


def range_text(rv: RangeVerdict) -> str:
    """The range part of the headline, e.g. ``"UNSTABLE over 633 uH .. 2 mH
    (68 % of the Lg range 200 uH .. 2 mH)"``; empty when nothing is declared."""
    parts = []
    if rv.Lg_range_H is not None:
        lo, hi = rv.Lg_range_H
        rng = f"the Lg range {_mh(lo)} .. {_mh(hi)}" if hi > lo else f"Lg = {_mh(lo)}"
        if rv.unstable_Lg_H:
            pieces = ", ".join(f"{_mh(a)} .. {_mh(b)}" for a, b in rv.unstable_Lg_H)
            parts.append(f"NOT STABLE over {pieces} ({100 * rv.unstable_share:.0f} % of {rng})")
        else:
            parts.append(f"stable over all of {rng}")
    if rv.corners:
        where = "over the Lg range" if rv.Lg_range_H is not None else "at the nominal Lg"
        n = len(rv.unstable_corners)
        if n:
            parts.append(f"NOT STABLE {where} at {n} of {rv.corners} tolerance corners")
        else:
            parts.append(f"stable {where} at all {rv.corners} tolerance corners")
    return "; ".join(parts)


def headline(rv: RangeVerdict) -> str:
    """One line: the nominal verdict and, where declared, the range result."""
    nominal = "stable at the nominal Lg" if rv.nominal_stable else "NOT STABLE at the nominal Lg"
    rest = range_text(rv)
    if not rest:
        return nominal
    overall = "STABLE over everything the case declares" if rv.stable_everywhere else "NOT STABLE over what the case declares"
    return f"{overall}: {nominal}, {rest}"


def case_verdict_line(rv: RangeVerdict) -> str | None:
    """The line commands print under their title when the case declares a
    range or tolerances (``"  case verdict: ..."``), else None."""
    return f"  case verdict: {headline(rv)}" if rv.declared else None
