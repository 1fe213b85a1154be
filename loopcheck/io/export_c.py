"""Render a :class:`loopcheck.design.firmware.FirmwareExport` as a C99 header of
constants, as a JSON document and as a plain-text summary.

The header holds only ``#define`` constants (no storage, no code), so it can
be included in any number of translation units; array constants are brace
initialisers meant for ``static const double b0[] = LC_SEC_B0;``. The
equations the constants belong to are written out in the header's leading
comment and in :mod:`loopcheck.design.firmware`; ``docs/firmware.md`` has a worked
example and a reference C implementation.

Pure string building: nothing here prints, writes files or imports numpy.
"""

from __future__ import annotations

import math

from loopcheck import __version__
from loopcheck.engine.units import format_quantity as q

__all__ = ["CAUTIONS", "export_json", "render_header", "render_summary", "c_double", "c_float", "c_int"]

#: Safety cautions repeated in every export (header, JSON, summary).
CAUTIONS = (
    "Grid-connected converters carry lethal voltages, and an unstable current loop can destroy the hardware.",
    "These numbers come from a model; verify the controller on the real hardware at reduced voltage and "
    "current with independent over-current and over-voltage protection before full-power operation.",
    "Local electrical codes, the utility's interconnection rules and licensed engineering practice take "
    "precedence; a qualified, licensed engineer must review and sign off the design before it is connected to a grid.",
)

_STEPS = (
    "sample the regulated current i_fb and the capacitor current ic at t = k*Ts",
    "e[k] = i_ref[k] - i_fb[k]",
    "for each section j: y_j[k] = b0_j*e[k] + b1_j*e[k-1] + b2_j*e[k-2] - a1_j*y_j[k-1] - a2_j*y_j[k-2]",
    "uc[k] = Kp*e[k] + sum over j of y_j[k]",
    "u[k] = uc[k] - Hi*ic[k]",
    "hand u[k] to the modulator so that it takes effect at t = (k + delay)*Ts",
    "shift the histories: e[k-2] = e[k-1], e[k-1] = e[k]; y_j[k-2] = y_j[k-1], y_j[k-1] = y_j[k]",
)

_CURRENT_NAME = {"grid": "grid-side current i2", "converter": "converter-side current i1"}


# ---------------------------------------------------------------------------
# C literals
# ---------------------------------------------------------------------------


def c_double(x: float) -> str:
    """A C double literal that reads back as exactly ``x`` (shortest round-trip repr)."""
    if not math.isfinite(x):
        raise ValueError("non-finite constant")
    s = repr(float(x))
    if "." not in s and "e" not in s and "E" not in s:
        s += ".0"
    return f"({s})" if s.startswith("-") else s


def c_float(x: float) -> str:
    """A C float literal (``f`` suffix) for a value already rounded to float32."""
    import numpy as np  # only for the float32 shortest representation

    s = np.format_float_scientific(np.float32(x), unique=True, trim="0", exp_digits=2) + "f"
    return f"({s})" if s.startswith("-") else s


def c_int(v: int, c_type: str) -> str:
    """A typed C integer constant, safe for the most negative value."""
    bits = int(c_type[3:-2])
    if bits == 64:
        if v == -(1 << 63):
            return "(-INT64_C(9223372036854775807) - 1)"
        return f"INT64_C({v})"
    if v == -(1 << (bits - 1)):
        return f"(({c_type})(-{(1 << (bits - 1)) - 1} - 1))"
    return f"(({c_type}){v})"


def _ident(name: str) -> str:
    return name.upper()


# ---------------------------------------------------------------------------
# header
# ---------------------------------------------------------------------------


def _comment_block(lines: list[str]) -> list[str]:
    out = ["/*"]
    for line in lines:
        safe = line.replace("*/", "* /")
        out.append(f" * {safe}".rstrip())
    out.append(" */")
    return out


def _delay_text(delay: float) -> str:
    return f"{delay:g} sampling period" + ("" if delay == 1 else "s")


def _range_lines(rv) -> list[str]:
    """Comment lines on the verdict over the case's declared Lg range and
    tolerance corners (empty when the case declares none)."""
    if rv is None or not rv.declared:
        return []
    from loopcheck.design.range_verdict import headline

    return ["", "RANGE declared by the case (Lg range / tolerance corners, exact coefficients):",
            f"  {headline(rv)}"]


def render_header(ex, case_path: str, range_verdict=None, range_error: bool = False) -> str:
    """The C99 header text for the export ``ex`` (a FirmwareExport).

    ``range_verdict``: a :class:`loopcheck.design.range_verdict.RangeVerdict`,
    stated in the comment (and as a warning when the design is not stable
    over all of it); ``range_error``: also emit an ``#error`` in that case,
    unless ``<PREFIX>ALLOW_RANGE_UNSTABLE`` is defined."""
    P = ex.settings.c_prefix
    fmt = ex.quantised.number_format
    sc = ex.settings.scaling
    unit = ex.stored.gain_unit
    rc = ex.recheck
    lines: list[str] = []
    head = [
        f"Current-controller constants exported by loopcheck {__version__}.",
        f"Case: {case_path}  (design \"{ex.name}\")",
        "",
        "CAUTION",
        *[f"  {c}" for c in CAUTIONS],
        "",
        "TIMING",
        f"  Sampling (= control update) frequency {ex.fs_hz:.10g} Hz, Ts = {ex.Ts_s:.10g} s.",
        f"  The output computed from the samples taken at t = k*Ts takes effect at t = (k + {ex.delay_samples:g})*Ts",
        f"  (computation delay {_delay_text(ex.delay_samples)}; the modulator holds it for one period).",
        "",
        f"EQUATIONS (direct form I), once per sampling period, in this order:",
        *[f"  {i + 1}. {s}" for i, s in enumerate(_STEPS)],
        "  All histories start at zero. a0 = 1 is implied. The integrator is a first-order section",
        "  (b2 = a2 = 0, a1 = -1). i_fb is the " + _CURRENT_NAME.get(ex.feedback, ex.feedback) + ".",
        "  Sign convention: positive u raises the regulated current; ic = i1 - i2 (into the capacitor).",
        "",
        "UNITS",
        "  *_V_PER_A: SI, converter volts per ampere of current (e, ic in A, u in V).",
        "  The section denominators (A1, A2) are dimensionless.",
    ]
    if sc is not None:
        head += [
            "  *_FW: firmware units, modulator compare counts per ADC count (e, ic in ADC counts with the",
            "  zero-current offset removed; u in compare counts around the compare value for u = 0).",
            *[f"  Scaling: {n}" for n in sc.notes],
        ]
    head += ["", "STORED FORMAT", f"  {fmt.description}"]
    if fmt.is_fixed:
        head += [
            f"  {P}*_Q are the stored integers: value = integer / 2^{fmt.fraction_bits}.",
            f"  Only coefficient rounding is analysed; signal word lengths, product rounding, overflow and",
            f"  limit cycles are the firmware's own design (use a wide accumulator).",
        ]
    head += [
        f"  {P}KP, {P}HI and {P}SEC_* hold the stored values in {unit} as real numbers: use these (or the",
        "  integers) in the firmware; the *_V_PER_A / *_FW values are the exact ones before rounding.",
        "",
        "RE-CHECK of the sampled loop with the stored coefficients (closed-loop eigenvalues):",
    ]
    head += _recheck_lines(rc)
    head += _range_lines(range_verdict)
    range_bad = range_verdict is not None and range_verdict.declared and not range_verdict.stable_everywhere
    warnings = list(rc.warnings)
    if range_bad:
        warnings.append("the design is NOT stable over everything the case declares (see RANGE above); "
                        "these constants must not run where that part of the range can occur")
    if warnings:
        head += ["", "WARNINGS"] + [f"  - {w}" for w in warnings]
    lines += _comment_block(head)
    guard = f"{P}CONTROLLER_H"
    lines += [f"#ifndef {guard}", f"#define {guard}", ""]
    if fmt.is_fixed:
        lines += ["#include <stdint.h>", ""]
    final = rc.after if rc.after is not None else rc.before
    if not final.stable:
        lines += [
            f"#ifndef {P}ALLOW_UNSTABLE",
            f'#error "loopcheck: the closed loop with these coefficients is {final.verdict.upper()} '
            f'(spectral radius {final.spectral_radius:.9f}); see the comment above. '
            f'Define {P}ALLOW_UNSTABLE only for analysis, never to run hardware."',
            "#endif",
            "",
        ]
    if range_bad and range_error:
        from loopcheck.design.range_verdict import range_text

        text = range_text(range_verdict).replace('"', "'")
        lines += [
            f"#ifndef {P}ALLOW_RANGE_UNSTABLE",
            f'#error "loopcheck: {text}; see RANGE in the comment above. '
            f'Define {P}ALLOW_RANGE_UNSTABLE only if that part of the range cannot occur."',
            "#endif",
            "",
        ]

    def define(name: str, value: str, comment: str = "") -> None:
        text = f"#define {P}{name} {value}"
        if comment:
            text = f"{text:<60} /* {comment} */"
        lines.append(text)

    lines.append("/* timing */")
    define("FS_HZ", c_double(ex.fs_hz), "sampling frequency [Hz]")
    define("TS_S", c_double(ex.Ts_s), "sampling period [s]")
    define("DELAY_SAMPLES", c_double(ex.delay_samples), "output takes effect at (k + delay)*Ts [sampling periods]")
    define("F1_HZ", c_double(ex.f1_hz), "grid fundamental [Hz]")
    define("SECTION_COUNT", str(len(ex.si.sections)), "number of sections (integrator or resonators)")
    lines.append("")

    lines.append("/* SI: converter volts per ampere */")
    define("KP_V_PER_A", c_double(ex.si.Kp), "proportional gain [V/A]")
    define("HI_V_PER_A", c_double(ex.si.Hi), "capacitor-current (damping) gain [V/A]")
    for s in ex.si.sections:
        what = (
            f"section {s.name}: integrator, {s.method}"
            if s.kind == "integrator"
            else f"section {s.name}: resonator at {s.tuned_frequency_hz:g} Hz (harmonic {s.harmonic}), {s.method}"
        )
        lines.append(f"/* {what} */")
        for i, b in enumerate(s.b):
            define(f"{_ident(s.name)}_B{i}_V_PER_A", c_double(b), f"b{i} [V/A]")
        for i, a in enumerate(s.a):
            define(f"{_ident(s.name)}_A{i + 1}", c_double(a), f"a{i + 1} [-]")
    lines.append("")

    if ex.firmware is not None:
        lines.append("/* scaling */")
        define("CURRENT_COUNTS_PER_A", c_double(sc.current_counts_per_A), "regulated-current ADC counts per ampere [count/A]")
        define("IC_COUNTS_PER_A", c_double(sc.ic_counts_per_A), "capacitor-current ADC counts per ampere [count/A]")
        define("MODULATOR_COUNTS_PER_V", c_double(sc.modulator_counts_per_V), "compare counts per volt [count/V]")
        lines.append("/* firmware units: compare counts per ADC count */")
        define("KP_FW", c_double(ex.firmware.Kp), "proportional gain [count/count]")
        define("HI_FW", c_double(ex.firmware.Hi), "damping gain [count/count]")
        for s in ex.firmware.sections:
            for i, b in enumerate(s.b):
                define(f"{_ident(s.name)}_B{i}_FW", c_double(b), f"section {s.name} b{i} [count/count]")
        lines.append("")

    qc = ex.quantised
    if fmt.is_fixed:
        lines.append(f"/* stored integers, {fmt.label}: value = integer / 2^{fmt.fraction_bits} */")
        define("Q_WORD_BITS", str(fmt.word_bits), "word length including the sign [bit]")
        define("Q_FRACTION_BITS", str(fmt.fraction_bits), "bits after the binary point [bit]")
        define("Q_INTEGER_BITS", str(fmt.integer_bits), "bits before the binary point, sign not counted [bit]")
        define("KP_Q", c_int(qc.Kp.integer, fmt.c_type), f"Kp [{unit}]")
        define("HI_Q", c_int(qc.Hi.integer, fmt.c_type), f"Hi [{unit}]")
        for qs in qc.sections:
            for i, v in enumerate(qs.b):
                define(f"{_ident(qs.name)}_B{i}_Q", c_int(v.integer, fmt.c_type), f"section {qs.name} b{i}")
            for i, v in enumerate(qs.a):
                define(f"{_ident(qs.name)}_A{i + 1}_Q", c_int(v.integer, fmt.c_type), f"section {qs.name} a{i + 1}")
        lines.append("")

    lit = c_float if fmt.kind == "float32" else c_double
    lines.append(f"/* the stored values as real numbers [{unit}]; use these in the firmware */")
    define("KP", lit(qc.Kp.value), f"proportional gain [{unit}]")
    define("HI", lit(qc.Hi.value), f"damping gain [{unit}]")
    n = len(qc.sections)
    if n:
        names = ", ".join(qs.name for qs in qc.sections)
        lines.append(f"/* sections in this order: {names}; integrator: B2 = A2 = 0 */")

        def arr(get, as_int=False):
            vals = []
            for qs in qc.sections:
                v = get(qs)
                if v is None:
                    vals.append(c_int(0, fmt.c_type) if as_int else lit(0.0))
                elif as_int:
                    vals.append(c_int(v.integer, fmt.c_type))
                else:
                    vals.append(lit(v.value))
            return "{ " + ", ".join(vals) + " }"

        getters = {
            "B0": lambda qs: qs.b[0],
            "B1": lambda qs: qs.b[1],
            "B2": lambda qs: qs.b[2] if len(qs.b) > 2 else None,
            "A1": lambda qs: qs.a[0],
            "A2": lambda qs: qs.a[1] if len(qs.a) > 1 else None,
        }
        for key, get in getters.items():
            define(f"SEC_{key}", arr(get))
        if fmt.is_fixed:
            for key, get in getters.items():
                define(f"SEC_{key}_Q", arr(get, as_int=True))
    lines += ["", f"#endif /* {guard} */", ""]
    return "\n".join(lines)


def _fmt_gm(gm) -> str:
    if gm is None:
        return "n/a"
    hi = "inf" if gm.upper_factor is None else f"{gm.upper_factor:.4g}"
    lo_db = "-inf" if gm.lower_db is None else f"{gm.lower_db:+.2f}"
    hi_db = "+inf" if gm.upper_db is None else f"{gm.upper_db:+.2f}"
    return f"[{gm.lower_factor:.4g}, {hi}] ({lo_db} dB, {hi_db} dB)"


def _err(x: float) -> str:
    """|S| at the fundamental: below 1e-9 it is a resonator exactly on f1 (round-off)."""
    return "0 (resonator on f1)" if x < 1e-9 else f"{x:.3g}"


def _pm(x) -> str:
    return "n/a" if x is None else f"{x:.2f} deg"


def _recheck_rows(rc) -> list[tuple[str, str, str]]:
    b, a = rc.before, rc.after
    rows = [
        ("verdict", b.verdict, a.verdict if a else "(not quantised)"),
        ("spectral radius", f"{b.spectral_radius:.9f}", f"{a.spectral_radius:.9f}" if a else ""),
        ("phase margin", _pm(b.phase_margin_deg), _pm(a.phase_margin_deg) if a else ""),
        ("gain margin", _fmt_gm(b.gain_margin), _fmt_gm(a.gain_margin) if a else ""),
        ("max |S|", f"{b.sensitivity_peak:.4g} at {b.sensitivity_peak_hz:.1f} Hz",
         f"{a.sensitivity_peak:.4g} at {a.sensitivity_peak_hz:.1f} Hz" if a else ""),
        ("|S| at f1", _err(b.fundamental_error), _err(a.fundamental_error) if a else ""),
    ]
    return rows


def _recheck_lines(rc) -> list[str]:
    out = [f"  {'':<18}{'exact':<40}stored"]
    for name, x, y in _recheck_rows(rc):
        out.append(f"  {name:<18}{x:<40}{y}")
    for p in rc.poles:
        if p.tuned_frequency_hz is None:
            out.append(f"  {p.section} pole radius {p.radius_before:.12g} -> {p.radius_after:.12g}")
        else:
            out.append(
                f"  {p.section} poles: radius {p.radius_before:.10f} -> {p.radius_after:.10f}, "
                f"frequency {p.frequency_before_hz:.4f} Hz -> {p.frequency_after_hz:.4f} Hz"
                + ("" if p.complex_after else " (real poles: resonance lost)")
            )
    return out


# ---------------------------------------------------------------------------
# JSON
# ---------------------------------------------------------------------------


def _coeffs_dict(c) -> dict:
    from loopcheck.design.firmware import section_poles

    secs = []
    for s in c.sections:
        r, ang, cplx = section_poles(s.a)
        secs.append(
            {
                "name": s.name,
                "kind": s.kind,
                "harmonic": s.harmonic,
                "tuned_frequency_hz": s.tuned_frequency_hz,
                "method": s.method,
                "b": list(s.b),
                "a": list(s.a),
                "pole_radius": r,
                "pole_angle_rad_per_sample": ang,
                "poles_complex": cplx,
            }
        )
    return {"gain_unit": c.gain_unit, "Kp": c.Kp, "Hi": c.Hi, "sections": secs}


def _qv(v) -> dict:
    return {"ideal": v.ideal, "value": v.value, "integer": v.integer, "relative_error": v.relative_error}


def _figures(f) -> dict | None:
    if f is None:
        return None
    gm = None
    if f.gain_margin is not None:
        g = f.gain_margin
        gm = {"lower_factor": g.lower_factor, "upper_factor": g.upper_factor, "lower_db": g.lower_db, "upper_db": g.upper_db}
    return {
        "verdict": f.verdict,
        "stable": f.stable,
        "spectral_radius": f.spectral_radius,
        "phase_margin_deg": f.phase_margin_deg,
        "crossover_hz": list(f.crossover_hz),
        "gain_margin": gm,
        "sensitivity_peak": f.sensitivity_peak,
        "sensitivity_peak_hz": f.sensitivity_peak_hz,
        "fundamental_error": f.fundamental_error,
    }


def export_json(ex, case_path: str, files: dict | None = None) -> dict:
    """The export as a JSON-ready dict (see docs/firmware.md for every key)."""
    fmt = ex.quantised.number_format
    sc = ex.settings.scaling
    qc = ex.quantised
    rc = ex.recheck
    return {
        "export_version": 1,
        "generator": f"loopcheck {__version__}",
        "name": ex.name,
        "case": case_path,
        "sampling": {
            "fs_hz": ex.fs_hz,
            "Ts_s": ex.Ts_s,
            "delay_samples": ex.delay_samples,
            "timing": f"the output computed from the samples at t = k*Ts takes effect at t = (k + {ex.delay_samples:g})*Ts",
        },
        "controller": {
            "kind": ex.controller_kind,
            "feedback": ex.feedback,
            "regulated_current": _CURRENT_NAME.get(ex.feedback, ex.feedback),
            "f1_hz": ex.f1_hz,
            "integrator_method": ex.integrator_method if ex.controller_kind == "PI" else None,
            "resonator_method": ex.resonator_method if ex.controller_kind == "PR" else None,
        },
        "equations": {
            "form": "direct form I",
            "section": "y[k] = b0*e[k] + b1*e[k-1] + b2*e[k-2] - a1*y[k-1] - a2*y[k-2]  (a0 = 1; first-order sections have no b2, a2)",
            "output": "u[k] = Kp*e[k] + sum_j y_j[k] - Hi*ic[k]",
            "error": "e[k] = i_ref[k] - i_fb[k]",
            "steps": list(_STEPS),
            "initial_state": "all histories zero",
        },
        "si": _coeffs_dict(ex.si),
        "scaling": None
        if sc is None
        else {
            "current_counts_per_A": sc.current_counts_per_A,
            "ic_counts_per_A": sc.ic_counts_per_A,
            "modulator_counts_per_V": sc.modulator_counts_per_V,
            "controller_gain_scale": sc.fb_scale,
            "damping_gain_scale": sc.ic_scale,
            "notes": list(sc.notes),
            "signals": "e and ic in ADC counts with the zero-current offset removed; u in compare counts relative to the compare value for u = 0",
        },
        "firmware_units": None if ex.firmware is None else _coeffs_dict(ex.firmware),
        "number_format": {
            "kind": fmt.kind,
            "label": fmt.label,
            "word_bits": fmt.word_bits,
            "fraction_bits": fmt.fraction_bits if fmt.is_fixed else None,
            "integer_bits": fmt.integer_bits if fmt.is_fixed else None,
            "signed": True,
            "rounding": fmt.rounding if fmt.is_fixed else "nearest-even (IEEE 754)",
            "lsb": fmt.lsb if fmt.is_fixed else None,
            "c_type": fmt.c_type,
            "description": fmt.description,
        },
        "stored": {
            "gain_unit": qc.gain_unit,
            "Kp": _qv(qc.Kp),
            "Hi": _qv(qc.Hi),
            "sections": [
                {"name": qs.name, "b": [_qv(v) for v in qs.b], "a": [_qv(v) for v in qs.a]} for qs in qc.sections
            ],
        },
        "recheck": {
            "exact": _figures(rc.before),
            "stored": _figures(rc.after),
            "poles": [
                {
                    "section": p.section,
                    "tuned_frequency_hz": p.tuned_frequency_hz,
                    "radius_exact": p.radius_before,
                    "radius_stored": p.radius_after,
                    "frequency_exact_hz": p.frequency_before_hz,
                    "frequency_stored_hz": p.frequency_after_hz,
                    "complex_exact": p.complex_before,
                    "complex_stored": p.complex_after,
                    "shift_fraction": p.shift_fraction,
                }
                for p in rc.poles
            ],
            "peak_shift_limit": rc.peak_shift_limit,
            "warnings": list(rc.warnings),
        },
        "c_prefix": ex.settings.c_prefix,
        "files": files or {},
        "cautions": list(CAUTIONS),
    }


# ---------------------------------------------------------------------------
# human summary
# ---------------------------------------------------------------------------


def _nums(xs) -> str:
    return ", ".join(f"{x:.10g}" for x in xs)


def render_summary(ex, case_path: str, files: dict | None = None, range_verdict=None) -> str:
    """Plain ASCII summary of the export (what the command prints)."""
    fmt = ex.quantised.number_format
    sc = ex.settings.scaling
    rc = ex.recheck
    L = []
    L.append(f"{ex.name}  ({case_path})")
    L.append(
        f"  timing       fs {q(ex.fs_hz, 'Hz')}, Ts {q(ex.Ts_s, 's')}; u[k] takes effect at (k + {ex.delay_samples:g})*Ts"
    )
    kind = {"P": "P", "PI": f"PI ({ex.integrator_method} integrator)", "PR": f"PR ({ex.resonator_method} resonators)"}[
        ex.controller_kind
    ]
    L.append(f"  controller   {kind} on the {_CURRENT_NAME.get(ex.feedback, ex.feedback)}, direct form I sections")
    L.append("  equations    y[k] = b0 e[k] + b1 e[k-1] + b2 e[k-2] - a1 y[k-1] - a2 y[k-2]")
    L.append("               u[k] = Kp e[k] + sum y[k] - Hi ic[k]")
    L.append(f"  SI [V/A]     Kp {ex.si.Kp:.10g}, Hi {ex.si.Hi:.10g}")
    for s in ex.si.sections:
        tag = "integrator" if s.kind == "integrator" else f"{s.tuned_frequency_hz:g} Hz"
        L.append(f"    {s.name:<5}{tag:<12}b = [{_nums(s.b)}]  a1.. = [{_nums(s.a)}]")
    if sc is not None:
        L.append(
            f"  scaling      {sc.current_counts_per_A:.6g} count/A (i_fb), {sc.ic_counts_per_A:.6g} count/A (ic), "
            f"{sc.modulator_counts_per_V:.6g} count/V (modulator)"
        )
        L.append(f"  firmware     Kp {ex.firmware.Kp:.10g}, Hi {ex.firmware.Hi:.10g} [count/count]")
    L.append(f"  stored       {fmt.description}")
    if fmt.kind != "float64":
        L.append(f"    {'coefficient':<12}{'exact':>22}{'stored':>22}{'integer':>22}{'change':>14}")
        for name, v in ex.quantised.values():
            integer = "" if v.integer is None else str(v.integer)
            ch = f"{100 * v.relative_error:+.3g} %"
            L.append(f"    {name:<12}{v.ideal:>22.12g}{v.value:>22.12g}{integer:>22}{ch:>14}")
    L.append("  re-check")
    for line in _recheck_lines(rc):
        L.append("  " + line)
    if range_verdict is not None and range_verdict.declared:
        from loopcheck.design.range_verdict import headline

        L.append(f"  range        {headline(range_verdict)}")
    if rc.warnings:
        L.append("  warnings")
        for w in rc.warnings:
            L.append(f"    - {w}")
    if files:
        for kind_, path in files.items():
            L.append(f"  wrote        {path} ({kind_})")
    L.append("  caution      model results only: verify on hardware at reduced voltage with protection;")
    L.append("               local codes, the utility's rules and a licensed engineer's sign-off come first.")
    return "\n".join(L)
