"""Choose the capacitor-current damping gain Hi [V/A] (and optionally Kp
[V/A]) with the most worst-case room over a grid-inductance range and the
tolerance corners.

Robustness of one loop is measured by the robustness index of
:func:`loopcheck.design.weakgrid.robustness_index`: the smallest of the margins
divided by their targets (phase margin / target, both gain margins in dB /
target, and the sensitivity-peak limit / peak when a limit is set), so an
index >= 1 meets every target and -inf marks an unstable loop. The
*worst-case* index of a gain is the minimum over the Lg samples (evenly
spaced over the range, plus the Lg where the nominal resonance crosses the
critical frequency) and over the nominal filter and every tolerance corner.

Method:

1. evaluate the worst-case index on an even grid of Hi over the search range
   (one batched evaluation of gains x corners x Lg);
2. the Hi intervals with worst-case index >= 1 meet the targets; each
   interior end is located by bisection (the binding term there, and its Lg
   and corner, are reported);
3. the recommended Hi maximises the worst-case index: bounded Brent search
   between the neighbours of the best grid point;
4. the recommendation is checked with the exact stable-interval scan
   (:func:`loopcheck.design.weakgrid.stable_lg_intervals`) for every corner; if
   that finds an instability between Lg samples, the offending Lg is added
   to the samples and the search repeated.

With ``also_kp`` the search runs over a (Kp, Hi) grid first and refines
Hi, then Kp, then Hi again around the best cell. Maximising robustness
alone favours a low Kp (slower loop), so Kp is kept inside a range
(default 0.5 to 2 times the case's Kp).

Pure computation; nothing prints.

References
----------
.. [1] R. P. Brent, "Algorithms for Minimization without Derivatives",
   Prentice-Hall, 1973, ch. 5 (the bounded one-dimensional search, as in
   scipy.optimize.minimize_scalar(method="bounded"); from memory).
.. [2] S. G. Parker, B. P. McGrath and D. G. Holmes, "Regions of Active
   Damping Control for LCL Filters", IEEE Trans. Ind. Appl., vol. 50, no. 1,
   pp. 424-432, 2014 (the critical frequency whose crossing is added to the
   Lg samples; from memory).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import numpy as np

from loopcheck.engine.model import Design
from loopcheck.design.tolerance import ComponentValues, ToleranceSpec, corner_values
from loopcheck.design.weakgrid import (
    TERMS,
    PointMargins,
    Targets,
    WorstPoint,
    _refine_worst,
    _split_c,
    binding_target,
    critical_crossing_lg,
    discrete_plants,
    evaluate_points,
    robustness_index,
    shortfalls,
    stable_lg_intervals,
)

__all__ = ["HiScan", "IntervalEnd", "PickResult", "default_hi_range", "pick_gain"]

Progress = Callable[[float], None]


@dataclass(frozen=True)
class IntervalEnd:
    """One end of an Hi interval that meets the targets.

    Hi_V_per_A [V/A]; side: ``"lower"`` or ``"upper"``; binding: what sets
    this end (a term of :data:`loopcheck.design.weakgrid.TERMS`, ``"stability"``,
    or ``"search range"`` when the interval runs into the end of the
    searched Hi range); Lg_H [H] and variant: where the binding term is
    smallest (None for the search range); value: that margin there (deg, dB
    or ratio, see ``text``); text: one line for people."""

    Hi_V_per_A: float
    side: str
    binding: str
    Lg_H: float | None
    variant: str | None
    text: str


@dataclass(frozen=True)
class HiScan:
    """Worst case over Lg and corners on the Hi grid (arrays of one length).

    Hi_V_per_A [V/A]; Kp_V_per_A [V/A] (scalar, the Kp of this scan);
    index: worst-case robustness index [-] (-inf where some sample is
    unstable); phase_margin_deg: worst-case phase margin [deg];
    gm_lower_room_db: smallest room for the gain to fall [dB] (positive);
    gm_upper_room_db: smallest room for the gain to rise [dB];
    sensitivity_peak: largest sensitivity peak [-]; all_stable: every sample
    stable; max_radius: largest closed-loop spectral radius [-]."""

    Hi_V_per_A: np.ndarray
    Kp_V_per_A: float
    index: np.ndarray
    phase_margin_deg: np.ndarray
    gm_lower_room_db: np.ndarray
    gm_upper_room_db: np.ndarray
    sensitivity_peak: np.ndarray
    all_stable: np.ndarray
    max_radius: np.ndarray


@dataclass(frozen=True)
class PickResult:
    """Result of :func:`pick_gain`.

    Hi_V_per_A: recommended damping gain [V/A] (None when no gain in the
    search range keeps every sample stable); Kp_V_per_A [V/A]: the
    proportional gain used (picked with ``also_kp``); index: its worst-case
    robustness index [-], refined in Lg; grid_index: the same on the Lg
    samples (what was maximised); meets_targets: index >= 1;
    Hi_interval_V_per_A: the Hi intervals meeting the targets
    [(from, to), ...] [V/A] (empty when none); ends: :class:`IntervalEnd`
    for each end; worst: the worst point at the recommendation;
    verified_stable: the exact Lg scan found every corner stable over the
    whole range at the recommendation; message: one paragraph for people;
    scan: :class:`HiScan` at the chosen Kp; Hi_range_V_per_A,
    Kp_range_V_per_A: searched ranges [V/A]; Lg_range_H [H]; Lg_samples_H:
    the Lg samples [H]; variants: labels of nominal + corners;
    zoomed: the scan is a finer second pass over part of the searched range,
    and every coarse sample outside it was unstable somewhere (so the gains
    beyond the scan's ends, within the searched range, are unstable
    somewhere too, to the coarse grid's resolution)."""

    Hi_V_per_A: float | None
    Kp_V_per_A: float
    index: float
    grid_index: float
    meets_targets: bool
    Hi_interval_V_per_A: tuple[tuple[float, float], ...]
    ends: tuple[IntervalEnd, ...]
    worst: WorstPoint | None
    verified_stable: bool
    message: str
    scan: HiScan
    targets: Targets
    Hi_range_V_per_A: tuple[float, float]
    Kp_range_V_per_A: tuple[float, float] | None
    Lg_range_H: tuple[float, float]
    Lg_samples_H: tuple[float, ...]
    variants: tuple[str, ...]
    zoomed: bool = False

    def to_dict(self) -> dict:
        """Plain dict of every field (arrays as nested lists; None for non-finite numbers)."""
        from loopcheck.engine.plain import plain

        return {f: plain(getattr(self, f)) for f in self.__dataclass_fields__}


def default_hi_range(design: Design, spec: ToleranceSpec | None = None) -> tuple[float, float]:
    """Symmetric Hi search range [V/A]: +-1.5 * 2*pi*f_crit * L1_min.

    The capacitor-current loop can only damp below the critical frequency
    f_crit = fs/(4*delay + 2) (or that of the damping filter,
    :func:`loopcheck.engine.damping_filter.damping_critical_hz`); its largest useful gain is of the order of
    L1*(w_crit^2 - w_r^2)/w_crit < w_crit*L1 (continuous-delay
    approximation of the inner-loop bound, derived), and negative gains
    damp resonances above f_crit. L1_min is L1 at its lowest tolerance."""
    L1 = design.filter.L1_H
    if spec is not None:
        for c in spec.components:
            if c.name == "L1":
                L1 *= 1.0 + c.low
    from loopcheck.engine.damping_filter import damping_critical_hz

    h = 1.5 * 2.0 * math.pi * damping_critical_hz(design) * L1
    return (-h, h)


def _variants(design: Design, spec: ToleranceSpec):
    labels, cv = corner_values(design, spec)
    nom = ComponentValues.nominal(design, (1,))
    fields = ("L1_H", "C_F", "L2_H", "R1_ohm", "R2_ohm", "Rd_ohm", "Cd_F", "Ld_H")
    allv = ComponentValues(*(np.concatenate([getattr(nom, a), getattr(cv, a)]) for a in fields))
    return ["nominal"] + labels, allv


class _Problem:
    """Worst case over (variant x Lg) samples for batches of (Hi, Kp)."""

    def __init__(self, design, values, names, Lg, targets):
        F = values.size
        self.design, self.targets, self.names = design, targets, names
        self.Lg_grid = Lg
        self.fam = np.repeat(np.arange(F), Lg.size)
        self.Lg = np.tile(Lg, F)
        self.vals = values.take(self.fam)
        self.values = values
        # the plants depend on the variant and Lg only: discretise them once
        self.plants = discrete_plants(design, self.Lg[None, :], self.vals.reshape((1, self.Lg.size)))

    def margins(self, Hi, Kp, progress=None) -> PointMargins:
        Hi = np.asarray(Hi, float).reshape(-1, 1)
        Kp = np.asarray(Kp, float).reshape(-1, 1)
        return evaluate_points(self.design, self.Lg[None, :], self.vals.reshape((1, self.Lg.size)), Hi, Kp,
                               progress=progress, plants=self.plants)

    def worst(self, Hi, Kp, progress=None):
        m = self.margins(Hi, Kp, progress)
        idx = robustness_index(m, self.targets)
        return idx.min(axis=1), m, idx

    def index_of(self, hi: float, kp: float) -> float:
        return float(self.worst([hi], [kp])[0][0])

    def where(self, p: int) -> tuple[float, str]:
        return float(self.Lg[p]), self.names[int(self.fam[p])]


def _scan_from(m: PointMargins, idx: np.ndarray, Hi: np.ndarray, kp: float) -> HiScan:
    with np.errstate(all="ignore"):
        pm = np.where(m.stable, m.phase_margin_deg, np.nan)
        gl = np.where(m.stable, -m.gm_lower_db, np.nan)
        gu = np.where(m.stable, m.gm_upper_db, np.nan)
        sp = np.where(m.stable, m.sensitivity_peak, np.nan)
    allst = np.all(m.stable, axis=1)

    def red(x, fn):
        return np.where(allst, fn(np.where(np.isnan(x), np.inf if fn is np.min else -np.inf, x), axis=1), np.nan)

    return HiScan(Hi, kp, idx.min(axis=1), red(pm, np.min), red(gl, np.min), red(gu, np.min), red(sp, np.max),
                  allst, m.spectral_radius.max(axis=1))


def _fmt_lg(lg: float) -> str:
    return f"{lg * 1e3:.4g} mH"


def _term_text(m1: PointMargins, term: str, t: Targets) -> str:
    if term == "phase margin":
        return f"phase margin {float(m1.phase_margin_deg):.1f} deg (target {t.phase_margin_deg:g} deg)"
    if term == "lower gain margin":
        return f"gain may fall {-float(m1.gm_lower_db):.2f} dB (target {t.gain_margin_db:g} dB)"
    if term == "upper gain margin":
        return f"gain may rise {float(m1.gm_upper_db):.2f} dB (target {t.gain_margin_db:g} dB)"
    if term == "sensitivity peak":
        return f"sensitivity peak {float(m1.sensitivity_peak):.3g} (limit {t.sensitivity_peak_max:.3g})"
    return f"closed-loop pole at |z| = {float(m1.spectral_radius):.4f}"


def _bisect_ends(prob: _Problem, a: np.ndarray, b: np.ndarray, kp: float, steps: int = 18):
    """Bisection of worst-case index >= 1 between a (meets) and b (misses), batched."""
    for _ in range(steps):
        mid = 0.5 * (a + b)
        w, _, _ = prob.worst(mid, np.full(mid.size, kp))
        ok = w >= 1.0
        a = np.where(ok, mid, a)
        b = np.where(ok, b, mid)
    return a


def _intervals(prob: _Problem, Hi: np.ndarray, idx_min: np.ndarray, kp: float, hi_range):
    """Feasible Hi intervals with refined ends and the binding term at each end."""
    ok = idx_min >= 1.0
    if not ok.any():
        return (), ()
    runs = []
    k = 0
    while k < ok.size:
        if ok[k]:
            j = k
            while j + 1 < ok.size and ok[j + 1]:
                j += 1
            runs.append((k, j))
            k = j + 1
        else:
            k += 1
    a_list, b_list, tags = [], [], []
    for r, (i, j) in enumerate(runs):
        if i > 0:
            a_list.append(Hi[i]); b_list.append(Hi[i - 1]); tags.append((r, "lower"))
        if j < Hi.size - 1:
            a_list.append(Hi[j]); b_list.append(Hi[j + 1]); tags.append((r, "upper"))
    ends_at = {}
    if a_list:
        refined = _bisect_ends(prob, np.array(a_list), np.array(b_list), kp)
        for (r, side), x in zip(tags, refined):
            ends_at[(r, side)] = float(x)
    intervals, ends = [], []
    t = prob.targets
    for r, (i, j) in enumerate(runs):
        lo = ends_at.get((r, "lower"), float(Hi[i]))
        hi = ends_at.get((r, "upper"), float(Hi[j]))
        intervals.append((lo, hi))
        for side, x in (("lower", lo), ("upper", hi)):
            at_limit = (r, side) not in ends_at
            if at_limit:
                ends.append(IntervalEnd(x, side, "search range", None, None,
                                        f"{side} end {x:.4g} V/A: end of the searched Hi range "
                                        f"{hi_range[0]:.4g}..{hi_range[1]:.4g} V/A (widen it with --hi-range)"))
                continue
            _, m, idx = prob.worst([x], [kp])
            p = int(np.argmin(idx[0]))
            m1 = m.take((0, p))
            term = str(binding_target(m1, t))
            lg, var = prob.where(p)
            ends.append(IntervalEnd(x, side, term, lg, var,
                                    f"{side} end {x:.4g} V/A: {_term_text(m1, term, t)} at Lg = {_fmt_lg(lg)} ({var})"))
    return tuple(intervals), tuple(ends)


def _maximise_hi(prob: _Problem, Hi: np.ndarray, idx_min: np.ndarray, kp: float) -> tuple[float, float]:
    """Bounded Brent search for the largest worst-case index near the best grid Hi."""
    from scipy.optimize import minimize_scalar

    i = int(np.argmax(idx_min))
    best_x, best_v = float(Hi[i]), float(idx_min[i])
    if not math.isfinite(best_v):
        return best_x, best_v
    a = float(Hi[max(i - 1, 0)])
    b = float(Hi[min(i + 1, Hi.size - 1)])
    if b > a:
        def obj(x):
            v = prob.index_of(x, kp)
            return -v if math.isfinite(v) else 1e300

        res = minimize_scalar(obj, bounds=(a, b), method="bounded",
                              options={"xatol": 1e-5 * (b - a), "maxiter": 40})
        if -res.fun > best_v:
            best_x, best_v = float(res.x), float(-res.fun)
    return best_x, best_v


def _maximise_kp(prob: _Problem, hi: float, Kp: np.ndarray, k: int) -> tuple[float, float]:
    from scipy.optimize import minimize_scalar

    a = math.log(Kp[max(k - 1, 0)])
    b = math.log(Kp[min(k + 1, Kp.size - 1)])
    best_x = float(Kp[k])
    best_v = prob.index_of(hi, best_x)
    if b > a:
        def obj(lk):
            v = prob.index_of(hi, math.exp(lk))
            return -v if math.isfinite(v) else 1e300

        res = minimize_scalar(obj, bounds=(a, b), method="bounded", options={"xatol": 1e-4, "maxiter": 30})
        if -res.fun > best_v:
            best_x, best_v = math.exp(float(res.x)), float(-res.fun)
    return best_x, best_v


def _zoom(Hi: np.ndarray, all_stable: np.ndarray, n: int) -> np.ndarray | None:
    """A finer Hi grid over the span of gains that were stable at every
    sample (one coarse step of slack on each side, within the searched
    range), or None when nothing was stable or the span is already the
    whole range."""
    k = np.nonzero(all_stable)[0]
    if k.size == 0:
        return None
    i, j = max(int(k[0]) - 1, 0), min(int(k[-1]) + 1, Hi.size - 1)
    if i == 0 and j == Hi.size - 1:
        return None
    return np.linspace(Hi[i], Hi[j], n)


def pick_gain(design: Design, Lg_range_H: tuple[float, float] | None = None, spec: ToleranceSpec | None = None,
              targets: Targets | None = None, *, hi_range: tuple[float, float] | None = None, n_hi: int = 61,
              n_lg: int = 21, also_kp: bool = False, kp_range: tuple[float, float] | None = None, n_kp: int = 7,
              progress: Progress | None = None) -> PickResult:
    """Pick the damping gain Hi [V/A] (and Kp [V/A] with ``also_kp``) that
    maximises the worst-case robustness index over ``Lg_range_H`` [H]
    (default: the case's range) and the tolerance corners of ``spec``.

    ``hi_range`` [V/A] defaults to :func:`default_hi_range`; ``n_hi`` and
    ``n_lg`` are the Hi grid and Lg sample counts; ``kp_range`` [V/A]
    defaults to 0.5..2 times the case's Kp, sampled at ``n_kp`` log-spaced
    values. See the module docstring for the method."""
    targets = targets or Targets()
    spec = spec or ToleranceSpec()
    if Lg_range_H is None:
        Lg_range_H = design.grid.Lg_range_H or (design.grid.Lg_H, design.grid.Lg_H)
    lo, hi = float(Lg_range_H[0]), float(Lg_range_H[1])
    hi_range = tuple(hi_range) if hi_range is not None else default_hi_range(design, spec)
    if not hi_range[1] > hi_range[0]:
        raise ValueError("the Hi search range must have from < to")
    kp0 = design.control.Kp_V_per_A
    if also_kp:
        kp_range = tuple(kp_range) if kp_range is not None else (0.5 * kp0, 2.0 * kp0)
        if not (kp_range[0] > 0 and kp_range[1] > kp_range[0]):
            raise ValueError("the Kp search range must satisfy 0 < from < to")
    else:
        kp_range = None
    names, values = _variants(design, spec)
    f = design.filter
    lg_star = critical_crossing_lg(f.L1_H, f.shunt_capacitance_F, f.L2_H, design.sampling.critical_hz)
    Lg = np.linspace(lo, hi, n_lg) if hi > lo else np.array([lo])
    if lg_star is not None and lo < lg_star < hi:
        Lg = np.unique(np.append(Lg, lg_star))
    Hi = np.linspace(hi_range[0], hi_range[1], n_hi)

    def sub(a, b):
        return None if progress is None else (lambda x: progress(a + (b - a) * x))

    for attempt in range(3):
        prob = _Problem(design, values, names, Lg, targets)
        if also_kp:
            # coarse (Kp, Hi) grid with every other Hi, then coordinate refinement
            Kp = np.geomspace(kp_range[0], kp_range[1], n_kp)
            Hc = Hi[::2]
            HH, KK = np.meshgrid(Hc, Kp, indexing="xy")  # [n_kp, n_hi/2]
            w, _, _ = prob.worst(HH.ravel(), KK.ravel(), progress=sub(0.0, 0.55))
            W = w.reshape(KK.shape)
            k, i = np.unravel_index(int(np.argmax(W)), W.shape)
            kp = float(Kp[k])
            h_best, v = _maximise_hi(prob, Hc, W[k], kp)
            if math.isfinite(v):
                kp, v = _maximise_kp(prob, h_best, Kp, int(k))
            Hs = Hi
            w_row, m_row, idx_row = prob.worst(Hs, np.full(Hs.size, kp), progress=sub(0.55, 0.65))
        else:
            kp = kp0
            Hs = Hi
            w_row, m_row, idx_row = prob.worst(Hs, np.full(Hs.size, kp), progress=sub(0.0, 0.45))
        # second pass on a finer grid over the gains that were stable everywhere
        Hz = _zoom(Hs, np.all(m_row.stable, axis=1), n_hi)
        zoomed = Hz is not None
        if Hz is not None:
            Hs = Hz
            w_row, m_row, idx_row = prob.worst(Hs, np.full(Hs.size, kp), progress=sub(0.65 if also_kp else 0.45, 0.75))
        h_best, v = _maximise_hi(prob, Hs, w_row, kp)
        scan = _scan_from(m_row, idx_row, Hs, kp)
        if not math.isfinite(v):
            break  # nothing stable at every sample
        scans = stable_lg_intervals(design, (lo, hi), values, h_best, kp,
                                    extra_points=[lg_star] if lg_star is not None else [], progress=sub(0.75, 0.85))
        bad = [s for s in scans if not s.fully_stable]
        if not bad:
            break
        add = [float(s.Lg_H[int(np.argmax(s.spectral_radius))]) for s in bad]
        Lg = np.unique(np.concatenate([Lg, add]))
    verified = math.isfinite(v) and not bad

    intervals, ends = _intervals(prob, Hs, w_row, kp, hi_range)
    if progress is not None:
        progress(0.92)

    worst = None
    if math.isfinite(v):
        _, m, idx = prob.worst([h_best], [kp])
        p = int(np.argmin(idx[0]))
        fam = int(prob.fam[p])
        v1 = values.take(slice(fam, fam + 1))
        # refine the worst Lg of the worst variant between Lg samples
        lgs = prob.Lg_grid
        fam_rows = np.nonzero(prob.fam == fam)[0]
        j = int(np.argmin(idx[0][fam_rows]))
        lg_w = _refine_worst(design, v1, h_best, kp, targets, lgs, j, False, lo, hi) if lgs.size > 1 else float(lgs[0])
        m1 = evaluate_points(design, np.array([lg_w]), v1, h_best, kp).take(0)
        ix = float(robustness_index(m1, targets))
        if ix > float(idx[0][p]):  # the sample itself is worse: keep it
            lg_w, m1, ix = float(prob.Lg[p]), m.take((0, p)), float(idx[0][p])
        from loopcheck.engine.model import resonance_hz

        fr = float(resonance_hz(v1.L1_H[0], v1.C_F[0] + _split_c(design, v1)[0], v1.L2_H[0] + lg_w))
        worst = WorstPoint(lg_w, names[fam], fr, m1, ix, str(binding_target(m1, targets)),
                           tuple(shortfalls(m1, targets)))
        index = min(ix, v)
    else:
        index = -math.inf

    meets = bool(intervals) and index >= 1.0 and verified
    message = _message(design, names, prob, targets, hi_range, lo, hi, h_best, kp, v, index, worst, verified,
                       intervals, scan)
    if progress is not None:
        progress(1.0)
    return PickResult(
        Hi_V_per_A=h_best if math.isfinite(v) else None,
        Kp_V_per_A=kp,
        index=index,
        grid_index=v,
        meets_targets=meets,
        Hi_interval_V_per_A=intervals,
        ends=ends,
        worst=worst,
        verified_stable=bool(verified),
        message=message,
        scan=scan,
        targets=targets,
        Hi_range_V_per_A=(float(hi_range[0]), float(hi_range[1])),
        Kp_range_V_per_A=None if kp_range is None else (float(kp_range[0]), float(kp_range[1])),
        Lg_range_H=(lo, hi),
        Lg_samples_H=tuple(float(x) for x in prob.Lg_grid),
        variants=tuple(names),
        zoomed=zoomed,
    )


def _message(design, names, prob, targets, hi_range, lo, hi, h_best, kp, v, index, worst, verified, intervals, scan):
    where_all = ((f"at every Lg in {_fmt_lg(lo)}..{_fmt_lg(hi)}" if hi > lo else f"at Lg = {_fmt_lg(lo)}")
                 + (f" and all {len(names) - 1} tolerance corners" if len(names) > 1 else ""))
    rng = f"{hi_range[0]:.4g}..{hi_range[1]:.4g} V/A"
    if not math.isfinite(v):
        k = int(np.argmin(scan.max_radius))
        h = float(scan.Hi_V_per_A[k])
        _, m, _ = prob.worst([h], [kp])
        p = int(np.argmax(m.spectral_radius[0]))
        lg, var = prob.where(p)
        return (f"No damping gain in {rng} keeps the loop stable {where_all}. The closest, Hi = {h:.4g} V/A, "
                f"is unstable at Lg = {_fmt_lg(lg)} ({var}): closed-loop pole at |z| = "
                f"{float(m.spectral_radius[0, p]):.4f}, ringing at {float(m.dominant_pole_hz[0, p]):.4g} Hz. "
                f"Change the filter, the sampling (delay) or Kp; see docs/weak-grid.md.")
    if not verified:
        return (f"Hi = {h_best:.4g} V/A is stable on the Lg samples but the exact scan found an instability between "
                f"them {where_all}; do not use it without review.")
    w = worst
    if intervals and index >= 1.0:
        return (f"Hi = {h_best:.4g} V/A (Kp = {kp:.4g} V/A) meets the targets {where_all}; worst-case robustness "
                f"index {index:.3f} (1 = on target), set by the {w.binding} at Lg = {_fmt_lg(w.Lg_H)} ({w.variant}).")
    misses = "; ".join(w.shortfalls) if w.shortfalls else f"{w.binding} just below target"
    return (f"No damping gain in {rng} meets the targets ({targets.describe()}) {where_all}. "
            f"The most robust, Hi = {h_best:.4g} V/A (Kp = {kp:.4g} V/A), is stable throughout but still misses: "
            f"{misses} at Lg = {_fmt_lg(w.Lg_H)} ({w.variant}).")
