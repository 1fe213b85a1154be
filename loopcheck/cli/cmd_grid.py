"""``loopcheck grid``: the design over its grid-inductance range, under the
component tolerances, optionally with a Monte Carlo draw of units."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Annotated, Optional

import typer

from loopcheck.cli.common import (
    EXIT_UNSTABLE,
    check_figure_output,
    check_option_values,
    fail,
    json_line,
    load_case,
    print_warnings,
    progress,
    write_figure,
)

#: One-line caution printed with every result (README "Safety" has the full text).
CAUTION = ("Model result only: verify on hardware at reduced voltage with protection; local codes, the utility's "
           "interconnection rules and a licensed engineer's sign-off take precedence.")


# Options shared with `loopcheck pick` (declared once here).
LgRangeOption = Annotated[
    Optional[tuple[str, str]],
    typer.Option("--lg-range", help='Grid-inductance range FROM TO, e.g. --lg-range "0 mH" "6 mH" (overrides the case).',
                 show_default=False, metavar="FROM TO"),
]
PhaseMarginOption = Annotated[
    Optional[float], typer.Option("--phase-margin", help="Phase-margin target [deg] (overrides [targets]; default 30).", show_default=False)
]
GainMarginOption = Annotated[
    Optional[float], typer.Option("--gain-margin", help="Gain-margin target on both sides [dB] (overrides [targets]; default 3).", show_default=False)
]
SensitivityPeakOption = Annotated[
    Optional[float], typer.Option("--sensitivity-peak", help="Sensitivity-peak limit [dB] (overrides [targets]; default none).", show_default=False)
]
QuietOption = Annotated[bool, typer.Option("--quiet", "-q", help="No progress bar on stderr.")]


def lg_range_or_fail(case, lg_range: Optional[tuple[str, str]]) -> tuple[float, float]:
    """The Lg range [H] from ``--lg-range`` or the case; exits 2 when neither gives one."""
    from loopcheck.engine.units import UnitError, parse_quantity

    if lg_range is not None:
        try:
            lo, hi = (parse_quantity(v, "inductance") for v in lg_range)
        except UnitError as exc:
            fail(f"--lg-range: {exc}")
        if lo < 0 or hi < lo:
            fail(f"--lg-range: need 0 <= from <= to, got {lg_range[0]} {lg_range[1]}")
        check_option_values(case.design, "Lg", (lo, hi), "--lg-range")
        return lo, hi
    rng = case.design.grid.Lg_range_H
    if rng is None:
        fail(f'{case.where("grid")} Lg_range: missing; this command needs a grid-inductance range '
             f'(Lg_range = ["0 mH", "4 mH"], or scr_range = [3, 50] with S and V) or --lg-range FROM TO')
    return float(rng[0]), float(rng[1])


def read_spec_and_targets(case, nominal_only: bool, phase_margin, gain_margin, sensitivity_peak):
    """[tolerance] and [targets] of the case with command-line overrides; exits 2 on bad input."""
    from loopcheck.io.casefile import CaseError
    from loopcheck.design.tolerance import ToleranceSpec
    from loopcheck.io.read_tolerance import parse_tolerance_table
    from loopcheck.io.read_targets import parse_targets

    try:
        spec = ToleranceSpec() if nominal_only else parse_tolerance_table(
            case.tables.get("tolerance"), case.where("tolerance"), case.design)
        targets = parse_targets(case.tables.get("targets"), case.where("targets"), phase_margin_deg=phase_margin,
                                gain_margin_db=gain_margin, sensitivity_peak_db=sensitivity_peak)
    except CaseError as exc:
        fail(str(exc))
    return spec, targets


class FractionBar:
    """Adapts a ``progress(fraction)`` callback to the stderr progress bar."""

    def __init__(self, advance, total: int = 1000):
        self.advance, self.total, self.done = advance, total, 0

    def __call__(self, fraction: float) -> None:
        target = int(round(max(0.0, min(1.0, fraction)) * self.total))
        if target > self.done:
            self.advance(target - self.done)
            self.done = target


def _fnum(x, fmt: str, width: int) -> str:
    try:
        xf = float(x)
    except (TypeError, ValueError):
        return f"{'n/a':>{width}}"
    if math.isnan(xf):
        return f"{'-':>{width}}"
    if math.isinf(xf):
        return f"{('inf' if xf > 0 else '-inf'):>{width}}"
    return f"{xf:{width}{fmt}}"


def _margins_dict(m, targets) -> dict:
    from loopcheck.engine.verdict import classify
    from loopcheck.design.weakgrid import robustness_index

    def f(x):
        return float(x)

    with_db = 20.0 * math.log10(f(m.sensitivity_peak)) if f(m.sensitivity_peak) > 0 else float("nan")
    return {
        "verdict": classify(f(m.spectral_radius)),
        "spectral_radius": f(m.spectral_radius),
        "dominant_pole_hz": f(m.dominant_pole_hz),
        "phase_margin_deg": f(m.phase_margin_deg),
        "crossover_hz": f(m.crossover_hz),
        "gain_margin_lower_factor": f(m.gm_lower_factor),
        "gain_margin_upper_factor": f(m.gm_upper_factor),
        "gain_margin_lower_db": f(m.gm_lower_db),
        "gain_margin_upper_db": f(m.gm_upper_db),
        "sensitivity_peak": f(m.sensitivity_peak),
        "sensitivity_peak_db": with_db,
        "sensitivity_peak_hz": f(m.sensitivity_peak_hz),
        "robustness_index": float(robustness_index(m, targets)),
    }


def worst_dict(w, targets, scr_of=None) -> dict:
    d = {"Lg_H": w.Lg_H, "scr": scr_of(w.Lg_H) if scr_of else None, "variant": w.variant,
         "resonance_hz": w.resonance_hz}
    d.update(_margins_dict(w.margins, targets))
    d.update({"binding": w.binding, "shortfalls": list(w.shortfalls)})
    return d


def _scr_function(design):
    """Lg [H] -> SCR [-] (float or array) for the case's S, V and f, or None
    without S and V; the definition is :func:`loopcheck.engine.scr.scr_from_lg`."""
    g = design.grid
    if g.S_VA is None or g.V_V is None:
        return None
    import numpy as np

    from loopcheck.engine.scr import scr_from_lg

    def scr_of(lg):
        if np.ndim(lg) == 0:
            return float(scr_from_lg(float(lg), g.S_VA, g.V_V, g.f_hz))
        with np.errstate(divide="ignore"):
            return scr_from_lg(np.asarray(lg, dtype=float), g.S_VA, g.V_V, g.f_hz)

    return scr_of


def _fmt_intervals(iv, lo, hi) -> str:
    if not iv:
        return "none (unstable over the whole range)"
    if len(iv) == 1 and iv[0][0] == lo and iv[0][1] == hi:
        return f"{lo * 1e3:.4g} .. {hi * 1e3:.4g} mH (the whole range)"
    return ", ".join(f"{a * 1e3:.5g} .. {b * 1e3:.5g} mH" for a, b in iv)


def _worst_text(w) -> list[str]:
    import numpy as np

    m = w.margins
    head = f"Lg = {w.Lg_H * 1e3:.4g} mH ({w.variant}), resonance {w.resonance_hz:.4g} Hz"
    if not bool(m.stable):
        return [head, "  " + w.shortfalls[0]]
    with np.errstate(all="ignore"):
        sp_db = 20 * math.log10(float(m.sensitivity_peak))
    fall, rise = -float(m.gm_lower_db), float(m.gm_upper_db)
    fall_t = "without limit" if math.isinf(fall) else f"{fall:.2f} dB"
    rise_t = "without limit" if math.isinf(rise) else f"{rise:.2f} dB"
    pm = float(m.phase_margin_deg)
    pm_t = "no gain crossover" if math.isinf(pm) else f"phase margin {pm:.1f} deg"
    lines = [head, f"  {pm_t}, gain may fall {fall_t} and rise {rise_t}, sensitivity peak {sp_db:.2f} dB"]
    if w.shortfalls:
        lines += ["  misses: " + s for s in w.shortfalls]
    else:
        lines.append(f"  all targets met (least room: {w.binding}, index {w.index:.3f})")
    return lines


def format_grid(case, res, scr_of, rows_every: int, mc) -> str:
    """Human report of a :class:`loopcheck.design.weakgrid.GridResult`."""
    lo, hi = res.Lg_range_H
    d = case.design
    L = []
    L.append(f"loopcheck grid: {d.name} ({case.path})")
    rng = f"Lg range        {lo * 1e3:.4g} .. {hi * 1e3:.4g} mH"
    if scr_of:
        s_lo, s_hi = scr_of(lo), scr_of(hi)
        rng += f"  (SCR {s_lo:.4g} .. {s_hi:.4g})"
    L.append(rng)
    from loopcheck.engine.damping_text import critical_formula

    L.append(f"critical freq.  {res.critical_hz:.4g} Hz = {critical_formula(d)}, delay {d.sampling.delay:g} sample")
    if res.Lg_critical_H is None:
        f = d.filter
        fr0 = math.sqrt((f.L1_H + f.L2_H) / (f.L1_H * f.L2_H * f.shunt_capacitance_F)) / (2 * math.pi)
        if fr0 <= res.critical_hz:
            L.append(f"                the nominal resonance ({fr0:.4g} Hz without Lg) stays below it: Lg only lowers it")
        else:
            f_inf = 1.0 / (2 * math.pi * math.sqrt(f.L1_H * f.shunt_capacitance_F))
            L.append(f"                the nominal resonance stays above it for every Lg (it falls towards {f_inf:.4g} Hz)")
    else:
        inside = "inside" if lo <= res.Lg_critical_H <= hi else "outside"
        L.append(f"                the nominal resonance crosses it at Lg = {res.Lg_critical_H * 1e3:.4g} mH ({inside} the range)")
    L.append(f"targets         {res.targets.describe()}")
    L.append("")
    L.append("Nominal filter")
    hdr = f"  {'Lg [mH]':>9} " + (f"{'SCR':>7} " if scr_of else "") + \
        f"{'fr [Hz]':>8} {'verdict':>9} {'max|z|':>8} {'PM [deg]':>8} {'fall [dB]':>9} {'rise [dB]':>9} {'S [dB]':>7}"
    L.append(hdr)
    nom = res.nominal
    from loopcheck.engine.verdict import classify

    for i in range(0, nom.Lg_H.size, rows_every):
        m = nom.margins.take(i)
        with_s = float("nan") if not bool(m.stable) else 20 * math.log10(float(m.sensitivity_peak))
        row = f"  {nom.Lg_H[i] * 1e3:9.4g} "
        if scr_of:
            row += _fnum(scr_of(nom.Lg_H[i]), ".4g", 7) + " "
        row += (f"{nom.resonance_hz[i]:8.0f} {classify(float(m.spectral_radius)):>9} {float(m.spectral_radius):8.5f} "
                + _fnum(m.phase_margin_deg, ".1f", 8) + " " + _fnum(-float(m.gm_lower_db), ".2f", 9) + " "
                + _fnum(float(m.gm_upper_db), ".2f", 9) + " " + _fnum(with_s, ".2f", 7))
        L.append(row)
    L.append(f"  stable for     {_fmt_intervals(nom.scan.stable_intervals_H, lo, hi)}")
    if nom.scan.limit_reached:
        L.append("  note: the adaptive scan hit its sample cap; an excursion narrower than the last step may be missed")
    L.append("  worst point    " + "\n                 ".join(_worst_text(nom.worst)))
    if res.corners:
        L.append("")
        L.append(f"Tolerance corners ({len(res.corners)})")
        for f in res.corners:
            st = "stable over the range" if f.scan.fully_stable else "UNSTABLE for part of the range"
            L.append(f"  {f.label}: {st}")
            if not f.scan.fully_stable:
                L.append(f"      stable for {_fmt_intervals(f.scan.stable_intervals_H, lo, hi)}")
            w = f.worst
            wt = _worst_text(w)
            L.append("      worst " + wt[0].split(" (")[0] + ": " + "; ".join(s.strip() for s in wt[1:]))
        L.append("")
        L.append("Worst over nominal and corners")
        L.append("  " + "\n  ".join(_worst_text(res.worst)))
    if mc is not None:
        L.append("")
        conf = f"{100 * mc.confidence:g} %"
        L.append(f"Monte Carlo     {mc.n_units} units, seed {mc.seed}, Lg {mc.Lg_distribution}")
        L.append(f"  unstable            {mc.n_unstable} = {100 * mc.unstable_fraction:.3g} %   "
                 f"{conf} interval {100 * mc.unstable_ci[0]:.3g} .. {100 * mc.unstable_ci[1]:.3g} % (Clopper-Pearson)")
        L.append(f"  unstable or below targets {mc.n_below_targets} = {100 * mc.below_targets_fraction:.3g} %   "
                 f"{conf} interval {100 * mc.below_targets_ci[0]:.3g} .. {100 * mc.below_targets_ci[1]:.3g} % (Clopper-Pearson)")
    L.append("")
    L.append("caution: " + CAUTION)
    return "\n".join(L)


def grid(
    case: Annotated[Path, typer.Argument(help="Case file (TOML).", show_default=False, metavar="CASE.toml")],
    json_output: Annotated[bool, typer.Option("--json", help="Print the result as one JSON object instead of the table.")] = False,
    output: Annotated[
        Optional[Path],
        typer.Option("-o", "--output", help="Write a figure of the margins against Lg (.png, .svg or .pdf).", show_default=False),
    ] = None,
    vs_scr: Annotated[
        bool, typer.Option("--vs-scr", help="Draw the figure against the short-circuit ratio (needs S and V in [grid]).")
    ] = False,
    lg_range: LgRangeOption = None,
    points: Annotated[int, typer.Option("--points", min=2, max=401, help="Rows of the Lg table.")] = 11,
    monte_carlo: Annotated[
        int, typer.Option("--monte-carlo", min=0, max=200_000, help="Draw this many units from the tolerances and Lg range (0: off).")
    ] = 0,
    seed: Annotated[int, typer.Option("--seed", min=0, help="Seed of the Monte Carlo draw (same seed, same units).")] = 1,
    confidence: Annotated[
        float, typer.Option("--confidence", min=0.5, max=0.9999, help="Confidence level of the Monte Carlo intervals.")
    ] = 0.95,
    phase_margin: PhaseMarginOption = None,
    gain_margin: GainMarginOption = None,
    sensitivity_peak: SensitivityPeakOption = None,
    nominal_only: Annotated[bool, typer.Option("--nominal-only", help="Ignore the [tolerance] table (no corners, no Monte Carlo spread).")] = False,
    fail_on_unstable: Annotated[
        bool, typer.Option("--fail-on-unstable", help="Exit with code 4 when the nominal filter or a corner is unstable somewhere in the range.")
    ] = False,
    quiet: QuietOption = False,
) -> None:
    """Sweep the grid inductance over its range ([grid] Lg_range or
    scr_range): per Lg the resonance, verdict, phase margin, gain-margin
    interval and sensitivity peak; the stable Lg intervals with exact ends;
    the worst point and what fails there; the same for every tolerance
    corner ([tolerance]); with --monte-carlo N the fraction of units that are
    unstable or below the margin targets, with its confidence interval.

    Exit codes: 0 the analysis ran; 2 bad input; 4 with --fail-on-unstable
    when some Lg in the range is unstable for the nominal filter or a corner.
    """
    loaded = load_case(case)
    check_figure_output(output)
    lo, hi = lg_range_or_fail(loaded, lg_range)
    spec, targets = read_spec_and_targets(loaded, nominal_only, phase_margin, gain_margin, sensitivity_peak)
    scr_of = _scr_function(loaded.design)
    if vs_scr and scr_of is None:
        fail(f'{loaded.where("grid")} S: --vs-scr needs the rated power S and the line-to-line voltage V in [grid]')
    print_warnings(loaded)

    from loopcheck.design.weakgrid import monte_carlo as run_mc
    from loopcheck.design.weakgrid import sweep_grid

    every = 1 if output is None else max(1, int(math.ceil(120 / max(points - 1, 1))))
    n_points = (points - 1) * every + 1 if hi > lo else 1
    with progress(1000, "grid sweep", quiet=quiet) as advance:
        bar = FractionBar(advance)
        share = 0.5 if monte_carlo else 1.0
        res = sweep_grid(loaded.design, (lo, hi), spec, targets, n_points=n_points,
                         progress=lambda x: bar(share * x))
        mc = None
        if monte_carlo:
            mc = run_mc(loaded.design, spec, (lo, hi), targets, monte_carlo, seed, confidence=confidence,
                        progress=lambda x: bar(0.5 + 0.5 * x))

    if output is not None:
        from loopcheck.figures.grid_plot import grid_figure

        fig = grid_figure(res, design_Lg_H=loaded.design.grid.Lg_H, scr_of=scr_of if vs_scr else None,
                          title=loaded.design.name)
        write_figure(fig, output)

    unstable_somewhere = not res.nominal.scan.fully_stable or any(not f.scan.fully_stable for f in res.corners)
    if json_output:
        nom = res.nominal
        table = []
        for i in range(nom.Lg_H.size):
            row = {"Lg_H": float(nom.Lg_H[i]), "scr": scr_of(nom.Lg_H[i]) if scr_of else None,
                   "resonance_hz": float(nom.resonance_hz[i])}
            row.update(_margins_dict(nom.margins.take(i), targets))
            table.append(row)
        doc = {
            "name": loaded.design.name,
            "case": loaded.path,
            "Lg_range_H": [lo, hi],
            "scr_range": [scr_of(hi), scr_of(lo)] if scr_of else None,
            "critical_hz": res.critical_hz,
            "Lg_critical_H": res.Lg_critical_H,
            "targets": {"phase_margin_deg": targets.phase_margin_deg, "gain_margin_db": targets.gain_margin_db,
                        "sensitivity_peak_max": targets.sensitivity_peak_max},
            "stable_Lg_intervals": [list(iv) for iv in nom.scan.stable_intervals_H],
            "stable_over_range": nom.scan.fully_stable,
            "stability_boundaries_H": list(nom.scan.boundaries_H),
            "worst": worst_dict(nom.worst, targets, scr_of),
            "worst_with_tolerances": worst_dict(res.worst, targets, scr_of),
            "table": table,
            "tolerances": [{"component": c.name, "low": c.low, "high": c.high, "distribution": c.distribution}
                           for c in spec.components],
            "corners": [
                {"label": f.label, "factors": f.factors, "stable_Lg_intervals": [list(iv) for iv in f.scan.stable_intervals_H],
                 "stable_over_range": f.scan.fully_stable, "worst": worst_dict(f.worst, targets, scr_of)}
                for f in res.corners
            ],
            "monte_carlo": None if mc is None else {
                "units": mc.n_units, "seed": mc.seed, "confidence": mc.confidence,
                "Lg_distribution": mc.Lg_distribution,
                "unstable": mc.n_unstable, "unstable_fraction": mc.unstable_fraction,
                "unstable_interval": list(mc.unstable_ci), "unstable_interval_wilson": list(mc.unstable_ci_wilson),
                "below_targets": mc.n_below_targets, "below_targets_fraction": mc.below_targets_fraction,
                "below_targets_interval": list(mc.below_targets_ci),
                "below_targets_interval_wilson": list(mc.below_targets_ci_wilson),
                "interval_method": "Clopper-Pearson (exact); Wilson score for comparison",
                "worst_unit": mc.worst_unit,
            },
            "figure": str(output) if output is not None else None,
            "warnings": list(loaded.warnings),
            "caution": CAUTION,
        }
        typer.echo(json_line(doc))
    else:
        typer.echo(format_grid(loaded, res, scr_of, every, mc))
    if fail_on_unstable and unstable_somewhere:
        raise typer.Exit(EXIT_UNSTABLE)
