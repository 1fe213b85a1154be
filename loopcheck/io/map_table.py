"""Read the ``[map]`` table of a case file, and the command-line options
that override it, into a :class:`loopcheck.design.maps.MapSpec`.

Keys (all optional; the complete reference is ``docs/maps.md``)::

    [map]
    x = "fr/fs"              # fr/fs, fs, Lg, Kp, Hi, C, L2, L1, Kr, Ki
    x_range = [0.02, 0.45]   # values with units for physical axes, e.g. ["0 mH", "5 mH"]
    x_points = 400
    x_scale = "linear"       # or "log"
    y = "Hi"
    y_range = ["0 V/A", "40 V/A"]
    y_points = 300
    y_scale = "linear"
    metrics = ["phase-margin", "gain-margin", "sensitivity"]

A missing range gets a default around the design's own value
(:func:`default_range`). When an option changes an axis (``--x Lg``) the
table's range for the old axis is not used. Every error is one line naming
the file and key (or the option), raised as
:class:`loopcheck.io.casefile.CaseError`. Nothing here prints.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from loopcheck.io.casefile import CaseError, check_keys
from loopcheck.engine.units import UnitError, parse_quantity_unit, shown

MAP_KEYS = ("x", "x_range", "x_points", "x_scale", "y", "y_range", "y_points", "y_scale", "metrics")
#: Bounds of the number of grid values per axis.
POINTS_MIN, POINTS_MAX = 2, 5000
#: Largest number of grid points of one map (peak memory about 1.6 GB at
#: 3000 x 3000 with the figure, measured by benchmarks/bench_map_wide.py;
#: 5000 x 5000 would need about 4 GB).
GRID_POINTS_MAX = 9_000_000
DEFAULT_POINTS = {"x": 300, "y": 200}
#: Largest fr/fs accepted on an axis (the resonance must stay below fs/2).
RATIO_MAX = 0.499


@dataclass(frozen=True)
class Overrides:
    """Command-line values that replace ``[map]`` keys (None = not given).

    x, y: axis names; x_range, y_range: two raw values each, as typed
    (``("0 mH", "5 mH")``); x_points, y_points: grid sizes; x_scale,
    y_scale: ``"linear"`` or ``"log"``; metrics: metric names."""

    x: str | None = None
    x_range: tuple[str, str] | None = None
    x_points: int | None = None
    x_scale: str | None = None
    y: str | None = None
    y_range: tuple[str, str] | None = None
    y_points: int | None = None
    y_scale: str | None = None
    metrics: tuple[str, ...] | None = None


def _dimension(name: str, design) -> str:
    """Units dimension of an axis (for reading its range)."""
    if name == "Kr":
        return "gain" if design.control.wc_rad_s > 0 else "integral_gain"
    return {
        "fr/fs": "ratio",
        "fs": "frequency",
        "Lg": "inductance",
        "Kp": "gain",
        "Hi": "gain",
        "C": "capacitance",
        "L2": "inductance",
        "L1": "inductance",
        "Ki": "integral_gain",
    }[name]


def _nice_up(x: float) -> float:
    """Round up to 1, 2 or 5 times a power of ten."""
    if x <= 0:
        return 1.0
    e = math.floor(math.log10(x))
    for m in (1.0, 2.0, 5.0, 10.0):
        if m * 10.0**e >= x * (1 - 1e-12):
            return m * 10.0**e
    return 10.0 ** (e + 1)


def _negative_hi_wanted(design, other) -> bool:
    """True when the map should show negative Hi: the design's Hi is
    negative, or a resonance above the critical frequency fs/(4*delay + 2)
    is on the map (at the design's own fs: the lowest grid inductance of the
    case's range, or an fr/fs axis reaching past the critical ratio). Above
    the critical frequency capacitor-current feedback damps with the
    opposite sign (common practice; e.g. Parker, McGrath, Holmes, "Regions
    of active damping control for LCL filters", IEEE Trans. Ind. Appl.
    50(1), 2014, from memory)."""
    from loopcheck.engine.model import resonance_hz

    f, g, s, c = design.filter, design.grid, design.sampling, design.control
    if c.Hi_V_per_A < 0:
        return True
    from loopcheck.engine.damping_filter import damping_critical_hz

    crit = damping_critical_hz(design)
    lg_low = min(g.Lg_H, g.Lg_range_H[0]) if g.Lg_range_H is not None else g.Lg_H
    if float(resonance_hz(f.L1_H, f.C_F, f.L2_H + lg_low)) > crit:
        return True
    return other is not None and other.name == "fr/fs" and other.stop > crit / s.fs_hz


def default_range(design, name: str, other=None) -> tuple[float, float]:
    """Default range of an axis around the design's own value [SI].

    ``other``: the map's other axis when already known (a
    :class:`loopcheck.design.maps.Axis`), which decides whether Hi goes negative.
    fr/fs: 0.02..0.45; Hi: 0 up to normalised gain Hi*Ts/L1 = 1.2 (or 1.5
    times the design's Hi if larger), and down to minus half of that (or
    1.5 times a negative design Hi) when a resonance above the critical
    frequency is on the map (:func:`_negative_hi_wanted`); Kp, Kr, Ki: 0 to 3 times the design
    value; fs: half to twice; Lg: the case's Lg_range, else 0 to
    max(3 Lg, L1 + L2); C, L1, L2: a quarter to four times."""
    f, g, s, c = design.filter, design.grid, design.sampling, design.control
    if name == "fr/fs":
        return 0.02, 0.45
    if name == "Hi":
        top = _nice_up(max(1.2 * f.L1_H * s.fs_hz, 1.5 * max(c.Hi_V_per_A, 0.0)))
        if not _negative_hi_wanted(design, other):
            return 0.0, top
        return -_nice_up(max(0.5 * top, -1.5 * c.Hi_V_per_A)), top
    if name in ("Kp", "Kr", "Ki"):
        v = {"Kp": c.Kp_V_per_A, "Kr": c.Kr, "Ki": c.Ki_V_per_As}[name]
        return 0.0, _nice_up(3.0 * v) if v > 0 else 1.0
    if name == "fs":
        return 0.5 * s.fs_hz, 2.0 * s.fs_hz
    if name == "Lg":
        if g.Lg_range_H is not None and g.Lg_range_H[1] > g.Lg_range_H[0]:
            return g.Lg_range_H
        return 0.0, _nice_up(max(3.0 * g.Lg_H, f.L1_H + f.L2_H))
    v = {"C": f.C_F, "L1": f.L1_H, "L2": f.L2_H}[name]
    return 0.25 * v, 4.0 * v


def _err(label: str, detail: str) -> CaseError:
    return CaseError(f"{label}: {detail}")


def _read_axis_name(value, label: str, axis_names) -> str:
    allowed = ", ".join(f'"{a}"' for a in axis_names)
    if not isinstance(value, str) or value not in axis_names:
        import difflib

        hint = ""
        if isinstance(value, str):
            close = difflib.get_close_matches(value, axis_names, n=1, cutoff=0.5)
            lower = {a.lower(): a for a in axis_names}
            if not close and value.lower() in lower:
                close = [lower[value.lower()]]
            hint = f'; did you mean "{close[0]}"?' if close else ""
        raise _err(label, f"expected one of {allowed}, got {shown(value)}{hint}")
    return value


def _read_range(value, label: str, name: str, design) -> tuple[float, float]:
    dim = _dimension(name, design)
    if not isinstance(value, (list, tuple)) or len(value) != 2:
        raise _err(label, f"expected a list of two values [from, to], got {shown(value)}")
    out = []
    for item in value:
        if isinstance(item, str) and dim == "ratio" and "/" in item:
            raise _err(label, f'expected a plain number for fr/fs (e.g. 0.1), got {shown(item)}')
        try:
            x, _unit = parse_quantity_unit(_number_or_text(item), dim)
        except UnitError as exc:
            raise _err(label, str(exc)) from None
        out.append(x)
    lo, hi = out
    if not lo < hi:
        raise _err(label, f"the first value must be below the second, got [{shown(value[0])}, {shown(value[1])}]")
    if name == "fr/fs" and not (0.0 < lo and hi <= RATIO_MAX):
        raise _err(label, f"fr/fs must lie between 0 and {RATIO_MAX} (below fs/2), got [{lo:g}, {hi:g}]")
    if name in ("fs", "C", "L1", "L2") and lo <= 0:
        raise _err(label, f"{name} must be greater than zero, got {shown(value[0])}")
    if name == "Lg" and lo < 0:
        raise _err(label, f"Lg must not be negative, got {shown(value[0])}")
    from loopcheck.io.casefile import override_problem

    for x in (lo, hi):
        problem = override_problem(design, name, x)
        if problem:
            raise _err(label, problem)
    return lo, hi


def _number_or_text(item):
    """Command-line values arrive as text; a bare number stays a number."""
    if isinstance(item, str):
        try:
            return float(item)
        except ValueError:
            return item
    return item


def _read_points(value, label: str) -> int:
    if isinstance(value, str):
        try:
            value = int(value)
        except ValueError:
            pass
    if isinstance(value, bool) or not isinstance(value, int):
        raise _err(label, f"expected a whole number of grid values, got {shown(value)}")
    if not POINTS_MIN <= value <= POINTS_MAX:
        raise _err(label, f"must lie between {POINTS_MIN} and {POINTS_MAX}, got {value}")
    return value


def _read_scale(value, label: str) -> bool:
    if value not in ("linear", "log"):
        raise _err(label, f'expected "linear" or "log", got {shown(value)}')
    return value == "log"


def _read_metrics(value, label: str, metric_names) -> tuple[str, ...]:
    if isinstance(value, str):
        value = [value]
    if not isinstance(value, (list, tuple)):
        raise _err(label, f"expected a list of metric names, got {shown(value)}")
    out: list[str] = []
    allowed = ", ".join(f'"{m}"' for m in metric_names)
    for v in value:
        if v == "all":
            out.extend(metric_names)
            continue
        if v not in metric_names:
            raise _err(label, f"expected metric names from {allowed} (or \"all\"), got {shown(v)}")
        out.append(v)
    return tuple(dict.fromkeys(out))


def map_spec(case, overrides: Overrides | None = None):
    """The :class:`loopcheck.design.maps.MapSpec` of a case: its ``[map]`` table
    (may be absent) with ``overrides`` applied. Raises CaseError (one line
    naming the file and key, or the option) for bad input."""
    from loopcheck.design.maps import AXIS_NAMES, METRICS, Axis, MapSpec, check_axes

    ov = overrides or Overrides()
    table = case.tables.get("map", {}) or {}
    where = case.where("map")
    check_keys(table, MAP_KEYS, where)
    design = case.design

    def source(key: str):
        """(raw value, label) for a key: the option when given, else the table."""
        opt = getattr(ov, key)
        if opt is not None:
            return opt, "--metric" if key == "metrics" else "--" + key.replace("_", "-")
        if key in table:
            return table[key], f"{where} {key}"
        return None, f"{where} {key}"

    axes = {}
    for ax, default_name in (("x", "fr/fs"), ("y", "Hi")):
        raw, label = source(ax)
        name = default_name if raw is None else _read_axis_name(raw, label, AXIS_NAMES)
        changed_by_option = getattr(ov, ax) is not None and table.get(ax) != name
        key = f"{ax}_range"
        raw_r, label_r = source(key)
        if raw_r is not None and not (changed_by_option and getattr(ov, key) is None):
            lo, hi = _read_range(raw_r, label_r, name, design)
        else:
            lo, hi = default_range(design, name, axes.get("x"))
        raw_p, label_p = source(f"{ax}_points")
        points = DEFAULT_POINTS[ax] if raw_p is None else _read_points(raw_p, label_p)
        raw_s, label_s = source(f"{ax}_scale")
        log = False if raw_s is None else _read_scale(raw_s, label_s)
        if log and lo <= 0:
            raise _err(label_s, f"a log scale needs a range above zero, got {lo:g}..{hi:g}")
        axes[ax] = Axis(name, float(lo), float(hi), points, log)
        if name == "Kr" and design.control.kind != "PR":
            raise _err(label, f'axis "Kr" needs a PR controller (the case has kind = "{design.control.kind}")')
        if name == "Ki" and design.control.kind != "PI":
            raise _err(label, f'axis "Ki" needs a PI controller (the case has kind = "{design.control.kind}")')
    try:
        check_axes(axes["x"].name, axes["y"].name)
    except ValueError as exc:
        label = "--y" if ov.y is not None else f"{where} y"
        raise _err(label, str(exc)) from None
    total = axes["x"].points * axes["y"].points
    if total > GRID_POINTS_MAX:
        ax = "x" if axes["x"].points >= axes["y"].points else "y"
        raise _err(
            source(f"{ax}_points")[1],
            f"{axes['x'].points} x {axes['y'].points} = {total} grid points is more than a map holds in memory "
            f"(at most {GRID_POINTS_MAX}, e.g. 3000 x 3000); use fewer x_points or y_points",
        )
    raw_m, label_m = source("metrics")
    metrics = () if raw_m is None else _read_metrics(raw_m, label_m, METRICS)
    spec = MapSpec(axes["x"], axes["y"], metrics)
    _check_work(design, spec)
    _check_resonance(case, spec, source)
    return spec


#: Work limits of a map (docs/bad-input.md): grid points x (loop states)^3
#: (eigenvalues per point; 1000 x 1000 points at 10 states is 1e9, about
#: 25 s measured), points in total, and points with --metric.
MAX_MAP_WORK = 4e9
MAX_MAP_POINTS = 4_000_000
MAX_MAP_METRIC_POINTS = 1_000_000


def _check_work(design, spec) -> None:
    """Refuse a map beyond the work limits above (points, points with
    metrics, points x states^3)."""
    from loopcheck.engine.model import loop_state_count

    points = spec.x.points * spec.y.points
    states = loop_state_count(design)
    size = f"{spec.x.points} x {spec.y.points} points"
    reduce = "lower --x-points/--y-points ([map] x_points, y_points)"
    limit = MAX_MAP_METRIC_POINTS if spec.metrics else MAX_MAP_POINTS
    if points > limit:
        extra = " with --metric" if spec.metrics else ""
        raise CaseError(f"map: {size}{extra} is more than {limit:,} points; {reduce}")
    work = points * states**3
    if work > MAX_MAP_WORK:
        most = int(MAX_MAP_WORK / states**3)
        raise CaseError(f"map: {size} with about {states} loop states is too much work; {reduce} "
                        f"to at most about {most:,} points in total, or use fewer resonators")


def _check_resonance(case, spec, source) -> None:
    """The resonance must stay below fs/2 everywhere on the map (the ratio
    is monotone in every axis parameter, so the corners decide)."""
    import numpy as np

    from loopcheck.design.maps import point_parameters
    from loopcheck.engine.model import resonance_hz

    xs = np.array([spec.x.start, spec.x.stop])
    ys = np.array([spec.y.start, spec.y.stop])
    X, Y = np.meshgrid(xs, ys)
    p = point_parameters(case.design, {spec.x.name: X, spec.y.name: Y})
    ratio = resonance_hz(p["L1"], p["C"] + p["Cd"], p["L2"] + p["Lg"]) / p["fs"]
    if np.all(ratio < 0.5):
        return
    i = np.unravel_index(np.argmax(ratio), ratio.shape)
    physical = ("fs", "C", "L1", "L2", "Lg")
    culprit = "x" if spec.x.name in physical else "y"
    _raw, label = source(f"{culprit}_range")
    raise _err(
        label,
        f"the LCL resonance reaches fs/2 on this map (fr/fs = {float(ratio[i]):.3g} at "
        f"{spec.x.name} = {float(X[i]):.4g}, {spec.y.name} = {float(Y[i]):.4g}); narrow the range",
    )


# ---------------------------------------------------------------------------
# the CSV of a computed map
# ---------------------------------------------------------------------------


def _words(values) -> list[str]:
    """Shortest round-trip text of each float (repr), "" for NaN."""
    words = list(map(repr, values))
    if "nan" in words:
        words = ["" if w == "nan" else w for w in words]
    return words


def _column_words(arr, ny: int, nx: int) -> list[str]:
    """Text of a ``[ny, nx]`` map array in CSV row order (x outer, y inner).
    Values that depend on x only or y only are formatted once each."""
    import numpy as np

    a = np.asarray(arr)
    if a.dtype == bool:
        return np.array(["0", "1"])[a.T.ravel().astype(int)].tolist()
    if a.shape != (ny, nx):
        a = np.broadcast_to(a, (ny, nx))
    same = (a == a[:1, :]) | (np.isnan(a) & np.isnan(a[:1, :]))
    if same.all():  # depends on x only: each word repeated ny times
        return [w for w in _words(a[0].tolist()) for _ in range(ny)]
    same = (a == a[:, :1]) | (np.isnan(a) & np.isnan(a[:, :1]))
    if same.all():  # depends on y only: the same ny words in every x block
        return _words(a[:, 0].tolist()) * nx
    return _words(a.T.ravel().tolist())


def csv_text(smap) -> str:
    """CSV of a :class:`loopcheck.design.maps.StabilityMap`: one row per grid point
    (x outer, y inner): every parameter that varies across the map under
    its case-file name in SI base units, then ``stable`` (0/1),
    ``spectral_radius`` and the requested metrics (empty where undefined,
    ``inf`` for an unbounded upper gain margin). Numbers are the shortest
    text that reads back as the same double (``repr``)."""
    ny, nx = smap.stable.shape
    names = list(smap.parameters)
    arrays = [smap.parameters[k] for k in names]
    names += ["stable", "spectral_radius"]
    arrays += [smap.stable, smap.spectral_radius]
    metrics = (
        ("phase_margin_deg", smap.phase_margin_deg),
        ("gain_margin_lower_factor", smap.gain_margin_lower),
        ("gain_margin_upper_factor", smap.gain_margin_upper),
        ("sensitivity_peak", smap.sensitivity_peak),
        ("sensitivity_peak_hz", smap.sensitivity_peak_hz),
    )
    for k, arr in metrics:
        if arr is not None:
            names.append(k)
            arrays.append(arr)
    cols = [_column_words(a, ny, nx) for a in arrays]
    rows = list(map(",".join, zip(*cols)))
    rows.insert(0, ",".join(names))
    rows.append("")
    return "\n".join(rows)
