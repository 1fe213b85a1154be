"""Symbolic (sympy) derivations of the LCL plant and of the sampled models.

This module is an independent route to the same models the numeric engine
builds from state-space matrices (:mod:`loopcheck.engine.plant`,
:mod:`loopcheck.engine.discretize`). It is used by the tests as a reference and by
anyone who wants the formulas; the analysis code never imports it (sympy is
slow to import and is imported here only).

Three derivations:

1. :func:`derive_plant` -- the Laplace-domain transfer functions
   i1/vi, i2/vi and ic/vi [A/V] of the LCL filter from nodal analysis of the
   impedances (converter branch ``R1 + s L1``, grid branch
   ``R2 + Rg + s (L2 + Lg)`` shorted at the grid, the shunt branch of each
   passive-damping variant), with the grid voltage set to zero.
2. :func:`derive_discrete_lossless` -- the exact pulse transfer functions of
   the lossless filter with a zero-order hold and a computation delay of
   ``lam`` sampling periods (0..1), by the modified z-transform evaluated with
   the residue formula.
3. :func:`derive_ccf_inner_bound` -- the exact stability range of the
   capacitor-current damping loop alone with one sample of delay, from the
   Jury conditions of its characteristic polynomial.

Every symbol is SI: henry, farad, ohm, seconds, rad/s.

References
----------
.. [1] K. Ogata, "Discrete-Time Control Systems", 2nd ed., Prentice Hall,
   1995 (modified z-transform by residues; Jury stability test) [from memory].
.. [2] E. I. Jury, "Theory and Application of the z-Transform Method",
   Wiley, 1964 (modified z-transform; stability table) [from memory].
.. [3] G. F. Franklin, J. D. Powell and M. L. Workman, "Digital Control of
   Dynamic Systems", 3rd ed., Addison-Wesley, 1998 (ZOH equivalents,
   modified z-transform) [from memory].
.. [4] S. G. Parker, B. P. McGrath and D. G. Holmes, "Regions of Active
   Damping Control for LCL Filters", IEEE Trans. Ind. Appl., vol. 50, no. 1,
   pp. 424-432, 2014 (closed forms of the ZOH-sampled lossless LCL filter
   with one sample of delay) [from memory].
"""

from __future__ import annotations

import functools
from dataclasses import dataclass
from fractions import Fraction
from typing import Callable

import numpy as np
import sympy as sp

from loopcheck.engine.model import PASSIVE_KINDS

#: Names of the circuit parameters, in the order the numeric evaluators take
#: them (all SI: [H], [F], [ohm]).
PARAMETER_NAMES = ("L1_H", "C_F", "L2_H", "Lg_H", "R1_ohm", "R2_ohm", "Rg_ohm", "Rd_ohm", "Cd_F", "Ld_H")


def _symbols():
    pos = dict(positive=True)
    return {
        "L1_H": sp.Symbol("L1", **pos),
        "C_F": sp.Symbol("C", **pos),
        "L2_H": sp.Symbol("L2", **pos),
        "Lg_H": sp.Symbol("Lg", nonnegative=True),
        "R1_ohm": sp.Symbol("R1", nonnegative=True),
        "R2_ohm": sp.Symbol("R2", nonnegative=True),
        "Rg_ohm": sp.Symbol("Rg", nonnegative=True),
        "Rd_ohm": sp.Symbol("Rd", **pos),
        "Cd_F": sp.Symbol("Cd", **pos),
        "Ld_H": sp.Symbol("Ld", **pos),
    }


@dataclass(frozen=True)
class PlantExpressions:
    """Laplace-domain transfer functions of one filter variant.

    s: the Laplace variable [1/s]; symbols: parameter name -> sympy symbol
    (names as :data:`PARAMETER_NAMES`); shunt_impedance: Z of the shunt
    branch [ohm]; i1, i2, ic: currents over the converter voltage [A/V]
    (ic is the current of the whole shunt branch, i1 - i2); v: shunt-branch
    voltage over the converter voltage [V/V]."""

    damping_kind: str
    s: sp.Symbol
    symbols: dict
    shunt_impedance: sp.Expr
    v: sp.Expr
    i1: sp.Expr
    i2: sp.Expr
    ic: sp.Expr


def shunt_impedance(damping_kind: str, s, sym) -> sp.Expr:
    """Impedance [ohm] of the filter's shunt branch for a passive-damping kind.

    none: 1/(sC); series-R: Rd + 1/(sC); split-RC: 1/(sC) in parallel with
    Rd + 1/(s Cd); split-RLC: 1/(sC) in parallel with (Rd || s Ld) + 1/(s Cd).
    (Circuit definitions as in :mod:`loopcheck.engine.plant`.)"""
    C, Rd, Cd, Ld = sym["C_F"], sym["Rd_ohm"], sym["Cd_F"], sym["Ld_H"]
    zc = 1 / (s * C)
    if damping_kind == "none":
        return zc
    if damping_kind == "series-R":
        return Rd + zc
    if damping_kind == "split-RC":
        zd = Rd + 1 / (s * Cd)
    elif damping_kind == "split-RLC":
        zd = (Rd * s * Ld) / (Rd + s * Ld) + 1 / (s * Cd)
    else:
        raise ValueError(f"unknown passive damping kind {damping_kind!r}")
    return 1 / (1 / zc + 1 / zd)


@functools.lru_cache(maxsize=None)
def derive_plant(damping_kind: str = "none") -> PlantExpressions:
    """Derive i1/vi, i2/vi, ic/vi [A/V] of the LCL filter by nodal analysis.

    One node (the shunt-branch voltage v) and Kirchhoff's current law with
    the grid voltage shorted (vg = 0, loop analysis)::

        (v - vi)/Z1 + v/Zsh + v/Z2 = 0,
        Z1 = R1 + s L1,  Z2 = R2 + Rg + s (L2 + Lg)

    solved by sympy for v, then i1 = (vi - v)/Z1, i2 = v/Z2, ic = v/Zsh.

    References
    ----------
    .. [1] M. Liserre, F. Blaabjerg and S. Hansen, "Design and Control of an
       LCL-Filter-Based Three-Phase Active Rectifier", IEEE Trans. Ind.
       Appl., vol. 41, no. 5, pp. 1281-1291, 2005 (LCL filter and its
       series-R damped variant).
    """
    if damping_kind not in PASSIVE_KINDS:
        raise ValueError(f"unknown passive damping kind {damping_kind!r}")
    sym = _symbols()
    s = sp.Symbol("s")
    vi, v = sp.symbols("v_i v")
    Z1 = sym["R1_ohm"] + s * sym["L1_H"]
    Z2 = sym["R2_ohm"] + sym["Rg_ohm"] + s * (sym["L2_H"] + sym["Lg_H"])
    Zsh = shunt_impedance(damping_kind, s, sym)
    (v_sol,) = sp.solve(sp.Eq((v - vi) / Z1 + v / Zsh + v / Z2, 0), v)
    v_over = sp.cancel(v_sol / vi)
    i1 = sp.cancel((1 - v_over) / Z1)
    i2 = sp.cancel(v_over / Z2)
    ic = sp.cancel(v_over / Zsh)
    return PlantExpressions(damping_kind, s, sym, sp.cancel(Zsh), v_over, i1, i2, ic)


@functools.lru_cache(maxsize=None)
def plant_evaluator(damping_kind: str = "none") -> Callable:
    """Numeric evaluator of :func:`derive_plant` (numpy, vectorised).

    Returns ``f(s, L1_H, C_F, L2_H, Lg_H=0, R1_ohm=0, R2_ohm=0, Rg_ohm=0,
    Rd_ohm=1, Cd_F=1, Ld_H=1) -> (i1, i2, ic)`` [A/V] for complex ``s``
    [1/s] (arrays broadcast). Damping parameters a variant does not use are
    ignored."""
    ex = derive_plant(damping_kind)
    args = [ex.s] + [ex.symbols[n] for n in PARAMETER_NAMES]
    fns = [sp.lambdify(args, e, modules="numpy") for e in (ex.i1, ex.i2, ex.ic)]

    def f(s, L1_H, C_F, L2_H, Lg_H=0.0, R1_ohm=0.0, R2_ohm=0.0, Rg_ohm=0.0, Rd_ohm=1.0, Cd_F=1.0, Ld_H=1.0):
        s = np.asarray(s, dtype=complex)
        vals = (L1_H, C_F, L2_H, Lg_H, R1_ohm, R2_ohm, Rg_ohm, Rd_ohm, Cd_F, Ld_H)
        return tuple(np.asarray(fn(s, *vals), dtype=complex) * np.ones_like(s) for fn in fns)

    return f


@dataclass(frozen=True)
class ResonanceExpressions:
    """Resonance and anti-resonance of the lossless filter [rad/s], derived.

    resonance: the positive pole frequency of i1/vi, i2/vi and ic/vi;
    antiresonance: the positive zero frequency of i1/vi (grid side incl. Lg)."""

    symbols: dict
    resonance: sp.Expr
    antiresonance: sp.Expr


@functools.lru_cache(maxsize=None)
def derive_resonances() -> ResonanceExpressions:
    """Poles and zeros of the lossless plant (R = 0, no passive damping).

    The denominator of i2/vi is s*(a s^2 + b); its nonzero roots are
    s = +-j*w_r. The numerator of i1/vi is (c s^2 + 1); its roots are
    s = +-j*w_z. sympy solves both; the results are the usual
    w_r = sqrt((L1 + L2 + Lg)/(L1 (L2 + Lg) C)), w_z = 1/sqrt((L2 + Lg) C).

    References
    ----------
    .. [1] M. Liserre, F. Blaabjerg and S. Hansen, "Design and Control of an
       LCL-Filter-Based Three-Phase Active Rectifier", IEEE Trans. Ind.
       Appl., vol. 41, no. 5, pp. 1281-1291, 2005.
    """
    ex = derive_plant("none")
    sym = ex.symbols
    lossless = {sym["R1_ohm"]: 0, sym["R2_ohm"]: 0, sym["Rg_ohm"]: 0}
    s = ex.s
    w = sp.Symbol("omega", positive=True)

    def positive_frequency(poly_expr):
        sols = sp.solve(sp.Eq(poly_expr.subs(s, sp.I * w), 0), w)
        sols = [x for x in sols if x != 0]
        if len(sols) != 1:
            raise RuntimeError("expected one positive resonance frequency")
        return sp.simplify(sols[0])

    num2, den2 = sp.fraction(sp.cancel(ex.i2.subs(lossless)))
    num1, den1 = sp.fraction(sp.cancel(ex.i1.subs(lossless)))
    return ResonanceExpressions(sym, positive_frequency(den2), positive_frequency(num1))


# ---------------------------------------------------------------------------
# exact sampled models of the lossless filter, fractional delay
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class DiscreteLosslessForms:
    """Pulse transfer functions of the lossless LCL filter with a ZOH and a
    computation delay of ``lam`` sampling periods (0..1) [A/V].

    Symbols: z; lam (delay in samples); L1 [H]; LT = L2 + Lg [H]; wr: the
    resonance [rad/s]; Ts: sampling period [s]. (C is eliminated through
    C = (L1 + LT)/(L1 LT wr^2).)"""

    z: sp.Symbol
    lam: sp.Symbol
    L1: sp.Symbol
    LT: sp.Symbol
    wr: sp.Symbol
    Ts: sp.Symbol
    i1: sp.Expr
    i2: sp.Expr
    ic: sp.Expr


def modified_z_transform(F: sp.Expr, s, z, m, T) -> sp.Expr:
    """Modified z-transform sum_{n>=0} f((n + m) T) z^-n of the rational
    Laplace transform F(s) (strictly proper), 0 <= m <= 1, by residues::

        F_m(z) = sum over poles p of F:  Res[ F(s) e^{m T s} z/(z - e^{T s}), s = p ]

    Real poles of any order use the derivative formula; simple complex poles
    are combined with their conjugates into one real second-order term.

    References
    ----------
    .. [1] E. I. Jury, "Theory and Application of the z-Transform Method",
       Wiley, 1964 [from memory].
    .. [2] K. Ogata, "Discrete-Time Control Systems", 2nd ed., Prentice
       Hall, 1995 [from memory].
    """
    F = sp.cancel(F)
    _, den = sp.fraction(F)
    total = sp.Integer(0)
    for p, k in sp.roots(sp.Poly(den, s)).items():
        im = sp.im(p)
        if im == 0:
            e = sp.cancel((s - p) ** k * F) * sp.exp(m * T * s) * z / (z - sp.exp(T * s))
            total += sp.diff(e, s, k - 1).subs(s, p) / sp.factorial(k - 1)
        elif im.is_positive:
            if k != 1:
                raise NotImplementedError("repeated complex poles")
            a = sp.cancel((s - p) * F).subs(s, p) * sp.exp(m * T * p)
            q = sp.exp(T * p)
            c1 = 2 * sp.re(sp.expand_complex(a))
            c0 = 2 * sp.re(sp.expand_complex(a * sp.conjugate(q)))
            mag2 = sp.simplify(sp.expand_complex(q * sp.conjugate(q)))
            total += z * (c1 * z - c0) / (z**2 - 2 * sp.re(sp.expand_complex(q)) * z + mag2)
        # poles with negative imaginary part are covered by their conjugates
    return total


def _tidy_rational(expr, z):
    """One rational function of z with trig-simplified numerator coefficients
    (cheaper than a global simplify; the result is equal, only tidier)."""
    num, den = sp.fraction(sp.factor(sp.cancel(sp.together(expr))))
    coeffs = [sp.factor(sp.trigsimp(c)) for c in sp.Poly(num, z).all_coeffs()]
    return sp.factor(sp.Poly(coeffs, z).as_expr()) / den


@functools.lru_cache(maxsize=None)
def derive_discrete_lossless() -> DiscreteLosslessForms:
    """Exact ZOH pulse transfer functions of the lossless filter with a
    computation delay of lam samples (0 <= lam <= 1).

    With the update applied from (k + lam) Ts (modulator hold, timing as in
    :mod:`loopcheck.engine.discretize`) the pulse transfer function of a plant G(s)
    is::

        G_lam(z) = z^-1 (1 - z^-1) Z_m{ G(s)/s },   m = 1 - lam

    where Z_m is the modified z-transform (:func:`modified_z_transform`).
    lam = 0 gives the ordinary ZOH equivalent, lam = 1 that equivalent times
    z^-1. The continuous plants come from :func:`derive_plant` (lossless,
    C eliminated in favour of w_r).

    References
    ----------
    .. [1] G. F. Franklin, J. D. Powell and M. L. Workman, "Digital Control
       of Dynamic Systems", 3rd ed., Addison-Wesley, 1998 [from memory].
    .. [2] K. J. Astrom and B. Wittenmark, "Computer-Controlled Systems:
       Theory and Design", 3rd ed., Prentice Hall, 1997, ch. 2 [from memory].
    """
    ex = derive_plant("none")
    sym = ex.symbols
    s = ex.s
    z = sp.Symbol("z")
    lam = sp.Symbol("lam", nonnegative=True)
    Ts = sp.Symbol("Ts", positive=True)
    L1 = sp.Symbol("L1", positive=True)
    LT = sp.Symbol("LT", positive=True)
    wr = sp.Symbol("w_r", positive=True)
    subs = {
        sym["R1_ohm"]: 0,
        sym["R2_ohm"]: 0,
        sym["Rg_ohm"]: 0,
        sym["Lg_H"]: 0,
        sym["L2_H"]: LT,
        sym["L1_H"]: L1,
    }
    C_of_wr = (L1 + LT) / (L1 * LT * wr**2)
    out = []
    for g in (ex.i1, ex.i2, ex.ic):
        G = sp.cancel(g.subs(subs).subs(sym["C_F"], C_of_wr))
        Fm = modified_z_transform(G / s, s, z, 1 - lam, Ts)
        out.append(_tidy_rational((1 - 1 / z) / z * Fm, z))
    return DiscreteLosslessForms(z, lam, L1, LT, wr, Ts, *out)


@functools.lru_cache(maxsize=None)
def discrete_lossless_evaluator() -> Callable:
    """Numeric evaluator of :func:`derive_discrete_lossless`.

    Returns ``f(z, L1_H, C_F, LT_H, Ts_s, delay) -> (i1, i2, ic)`` [A/V] for
    complex ``z``; ``LT_H`` = L2 + Lg [H], ``delay`` in samples (0..1)."""
    d = derive_discrete_lossless()
    args = (d.z, d.L1, d.LT, d.wr, d.Ts, d.lam)
    fns = [sp.lambdify(args, e, modules="numpy") for e in (d.i1, d.i2, d.ic)]

    def f(z, L1_H, C_F, LT_H, Ts_s, delay):
        z = np.asarray(z, dtype=complex)
        wr = np.sqrt((L1_H + LT_H) / (L1_H * LT_H * C_F))
        return tuple(np.asarray(fn(z, L1_H, LT_H, wr, Ts_s, delay), dtype=complex) for fn in fns)

    return f


# ---------------------------------------------------------------------------
# Jury test and the exact bound of the capacitor-current damping loop
# ---------------------------------------------------------------------------


def jury_conditions(coeffs: list) -> list[sp.Expr]:
    """Jury's stability conditions for P(z) = sum_i a_i z^i, written as a
    list of expressions that must all be > 0 (leading coefficient a_n > 0).

    ``coeffs`` = [a_n, ..., a_1, a_0] (descending powers). The conditions
    are P(1) > 0, (-1)^n P(-1) > 0, |a_0| < a_n and, for each reduced row of
    the Jury table with first/last entries b_0, b_last, |b_0| > |b_last|;
    each |x| > |y| is returned as x^2 - y^2 (factored).

    References
    ----------
    .. [1] E. I. Jury, "Theory and Application of the z-Transform Method",
       Wiley, 1964 [from memory].
    .. [2] K. Ogata, "Discrete-Time Control Systems", 2nd ed., Prentice
       Hall, 1995, sec. 4-3 [from memory].
    """
    a = [sp.sympify(c) for c in coeffs][::-1]  # a[i] multiplies z^i
    n = len(a) - 1
    P1 = sum(a)
    Pm1 = sum(ai * (-1) ** i for i, ai in enumerate(a))
    conds = [sp.factor(P1), sp.factor((-1) ** n * Pm1), sp.factor(a[n] ** 2 - a[0] ** 2)]
    row = a  # row[i] multiplies z^i
    while len(row) > 3:
        m = len(row) - 1
        new = [sp.expand(row[0] * row[k] - row[m] * row[m - k]) for k in range(m)]
        conds.append(sp.factor(new[0] ** 2 - new[m - 1] ** 2))
        row = new
    return conds


@dataclass(frozen=True)
class InnerLoopBound:
    """Exact stability range of the capacitor-current damping loop alone,
    lossless filter, ZOH, one sample of computation delay.

    char_poly: the monic characteristic polynomial in z with c = cos(wr Ts)
    and the normalised gain k = Hi sin(wr Ts)/(wr L1);
    conditions: Jury conditions (each > 0);
    k_roots: every root in k of every condition (functions of c), the
    candidate end points of the stable range;
    k_range_below: (k_lo, k_hi) in terms of c, valid for 1/2 < c < 1
    (resonance below fs/6); k_range_above: the range for 0 < c < 1/2
    (resonance between fs/6 and fs/4; beyond fs/4 other conditions bind,
    see :func:`ccf_inner_hi_range`);
    hi_range_below / hi_range_above: the same ranges as gains Hi [V/A] in
    terms of the symbols wr [rad/s], Ts [s], L1 [H]."""

    z: sp.Symbol
    c: sp.Symbol
    k: sp.Symbol
    wr: sp.Symbol
    Ts: sp.Symbol
    L1: sp.Symbol
    char_poly: sp.Expr
    conditions: tuple
    k_roots: tuple
    k_range_below: tuple
    k_range_above: tuple
    hi_range_below: tuple
    hi_range_above: tuple


def _stable_k_interval(conds, roots, k, c, c_value):
    """The open k-interval where every condition is > 0 at c = c_value, as a
    pair of symbolic roots (functions of c), or None when it is empty.

    ``roots`` are the real roots in k of the conditions (candidate end
    points); the interval between consecutive candidates is tested at its
    midpoint. More than one stable interval raises RuntimeError."""
    cands = []
    for r in roots:
        val = complex(sp.N(r.subs(c, c_value)))
        if abs(val.imag) < 1e-12:
            cands.append((val.real, r))
    cands.sort(key=lambda t: t[0])
    stable = []
    for (x0, r0), (x1, r1) in zip(cands[:-1], cands[1:]):
        if x1 - x0 < 1e-12:
            continue
        mid = 0.5 * (x0 + x1)
        if all(float(cond.subs({c: c_value, k: mid})) > 0 for cond in conds):
            stable.append((r0, r1))
    if len(stable) > 1:
        raise RuntimeError(f"more than one stable interval at c = {c_value}")
    return stable[0] if stable else None


@functools.lru_cache(maxsize=None)
def derive_ccf_inner_bound() -> InnerLoopBound:
    """Derive the exact range of the capacitor-current damping gain Hi for
    which the damping loop alone is stable (lossless filter, delay 1).

    The loop vi[k] = -Hi ic[k] applied one sample later closes around the
    pulse transfer function of :func:`derive_discrete_lossless` (lam = 1).
    Its characteristic polynomial, with c = cos(wr Ts) and
    k = Hi sin(wr Ts)/(wr L1), is derived here (it comes out as
    z^3 - 2c z^2 + (1 + k) z - k); the Jury conditions are then solved for
    k. Which roots bound the stable interval is decided by evaluating the
    conditions at sample values of c in each region and checking that the
    same symbolic roots bound it at every sample: 0 < k < 2c - 1 below
    fs/6, 2c - 1 < k < 0 between fs/6 and fs/4. (The plant's integrator
    pole z = 1 cancels against the zero of ic/vi and is not part of the
    damping loop.)

    References
    ----------
    .. [1] W. Pan, X. Ruan, C. Bao, W. Li and X. Wang, "Capacitor-Current-
       Feedback Active Damping With Reduced Computation Delay for Improving
       Robustness of LCL-Type Grid-Connected Inverter", IEEE Trans. Power
       Electron., vol. 29, no. 7, pp. 3414-3427, 2014 [from memory; the
       damping region below fs/6].
    .. [2] S. G. Parker, B. P. McGrath and D. G. Holmes, "Regions of Active
       Damping Control for LCL Filters", IEEE Trans. Ind. Appl., vol. 50,
       no. 1, pp. 424-432, 2014 [from memory].
    .. [3] E. I. Jury, "Theory and Application of the z-Transform Method",
       Wiley, 1964 [from memory].
    """
    d = derive_discrete_lossless()
    z = d.z
    Hi = sp.Symbol("H_i", real=True)
    c = sp.Symbol("c", real=True)
    k = sp.Symbol("k", real=True)
    theta = d.wr * d.Ts
    Gic = d.ic.subs(d.lam, 1)
    num, _ = sp.fraction(sp.together(1 + Hi * Gic))
    # normalised gain and c; then make the polynomial monic in z
    num = sp.expand(sp.expand(num).subs(Hi, k * d.wr * d.L1 / sp.sin(theta)))
    poly = sp.Poly(num, z)
    lead = poly.LC()
    coeffs = [sp.simplify(sp.expand(cf / lead)) for cf in poly.all_coeffs()]
    coeffs = [sp.simplify(cf.subs(sp.cos(theta), c)) for cf in coeffs]
    if any(cf.has(d.wr) or cf.has(d.Ts) for cf in coeffs):
        raise RuntimeError("characteristic polynomial not in terms of c and k alone")
    char_poly = sp.Poly(coeffs, z).as_expr()
    conds = jury_conditions(coeffs)
    roots = tuple(r for cond in conds for r in sp.solve(sp.Eq(cond, 0), k))

    def region(samples):
        found = [_stable_k_interval(conds, roots, k, c, sp.Rational(v)) for v in samples]
        if any(f is None for f in found):
            raise RuntimeError("empty stable range inside a region")
        first = found[0]
        if any(sp.simplify(f[0] - first[0]) != 0 or sp.simplify(f[1] - first[1]) != 0 for f in found):
            raise RuntimeError("the bounding roots change with c inside one region")
        return first

    k_below = region((Fraction(51, 100), Fraction(3, 5), Fraction(3, 4), Fraction(9, 10), Fraction(99, 100)))
    k_above = region((Fraction(1, 100), Fraction(1, 10), Fraction(1, 4), Fraction(2, 5), Fraction(49, 100)))
    to_hi = d.wr * d.L1 / sp.sin(theta)
    hi_below = tuple(sp.simplify((r * to_hi).subs(c, sp.cos(theta))) for r in k_below)
    hi_above = tuple(sp.simplify((r * to_hi).subs(c, sp.cos(theta))) for r in k_above)
    return InnerLoopBound(
        z, c, k, d.wr, d.Ts, d.L1, char_poly, tuple(conds), roots, k_below, k_above, hi_below, hi_above
    )


def ccf_inner_hi_range(L1_H: float, C_F: float, LT_H: float, Ts_s: float) -> tuple[float, float] | None:
    """Numeric range (Hi_low, Hi_high) [V/A] of capacitor-current damping
    gains that keep the damping loop alone stable (lossless filter, ZOH,
    one sample of delay), from the Jury conditions of
    :func:`derive_ccf_inner_bound` evaluated at this filter's c = cos(wr Ts).

    ``LT_H`` = L2 + Lg [H]. Below fs/6 the range is (0, Hi_max); above it
    the range holds negative gains; at fs/6 exactly it is empty (None).
    Valid for resonances below the Nyquist frequency."""
    b = derive_ccf_inner_bound()
    wr = float(np.sqrt((L1_H + LT_H) / (L1_H * LT_H * C_F)))
    theta = wr * Ts_s
    c_value = sp.Float(np.cos(theta), 30)
    rng = _stable_k_interval(b.conditions, b.k_roots, b.k, b.c, c_value)
    if rng is None:
        return None
    to_hi = float(wr * L1_H / np.sin(theta))
    lo, hi = (float(sp.N(r.subs(b.c, c_value))) * to_hi for r in rng)
    return lo, hi
