"""Margins of a sampled loop that may have open-loop poles outside or on
the unit circle.

Everything works on a callable ``L(z)`` evaluated in state space or in
factored form (never one high-order polynomial) on the upper half of the
unit circle, ``z = e^{jw}``, ``0 <= w <= pi`` [rad/sample], the Nyquist
frequency included.

* Gain crossovers: every w with |L| = 1, located by Brent's method between
  grid points where log|L| changes sign.
* Phase crossings: every w where L is real and negative (loop phase -180 deg
  modulo 360), including w = pi where L is real by construction.
* Stable gain intervals: a closed-loop pole can reach the unit circle for a
  controller scaled by k only where 1 + k L(e^{jw}) = 0, i.e. at
  k = -1/L(e^{jw}) for L real. Those k split the positive axis; each piece
  is classified by the eigenvalues of A_cl(k) (parameter-space approach of
  D-decomposition: Yu. I. Neimark, "Search for the parameter values that
  make automatic control system stable", Avtomatika i Telemekhanika,
  vol. 9, no. 3, pp. 190-203, 1948).
* Nyquist count: winding number of 1 + L(z) on |z| = 1 + delta (the contour
  passes outside poles on the circle). By the argument principle,
  winding (counter-clockwise) = P - Z with P open-loop and Z closed-loop
  poles outside the contour (H. Nyquist, "Regeneration theory", Bell Syst.
  Tech. J., vol. 11, pp. 126-147, 1932; K. J. Astrom and R. M. Murray,
  "Feedback Systems", 2nd ed., Princeton Univ. Press, 2021, sec. 10.2).
"""

from __future__ import annotations

import math
from typing import Callable

import numpy as np
from scipy.optimize import brentq, minimize_scalar

LoopFn = Callable[[np.ndarray], np.ndarray]


def frequency_grid(Ts_s: float, extra_w=(), n_log: int = 4000, n_lin: int = 3000) -> np.ndarray:
    """Frequency grid [rad/sample] on (0, pi]: log-spaced from 0.01 Hz, linear
    up to the Nyquist frequency, and clusters around each angle in
    ``extra_w`` (resonances), with pi itself included."""
    w_min = 2.0 * math.pi * 0.01 * Ts_s
    parts = [np.geomspace(w_min, math.pi, n_log), np.linspace(0.0, math.pi, n_lin + 1)[1:]]
    offs = np.geomspace(1e-9, 3e-2, 60)
    for w0 in extra_w:
        if 0.0 < w0 < math.pi:
            parts.append(w0 * (1.0 + offs))
            parts.append(w0 * (1.0 - offs))
    w = np.unique(np.concatenate(parts))
    w = w[(w > 0.0) & (w <= math.pi)]
    return w


def _finite(x):
    return np.isfinite(x)


class _PoleOnCircle(Exception):
    """Raised inside a root search when L is not finite (or zero) at the
    trial point, i.e. the search landed on a pole or zero of L on the circle."""


def _finite_value(L: LoopFn, x: float) -> complex:
    """L(e^{jx}), raising _PoleOnCircle where it is infinite, nan or zero."""
    with np.errstate(all="ignore"):
        v = L(np.array([np.exp(1j * x)]))[0]
    if not np.isfinite(v) or v == 0:
        raise _PoleOnCircle
    return v


def _bracketed_root(f, a: float, b: float):
    """brentq on [a, b], or None when the bracket's sign change comes from a
    pole or zero of L on the circle that the search runs into (there is no
    crossing then: the sign flips through infinity or zero)."""
    try:
        return brentq(f, a, b, xtol=1e-14, rtol=1e-13)
    except _PoleOnCircle:
        return None


def gain_crossovers(L: LoopFn, w: np.ndarray, Lw: np.ndarray) -> list[float]:
    """All w [rad/sample] in the grid span where |L(e^{jw})| = 1."""
    with np.errstate(all="ignore"):  # poles/zeros exactly on the grid: inf/nan, skipped below
        g = np.log(np.abs(Lw))
    out = []
    s = np.sign(g)
    idx = np.nonzero((s[:-1] * s[1:] < 0) & _finite(g[:-1]) & _finite(g[1:]))[0]
    f = lambda x: float(np.log(np.abs(_finite_value(L, x))))  # noqa: E731
    for i in idx:
        r = _bracketed_root(f, w[i], w[i + 1])
        if r is not None:
            out.append(r)
    return out


#: Distance [dimensionless] from z = 1 or z = -1 within which an open-loop
#: pole makes L there a pole (an integrator, or a lossless plant's
#: integrator), so that point is no real-axis crossing. Rounding leaves such
#: poles within ~1e-15 of the point and L there finite but meaningless.
POLE_AT_POINT_TOL = 1e-7


def real_axis_crossings(L: LoopFn, w: np.ndarray, Lw: np.ndarray, tol: float = 1e-7, open_loop_poles=None):
    """All w in (0, pi] where L(e^{jw}) is real (either sign), with L there.

    Poles and zeros of L on the circle flip the sign of Im L without L being
    real there; such brackets are rejected by checking |Im L|/|L| at the root.
    The end points z = -1 and z = 1 are included when L is finite there;
    pass ``open_loop_poles`` (the eigenvalues of the loop's state matrix) so
    that a pole within :data:`POLE_AT_POINT_TOL` of such a point excludes it
    (without them, z = 1 is excluded only when |L(1)| >= 1e12)."""
    with np.errstate(all="ignore"):  # poles/zeros exactly on the grid: inf/nan, skipped below
        h = Lw.imag / np.abs(Lw)
    s = np.sign(h)
    idx = np.nonzero((s[:-1] * s[1:] < 0) & _finite(h[:-1]) & _finite(h[1:]))[0]

    def f(x):
        v = _finite_value(L, x)
        return float(v.imag / abs(v))

    def pole_at(z0: float) -> bool:
        if open_loop_poles is None:
            return False
        return bool(np.any(np.abs(np.asarray(open_loop_poles) - z0) < POLE_AT_POINT_TOL))

    roots = []
    for i in idx:
        r = _bracketed_root(f, w[i], w[i + 1])
        if r is None:
            continue
        v = L(np.array([np.exp(1j * r)]))[0]
        if np.isfinite(v) and abs(v.imag) <= tol * abs(v) and abs(v) > 0:
            roots.append((r, float(v.real)))
    # the Nyquist frequency: z = -1, L real for a real system
    v = L(np.array([-1.0 + 0j]))[0]
    if np.isfinite(v) and abs(v) > 0 and not pole_at(-1.0):
        roots.append((math.pi, float(v.real)))
    # w = 0 (z = 1) when L is finite there (no integrator in the loop)
    v0 = L(np.array([1.0 + 0j]))[0]
    if np.isfinite(v0) and abs(v0) < 1e12 and abs(v0) > 0 and not pole_at(1.0):
        roots.append((0.0, float(v0.real)))
    return roots


def sensitivity_peak(L: LoopFn, w: np.ndarray, Lw: np.ndarray, n_peaks: int = 6) -> tuple[float, float]:
    """max |1/(1 + L)| and the w [rad/sample] where it occurs.

    The ``n_peaks`` largest local maxima on the grid are each refined by a
    bounded scalar search between their neighbours, so a narrow peak beside
    a resonator is not lost to a broader one that happens to be larger on
    the grid."""
    with np.errstate(all="ignore"):  # poles exactly on the grid give nan; set to 0 below
        S = np.abs(1.0 / (1.0 + Lw))
    S[~np.isfinite(S)] = 0.0
    inner = np.nonzero((S[1:-1] >= S[:-2]) & (S[1:-1] >= S[2:]))[0] + 1
    cand = np.concatenate([inner, [0, w.size - 1]])
    cand = cand[np.argsort(S[cand])[::-1][:n_peaks]]
    best_S, best_w = float(S[cand[0]]), float(w[cand[0]])
    for i in cand:
        lo, hi = w[max(i - 1, 0)], w[min(i + 1, w.size - 1)]
        if hi <= lo:
            continue
        res = minimize_scalar(
            lambda x: -abs(1.0 / (1.0 + L(np.array([np.exp(1j * x)]))[0])),
            bounds=(lo, hi),
            method="bounded",
            options={"xatol": 1e-12 * max(1.0, hi)},
        )
        if np.isfinite(res.fun) and -res.fun > best_S:
            best_S, best_w = float(-res.fun), float(res.x)
    return best_S, best_w


def winding_number(L: LoopFn, w_seed: np.ndarray, rho: float, max_rounds: int = 40) -> tuple[int, float]:
    """Counter-clockwise winding number of 1 + L(z) around 0 on |z| = rho.

    Evaluated on the upper half (z real at both ends, so the lower half
    mirrors it) with adaptive refinement until no step in the argument
    exceeds 0.5 rad. Returns (integer winding, residual from an integer)."""
    w = np.unique(np.concatenate([[0.0, math.pi], w_seed]))
    f = 1.0 + L(rho * np.exp(1j * w))
    for _ in range(max_rounds):
        d = np.angle(f[1:] / f[:-1])
        bad = np.nonzero(np.abs(d) > 0.5)[0]
        if bad.size == 0:
            break
        wn = 0.5 * (w[bad] + w[bad + 1])
        fn = 1.0 + L(rho * np.exp(1j * wn))
        w = np.concatenate([w, wn])
        f = np.concatenate([f, fn])
        order = np.argsort(w)
        w, f = w[order], f[order]
    total = 2.0 * np.sum(np.angle(f[1:] / f[:-1])) / (2.0 * math.pi)
    n = int(round(total))
    return n, abs(total - n)


def interval_candidates(crossings) -> list[float]:
    """Controller-gain factors k > 0 at which a closed-loop pole can sit on
    the unit circle: k = -1/L at the real-negative crossings."""
    ks = sorted({-1.0 / v for _, v in crossings if v < 0})
    return ks


def stable_intervals(ks: list[float], is_stable: Callable[[np.ndarray], np.ndarray]):
    """Split (0, inf) at the candidate factors and classify each piece.

    ``is_stable`` maps an array of k to booleans (closed-loop eigenvalues).
    Adjacent stable pieces are merged. Returns a list of (from, to|None)."""
    edges = [0.0] + list(ks) + [math.inf]
    tests = []
    for a, b in zip(edges[:-1], edges[1:]):
        if a == 0.0 and math.isinf(b):
            tests.append(1.0)
        elif a == 0.0:
            tests.append(0.5 * b)
        elif math.isinf(b):
            tests.append(2.0 * a)
        else:
            tests.append(math.sqrt(a * b))
    ok = is_stable(np.array(tests))
    out: list[list] = []
    for (a, b), s in zip(zip(edges[:-1], edges[1:]), ok):
        if not s:
            continue
        if out and out[-1][1] == a:
            out[-1][1] = b
        else:
            out.append([a, b])
    return [(a, None if math.isinf(b) else b) for a, b in out]


def wrap_deg(x: float) -> float:
    """Wrap an angle to (-180, 180] [deg]."""
    y = (x + 180.0) % 360.0 - 180.0
    return 180.0 if y == -180.0 else y
