"""Sanity warnings: signs that a meter's PROFILE is wrong, not the patient.

Two easy profile mistakes look like a sick patient: a litre meter declared in mL shows
output near zero with every minute measured (it reads as anuria), and an epoch-seconds
meter declared in milliseconds dates its readings in January 1970 (every reading late).
The low-output rules stay as they are; these warnings tell the engineer that it is the
profile, and which key to check. They never reject a reading and never page anyone.

Pure: fed by the engine with receive times and readings; warnings are plain data.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from .numbers import num
from .outcomes import Outcome
from .profiles import DeviceProfile, Semantics, TimeFormat
from .timefmt import iso

# Checked over tumbling spans of this much reading time: "for hours". A litre meter read
# as mL is caught well before the 6-h KDIGO window or the 12-h anuria window could fire.
SPAN_S = 3 * 3600.0
# A span counts only with readings arriving: at least this share of the expected ones.
ARRIVING = 0.5
# Implied flow below this, on a series that rises steadily, is a scale mistake far more
# often than a kidney. 1 mL/h is 24 mL a day, under half the lowest textbook bound for
# anuria (50-100 mL/day: CLINICAL-REFERENCE.md section 3, common practice, no single
# source); a real output that low barely moves a meter, it does not climb every reading.
LOW_FLOW_ML_H = 1.0
# "Steadily": at most this share of the steps are falls (noise around a still bag falls
# about as often as it rises). Ours, no clinical source.
FALLS_MAX = 0.1
MIN_STEPS = 10  # steps in a span before its flow is judged (ours)
# A meter's steps are whole multiples of its resolution; steps twenty times finer than
# the declared resolution mean the values are scaled wrong (a cL, dL or L meter read as
# mL gives steps 10, 100 or 1000 times finer) or the resolution is. Ours, no source.
FINER_THAN = 20.0
MIN_NONZERO = 20  # nonzero steps before their size is judged (ours)
# Device times this far from the receive time are not a drifting clock but a wrong epoch
# unit (seconds read as milliseconds land in January 1970) or an unset clock: "years
# away". 365 days, ours.
FAR_S = 365.0 * 86400.0
FAR_RUN = 3  # consecutive readings that far off before warning (and back before clearing)
# Every reading late for this many readings AND this many reporting periods of receive
# time: a store-and-forward burst arrives within seconds, a wrong clock for every reading.
LATE_RUN = 10
MAX_CHANGES = 10_000  # changes kept for the shell; the oldest half goes beyond this
HISTORY_KEPT = 20  # warnings kept per meter, raised and cleared (the newest)
# What a reading's outcome means here (one dict lookup per reading).
_STEP, _STORED, _LATE, _BAG, _SKEWED, _SKIP = "step", "stored", "late", "bag", "skewed", "skip"
_KIND: dict[Outcome, str] = {
    Outcome.ACCEPTED: _STEP,  # in the series at its device time
    Outcome.NOISE_FALL: _STEP,
    Outcome.SPIKE_CONFIRMED: _STEP,
    Outcome.STORE_FORWARD: _STORED,  # in the series, but sent late
    Outcome.LATE: _LATE,  # not in the series
    Outcome.TOO_OLD: _LATE,
    Outcome.BAG_CHANGE: _BAG,  # a new bag: no step across it
    Outcome.BAG_CHANGE_INFERRED: _BAG,
    Outcome.CLOCK_SKEW: _SKEWED,  # in the series at its receive time
}  # anything else (duplicates, artefacts, held or reordered readings): _SKIP
_BREAK = math.nan  # in a span's values: no step across it (a bag change)
MAX_SPAN_VALUES = 20_000  # a span is judged early past this many readings (memory bound)


@dataclass(frozen=True, slots=True)
class SanityWarning:
    """One warning about one meter: the likely profile key, and why, in words of ours
    (numbers computed here, never payload content)."""

    device_id: str
    profile: str
    code: str  # flow_below_adult | steps_below_resolution | device_time_far | every_reading_late
    key: str  # the profile key most likely wrong
    detail: str
    since: float  # receive time it was raised
    cleared: float | None = None  # receive time it cleared, when it did

    def to_json(self) -> dict[str, object]:
        return {"device_id": self.device_id, "profile": self.profile, "code": self.code,
                "key": self.key, "detail": self.detail, "since": iso(self.since),
                "cleared": iso(self.cleared) if self.cleared is not None else None}  # fmt: skip

    def line(self) -> str:
        return f"{self.code}: check {self.key}: {self.detail}"


Change = tuple[str, SanityWarning]  # ("raised" | "cleared", the warning)


class SanityWatch:
    """One meter's checks. `clock` sees every decoded reading, `cleaned` every reading
    the meter's cleaner judged (with its outcome and the time the engine used)."""

    __slots__ = (
        "_changes", "_far", "_late", "_late_since", "_near", "_span_end", "active",
        "device_id", "epoch_time", "history", "interval", "period_s", "profile", "resolution",
        "span_start", "tiny_ml", "values", "watch_clock",
    )  # fmt: skip

    def __init__(self, device_id: str, profile: DeviceProfile, changes: list[Change]) -> None:
        self.device_id = device_id
        self.profile = profile.name
        self.period_s = float(profile.timing.period_s)
        self.resolution = profile.volume.resolution_ml
        self.tiny_ml = self.resolution / FINER_THAN  # a step this small is "far below" it
        self.interval = profile.volume.semantics is Semantics.INTERVAL
        self.epoch_time = profile.time.format is not TimeFormat.ISO8601  # no offset field
        self.active: dict[str, SanityWarning] = {}
        self.history: list[SanityWarning] = []  # raised ones, with when they cleared
        self._changes = changes  # the engine's list: raised and cleared, in order
        self._far = self._near = 0
        self._late = 0
        self._late_since = 0.0
        # the span's values in the series, in order (a bag change breaks the chain):
        # one append per reading, judged with numpy when the span is complete
        self.values: list[float] = []
        self.span_start: float | None = None
        self._span_end = -math.inf  # the first reading starts the first span
        self.watch_clock = True  # a far clock may be pending: check device times

    # --- raising and clearing --------------------------------------------------------
    def _raise(self, code: str, key: str, detail: str, now: float) -> None:
        if code in self.active:
            return  # raised already: it says what it saw then
        w = SanityWarning(self.device_id, self.profile, code, key, detail, now)
        self.active[code] = w
        self.history.append(w)
        del self.history[:-HISTORY_KEPT]
        self._note(("raised", w))

    def _clear(self, code: str, now: float) -> None:
        w = self.active.pop(code, None)
        if w is not None:
            done = replace(w, cleared=now)
            self._record(w, done)
            self._note(("cleared", done))

    def _record(self, old: SanityWarning, new: SanityWarning) -> None:
        for i in range(len(self.history) - 1, -1, -1):
            if self.history[i] is old:
                self.history[i] = new
                return

    def _note(self, change: Change) -> None:
        if len(self._changes) >= MAX_CHANGES:  # nobody took them: keep the newest
            del self._changes[: MAX_CHANGES // 2]
        self._changes.append(change)

    # --- device times -------------------------------------------------------------------
    def clock(self, now: float, device_time: float) -> None:
        off = now - device_time
        if -FAR_S <= off <= FAR_S:
            self._far = 0
            self._near += 1
            if self._near >= FAR_RUN:
                self.watch_clock = False  # settled: the fast path skips this until it is not
                if self.active:
                    self._clear("device_time_far", now)
            return
        self.watch_clock = True
        self._far += 1
        self._near = 0
        if self._far >= FAR_RUN and "device_time_far" not in self.active:
            years = abs(off) / (365.25 * 86400.0)
            when = "behind" if off > 0 else "ahead of"
            self._raise("device_time_far", "time.format",
                        f"device times are {num(years, 1)} years {when} the receive time "
                        "(epoch seconds read as milliseconds, or the other way round, "
                        "or the meter's clock is not set)", now)  # fmt: skip

    # --- judged readings ------------------------------------------------------------------
    def cleaned(self, now: float, device_time: float, volume_ml: float, outcome: Outcome
                ) -> None:  # fmt: skip
        """A reading the meter's cleaner judged: its device time, its volume and its
        outcome (the last one, if it settled a held reading). Called for every reading:
        one in the series at its device time costs a lookup, an append and a few
        comparisons (its device time is then near the receive time: it can only end a
        far-clock warning, and `watch_clock` says whether one may be pending)."""
        kind = _KIND.get(outcome, _SKIP)
        if kind is _STEP:
            if self.watch_clock:
                self.clock(now, device_time)
            if self._late:
                self._late = 0
                if self.active:
                    self._clear("every_reading_late", now)
            values = self.values
            values.append(volume_ml)
            if device_time >= self._span_end or len(values) > MAX_SPAN_VALUES:
                self._span(now, device_time)
            return
        if self.watch_clock or not -FAR_S <= now - device_time <= FAR_S:
            self.clock(now, device_time)
        if kind is _SKIP:  # a duplicate, an artefact, a held or an out-of-order reading
            return
        if kind is _LATE or kind is _STORED:
            if self._late == 0:
                self._late_since = now
            self._late += 1
            late = self._late >= LATE_RUN and now - self._late_since >= LATE_RUN * self.period_s
            if late and "every_reading_late" not in self.active:
                key, why = _late_hint(now - device_time, self.epoch_time)
                self._raise("every_reading_late", key,
                            f"the last {self._late} readings over "
                            f"{num((now - self._late_since) / 60, 0)} min were all late or "
                            f"from the meter's store ({why})", now)  # fmt: skip
            if kind is _LATE:
                return  # not in the series
        else:
            self._late = 0
            if self.active:
                self._clear("every_reading_late", now)
        if kind is _BAG:
            if not self.interval:
                self.values.append(_BREAK)  # a new bag: no step across the change
            self.values.append(volume_ml)
            return
        t = now if kind is _SKEWED else device_time  # the time the engine used
        self.values.append(volume_ml)
        if t >= self._span_end or len(self.values) > MAX_SPAN_VALUES:
            self._span(now, t)

    def _span(self, now: float, t: float) -> None:
        """The reading at `t` starts the first span, or completes one."""
        if self.span_start is None:
            self.span_start = t
            self._span_end = t + SPAN_S
        else:
            self._judge(now, t)

    def _judge(self, now: float, t: float) -> None:
        """A complete span, up to the reading at `t`: judge it, and start the next one
        from that reading."""
        assert self.span_start is not None
        span_s = t - self.span_start
        vals = np.array(self.values, dtype=np.float64)
        self.values = [] if self.interval else [self.values[-1]]
        self.span_start = t
        self._span_end = t + SPAN_S
        n = int(np.count_nonzero(~np.isnan(vals)))
        if n < ARRIVING * span_s / self.period_s:
            return  # too few readings to say anything either way
        diffs = vals if self.interval else np.diff(vals)
        diffs = diffs[~np.isnan(diffs)]  # no step across a bag change
        moved = diffs[diffs != 0.0]
        steps, nonzero = int(diffs.size), int(moved.size)
        falls = int(np.count_nonzero(moved < 0.0))
        tiny = int(np.count_nonzero(np.abs(moved) < self.tiny_ml))
        hours = span_s / 3600.0
        flow = float(moved.sum()) / hours
        steady = steps >= MIN_STEPS and falls <= FALLS_MAX * steps
        if steady and 0.0 < flow < LOW_FLOW_ML_H:
            self._raise("flow_below_adult", "volume.unit",
                        f"implied flow {num(flow, 3)} mL/h over {num(hours, 1)} h, rising "
                        "with readings arriving: below what an adult produces even in "
                        "anuria; is the meter's unit larger than declared (L, dL, cL)? "
                        "Check volume.unit or volume.scale_to_ml", now)  # fmt: skip
        else:
            self._clear("flow_below_adult", now)
        if nonzero >= MIN_NONZERO and tiny * 2 > nonzero:
            self._raise("steps_below_resolution", "volume.unit",
                        f"most steps are under {num(self.resolution / FINER_THAN, 3)} mL, "
                        f"far below the declared resolution of {num(self.resolution, 3)} mL: "
                        "check volume.unit or volume.scale_to_ml (or volume.resolution_ml, "
                        "if the meter really resolves that finely)", now)  # fmt: skip
        elif nonzero >= MIN_NONZERO:
            self._clear("steps_below_resolution", now)


def _late_hint(offset_s: float, epoch: bool) -> tuple[str, str]:
    """The key to check for readings that are all late, from how late they are."""
    if abs(offset_s) > FAR_S:
        return "time.format", "device times are years away: check the epoch unit"
    hours = round(offset_s / 3600.0)
    if hours and abs(offset_s - hours * 3600.0) < 300.0:
        if epoch:  # an epoch has no offset to declare: the meter counts from local time
            return ("time.format",
                    f"device times run {hours} h behind: an epoch counted from local time? "
                    "Set the meter's clock to UTC")  # fmt: skip
        return ("fields.utc_offset",
                f"device times run {hours} h behind: a local time sent as UTC?")  # fmt: skip
    return ("timing.store_forward_max_s",
            f"device times run {num(offset_s / 60, 0)} min behind the receive time: "
            "the meter's clock, or a store it sends from late")  # fmt: skip
