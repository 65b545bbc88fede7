"""What the engine knows of one bed besides its minute series: context and
clinical inputs, kept short enough for the longest rule window."""

from __future__ import annotations

import bisect
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

from .context import DRAINS_RESIDUAL, BedContext

if TYPE_CHECKING:
    from .effects import AdviceIssued
from .series import MinuteSeries

KEEP_S = 3 * 86400.0  # clinical inputs older than this are forgotten


@dataclass(frozen=True, slots=True)
class Vitals:
    time: float
    heart_rate: float | None
    systolic: float | None
    diastolic: float | None
    mean: float | None


@dataclass(slots=True)
class BedState:
    bed_id: str
    context: BedContext
    series: MinuteSeries
    bound_at: float
    intake_times: list[float] = field(default_factory=list)  # sorted
    intake_ml: list[float] = field(default_factory=list)
    vitals: list[Vitals] = field(default_factory=list)  # sorted by time
    labs: dict[str, list[tuple[float, float]]] = field(default_factory=dict)  # analyte -> (t, v)
    last_eval_minute: int | None = None
    notices: set[str] = field(default_factory=set)
    quiet_until: dict[str, int] = field(default_factory=dict)  # rule id -> minute
    quiet_floor: int = -1  # no rule needs a reading before windows end after this minute
    # rule id -> when a rule on inputs alone, last found false, may next change
    # without an input (see Evaluator.run)
    input_due: dict[str, float] = field(default_factory=dict)
    # rule id -> when a rule armed by episode markers is next armed or disarmed
    arm_due: dict[str, float] = field(default_factory=dict)
    last_advice: AdviceIssued | None = None
    last_advice_hour: int | None = None  # clock-hour index the advice was computed from
    # minute ranges [lo, hi) in which what drained was the bladder's retained content
    residual: tuple[tuple[int, int], ...] = ()
    # episode markers by name -> their times (epoch s), from the context
    markers: dict[str, tuple[float, ...]] = field(default_factory=dict)

    def set_context(self, ctx: BedContext) -> None:
        self.context = ctx
        spans: list[tuple[int, int]] = []
        marks: dict[str, list[float]] = {}
        for e in ctx.episodes:
            t = e.at.timestamp()
            marks.setdefault(e.marker, []).append(t)
            if e.kind in DRAINS_RESIDUAL and e.residual_drain_min > 0:
                lo = int(t // 60)
                spans.append((lo, lo + e.residual_drain_min))
        self.residual = tuple(sorted(spans))
        self.markers = {k: tuple(sorted(v)) for k, v in marks.items()}

    def forget_quiet(self) -> None:
        """Readings moved volume in a way no quiet proof allowed for, or a meter spoke
        for the first time on the bed: re-check all."""
        self.quiet_until.clear()
        self.input_due.clear()
        self.quiet_floor = -1

    def add_intake(self, t: float, ml: float, now: float) -> None:
        """Fluid given at t, received at `now`. History is pruned by the receive time,
        never by a value's own time (a mistyped date must not push the rest out)."""
        i = bisect.bisect_right(self.intake_times, t)
        self.intake_times.insert(i, t)
        self.intake_ml.insert(i, ml)
        if self.intake_times[0] < now - KEEP_S:
            k = bisect.bisect_left(self.intake_times, now - KEEP_S)
            del self.intake_times[:k], self.intake_ml[:k]

    def intake_between(self, t0: float, t1: float) -> float:
        """Fluid documented with a time in [t0, t1)."""
        lo = bisect.bisect_left(self.intake_times, t0)
        hi = bisect.bisect_left(self.intake_times, t1)
        return float(sum(self.intake_ml[lo:hi]))

    def add_vitals(self, v: Vitals) -> None:
        times = [x.time for x in self.vitals]
        self.vitals.insert(bisect.bisect_right(times, v.time), v)
        if len(self.vitals) > 512:
            del self.vitals[:256]

    def latest_vitals(self, now: float, max_age_s: float) -> Vitals | None:
        for v in reversed(self.vitals):
            if v.time <= now:
                return v if now - v.time <= max_age_s else None
        return None

    def add_lab(self, analyte: str, t: float, value: float, now: float) -> None:
        """A result taken at t, received at `now`; pruned by the receive time."""
        series = self.labs.setdefault(analyte, [])
        bisect.insort(series, (t, value))
        while series and series[0][0] < now - KEEP_S:
            series.pop(0)

    def latest_lab(self, analyte: str, now: float) -> tuple[float, float] | None:
        """The newest (time, value) of `analyte` taken at or before `now`."""
        for t, v in reversed(self.labs.get(analyte, ())):
            if t <= now:
                return t, v
        return None
