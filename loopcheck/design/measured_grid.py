"""A measured grid impedance (CSV table) and the frequency-response Nyquist
count of ``1 + N Zg Yo`` on it.

File format (UTF-8 text, one row per frequency):

    # comment lines start with '#'; blank lines are skipped
    frequency_hz, magnitude_ohm, phase_deg      <- optional header line
    50, 0.12, 78.0
    ...

Frequencies [Hz] must be positive and strictly increasing, magnitudes
[ohm] non-negative, phases [deg] finite. Every bad row is reported as one
line ``<file>:<line>: <what is wrong>`` (a :class:`CaseError`).

The count is only as good as its conditions, which the result states:
the inverter must be stable on a stiff grid (closed-loop eigenvalues), the
grid passive (Re Zg >= 0, |phase| <= 90 deg, on every row), and
``N Zg Yo`` on the right of -1/2 at both ends of the data
(``Re > -1/2``), so that closing the curve the short way outside the data
is plausible (an assumption: unmeasured parts are not seen). Between rows, ``log|Zg|`` and the
unwrapped phase are interpolated linearly in ``log f``; ``Yo`` is evaluated
exactly at every point.

References
----------
.. [1] J. Sun, "Impedance-based stability criterion for grid-connected
   inverters", IEEE Trans. Power Electron., vol. 26, no. 11,
   pp. 3075-3078, 2011 (from memory).
.. [2] L. Harnefors, X. Wang, A. G. Yepes and F. Blaabjerg,
   "Passivity-based stability assessment of grid-connected VSCs - an
   overview", IEEE J. Emerg. Sel. Topics Power Electron., 2016 (abstract
   read): a passive grid on a passive band cannot destabilise the loop.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from loopcheck.engine.admittance import admittance_model, output_admittance

#: Largest file accepted [bytes].
MAX_BYTES = 20_000_000
#: Re(N Zg Yo) at the ends of the data below which the count is flagged.
END_LIMIT = -0.5


@dataclass(frozen=True, eq=False)
class MeasuredImpedance:
    """A measured impedance: frequency_hz [Hz] (increasing), Z_ohm complex
    [ohm]; path: the file."""

    path: str
    frequency_hz: np.ndarray
    Z_ohm: np.ndarray

    @property
    def passive(self) -> bool:
        """Re Zg >= 0 on every row (|phase| <= 90 deg)."""
        return bool(np.all(self.Z_ohm.real >= -1e-12 * np.abs(self.Z_ohm)))

    def interpolate(self, f_hz) -> np.ndarray:
        """Zg at f [Hz] inside the data: log|Z| and unwrapped phase linear in log f."""
        lf = np.log(self.frequency_hz)
        mag = np.log(np.maximum(np.abs(self.Z_ohm), 1e-300))
        ph = np.unwrap(np.angle(self.Z_ohm))
        x = np.log(np.asarray(f_hz, dtype=float))
        return np.exp(np.interp(x, lf, mag) + 1j * np.interp(x, lf, ph))


@dataclass(frozen=True)
class MeasuredVerdict:
    """Frequency-response Nyquist count of 1 + N Zg Yo over the data.

    f_min_hz, f_max_hz [Hz]: the measured range; rows; units N;
    grid_passive; stiff_verdict; encirclements_cw (clockwise of -1 by N Zg Yo);
    verdict "stable", "unstable" or "not applicable"; min_distance (smallest
    |1 + N Zg Yo|) at min_distance_hz [Hz]; end_low / end_high: N Zg Yo
    at the ends of the data [-]; conditions: the validity statements,
    each marked met or not."""

    f_min_hz: float
    f_max_hz: float
    rows: int
    units: int
    grid_passive: bool
    stiff_verdict: str
    encirclements_cw: int
    verdict: str
    min_distance: float
    min_distance_hz: float
    end_low: complex
    end_high: complex
    conditions: tuple[tuple[str, bool], ...]


def measured_verdict(design, meas: MeasuredImpedance, units: int = 1, stiff_verdict: str | None = None,
                     per_interval: int = 16, max_rounds: int = 30, feedforward=None) -> MeasuredVerdict:
    """Count encirclements of -1 by N Zg Yo on the measured range (mirrored to
    negative frequencies; the curve is closed the short way outside the data).
    ``stiff_verdict`` is computed from the eigenvalues when not given."""
    from loopcheck.design.grid_network import stiff_grid_verdict

    if stiff_verdict is None:
        stiff_verdict, _ = stiff_grid_verdict(design)
    model = admittance_model(design, feedforward)
    fd = meas.frequency_hz
    # sub-points between rows (log-spaced), then adaptive refinement
    t = np.linspace(0.0, 1.0, per_interval + 1)[:-1]
    lf = np.log(fd)
    fgrid = np.exp(np.concatenate([lf[:-1, None] + np.diff(lf)[:, None] * t[None, :]]).ravel())
    fgrid = np.concatenate([fgrid, fd[-1:]])

    def F(f):
        with np.errstate(all="ignore"):
            return 1.0 + units * meas.interpolate(f) * output_admittance(model, 2j * math.pi * f)

    val = F(fgrid)
    for _ in range(max_rounds):
        d = np.angle(val[1:] / val[:-1])
        bad = np.nonzero(~(np.abs(d) <= 0.5))[0]
        if bad.size == 0:
            break
        fn = np.sqrt(fgrid[bad] * fgrid[bad + 1])
        keep = fn > fgrid[bad] * (1 + 1e-12)
        if not keep.any():
            break
        fn = fn[keep]
        fgrid = np.concatenate([fgrid, fn])
        val = np.concatenate([val, F(fn)])
        o = np.argsort(fgrid)
        fgrid, val = fgrid[o], val[o]
    steps = np.angle(val[1:] / val[:-1])
    # mirrored curve closed the short way at both ends (through the real axis)
    total = 2.0 * np.sum(steps) + 2.0 * np.angle(val[0]) - 2.0 * np.angle(val[-1])
    ccw = int(round(total / (2 * math.pi)))
    g_lo = complex(val[0] - 1.0)
    g_hi = complex(val[-1] - 1.0)
    passive = meas.passive
    conditions = (
        ("inverter stable on a stiff grid (closed-loop eigenvalues)", stiff_verdict == "stable"),
        ("grid passive on every row (Re Zg >= 0)", passive),
        (f"Re(N Zg Yo) above {END_LIMIT:g} at both ends of the data (the curve is closed the short way outside them)",
         g_lo.real > END_LIMIT and g_hi.real > END_LIMIT),
    )
    ok = all(c for _, c in conditions)
    verdict = ("stable" if ccw == 0 else "unstable") if ok and ccw <= 0 else "not applicable"
    j = int(np.argmin(np.abs(val)))
    return MeasuredVerdict(float(fd[0]), float(fd[-1]), int(fd.size), int(units), passive, stiff_verdict, -ccw,
                           verdict, float(np.abs(val[j])), float(fgrid[j]), g_lo, g_hi, conditions)
