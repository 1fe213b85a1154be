"""Stability along the map's y parameter through the design point.

A map draws a finite window; the question a designer asks of the design
point is not bounded by that window: "which values of this gain keep the
loop stable at my operating point, and how far am I from the edge?" and,
for a design that fails, "which stable interval is nearest?".

Along a gain (``Kp``, ``Hi``, ``Kr``, ``Ki``) the closed-loop matrix is
``A(y) = A0 + y*A1`` with ``A1`` of rank one, so the characteristic
polynomial is ``p0(z) + y*p1(z)`` with ``deg p1 < deg p0``. Every gain at
which a root crosses the unit circle is a real root of a finite set of
equations (D-decomposition: z = 1, z = -1 and ``y = 1/G(e^{jw})`` where
``G = v^T (zI - A0)^{-1} u`` is real), so the stable set of the whole real
gain line is a finite union of bounded intervals (for large |y| one root
goes to infinity), and it is found exactly without any window: the
candidate gains come from both the polynomial and the frequency response
(their union: a spurious candidate is harmless), every piece between them
is classified by state-space eigenvalues, and the result is checked against
eigenvalues on a dense grid over the candidates and around the design
value; any contradiction falls back to eigenvalue bisection on that grid.

Along a physical parameter (fr/fs, fs, L1, L2, Lg, C) the line is searched
over a window four times wider than the map's y range on either side (in
ratio for positive parameters), by eigenvalues on a grid refined by
bisection; an interval that reaches the end of that window says so
(``"scan end"``).

References
----------
Ju. I. Neimark, "On the problem of the distribution of the roots of
polynomials", Doklady Akad. Nauk SSSR 58, 1947 / "D-decomposition of the
space of quasi-polynomials", Prikl. Mat. Mekh. 13, 1949 (from memory).
E. N. Gryazina, B. T. Polyak, "Stability regions in the parameter space:
D-decomposition revisited", Automatica 42(1), 2006.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from loopcheck.engine.model import Design
from loopcheck.design import maps as _m

#: Edge kinds of an interval along the line.
EDGE_KINDS = ("boundary", "scan end", "none")

_DENSE = 2001


@dataclass(frozen=True)
class LineInterval:
    """One stable interval along the y parameter at the design's x.

    low, high: its ends [SI unit of the y parameter]; ``-inf``/``inf`` when
    the loop stays stable without bound on that side.
    low_kind, high_kind: ``"boundary"`` (a closed-loop pole reaches the unit
    circle there), ``"scan end"`` (the end of the searched window, physical
    parameters only) or ``"none"`` (no boundary on that side)."""

    low: float
    high: float
    low_kind: str
    high_kind: str

    def contains(self, y: float) -> bool:
        return self.low <= y <= self.high

    def distance(self, y: float) -> float:
        """Distance from y to the interval [y unit], 0 inside."""
        return max(self.low - y, y - self.high, 0.0)

    def to_dict(self) -> dict:
        return {"from": _finite(self.low), "to": _finite(self.high),
                "from_kind": self.low_kind, "to_kind": self.high_kind}


@dataclass(frozen=True)
class DesignLine:
    """The y line through the design point of a map.

    name: the y parameter (case-file name); x_name, x_value: the x parameter
    and the design's value of it [SI]; design_value: the design's y value
    [SI]; stable: verdict at the design point (closed-loop eigenvalues);
    intervals: every stable interval found on the line, ascending;
    searched: ``(low, high)`` window searched [SI] (the whole real line,
    ``(-inf, inf)``, along a gain); method: ``"exact"`` (D-decomposition,
    eigenvalue-checked) or ``"refined"`` (eigenvalue bisection on a grid)."""

    name: str
    x_name: str
    x_value: float
    design_value: float
    stable: bool
    intervals: tuple[LineInterval, ...]
    searched: tuple[float, float]
    method: str

    @property
    def containing(self) -> LineInterval | None:
        """The stable interval that holds the design value, or None."""
        for iv in self.intervals:
            if iv.contains(self.design_value):
                return iv
        return None

    @property
    def nearest(self) -> tuple[LineInterval, ...]:
        """The stable interval holding the design value; for a design that
        is not stable, the nearest stable interval below and the nearest
        above it (closest first), as far as they exist."""
        c = self.containing
        if c is not None and self.stable:
            return (c,)
        y = self.design_value
        below = [iv for iv in self.intervals if iv.high < y]
        above = [iv for iv in self.intervals if iv.low > y]
        out = ([below[-1]] if below else []) + ([above[0]] if above else [])
        return tuple(sorted(out, key=lambda iv: iv.distance(y)))

    def to_dict(self) -> dict:
        c = self.containing if self.stable else None
        return {
            "parameter": self.name,
            "x": self.x_value,
            "y": self.design_value,
            "stable": self.stable,
            "stable_interval": c.to_dict() if c is not None else None,
            "nearest_stable_intervals": [iv.to_dict() for iv in self.nearest],
            "all_stable_intervals": [iv.to_dict() for iv in self.intervals],
            "searched": [_finite(self.searched[0]), _finite(self.searched[1])],
            "method": self.method,
        }


def _finite(v: float):
    return float(v) if math.isfinite(v) else None


def _pieces(boundaries, first_stable: bool, lo: float, hi: float, lo_kind: str, hi_kind: str):
    edges = [lo] + [float(b) for b in boundaries] + [hi]
    kinds = [lo_kind] + ["boundary"] * len(boundaries) + [hi_kind]
    out, s = [], first_stable
    for i in range(len(edges) - 1):
        if s and edges[i + 1] > edges[i]:
            out.append(LineInterval(edges[i], edges[i + 1], kinds[i], kinds[i + 1]))
        s = not s
    return tuple(out)


def _gain_line(design: Design, xname: str, x0: float, yname: str, y0: float, y_scale: float, tol: float):
    A0, A1 = _m._line_matrices(design, {xname: np.array([x0])}, yname, y_scale)
    cands = [y0]
    if np.abs(A1).max() > 0:
        p0, p1 = _m.char_polys(A0, A1)
        cands.extend(_m.crossing_gains(p0, p1)[0].tolist())
        cands.extend(_m.frequency_crossing_gains(A0, A1)[0].tolist())
    c = np.array([v for v in cands if math.isfinite(v)])
    c_lo, c_hi = float(c.min()), float(c.max())
    pad = 0.25 * (c_hi - c_lo) + 0.25 * max(abs(c_lo), abs(c_hi), y_scale)
    lo, hi = c_lo - pad, c_hi + pad
    lines, _ = _m._classify(A0, A1, [c], lo, hi, tol)
    line = lines[0]

    def radius(y):
        return _m._radius(A0[0][None] + np.asarray(y)[:, None, None] * A1[0][None])

    # dense eigenvalue check over the whole window and around the design value
    local = max(abs(y0), y_scale)
    grid = np.unique(np.concatenate([
        np.linspace(lo, hi, _DENSE),
        np.linspace(y0 - 2 * local, y0 + 2 * local, _DENSE),
        line.boundaries,
    ]))
    grid = grid[(grid >= lo) & (grid <= hi)]
    rad = radius(grid)
    eig = rad < 1.0 - tol
    bad = (line.flags(grid) != eig) & (np.abs(rad - 1.0) > 1e-7) & ~np.isin(grid, line.boundaries)
    method = "exact"
    if bad.any():
        evaluate = lambda li, yy: radius(yy) < 1.0 - tol  # noqa: E731
        line = _m._refined_lines(evaluate, eig[:, None], grid, hi - lo)[0]
        method = "refined"
    stable_lo = bool(line.flags(np.array([lo]))[0])
    stable_hi = bool(line.flags(np.array([hi]))[0])
    ivs = _pieces(line.boundaries, line.first_stable, lo, hi, "boundary", "boundary")
    if ivs and stable_lo:
        ivs = (LineInterval(-math.inf, ivs[0].high, "none", ivs[0].high_kind),) + ivs[1:]
    if ivs and stable_hi:
        ivs = ivs[:-1] + (LineInterval(ivs[-1].low, math.inf, ivs[-1].low_kind, "none"),)
    return ivs, (-math.inf, math.inf), method


def _physical_window(spec_axis, y0: float) -> tuple[float, float, bool]:
    lo = min(spec_axis.start, y0)
    hi = max(spec_axis.stop, y0)
    if spec_axis.name == "fr/fs":
        return max(lo / 4.0, 1e-4), min(hi * 4.0, 0.4999), True
    if lo > 0:
        return lo / 4.0, hi * 4.0, True
    return lo, hi * 4.0 if hi > 0 else hi + 1.0, False


def _physical_line(design: Design, spec, x0: float, y0: float, tol: float):
    xname, yname = spec.x.name, spec.y.name
    lo, hi, geometric = _physical_window(spec.y, y0)
    n = max(4 * spec.y.points, 801)
    yy = np.geomspace(lo, hi, n) if geometric else np.linspace(lo, hi, n)
    yy = np.unique(np.concatenate([yy, [y0]]))
    A = _m.closed_loop_matrices(design, {xname: np.full(yy.size, x0), yname: yy})
    st = (_m._radius(A) < 1.0 - tol)[:, None]
    ev = _m._physical_evaluator(design, xname, np.array([x0]), yname, tol)
    line = _m._refined_lines(ev, st, yy, hi - lo)[0]
    return _pieces(line.boundaries, line.first_stable, lo, hi, "scan end", "scan end"), (lo, hi), "refined"


def design_line(design: Design, spec, tol: float = _m.TOLERANCE) -> DesignLine:
    """Verdict at the design point of ``spec`` (a :class:`loopcheck.design.maps.MapSpec`)
    and every stable interval of its y parameter at the design's x value,
    over the whole gain line (gain axes) or a wide window (physical axes),
    independent of the drawn y range. See the module docstring."""
    xname, yname = spec.x.name, spec.y.name
    x0 = _m.design_value(design, xname)
    y0 = _m.design_value(design, yname)
    A = _m.closed_loop_matrices(design, {xname: np.array([x0]), yname: np.array([y0])})
    stable = bool(_m._radius(A)[0] < 1.0 - tol)
    if spec.y.is_gain:
        y_scale = _m._y_ref(np.array([spec.y.start, spec.y.stop, y0]))
        ivs, searched, method = _gain_line(design, xname, x0, yname, y0, y_scale, tol)
    else:
        ivs, searched, method = _physical_line(design, spec, x0, y0, tol)
    return DesignLine(yname, xname, float(x0), float(y0), stable, ivs, searched, method)
