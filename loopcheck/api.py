"""The public Python API: what a notebook needs, in SI units, with no CLI.

``import loopcheck as lc`` exposes these functions lazily (numpy, scipy and
control load on first use, so the command line stays fast). Every function
takes a :class:`loopcheck.io.casefile.Case` (from :func:`read_case` or
:func:`case_from_dict`) or a bare :class:`loopcheck.engine.model.Design`; every
result is a frozen dataclass in SI units with ``to_dict()`` (or
:func:`to_dict` for any of them). See docs/api.md for a worked example.

Nothing here prints; bad input raises :class:`loopcheck.io.casefile.CaseError`
(one line naming the table and key) or ValueError.
"""

from __future__ import annotations

import os

__all__ = [
    "read_case", "case_from_dict", "analyse", "verdict_over_range", "stability_map", "design_point_line",
    "sweep_grid", "pick_gain", "closed_loop_summary", "impedance_study", "control_systems", "to_dict",
]


def read_case(path: str | os.PathLike):
    """Read and check a TOML case file; returns a :class:`loopcheck.io.casefile.Case`
    (``.design`` holds the SI parameters, ``.tables`` the optional tables)."""
    from loopcheck.io.casefile import read_case as _read

    return _read(path)


def case_from_dict(data: dict, label: str = "<dict>"):
    """Build a case from a dict shaped like a case file, values as unit
    strings (``"1.2 mH"``) or SI floats; checked exactly as a file is.

    >>> import loopcheck as lc
    >>> case = lc.case_from_dict({
    ...     "filter": {"L1": "1.5 mH", "C": "8 uF", "L2": "0.6 mH"},
    ...     "grid": {"f": "50 Hz", "Lg": "0.4 mH"},
    ...     "sampling": {"fs": "16 kHz", "delay": 1},
    ...     "control": {"feedback": "grid", "kind": "PI", "Kp": "9 V/A", "Ki": "900 V/A/s", "Hi": "7 V/A"},
    ... })
    >>> round(case.design.filter.L1_H * 1e3, 3)
    1.5
    """
    from loopcheck.io.casefile import parse_case

    return parse_case(dict(data), label)


def _design(case_or_design):
    return getattr(case_or_design, "design", case_or_design)


def _tolerance(case_or_design):
    tables = getattr(case_or_design, "tables", None)
    if tables is None:
        return None
    from loopcheck.io.read_tolerance import parse_tolerance_table

    return parse_tolerance_table(tables.get("tolerance"), case_or_design.where("tolerance"), case_or_design.design)


def _targets(case_or_design):
    tables = getattr(case_or_design, "tables", None)
    if tables is None:
        return None
    from loopcheck.io.read_targets import parse_targets

    return parse_targets(tables.get("targets"), case_or_design.where("targets"))


def analyse(case_or_design):
    """Verdict (closed-loop eigenvalues) and margins at the nominal point:
    a :class:`loopcheck.engine.results.Analysis`."""
    from loopcheck.engine.analysis import analyse as _analyse

    return _analyse(_design(case_or_design))


def verdict_over_range(case_or_design):
    """Verdict over everything the case declares (Lg or SCR range, tolerance
    corners, grid network, feedforward): a
    :class:`loopcheck.design.range_verdict.RangeVerdict`. A bare design: its own
    Lg range only."""
    from loopcheck.design.range_verdict import range_verdict
    from loopcheck.io.read_verdict import case_range_verdict

    if hasattr(case_or_design, "tables"):
        return case_range_verdict(case_or_design)
    return range_verdict(case_or_design)


def _spec(case_or_design, x, y, x_range, y_range, x_points, y_points, metrics):
    from loopcheck.io.map_table import Overrides, map_spec

    case = case_or_design
    if not hasattr(case, "tables"):
        from loopcheck.io.casefile import Case

        case = Case(path="<design>", design=case_or_design)
    rng = lambda r: None if r is None else tuple(str(v) if not isinstance(v, str) else v for v in r)  # noqa: E731
    return case, map_spec(case, Overrides(x=x, x_range=rng(x_range), x_points=x_points, y=y, y_range=rng(y_range),
                                          y_points=y_points, metrics=None if metrics is None else tuple(metrics)))


def stability_map(case_or_design, x: str | None = None, y: str | None = None, *, x_range=None, y_range=None,
                  x_points: int | None = None, y_points: int | None = None, metrics=None):
    """Stability map over two parameters (defaults from the case's ``[map]``
    table, else fr/fs against Hi): a :class:`loopcheck.design.maps.StabilityMap`.
    Ranges are pairs of unit strings or SI numbers."""
    from loopcheck.design.maps import compute_map

    case, spec = _spec(case_or_design, x, y, x_range, y_range, x_points, y_points, metrics)
    return compute_map(case.design, spec)


def design_point_line(case_or_design, x: str | None = None, y: str | None = None):
    """Every stable interval of the y parameter through the design point
    (whole gain line): a :class:`loopcheck.design.design_line.DesignLine`."""
    from loopcheck.design.design_line import design_line as _dl

    case, spec = _spec(case_or_design, x, y, None, None, 2, 2, None)
    return _dl(case.design, spec)


def sweep_grid(case_or_design, Lg_range_H: tuple[float, float] | None = None):
    """The design over its grid-inductance range [H] (default: the case's)
    and tolerance corners: a :class:`loopcheck.design.weakgrid.GridResult`."""
    from loopcheck.design.weakgrid import sweep_grid as _sweep

    return _sweep(_design(case_or_design), Lg_range_H, _tolerance(case_or_design), _targets(case_or_design))


def pick_gain(case_or_design, Lg_range_H: tuple[float, float] | None = None, also_kp: bool = False):
    """The damping gain Hi (and Kp with ``also_kp``) with the most worst-case
    room: a :class:`loopcheck.design.pick.PickResult`."""
    from loopcheck.design.pick import pick_gain as _pick

    return _pick(_design(case_or_design), Lg_range_H, _tolerance(case_or_design), _targets(case_or_design),
                 also_kp=also_kp)


def closed_loop_summary(case_or_design):
    """Tracking bandwidth and dominant poles:
    a :class:`loopcheck.engine.closed_loop.ClosedLoopSummary`."""
    from loopcheck.engine.closed_loop import characterise

    d = _design(case_or_design)
    return characterise(d, analyse(d))


def impedance_study(case_or_design):
    """Output admittance, its non-passive bands and the impedance-ratio and
    eigenvalue verdicts on the case's grid (``[grid_network]``,
    ``[feedforward]``; a bare design: its own Lg and Rg):
    a :class:`loopcheck.design.grid_network.ImpedanceStudy`."""
    from loopcheck.design.grid_network import study
    from loopcheck.io.read_network import read_feedforward, read_grid_network

    if hasattr(case_or_design, "tables"):
        return study(case_or_design.design, read_grid_network(case_or_design), feedforward=read_feedforward(case_or_design))
    return study(case_or_design, None)


def control_systems(case_or_design):
    """The loop as python-control discrete-time state-space objects
    ``(open_loop, closed_loop)`` with ``dt = Ts``: the loop gain L (broken
    at the current controller, damping loop closed; input the current error
    [A], output the regulated current [A]) and the reference-to-current
    closed loop L/(1 + L), so python-control's own tools apply."""
    import control as ct
    import numpy as np

    from loopcheck.engine.loop import build_loop

    d = _design(case_or_design)
    A, B, C = build_loop(d).open_loop()
    D = np.zeros((C.shape[0], B.shape[1]))
    Ts = d.sampling.Ts_s
    return ct.ss(A, B, C, D, Ts), ct.ss(A - B @ C, B, C, D, Ts)


def to_dict(result) -> dict:
    """Plain dict (JSON-ready: None for non-finite numbers) of any result."""
    from loopcheck.engine.plain import plain

    return plain(result)
