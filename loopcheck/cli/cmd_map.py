"""``loopcheck map``: stability map of a case over two parameters."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from loopcheck.cli.common import (
    atomic_write_text,
    case_verdict,
    check_figure_output,
    check_output,
    fail,
    json_line,
    load_case,
    print_warnings,
    progress,
    write_failure,
    write_figure,
)

_AXES_HELP = "fr/fs, fs, Lg, Kp, Hi, C, L2, L1, Kr or Ki"


def map_command(
    case: Annotated[Path, typer.Argument(help="Case file (TOML).", show_default=False, metavar="CASE.toml")],
    x: Annotated[Optional[str], typer.Option("--x", help=f"x axis: {_AXES_HELP} (overrides [map] x).")] = None,
    x_range: Annotated[
        Optional[tuple[str, str]],
        typer.Option("--x-range", help='x from and to, with units for physical axes, e.g. --x-range "0 mH" "5 mH".'),
    ] = None,
    x_points: Annotated[Optional[int], typer.Option("--x-points", help="Number of x values.")] = None,
    x_scale: Annotated[Optional[str], typer.Option("--x-scale", help='"linear" or "log".')] = None,
    y: Annotated[Optional[str], typer.Option("--y", help=f"y axis: {_AXES_HELP} (overrides [map] y).")] = None,
    y_range: Annotated[
        Optional[tuple[str, str]],
        typer.Option("--y-range", help='y from and to, e.g. --y-range "0 V/A" "40 V/A".'),
    ] = None,
    y_points: Annotated[Optional[int], typer.Option("--y-points", help="Number of y values.")] = None,
    y_scale: Annotated[Optional[str], typer.Option("--y-scale", help='"linear" or "log".')] = None,
    metric: Annotated[
        Optional[list[str]],
        typer.Option(
            "--metric",
            help="Also compute per point: phase-margin, gain-margin, sensitivity or all (repeat the option for several).",
        ),
    ] = None,
    output: Annotated[
        Optional[Path], typer.Option("-o", "--output", help="Write the figure here (.png, .svg or .pdf).")
    ] = None,
    csv_path: Annotated[
        Optional[Path], typer.Option("--csv", help="Write one row per grid point (SI units) to this CSV file.")
    ] = None,
    json_output: Annotated[
        bool, typer.Option("--json", help="Print one JSON object with the stable intervals per x value.")
    ] = False,
    quiet: Annotated[bool, typer.Option("--quiet", "-q", help="No progress bar on stderr.")] = False,
) -> None:
    """Stability map of a case over two parameters: the stable region with
    its exact boundary (D-decomposition along gain axes), the spectral
    radius and optional margins per grid point, the design point and the
    critical ratio fr/fs = 1/(4*delay + 2).

    Axes come from the case's [map] table (see docs/maps.md); the options
    override it. Exit codes: 0 the map was computed; 2 bad input.
    """
    check_figure_output(output)
    check_output(csv_path, "--csv")
    loaded = load_case(case)
    print_warnings(loaded)

    from loopcheck.io.casefile import CaseError
    from loopcheck.io.map_table import Overrides, map_spec

    try:
        spec = map_spec(
            loaded,
            Overrides(
                x=x, x_range=x_range, x_points=x_points, x_scale=x_scale,
                y=y, y_range=y_range, y_points=y_points, y_scale=y_scale,
                metrics=tuple(metric) if metric else None,
            ),
        )
    except CaseError as exc:
        fail(str(exc))

    from loopcheck.design.maps import compute_map

    design = loaded.design
    with progress(100, f"map {spec.x.name} x {spec.y.name} [%]", quiet=quiet) as advance:
        smap = compute_map(design, spec, progress=lambda fraction: advance(100.0 * fraction))

    if output is not None:
        from loopcheck.figures.map_plot import map_figure

        kr_unit = "V/A" if design.control.wc_rad_s > 0 else "V/A/s"
        fig = map_figure(smap, kr_unit=kr_unit)
        write_figure(fig, output, dpi=150)
    if csv_path is not None:
        try:
            from loopcheck.io.map_table import csv_text as map_csv_text

            atomic_write_text(csv_path, map_csv_text(smap))
        except OSError as exc:
            write_failure("--csv", csv_path, exc)
    from loopcheck.design.range_verdict import case_verdict_line, headline

    rv = case_verdict(loaded)
    if json_output:
        typer.echo(json_line({**json_record(smap, loaded.path, output, csv_path), "headline": headline(rv),
                              "range_verdict": rv.to_dict()}))
    else:
        text = summary_text(smap, loaded.path, output, csv_path)
        line = case_verdict_line(rv)  # the case's own verdict over what it declares, under the title
        if line:
            first, _, rest = text.partition("\n")
            text = f"{first}\n{line}\n{rest}"
        typer.echo(text)


# --- rendering of the results (text only; numpy imported lazily) -------------

def _metric_columns(smap) -> list[tuple[str, object]]:
    cols = []
    if smap.phase_margin_deg is not None:
        cols.append(("phase_margin_deg", smap.phase_margin_deg))
    if smap.gain_margin_lower is not None:
        cols += [("gain_margin_lower_factor", smap.gain_margin_lower), ("gain_margin_upper_factor", smap.gain_margin_upper)]
    if smap.sensitivity_peak is not None:
        cols += [("sensitivity_peak", smap.sensitivity_peak), ("sensitivity_peak_hz", smap.sensitivity_peak_hz)]
    return cols


def _axis_record(ax) -> dict:
    return {"name": ax.name, "unit": ax.unit, "from": ax.start, "to": ax.stop, "points": ax.points,
            "scale": "log" if ax.log else "linear"}


def json_record(smap, case_path: str, figure, csv_path) -> dict:
    """The JSON object printed by ``--json``: axes, design point, critical
    ratio, and per x value the stable y intervals and boundaries."""
    return {
        "case": case_path,
        "name": smap.name,
        "x": _axis_record(smap.x),
        "y": _axis_record(smap.y),
        "critical_ratio": smap.critical_ratio,
        "delay": smap.delay,
        "stable_fraction": smap.stable_fraction,
        "design_point": {
            "x": smap.design_x,
            "y": smap.design_y,
            "stable": smap.design_stable,
            "stable_y_interval": _interval_json(smap.design_interval),
            "line": smap.design_line.to_dict() if smap.design_line is not None else None,
        },
        "columns": [
            {"x": float(x), "stable_y_intervals": [list(iv) for iv in ivs], "boundaries": list(b), "method": m}
            for x, ivs, b, m in zip(smap.x_values, smap.intervals, smap.boundaries, smap.boundary_method)
        ],
        "metrics": [k for k, _ in _metric_columns(smap)],
        "polynomial_path_columns": smap.boundary_path.count("polynomial"),
        "kernels": smap.kernels,
        "figure": str(figure) if figure is not None else None,
        "csv": str(csv_path) if csv_path is not None else None,
    }


def _q(value: float, name: str) -> str:
    from loopcheck.design.maps import AXIS_UNITS
    from loopcheck.engine.units import format_quantity

    unit = AXIS_UNITS[name]
    if not unit:
        return f"{value:.4g}"
    return format_quantity(value, unit, prefix=unit not in ("V/A", "V/A/s"))


def _interval_json(iv):
    if iv is None:
        return None
    return [float(v) if v == v and abs(v) != float("inf") else None for v in iv]


def summary_text(smap, case_path: str, figure, csv_path) -> str:
    """Readable summary for the terminal."""
    xn, yn = smap.x.name, smap.y.name
    lines = [
        f"stability map of {smap.name} ({case_path})",
        f"  x: {xn} {_q(smap.x.start, xn)} .. {_q(smap.x.stop, xn)} ({smap.x.points} values"
        f"{', log' if smap.x.log else ''})",
        f"  y: {yn} {_q(smap.y.start, yn)} .. {_q(smap.y.stop, yn)} ({smap.y.points} values"
        f"{', log' if smap.y.log else ''})",
        f"  stable share of the map: {100 * smap.stable_fraction:.1f} %",
    ]
    from loopcheck.io.map_summary import design_point_lines

    lines.extend(design_point_lines(smap))
    crit = smap.critical_ratio
    period = "sampling period" if smap.delay == 1 else "sampling periods"
    lines.append(f"  critical ratio fr/fs = {smap.critical_formula} = {crit:.4g} (delay {smap.delay:g} {period})")
    methods = smap.boundary_method
    n_exact = sum(m == "exact" for m in methods)
    if n_exact == len(methods):
        lines.append(f"  boundaries: exact along {yn} in all {len(methods)} columns (D-decomposition, eigenvalue-checked)")
    else:
        lines.append(
            f"  boundaries: exact in {n_exact} of {len(methods)} columns, elsewhere bisection between {yn} grid "
            f"values (a region thinner than one {yn} step can be missed there)"
        )
        if smap.x.is_gain and not smap.y.is_gain:
            lines.append(f"  hint: the gain {xn} on the y axis (--x {yn} --y {xn}) gives exact boundaries in every column")
    n_poly = smap.boundary_path.count("polynomial")
    if n_poly:
        lines.append(f"  {n_poly} of {len(methods)} columns took the slower polynomial path (near-defective modal basis)")
    if figure is not None:
        lines.append(f"  figure: {figure}")
    if csv_path is not None:
        lines.append(f"  csv: {csv_path}")
    lines.append(
        "  caution: a screening aid; verify on hardware with protection enabled and follow local codes, the "
        "utility's interconnection rules and licensed engineering practice."
    )
    return "\n".join(lines)
