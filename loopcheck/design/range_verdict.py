"""The headline verdict over what the case declares, not only the nominal point.

A case that declares a grid-inductance range (``Lg_range``, or ``scr_range``
with the rating) or component tolerances promises that the loop stays
stable over all of it. A headline that says STABLE from the nominal point
alone misleads where the design fails over part of its own range. This
module states the range result beside the nominal verdict: the sub-ranges
of Lg where the nominal filter is not stable (exact ends from
:func:`loopcheck.design.weakgrid.stable_lg_intervals`: closed-loop eigenvalues
sampled adaptively, crossings located by bisection) and the tolerance
corners that are not stable somewhere over the range (or at the nominal Lg
when the case has no range).

Pure computation; the text helpers build strings and never print.
"""

from __future__ import annotations

from dataclasses import dataclass

from loopcheck.engine.model import Design





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
    without a range);
    network_verdict: with a declared grid network (``[grid_network]``:
    shunt capacitance, N paralleled units, or a measured impedance) and/or
    grid-voltage feedforward, the verdict there ("stable", "marginal",
    "unstable"; None when none is declared); network_text: what that
    verdict is of, in words (components and units, or the measured table's
    frequency-response count)."""

    Lg_range_H: tuple[float, float] | None
    nominal_stable: bool
    unstable_Lg_H: tuple[tuple[float, float], ...]
    unstable_share: float
    corners: int
    unstable_corners: tuple[str, ...]
    network_verdict: str | None = None
    network_text: str = ""

    @property
    def declared(self) -> bool:
        """True when the case declares a range, tolerances or a grid network."""
        return self.Lg_range_H is not None or self.corners > 0 or self.network_verdict is not None

    @property
    def stable_everywhere(self) -> bool:
        """Stable at the nominal point, over the whole range, at every corner
        and on the declared grid network."""
        return (self.nominal_stable and not self.unstable_Lg_H and not self.unstable_corners
                and self.network_verdict in (None, "stable"))

    def to_dict(self) -> dict:
        return {
            "declared": self.declared,
            "stable_everywhere": self.stable_everywhere,
            "Lg_range_H": list(self.Lg_range_H) if self.Lg_range_H is not None else None,
            "unstable_Lg_H": [list(iv) for iv in self.unstable_Lg_H],
            "unstable_share": self.unstable_share,
            "corners": self.corners,
            "unstable_corners": list(self.unstable_corners),
            "network_verdict": self.network_verdict,
            "network": self.network_text or None,
            "headline": headline(self),
            "note": "null: not declared by the case (no Lg range, no grid network or feedforward)",
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


def _network_verdict(design, network, feedforward) -> tuple[str | None, str]:
    """(verdict, words) on a declared grid network and/or feedforward."""
    if network is None and feedforward is None:
        return None, ""
    from loopcheck.design.grid_network import GridNetwork, exact_verdict, impedance_ratio_verdict  # noqa: F401
    from loopcheck.engine.units import format_quantity

    net = network if network is not None else GridNetwork(design.grid.Lg_H, design.grid.Rg_ohm)
    parts = []
    if net.measured is not None:
        from loopcheck.design.measured_grid import measured_verdict

        r = measured_verdict(design, net.measured, net.units, feedforward=feedforward)
        ok = all(c for _, c in r.conditions)
        words = f"the measured grid impedance (frequency-response Nyquist count{'' if ok else ', validity conditions NOT all met'})"
        return r.verdict, words
    if net.has_shunt:
        parts.append(f"shunt C {format_quantity(net.C_shunt_F, 'F')}")
    if net.units > 1:
        parts.append(f"{net.units} paralleled units")
    if feedforward is not None:
        parts.append("grid-voltage feedforward")
    ev = exact_verdict(design, net, feedforward=feedforward)
    words = "the declared grid network" + (f" ({', '.join(parts)})" if parts else "")
    return ev.verdict, f"{words}, spectral radius {ev.spectral_radius:.6f}"


def range_verdict(design: Design, tolerance=None, network=None, feedforward=None) -> RangeVerdict:
    """Verdict over the design's declared Lg range (``design.grid.Lg_range_H``),
    the corners of ``tolerance`` (a :class:`loopcheck.design.tolerance.ToleranceSpec`
    or None) and, when given, a grid network (:class:`loopcheck.design.grid_network.GridNetwork`,
    exact eigenvalues with the network, all units and ``feedforward`` in the
    sampled model); see the module docstring."""
    import numpy as np

    from loopcheck.design.tolerance import ComponentValues, ToleranceSpec, corner_values
    from loopcheck.design.weakgrid import closed_loop_eigenvalues, stable_lg_intervals

    g = design.grid
    Lg_nom = g.Lg_H
    E = closed_loop_eigenvalues(design, np.array([Lg_nom]))
    from loopcheck.engine.verdict import TOLERANCE

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
    net_v, net_text = _network_verdict(design, network, feedforward)
    return RangeVerdict(None if rng is None else (lo, hi), nominal_stable, unstable, float(share),
                        len(labels), tuple(bad_corners), net_v, net_text)


def _mh(v: float) -> str:
    from loopcheck.engine.units import format_quantity

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
    if rv.network_verdict is not None:
        word = "stable" if rv.network_verdict == "stable" else f"NOT STABLE ({rv.network_verdict})"
        parts.append(f"{word} on {rv.network_text}")
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
