"""The ``[scenario]`` table of a case file: what ``loopcheck simulate`` runs.

Every key is optional; a case without ``[scenario]`` simulates the design in
its periodic steady state for 60 ms with a resonance burst at 20 ms.

Keys of ``[scenario]``
----------------------
``duration``            simulated time, e.g. ``"60 ms"`` (default 60 ms)
``points_per_sample``   output points per sampling period, whole number
                        1..200 (default 20)
``start``               ``"steady"`` (default): the periodic steady state of
                        the loop under the grid voltage and the reference;
                        ``"rest"``: every state zero at t = 0
``phases``              1 or 3: how ``[grid] V`` and ``S`` are read for the
                        defaults below (default: from ``[pwm] scheme`` when
                        given, else 3)
``grid_peak``           peak of the fundamental grid phase voltage, e.g.
                        ``"325 V"``; default sqrt(2/3) times ``[grid] V``
                        (line-to-line rms) for three phases, sqrt(2) times
                        ``V`` for one; 0 V when ``V`` is not given
``grid_phase_deg``      phase of the grid voltage at t = 0 [deg] (default 0)
``grid_harmonics``      list of inline tables ``{order = 5, share = "3 %",
                        phase_deg = 0}``: a grid-voltage harmonic of that
                        order with that share of ``grid_peak``
``reference_peak``      peak of the sinusoidal current reference, e.g.
                        ``"20 A"``; default the rated peak current
                        sqrt(2) * S / (sqrt(3) * V) from ``[grid]`` (three
                        phases) or sqrt(2) * S / V (one phase), 0 A when S
                        or V is missing
``reference_phase_deg`` reference phase relative to the grid voltage [deg]
                        (default 0: in phase, unity power factor)
``trip_current``        the simulation stops when any current exceeds this
                        peak (the protection would trip), e.g. ``"200 A"``;
                        default 5 times the largest reference peak, at
                        least 10 A

Events: ``[[scenario.events]]``, each with ``at`` (a time, rounded to the
nearest sampling instant) and ``kind``:

``"reference-step"``        ``peak`` (current) and/or ``phase_deg``: the
                            reference changes to these values
``"grid-voltage-step"``     ``peak`` (voltage): new fundamental peak of
                            the grid voltage (harmonics unchanged)
``"grid-phase-jump"``       ``by_deg``: the grid voltage jumps by this angle
                            (each harmonic by order times the angle)
``"grid-inductance-step"``  ``Lg`` (inductance): the grid inductance changes;
                            every current and voltage of the filter is kept
                            (the grid-side current stays continuous)
``"resonance-burst"``       ``peak`` (voltage; default 5 % of the grid
                            peak, 10 V without grid voltage), ``cycles``
                            (whole number, default 3), ``frequency`` (default the LCL
                            resonance with the grid inductance of that
                            moment): a sinusoidal burst added to the
                            converter voltage, starting at ``at`` and
                            ending at the sampling instant nearest to
                            ``cycles`` periods later
``"voltage-pulse"``         ``peak`` (voltage, default as for the burst), ``width`` (time, default one
                            sampling period, rounded to whole periods): a
                            rectangular pulse added to the converter voltage

The same events can be given on the command line as
``--event "resonance-burst at=20ms peak=15V"`` (key=value words, no blanks
inside a value).

Pure parsing into frozen dataclasses, SI units inside; bad input raises
:class:`loopcheck.io.casefile.CaseError` with a one-line message naming the file,
the table and the key. Nothing here imports numpy.
"""

from __future__ import annotations

from dataclasses import dataclass, field


EVENT_KINDS = (
    "reference-step",
    "grid-voltage-step",
    "grid-phase-jump",
    "grid-inductance-step",
    "resonance-burst",
    "voltage-pulse",
)
#: Events that add a voltage to the converter output (used to excite the resonance).
INJECTION_KINDS = ("resonance-burst", "voltage-pulse")

SCENARIO_KEYS = (
    "duration",
    "phases",
    "points_per_sample",
    "start",
    "grid_peak",
    "grid_phase_deg",
    "grid_harmonics",
    "reference_peak",
    "reference_phase_deg",
    "trip_current",
    "events",
)

_EVENT_KEYS = {
    "reference-step": ("peak", "phase_deg"),
    "grid-voltage-step": ("peak",),
    "grid-phase-jump": ("by_deg",),
    "grid-inductance-step": ("Lg",),
    "resonance-burst": ("peak", "cycles", "frequency"),
    "voltage-pulse": ("peak", "width"),
}

DEFAULT_DURATION_S = 0.06
DEFAULT_POINTS = 20
DEFAULT_BURST_AT_S = 0.02


@dataclass(frozen=True)
class GridHarmonic:
    """A grid-voltage harmonic: ``order`` (whole number >= 2), ``share`` of
    the fundamental peak [-] and ``phase_deg`` at t = 0 [deg]."""

    order: int
    share: float
    phase_deg: float = 0.0


@dataclass(frozen=True)
class Event:
    """A scenario event at ``time_s`` [s] (rounded to a sampling instant by
    the simulator).

    kind: one of :data:`EVENT_KINDS`. Fields used by each kind:
    reference-step: ``peak_A`` [A] and/or ``phase_deg`` [deg] (None = keep);
    grid-voltage-step: ``peak_V`` [V]; grid-phase-jump: ``angle_deg`` [deg];
    grid-inductance-step: ``Lg_H`` [H]; resonance-burst: ``peak_V`` [V],
    ``cycles`` [-], ``frequency_hz`` [Hz] (None = the LCL resonance);
    voltage-pulse: ``peak_V`` [V], ``width_s`` [s] (None = one period)."""

    time_s: float
    kind: str
    peak_A: float | None = None
    peak_V: float | None = None
    phase_deg: float | None = None
    angle_deg: float | None = None
    Lg_H: float | None = None
    cycles: int = 3
    frequency_hz: float | None = None
    width_s: float | None = None

    def describe(self) -> str:
        """Short text for figures and printouts, e.g. ``"Lg -> 3 mH"``."""
        k = self.kind
        if k == "reference-step":
            parts = []
            if self.peak_A is not None:
                parts.append(f"{self.peak_A:.4g} A")
            if self.phase_deg is not None:
                parts.append(f"{self.phase_deg:.4g} deg")
            return "reference -> " + ", ".join(parts)
        if k == "grid-voltage-step":
            return f"grid voltage -> {self.peak_V:.4g} V peak"
        if k == "grid-phase-jump":
            return f"grid phase jump {self.angle_deg:+.4g} deg"
        if k == "grid-inductance-step":
            return f"Lg -> {self.Lg_H * 1e3:.4g} mH"
        peak = "default peak" if self.peak_V is None else f"{self.peak_V:.4g} V"
        if k == "resonance-burst":
            f = "the resonance" if self.frequency_hz is None else f"{self.frequency_hz:.5g} Hz"
            return f"burst {peak} at {f}, {self.cycles} cycles"
        return f"voltage pulse {peak}"


@dataclass(frozen=True)
class Scenario:
    """What to simulate (SI units; None means "derive from the design").

    duration_s [s]; points_per_sample: output points per sampling period;
    start: "steady" or "rest"; grid_peak_V [V] (fundamental phase-voltage
    peak); grid_phase_deg [deg]; grid_harmonics; reference_peak_A [A];
    reference_phase_deg [deg] (relative to the grid voltage); trip_current_A
    [A] (None = automatic, inf = never); events (sorted by time);
    phases: 1 or 3 (None = 3) for the defaults taken from the grid rating."""

    duration_s: float = DEFAULT_DURATION_S
    points_per_sample: int = DEFAULT_POINTS
    start: str = "steady"
    grid_peak_V: float | None = None
    grid_phase_deg: float = 0.0
    grid_harmonics: tuple[GridHarmonic, ...] = ()
    reference_peak_A: float | None = None
    reference_phase_deg: float = 0.0
    trip_current_A: float | None = None
    events: tuple[Event, ...] = field(default_factory=tuple)
    phases: int | None = None

    @property
    def injections(self) -> tuple[Event, ...]:
        """The events that add a voltage to the converter output."""
        return tuple(e for e in self.events if e.kind in INJECTION_KINDS)


def default_scenario() -> Scenario:
    """Steady state for 60 ms with a 3-cycle resonance burst at 20 ms whose
    peak is chosen by the simulator (5 % of the grid peak, 10 V without
    grid voltage)."""
    return Scenario(events=(Event(DEFAULT_BURST_AT_S, "resonance-burst"),))


#: Plausibility ranges of event values (errors beyond; docs/case-file.md).
EVENT_MAX_V = 1e6
EVENT_MAX_A = 1e6
EVENT_MAX_LG_H = 10.0
EVENT_FREQUENCY_HZ = (1.0, 10e6)


def _with_events(sc: Scenario, extra: tuple) -> Scenario:
    from dataclasses import replace

    events = tuple(sorted(sc.events + extra, key=lambda e: e.time_s))
    return replace(sc, events=events)
