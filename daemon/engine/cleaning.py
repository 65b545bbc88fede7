"""Per-device stream cleaning (DESIGN §3): from accepted readings to spreads of
volume over time in the bed's minute series.

Two cleaners share one contract: `feed(t, reading)` for a reading at effective
time t that is not a duplicate and not late, returning the final outcome of
every reading it settled (a held reading is settled by the one after it).
"""

from __future__ import annotations

import bisect
from collections import deque
from dataclasses import dataclass

from .decode import Reading
from .outcomes import Outcome
from .profiles import DeviceProfile
from .series import ESTIMATED, MEASURED, MinuteSeries

RATE_LOOKBACK_S = 1800.0  # flow before a bag change is judged over the last 30 min
JITTER_SHARE = 0.1  # interval meters: overlap up to this share of an interval is jitter

# Kinds of held reading: a rise beyond the maximum plausible flow, a large fall, a fall
# to near zero (an emptying if the next reading continues from it), and a reading back
# on the level before a recent jump or fall (that jump or fall was an artefact).
SPIKE, FALL, EMPTY, RETURN = "spike", "fall", "empty", "return"
# The outcomes of nearly every reading, as module names: Outcome.X is a slow lookup
# (the enum's metaclass defines __getattr__, so it is never cached)
_ACCEPTED, _NOISE_FALL = Outcome.ACCEPTED, Outcome.NOISE_FALL


@dataclass(slots=True)
class _Point:
    t: float
    raw: float
    fit: float = 0.0
    applied: float = 0.0  # increment currently spread over (previous point, t]
    marked: bool = False  # its interval's minutes are marked measured

    def copy(self) -> _Point:
        return _Point(self.t, self.raw, self.fit, self.applied, self.marked)


@dataclass(slots=True)
class _Provisional:
    """A jump or fall taken on one reading's word, kept undoable while the next few
    readings come in: if they go back to the level before it, it never happened."""

    t_before: float  # the last reading before it, and its fitted level
    level_before: float
    snapshot: tuple[object, ...]  # the cleaner's bag state before it
    spreads: list[tuple[float, float, float, int]]  # every spread since, to take back
    outcomes: list[tuple[float, Outcome]]  # readings counted since: (time, outcome)
    left: int  # readings still to come before it is final


def isotonic_fit(values: list[float], floor: float) -> list[float]:
    """Least-squares non-decreasing fit (pool adjacent violators), clipped at `floor`.

    Clipping the unconstrained fit is the exact solution with a lower bound.
    """
    # The block being built is kept in locals (s, c) and pushed once it stops pooling:
    # the same comparisons and additions as pooling it on the stack, in the same order
    # (ps * c > s * pc, then ps + s), so every fit is the same to the last bit.
    sums: list[float] = []
    counts: list[int] = []
    for v in values:
        s, c = v, 1
        while sums and sums[-1] * c > s * counts[-1]:
            s = sums.pop() + s
            c = counts.pop() + c
        sums.append(s)
        counts.append(c)
    out: list[float] = []
    for s, c in zip(sums, counts, strict=True):
        level = s if c == 1 else s / c
        level = level if level > floor else floor  # max(floor, level), without the call
        if c == 1:
            out.append(level)
        else:
            out.extend([level] * c)
    return out


class CumulativeCleaner:
    """Cumulative volume since the last bag change (also bag weight, once in mL).

    The newest readings form a short tail that is refitted monotone when a small
    fall (noise) arrives; readings older than the tail are final. A fall to near
    zero or a bag-change flag starts a new bag; the volume produced between the
    last reading before the change and the change, which no reading shows, is
    estimated from the flow before it. Implausible jumps and large falls are held
    until the next reading confirms or refutes them.
    """

    # slotted: a snapshot (snapshot.py) knows its fields from the class
    __slots__ = (
        "_fall_detect", "_max_flow_s", "_max_gap", "_min_dt", "_min_fall", "_near_zero",
        "_noise", "_provisional_n", "_reorder_tol", "_tail_len", "first", "floor_level",
        "floor_t", "held", "history", "last_change", "provisional", "revised", "series", "tail",
    )  # fmt: skip

    def __init__(self, profile: DeviceProfile, series: MinuteSeries) -> None:
        self.series = series
        p = profile
        self._tail_len = p.smoothing.points
        self._reorder_tol = float(p.timing.reorder_tolerance_s)
        self._max_gap = float(p.timing.max_interpolation_gap_s)
        self._min_dt = float(p.timing.period_s)
        self._max_flow_s = p.limits.max_flow_ml_h / 3600.0
        self._noise = p.bag_change.noise_fall_ml
        self._near_zero = p.bag_change.near_zero_ml
        self._min_fall = max(p.bag_change.min_fall_ml, p.bag_change.noise_fall_ml)
        self._fall_detect = p.bag_change.detect in ("fall", "both")
        self.floor_t: float | None = None  # last final point: time and fitted level
        self.floor_level = 0.0
        self.tail: list[_Point] = []
        self.history: deque[tuple[float, float]] = deque(maxlen=128)  # final (t, level)
        self.held: tuple[float, Reading, str] | None = None  # (t, reading, kind)
        self.provisional: _Provisional | None = None
        # readings counted earlier and now found to be artefacts: (time, old outcome);
        # the engine takes them with `take_revised()` and corrects its counts
        self.revised: list[tuple[float, Outcome]] = []
        self._provisional_n = max(3, p.smoothing.points)
        # the device's first reading, while no bag change has happened since: a
        # reading delayed past it can still become the baseline
        self.first: tuple[float, float] | None = None
        # the last bag change: (t_before, level_before, t_change, unseen, new_level),
        # so a reading of the old bag delayed past the change can refine the estimate
        self.last_change: tuple[float, float, float, float, float] | None = None

    # --- public --------------------------------------------------------------
    @property
    def last_t(self) -> float | None:
        return self.tail[-1].t if self.tail else self.floor_t

    def pending(self) -> int:
        return 1 if self.held else 0

    def take_revised(self) -> list[tuple[float, Outcome]]:
        out, self.revised = self.revised, []
        return out

    def feed(self, t: float, r: Reading) -> list[Outcome]:
        if self.floor_t is None:
            self._start_bag(t, r.volume_ml)
            self.first = (t, r.volume_ml)
            return [Outcome.BAG_CHANGE if r.bag_flag else Outcome.ACCEPTED]
        last_t = self.last_t
        assert last_t is not None
        if t < last_t:
            held = self.held
            if held is not None and held[2] == RETURN:
                # a reading back on the level before a jump or fall waits for the next
                # one to say the jump or fall never happened: it must stay undoable,
                # which matters more than a reading that predates it
                return [Outcome.LATE]
            self.provisional = None  # the tail changes under it: keep what is known
            return [self._insert(t, r)]
        held = self.held
        if held is not None and t < held[0]:
            return self._before_held(t, r)
        out: list[Outcome] = []
        if held is not None:
            out.append(self._settle_held(t, r))
        out.append(self._next(t, r))
        if self.provisional is not None:  # else nothing to count it against
            self._count(t, out[-1])
        return out

    def _before_held(self, t: float, r: Reading) -> list[Outcome]:
        """A reading older than the held one (reordered in transit): it is judged
        first, as if it had come first, and the held one after it. The held one's
        outcome, when final, comes first in the list (it settles an earlier message)."""
        assert self.held is not None
        th, h, _ = self.held
        self.held = None
        mine = self._next(t, r)
        if self.held is not None:  # this one is held in its turn: the newer one settles it
            mine = self._settle_held(th, h)
        else:
            self._count(t, mine)
        theirs = self._next(th, h)
        self._count(th, theirs)
        return [mine] if theirs is Outcome.SPIKE_HELD else [theirs, mine]

    # --- in-order path -------------------------------------------------------
    def _level(self) -> tuple[float, float]:
        if self.tail:
            return self.tail[-1].t, self.tail[-1].fit
        assert self.floor_t is not None
        return self.floor_t, self.floor_level

    def _next(self, t: float, r: Reading) -> Outcome:
        if r.bag_flag:  # the meter says so: believed at once, and final
            self.provisional = None
            self._bag_change(t, r.volume_ml)
            return Outcome.BAG_CHANGE
        last_t, level = self._level()
        v = r.volume_ml
        fall = level - v
        if fall > self._noise:
            kind = FALL
            if self._fall_detect and v <= self._near_zero and fall >= self._min_fall:
                kind = EMPTY  # an emptying if the next reading continues from here
        elif self._implausible(last_t, level, t, v):
            kind = SPIKE
        else:
            return self._append(t, v, last_t, level)
        if self._back_before(t, v):
            kind = RETURN
        self.held = (t, r, kind)
        return Outcome.SPIKE_HELD

    def _implausible(self, t0: float, v0: float, t1: float, v1: float) -> bool:
        dt = t1 - t0
        if dt < self._min_dt:  # max(), without the call
            dt = self._min_dt
        return (v1 - v0 - self._noise) > self._max_flow_s * dt

    def _continues(self, t0: float, v0: float, t1: float, v1: float) -> bool:
        """v1 at t1 follows v0 at t0 within the noise below and the flow limit above."""
        return v1 >= v0 - self._noise and not self._implausible(t0, v0, t1, v1)

    def _back_before(self, t: float, v: float) -> bool:
        """Is v at t back on the level before a jump or fall still provisional?"""
        pv = self.provisional
        return pv is not None and self._continues(pv.t_before, pv.level_before, t, v)

    def _settle_held(self, t: float, r: Reading) -> Outcome:
        """The reading after a held one decides it: the same new level confirms it,
        anything else makes it an artefact."""
        assert self.held is not None
        th, h, kind = self.held
        self.held = None
        confirms = not r.bag_flag and self._continues(th, h.volume_ml, t, r.volume_ml)
        if kind == RETURN:
            if not confirms:
                return Outcome.ARTEFACT_DROPPED
            self._revert()  # the jump or fall before it never happened
            self._append(th, h.volume_ml, *self._level())
            return Outcome.ACCEPTED
        before = self._level()
        snapshot = self._snapshot()
        if kind in (FALL, EMPTY):
            confirms = confirms and r.volume_ml < before[1] - self._noise
            if not confirms:
                return Outcome.ARTEFACT_DROPPED
            self._provisional(before, snapshot)
            # near zero: an emptying; higher: part of the bag was taken (a sample, a
            # partial drain), so only the baseline moves
            self._bag_change(th, h.volume_ml, emptied=h.volume_ml <= self._near_zero)
            out = Outcome.BAG_CHANGE if kind == EMPTY else Outcome.BAG_CHANGE_INFERRED
        elif confirms:
            self._provisional(before, snapshot)
            self._append(th, h.volume_ml, *before)
            out = Outcome.SPIKE_CONFIRMED
        else:
            return Outcome.ARTEFACT_DROPPED
        assert self.provisional is not None
        self.provisional.outcomes.append((th, out))
        return out

    # --- provisional jumps and falls -------------------------------------------
    def _snapshot(self) -> tuple[object, ...]:
        return (self.floor_t, self.floor_level, [p.copy() for p in self.tail],
                list(self.history), self.first, self.last_change)  # fmt: skip

    def _provisional(self, before: tuple[float, float], snapshot: tuple[object, ...]) -> None:
        self.provisional = _Provisional(before[0], before[1], snapshot, [], [],
                                        self._provisional_n)  # fmt: skip

    def _count(self, t: float, outcome: Outcome) -> None:
        """A reading settled while a jump or fall is provisional: remember it, and let
        the jump or fall become final after enough readings."""
        pv = self.provisional
        if pv is None or outcome is Outcome.SPIKE_HELD:
            return
        if outcome is not Outcome.ARTEFACT_DROPPED:
            pv.outcomes.append((t, outcome))
        pv.left -= 1
        if pv.left <= 0 and self.held is None:
            self.provisional = None

    def _revert(self) -> None:
        """Take back a provisional jump or fall and every reading counted since."""
        pv = self.provisional
        assert pv is not None
        self.provisional = None
        for t0, t1, volume, state in reversed(pv.spreads):
            self.series.spread(t0, t1, -volume, state)
        floor_t, floor_level, tail, history, first, last_change = pv.snapshot
        self.floor_t, self.floor_level = floor_t, floor_level  # type: ignore[assignment]
        self.tail = tail  # type: ignore[assignment]
        self.history.clear()
        self.history.extend(history)  # type: ignore[arg-type]
        self.first, self.last_change = first, last_change  # type: ignore[assignment]
        self.revised.extend(pv.outcomes)

    def _put(self, t0: float, t1: float, volume: float, state: int) -> None:
        """Every spread of this cleaner: undoable while a jump or fall is provisional."""
        self.series.spread(t0, t1, volume, state)
        if self.provisional is not None:
            self.provisional.spreads.append((t0, t1, volume, state))

    def _append(self, t: float, v: float, prev_t: float, level: float) -> Outcome:
        """A reading after the newest, at or above it less the noise allowance;
        (prev_t, level) is the newest point, as `_level()` gives it."""
        if v >= level:  # common case: nothing earlier changes (_spread, inlined)
            self.tail.append(_Point(t, v, v, v - level, True))
            state = MEASURED if t - prev_t <= self._max_gap else ESTIMATED
            self._put(prev_t, t, v - level, state)
            outcome = _ACCEPTED
        else:
            self.tail.append(_Point(t, v))
            self._refit()
            outcome = _NOISE_FALL
        if len(self.tail) > self._tail_len:
            self._freeze()
        return outcome

    # --- tail maintenance ------------------------------------------------------
    def _spread(self, t0: float, t1: float, volume: float) -> None:
        # zero volume still marks the minutes measured: no flow is a measurement
        state = MEASURED if t1 - t0 <= self._max_gap else ESTIMATED
        self._put(t0, t1, volume, state)

    def _refit(self) -> None:
        fits = isotonic_fit([p.raw for p in self.tail], self.floor_level)
        prev_t, prev_fit = self.floor_t, self.floor_level
        assert prev_t is not None
        for p, f in zip(self.tail, fits, strict=True):
            p.fit = f
            inc = f - prev_fit
            if inc != p.applied or not p.marked:  # a zero increment is still measured
                self._spread(prev_t, p.t, inc - p.applied)
                p.applied = inc
                p.marked = True
            prev_t, prev_fit = p.t, f

    def _freeze(self) -> None:
        newest = self.tail[-1].t
        while len(self.tail) > self._tail_len and newest - self.tail[0].t > self._reorder_tol:
            p = self.tail.pop(0)
            self.floor_t, self.floor_level = p.t, p.fit
            self.history.append((p.t, p.fit))

    def _insert(self, t: float, r: Reading) -> Outcome:
        """A reading older than the newest one but within the reorder tolerance."""
        assert self.floor_t is not None
        if r.bag_flag:
            return Outcome.LATE  # a past bag change cannot be replayed into a later bag
        if self.first is not None and t < self.first[0]:
            return self._before_first(t, r.volume_ml)
        if self.last_change is not None and self.last_change[0] < t < self.last_change[2]:
            return self._before_change(t, r.volume_ml)
        if t <= self.floor_t:
            return Outcome.LATE  # before a reading that is already final
        i = next(k for k, p in enumerate(self.tail) if p.t > t)
        lo = self.tail[i - 1].fit if i > 0 else self.floor_level
        hi = self.tail[i].raw
        if not (lo - self._noise <= r.volume_ml <= hi + self._noise):
            return Outcome.ARTEFACT_DROPPED
        prev_t = self.floor_t
        for p in self.tail:  # undo the tail's spreads, whose intervals change
            self._spread(prev_t, p.t, -p.applied)
            p.applied = 0.0
            p.marked = False
            prev_t = p.t
        self.tail.insert(i, _Point(t, r.volume_ml))
        self._refit()
        return Outcome.REORDERED

    def _before_first(self, t: float, v: float) -> Outcome:
        """Delayed past the device's first reading: it becomes the baseline."""
        assert self.first is not None
        t1, v1 = self.first
        if v > v1 + self._noise:
            return Outcome.ARTEFACT_DROPPED
        self._spread(t, t1, max(0.0, v1 - v))
        self.first = (t, v)
        return Outcome.REORDERED

    def _before_change(self, t: float, v: float) -> Outcome:
        """A reading of the old bag, delayed past the bag change: it measures part
        of what the bag-change estimate guessed."""
        assert self.last_change is not None
        t_a, level_a, t_c, unseen, new_level = self.last_change
        if v < level_a - self._noise:
            return Outcome.ARTEFACT_DROPPED
        measured = max(0.0, v - level_a)
        self._put(t_a, t_c, -unseen, ESTIMATED)  # take the old estimate back
        self._spread(t_a, t, measured)
        rate = self._flow_between(t_a, level_a, t, v)
        rest = new_level if rate is None else max(new_level, rate * (t_c - t))
        self._put(t, t_c, rest, ESTIMATED)
        self.last_change = (t, v, t_c, rest, new_level)
        return Outcome.REORDERED

    # --- bags ----------------------------------------------------------------
    def _start_bag(self, t: float, level: float) -> None:
        self.floor_t, self.floor_level = t, level
        self.tail.clear()
        self.history.clear()
        self.history.append((t, level))

    def _flow_before(self) -> float | None:
        """mL/s over the last RATE_LOOKBACK_S of the current bag, or None if too short."""
        pts = list(self.history) + [(p.t, p.fit) for p in self.tail]
        t_end, v_end = pts[-1]
        start = next(((t, v) for t, v in pts if t >= t_end - RATE_LOOKBACK_S), pts[0])
        if t_end - start[0] < self._min_dt:
            return None
        return max(0.0, (v_end - start[1]) / (t_end - start[0]))

    def _flow_between(self, t0: float, v0: float, t1: float, v1: float) -> float | None:
        return None if t1 - t0 < self._min_dt else max(0.0, (v1 - v0) / (t1 - t0))

    def _bag_change(self, t: float, new_level: float, emptied: bool = True) -> None:
        """A new bag starts at t with `new_level`. The volume produced since the last
        reading, which no reading shows, is estimated from the flow before it; when
        the bag was emptied, the new level is all new output, so at least that."""
        t_a, level_a = self._level()
        rate = self._flow_before()
        guess = 0.0 if rate is None else rate * (t - t_a)
        unseen = max(new_level, guess) if emptied else guess
        self._put(t_a, t, unseen, ESTIMATED)
        self._start_bag(t, new_level)
        self.first = None
        self.last_change = (t_a, level_a, t, unseen, new_level)


class IntervalCleaner:
    """Each reading is the volume produced in (t - interval, t]; order does not
    matter, overlap does: an interval overlapping an accepted one is refused."""

    __slots__ = ("_ends", "_interval", "_max_flow_s", "last_t", "series")

    def __init__(self, profile: DeviceProfile, series: MinuteSeries) -> None:
        self.series = series
        assert profile.volume.interval_s is not None
        self._interval = float(profile.volume.interval_s)
        self._max_flow_s = profile.limits.max_flow_ml_h / 3600.0
        self._ends: list[float] = []  # accepted interval ends, sorted
        self.last_t: float | None = None

    def pending(self) -> int:
        return 0

    def feed(self, t: float, r: Reading) -> list[Outcome]:
        if r.volume_ml > self._max_flow_s * self._interval:
            return [Outcome.IMPLAUSIBLE_FLOW]
        ends = self._ends
        i = bisect.bisect_left(ends, t)
        start = t - self._interval
        # A little overlap is clock jitter (and second-truncated stamps): the volume
        # is kept and placed after the earlier interval. More is a second report of
        # the same urine.
        slack = max(1.0, JITTER_SHARE * self._interval)
        if i < len(ends) and ends[i] - t < self._interval - slack:
            return [Outcome.CONFLICTING_DUPLICATE]
        if i > 0 and ends[i - 1] > start:
            if ends[i - 1] - start > slack:
                return [Outcome.CONFLICTING_DUPLICATE]
            start = ends[i - 1]
        ends.insert(i, t)
        if len(ends) > 4096:
            del ends[:2048]
        out = Outcome.ACCEPTED
        if self.last_t is not None and t < self.last_t:
            out = Outcome.REORDERED
        else:
            self.last_t = t
        self.series.spread(start, t, r.volume_ml, MEASURED)
        return [out]


Cleaner = CumulativeCleaner | IntervalCleaner
