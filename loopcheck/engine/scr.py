"""Short-circuit ratio and grid inductance.

The short-circuit ratio (SCR) at the point of connection is the grid's
short-circuit apparent power there divided by the rated apparent power of
the unit, SCR = S_sc / S_rated. For a purely inductive grid behind the point
of connection, S_sc = V^2 / |Z_g| with V the line-to-line rms voltage of a
three-phase system (giving the per-phase, star-equivalent impedance) or the
rms voltage of a single-phase system, so

    Z_g = V^2 / (SCR * S_rated),        L_g = V^2 / (2*pi*f * SCR * S_rated).

Strength bands used for the grid (same reference): strong SCR > 3, weak
2 <= SCR <= 3, very weak SCR < 2.

Pure functions; they work on floats and on numpy arrays alike.

References
----------
.. [1] North American Electric Reliability Corporation (NERC), "Reliability
   Guideline: Integrating Inverter-Based Resources into Low Short Circuit
   Strength Systems", Atlanta, GA, Dec. 2017 (SCR definition and the
   strong/weak/very-weak bands).
.. [2] IEEE Std 1204-1997, "IEEE Guide for Planning DC Links Terminating at
   AC Locations Having Low Short-Circuit Capacities" (the same bands; from
   memory, not re-read).
"""

from __future__ import annotations

import math

__all__ = ["grid_strength", "lg_from_scr", "scr_from_lg"]

#: NERC 2017 bands: SCR above this is a strong grid.
STRONG_ABOVE = 3.0
#: NERC 2017 bands: SCR below this is a very weak grid.
VERY_WEAK_BELOW = 2.0


def lg_from_scr(scr, S_VA, V_V, f_hz):
    """Grid inductance [H] (per phase) that gives the short-circuit ratio ``scr`` [-].

    Parameters
    ----------
    scr : float or array
        Short-circuit ratio S_sc / S_rated [-], > 0.
    S_VA : float
        Rated apparent power of the unit [VA] (all three phases together for a
        three-phase unit).
    V_V : float
        Line-to-line rms voltage [V] of a three-phase system, or the rms
        voltage of a single-phase system.
    f_hz : float
        Grid fundamental frequency [Hz].

    Returns
    -------
    float or array
        L_g = V^2 / (2*pi*f * SCR * S) [H]; the grid is taken as purely
        inductive.

    References
    ----------
    .. [1] NERC, "Reliability Guideline: Integrating Inverter-Based Resources
       into Low Short Circuit Strength Systems", Dec. 2017 (SCR = S_sc / S_rated).

    Examples
    --------
    >>> round(lg_from_scr(20, 10e3, 400.0, 50.0) * 1e3, 4)  # [mH]
    2.5465
    """
    return V_V**2 / (2.0 * math.pi * f_hz * scr * S_VA)


def scr_from_lg(Lg_H, S_VA, V_V, f_hz):
    """Short-circuit ratio [-] of a purely inductive grid of ``Lg_H`` [H] per
    phase; inverse of :func:`lg_from_scr` (infinite for Lg = 0).

    References
    ----------
    .. [1] NERC, "Reliability Guideline: Integrating Inverter-Based Resources
       into Low Short Circuit Strength Systems", Dec. 2017.
    """
    x = 2.0 * math.pi * f_hz * Lg_H * S_VA
    try:
        return V_V**2 / x
    except ZeroDivisionError:
        return math.inf


def grid_strength(scr: float) -> str:
    """``"strong"`` (SCR > 3), ``"weak"`` (2 <= SCR <= 3) or ``"very weak"``
    (SCR < 2).

    References
    ----------
    .. [1] NERC, "Reliability Guideline: Integrating Inverter-Based Resources
       into Low Short Circuit Strength Systems", Dec. 2017.
    """
    if scr > STRONG_ABOVE:
        return "strong"
    if scr >= VERY_WEAK_BELOW:
        return "weak"
    return "very weak"
