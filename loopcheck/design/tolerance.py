"""Component tolerances: the ``[tolerance]`` table, corners, Monte Carlo
draws and the confidence interval of a failure fraction.

Conventions
-----------
* A tolerance is a band of relative deviations ``[low, high]`` (fractions,
  ``low <= 0 <= high``) around the nominal value of one component:
  ``"±10 %"`` is ``[-0.10, +0.10]``, ``"-20 %"`` is ``[-0.20, 0]`` (an
  inductor that loses inductance at high current), ``"+5 %"`` is
  ``[0, +0.05]``, ``"-20 % / +5 %"`` is ``[-0.20, +0.05]``. The component's
  value is ``nominal * (1 + deviation)``.
* Components that can carry a tolerance (key in the table -> design value):
  ``L1`` converter-side inductance [H], ``C`` filter capacitance [F],
  ``L2`` grid-side inductance [H] (without the grid), ``R1``, ``R2`` their
  series resistances [ohm], and for passive damping ``Rd`` [ohm], ``Cd`` [F],
  ``Ld`` [H]. The grid inductance has its own range (``[grid] Lg_range`` or
  ``scr_range``) and no tolerance.
* Distributions for Monte Carlo draws, per component:

  - ``"uniform"`` (default): every deviation in the band equally likely.
  - ``"normal"``: a normal distribution centred on the middle of the band
    with the band's half-width equal to **3 sigma**, truncated to the band
    (a part outside its stated tolerance is out of specification and taken
    as rejected by incoming inspection). For ``"±10 %"`` sigma is 3.33 %.

  The corners (see :func:`corner_factors`) use the band edges whatever the
  distribution.

Table syntax (all keys optional)::

    [tolerance]
    distribution = "uniform"        # default for every component below
    C = "±10 %"
    L1 = "-20 %"                     # saturation: only less inductance
    L2 = { band = "±5 %", distribution = "normal" }

Pure computation and table parsing; nothing prints. Parse errors raise
:class:`loopcheck.io.casefile.CaseError` with a one-line message naming the
file, table and key.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, replace

import numpy as np


__all__ = [
    "COMPONENTS",
    "DISTRIBUTIONS",
    "ComponentTolerance",
    "ComponentValues",
    "ToleranceSpec",
    "clopper_pearson_interval",
    "corner_factors",
    "corner_values",
    "draw_units",
    "parse_tolerance_table",
    "wilson_interval",
]

#: Table key -> (attribute of ComponentValues, what it is, SI unit).
COMPONENTS: dict[str, tuple[str, str, str]] = {
    "L1": ("L1_H", "converter-side inductance", "H"),
    "C": ("C_F", "filter capacitance", "F"),
    "L2": ("L2_H", "grid-side inductance", "H"),
    "R1": ("R1_ohm", "resistance of L1", "ohm"),
    "R2": ("R2_ohm", "resistance of L2", "ohm"),
    "Rd": ("Rd_ohm", "damping resistor", "ohm"),
    "Cd": ("Cd_F", "damping capacitor", "F"),
    "Ld": ("Ld_H", "damping inductor", "H"),
}
DISTRIBUTIONS = ("uniform", "normal")
#: Normal distribution: the tolerance band's half-width is this many sigma.
SIGMAS_PER_HALF_BAND = 3.0
#: Passive-damping components each damping kind uses.
_DAMPING_USES = {"none": (), "series-R": ("Rd",), "split-RC": ("Rd", "Cd"), "split-RLC": ("Rd", "Cd", "Ld")}


@dataclass(frozen=True)
class ComponentTolerance:
    """Tolerance of one component.

    name: table key (``"C"``, ``"L1"``, ...); low, high: relative deviation
    band as fractions [-] (``low <= 0 <= high``, low > -1);
    distribution: ``"uniform"`` or ``"normal"`` (3 sigma = half band,
    truncated to the band)."""

    name: str
    low: float
    high: float
    distribution: str = "uniform"

    @property
    def label(self) -> str:
        """Short text such as ``"C ±10 %"`` or ``"L1 -20 %/+0 %"``."""
        if self.low == -self.high:
            return f"{self.name} \u00b1{100 * self.high:g} %"
        return f"{self.name} {100 * self.low:+g} %/{100 * self.high:+g} %"


@dataclass(frozen=True)
class ToleranceSpec:
    """All component tolerances of a case (empty: no tolerances)."""

    components: tuple[ComponentTolerance, ...] = ()

    def __post_init__(self) -> None:
        names = [c.name for c in self.components]
        for n in names:
            if n not in COMPONENTS:
                raise ValueError(f"unknown component {n!r}; known: {', '.join(COMPONENTS)}")
        if len(set(names)) != len(names):
            raise ValueError(f"a component has two tolerances: {names}")

    def __bool__(self) -> bool:
        return bool(self.components)

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(c.name for c in self.components)


@dataclass(frozen=True)
class ComponentValues:
    """Component values of a set of filter variants (corners or drawn units).

    Every field is a numpy array of the same shape, one entry per variant:
    L1_H [H], C_F [F], L2_H [H] (grid-side inductor without the grid),
    R1_ohm, R2_ohm [ohm], Rd_ohm [ohm], Cd_F [F], Ld_H [H] (passive damping;
    zero when unused)."""

    L1_H: np.ndarray
    C_F: np.ndarray
    L2_H: np.ndarray
    R1_ohm: np.ndarray
    R2_ohm: np.ndarray
    Rd_ohm: np.ndarray
    Cd_F: np.ndarray
    Ld_H: np.ndarray

    @classmethod
    def nominal(cls, design, shape: tuple[int, ...] = (1,)) -> "ComponentValues":
        """The design's own values, repeated to ``shape``."""
        f = design.filter
        d = f.damping
        vals = (f.L1_H, f.C_F, f.L2_H, f.R1_ohm, f.R2_ohm, d.Rd_ohm, d.Cd_F, d.Ld_H)
        return cls(*(np.full(shape, float(v)) for v in vals))

    @property
    def shape(self) -> tuple[int, ...]:
        return self.L1_H.shape

    @property
    def size(self) -> int:
        return self.L1_H.size

    def take(self, index) -> "ComponentValues":
        """The variants at ``index`` (any numpy index)."""
        return ComponentValues(*(np.asarray(getattr(self, a))[index] for a in _FIELDS))

    def reshape(self, shape) -> "ComponentValues":
        return ComponentValues(*(np.reshape(getattr(self, a), shape) for a in _FIELDS))

    def scaled(self, factors: dict[str, np.ndarray]) -> "ComponentValues":
        """Multiply components by ``factors`` (table key -> array of 1 + deviation)."""
        changes = {COMPONENTS[k][0]: getattr(self, COMPONENTS[k][0]) * np.asarray(v, dtype=float) for k, v in factors.items()}
        return replace(self, **changes)


_FIELDS = ("L1_H", "C_F", "L2_H", "R1_ohm", "R2_ohm", "Rd_ohm", "Cd_F", "Ld_H")


# ---------------------------------------------------------------------------
# parsing
# ---------------------------------------------------------------------------


# ---------------------------------------------------------------------------
# corners and draws
# ---------------------------------------------------------------------------


def corner_factors(spec: ToleranceSpec) -> tuple[list[str], dict[str, np.ndarray]]:
    """All combinations of band edges (2^m corners for m one- or two-sided
    tolerances; one-sided bands contribute their non-zero edge and the
    nominal value).

    Returns ``(labels, factors)``: ``labels[k]`` describes corner k (e.g.
    ``"L1 -20 %, C +10 %"``), ``factors[name][k]`` is 1 + deviation [-]."""
    comps = spec.components
    if not comps:
        return [], {}
    edges = [(c.low, c.high) for c in comps]
    labels, cols = [], {c.name: [] for c in comps}
    for combo in itertools.product(*edges):
        labels.append(", ".join(f"{c.name} {100 * x:+g} %" for c, x in zip(comps, combo)))
        for c, x in zip(comps, combo):
            cols[c.name].append(1.0 + x)
    return labels, {k: np.array(v) for k, v in cols.items()}


def corner_values(design, spec: ToleranceSpec) -> tuple[list[str], ComponentValues]:
    """Component values at every corner of ``spec`` (see :func:`corner_factors`)."""
    labels, factors = corner_factors(spec)
    if not labels:
        return [], ComponentValues.nominal(design, (0,))
    base = ComponentValues.nominal(design, (len(labels),))
    return labels, base.scaled(factors)


def _draw_deviation(c: ComponentTolerance, n: int, rng: np.random.Generator) -> np.ndarray:
    """n relative deviations of one component [-] (see the module conventions)."""
    if c.distribution == "uniform":
        return rng.uniform(c.low, c.high, n)
    from scipy.special import ndtr, ndtri

    # normal, centred on the band, half-width = 3 sigma, truncated to the
    # band by inverse-CDF sampling (exact, vectorised, one uniform per unit)
    mid = 0.5 * (c.low + c.high)
    sigma = 0.5 * (c.high - c.low) / SIGMAS_PER_HALF_BAND
    lo, hi = ndtr(-SIGMAS_PER_HALF_BAND), ndtr(SIGMAS_PER_HALF_BAND)
    u = rng.uniform(lo, hi, n)
    return mid + sigma * ndtri(u)


def draw_units(design, spec: ToleranceSpec, n: int, rng: np.random.Generator) -> tuple[ComponentValues, dict[str, np.ndarray]]:
    """Draw ``n`` units: component values and the deviations drawn.

    Components are independent and drawn one after the other in the order
    of ``spec.components`` (the parser keeps the fixed order of
    :data:`COMPONENTS`, L1, C, L2, R1, R2, Rd, Cd, Ld, whatever the order of
    the keys in the file); ``rng`` (a seeded
    :class:`numpy.random.Generator`) makes the draw reproducible. Returns
    ``(values, deviations)`` with ``deviations[name]`` [-] per unit."""
    base = ComponentValues.nominal(design, (n,))
    dev = {c.name: _draw_deviation(c, n, rng) for c in spec.components}
    return base.scaled({k: 1.0 + v for k, v in dev.items()}), dev


# ---------------------------------------------------------------------------
# confidence interval of a fraction
# ---------------------------------------------------------------------------


def wilson_interval(k: int, n: int, confidence: float = 0.95) -> tuple[float, float]:
    """Wilson score interval of a binomial proportion k/n [-].

    p_hat = k/n, z = Phi^-1(1 - alpha/2); centre = (p_hat + z^2/(2n)) /
    (1 + z^2/n); half-width = z/(1 + z^2/n) * sqrt(p_hat(1-p_hat)/n +
    z^2/(4n^2)).

    References
    ----------
    .. [1] E. B. Wilson, "Probable inference, the law of succession, and
       statistical inference", J. Amer. Statist. Assoc., vol. 22, no. 158,
       pp. 209-212, 1927.
    """
    from scipy.special import ndtri

    _check_counts(k, n, confidence)
    z = float(ndtri(0.5 + 0.5 * confidence))
    p = k / n
    den = 1.0 + z * z / n
    centre = (p + z * z / (2 * n)) / den
    half = z / den * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    return max(0.0, centre - half), min(1.0, centre + half)


def clopper_pearson_interval(k: int, n: int, confidence: float = 0.95) -> tuple[float, float]:
    """Clopper-Pearson ("exact") interval of a binomial proportion k/n [-].

    lower = B^-1(alpha/2; k, n-k+1) (0 when k = 0), upper =
    B^-1(1-alpha/2; k+1, n-k) (1 when k = n), with B^-1 the inverse of the
    regularised incomplete beta function. Conservative: the coverage is at
    least the stated confidence, which suits a production sign-off.

    References
    ----------
    .. [1] C. J. Clopper and E. S. Pearson, "The use of confidence or
       fiducial limits illustrated in the case of the binomial",
       Biometrika, vol. 26, no. 4, pp. 404-413, 1934.
    """
    from scipy.special import betaincinv

    _check_counts(k, n, confidence)
    alpha = 1.0 - confidence
    lo = 0.0 if k == 0 else float(betaincinv(k, n - k + 1, alpha / 2))
    hi = 1.0 if k == n else float(betaincinv(k + 1, n - k, 1 - alpha / 2))
    return lo, hi


def _check_counts(k: int, n: int, confidence: float) -> None:
    if n <= 0 or not 0 <= k <= n:
        raise ValueError(f"need 0 <= k <= n and n > 0, got k={k}, n={n}")
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must lie strictly between 0 and 1, got {confidence}")
