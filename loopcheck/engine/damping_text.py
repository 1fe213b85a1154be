"""Text on the damping path's filter (pure string building, no numpy), for
summaries, exports and reports. The model is in :mod:`loopcheck.engine.damping_filter`."""

from __future__ import annotations


def is_filtered(control) -> bool:
    """True when the damping path is more than the measured ic (H != 1 on ic)."""
    f = getattr(control, "damping_filter", None)
    return f is not None and f.kind != "measured"


def describe(filt: DampingFilter | None) -> str:
    """One line on the damping path, for summaries and exports."""
    if filt is None or filt.kind == "measured":
        return "measured capacitor current ic"
    sig = "C vc/Ts (vc sampled)" if filt.signal == "vc" else "measured ic"
    if filt.kind == "backward-euler":
        return "ic estimated from vc, backward Euler: C (vc[k] - vc[k-1])/Ts"
    if filt.kind == "tustin":
        return "ic estimated from vc, Tustin derivative: 2C (vc[k] - vc[k-1])/Ts - y[k-1]"
    if filt.kind == "lead":
        g = filt.lead_samples
        return f"lead (linear prediction {g:g} sample ahead): {1 + g:g} ic[k] - {g:g} ic[k-1]"
    if filt.kind == "high-pass":
        return f"first-order high-pass on ic, corner {filt.cutoff_hz:g} Hz (Tustin)"
    return f"H(z) = b/a on {sig}, b = {list(filt.b)}, a = {list(filt.a)}"


def critical_formula(design) -> str:
    """How the critical frequency was found, for output text."""
    if not is_filtered(design.control):
        return "fs/(4*delay+2)"
    return f"(numeric: phase of the damping path's virtual admittance at -90 deg, {design.control.damping_filter.kind})"
