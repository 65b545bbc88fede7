"""A bed's urine output as one-minute bins.

Minute m covers [m*60, (m+1)*60) epoch seconds. Each bin holds the volume
produced in it (mL) and a state: unknown (no reading covers it), estimated
(covered only by a long-gap interpolation or a bag-change estimate) or
measured. Volume between two readings is spread evenly over the time between
them, so an emptying logged late lands in the hours it was produced.

Storage is one contiguous buffer per bed with prefix sums refreshed lazily
from the earliest changed minute, so any window costs O(1) once refreshed:
rules ask for many windows per minute, while writes touch the last few minutes.
The buffers are typed arrays (array.array): 25 bytes a minute in all, where lists
of Python floats took about 140, and an item reads as a plain int, several times
cheaper than a numpy scalar; numpy is used for bulk copies.

Volumes are kept in whole nanolitres (integers), each part of a spread rounded to
the nearest: far below any meter's resolution, and every sum of them is exact. So a
window's volume is the exact sum of its minutes, whatever the order of the writes,
where the buffer starts (the live service forgets old minutes, replay keeps them
all) or how the prefix sums were refreshed; a spread taken back leaves its minutes
exactly as they were; and a window that holds exactly 200.05 mL reads as that decimal
number, not as whatever float noise made of it (DESIGN §3: volumes are compared at
the tenth of a mL).

A series made with `keep_min` forgets minutes older than that many before its
latest (in steps of GROW), so a long-running service holds a bounded buffer per
bed; `first_minute` still says when monitoring began. Without it (replay, reports)
every minute is kept.
"""

from __future__ import annotations

import bisect
import math
from array import array
from collections.abc import Iterator
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
import numpy.typing as npt

UNKNOWN = 0
ESTIMATED = 1
MEASURED = 2

GROW = 60  # minutes added (and, with keep_min, forgotten) at a time
NL_PER_ML = 1_000_000  # the series counts nanolitres


def nanolitres(ml: float) -> int:
    """`ml` in whole nanolitres (nearest; a half to even, so -x gives the negative of x)."""
    return round(ml * NL_PER_ML)


@dataclass(frozen=True, slots=True)
class HourTotal:
    hour_start_min: int  # minute index of the clock hour's first minute
    volume_ml: float
    measured_fraction: float
    estimated_fraction: float


class Sums(NamedTuple):
    volume_ml: float
    measured_min: int
    estimated_min: int


class MinuteSeries:
    __slots__ = (
        "_base", "_cum_est", "_cum_meas", "_cum_nl", "_dirty", "_n", "_state", "_vol_nl",
        "first_minute", "keep_min", "latest_time",
    )  # fmt: skip

    def __init__(self, keep_min: int | None = None) -> None:
        self._base: int | None = None  # minute index of buffer slot 0
        self._vol_nl = array("q")  # each minute's volume, nanolitres
        self._state = array("b")
        self._n = 0  # slots in use: [0, n)
        # prefix sums: rules read single items, and an array item is several times
        # cheaper to read than a numpy scalar
        self._cum_nl = array("q", [0])
        self._cum_meas = array("i", [0])
        self._cum_est = array("i", [0])
        self._dirty = 0  # prefix sums are valid up to slot index `_dirty`
        self.latest_time: float | None = None  # time of the latest accepted reading
        self.first_minute: int | None = None  # the first minute with data, ever
        self.keep_min = keep_min  # minutes kept before the latest (None: all)

    # --- writing -------------------------------------------------------------
    def note_reading(self, t: float) -> None:
        if self.latest_time is None or t > self.latest_time:
            self.latest_time = t

    def _slot(self, lo: int, hi: int) -> int:
        """Make minutes [lo, hi] writable; return the slot index of `lo`."""
        if self._base is None:
            self._base = lo
        if lo < self._base:  # data before the buffer: grow at the front
            extra = self._base - lo + GROW
            self._vol_nl = array("q", bytes(8 * extra)) + self._vol_nl
            self._state = array("b", bytes(extra)) + self._state
            self._base -= extra
            self._n += extra
            self._reset_sums()
        keep = self.keep_min
        if keep is not None:
            # forget what lies more than keep_min before the newest minute written, on a
            # grid of GROW minutes: where the buffer starts then depends on the data, not
            # on how the buffer happened to grow (a snapshot's buffer is a re-feed's)
            target = min((hi - keep) // GROW * GROW, lo)
            if target - self._base >= GROW:
                self._forget(target - self._base)
        need = hi - self._base + 1
        if need > len(self._vol_nl):
            size = need + GROW
            if self.keep_min is None:
                size = max(size, 2 * len(self._vol_nl))
            self._vol_nl.extend(array("q", bytes(8 * (size - len(self._vol_nl)))))
            self._state.extend(array("b", bytes(size - len(self._state))))
            pad = size + 1 - len(self._cum_nl)
            self._cum_nl.extend(array("q", bytes(8 * pad)))
            self._cum_meas.extend(array("i", bytes(4 * pad)))
            self._cum_est.extend(array("i", bytes(4 * pad)))
        if need > self._n:
            self._n = need
        i = lo - self._base
        if i < self._dirty:
            self._dirty = i
        if self.first_minute is None or lo < self.first_minute:
            self.first_minute = lo
        return i

    def spread(self, t0: float, t1: float, volume: float, state: int) -> None:
        """Attribute `volume` evenly over (t0, t1]; a zero-length span lands in t1's minute."""
        if t1 <= t0:
            m0 = m1 = math.floor(t1 / 60.0)
        else:
            m0 = math.floor(t0 / 60.0)
            m1 = math.ceil(t1 / 60.0) - 1  # last minute with positive overlap
        i0 = self._slot(m0, m1)
        vol, st = self._vol_nl, self._state
        # round(x * NL_PER_ML) is nanolitres(x), written out: this runs for every reading
        if m0 == m1:
            vol[i0] += round(volume * NL_PER_ML)
            if st[i0] < state:
                st[i0] = state
            return
        i1 = i0 + (m1 - m0)
        rate = volume / (t1 - t0)
        # first and last minutes are partial, the ones between are whole
        vol[i0] += round(rate * ((m0 + 1) * 60.0 - t0) * NL_PER_ML)
        vol[i1] += round(rate * (t1 - m1 * 60.0) * NL_PER_ML)
        if i1 > i0 + 1:
            whole = round(rate * 60.0 * NL_PER_ML)
            for i in range(i0 + 1, i1):
                vol[i] += whole
        for i in range(i0, i1 + 1):
            if st[i] < state:
                st[i] = state

    def forget_before(self, minute: int) -> None:
        """Drop minutes before `minute` (bounded memory in a long-running engine);
        `first_minute` still says when monitoring began."""
        if self._base is None or minute <= self._base:
            return
        self._forget(minute - self._base)

    def _forget(self, k: int) -> None:
        """Drop the first k slots (keeping the buffer's size, for the minutes to come)."""
        assert self._base is not None
        k = min(k, len(self._vol_nl))
        del self._vol_nl[:k]
        del self._state[:k]
        self._vol_nl.extend(array("q", bytes(8 * k)))
        self._state.extend(array("b", bytes(k)))
        self._n = max(0, self._n - k)
        self._base += k
        # the prefix sums restart at the new slot 0: refreshed from there
        self._cum_nl[0] = self._cum_meas[0] = self._cum_est[0] = 0
        self._dirty = 0

    def _reset_sums(self) -> None:
        size = len(self._vol_nl) + 1
        self._cum_nl = array("q", bytes(8 * size))
        self._cum_meas = array("i", bytes(4 * size))
        self._cum_est = array("i", bytes(4 * size))
        self._dirty = 0

    # --- reading -------------------------------------------------------------
    def latest_minute(self) -> int | None:
        """The last whole minute the latest accepted reading covers (windows end here).

        A reading at t measures up to t; the minute t falls in is only partly
        observed, so windows end at the minute before it and every window holds
        whole minutes (a reading on a minute boundary completes that minute).
        """
        return None if self.latest_time is None else math.floor(self.latest_time / 60.0) - 1

    def _refresh(self) -> None:
        d, n = self._dirty, self._n
        if d >= n:
            return
        if n - d <= 16:  # the usual case, a few recent minutes: plain Python is cheaper
            cv, cm, ce = self._cum_nl, self._cum_meas, self._cum_est
            minute_vol, minute_state = self._vol_nl, self._state
            v, m, e = cv[d], cm[d], ce[d]
            for i in range(d, n):  # indexed: slicing the arrays would copy them
                v += minute_vol[i]
                st = minute_state[i]
                if st == MEASURED:
                    m += 1
                elif st == ESTIMATED:
                    e += 1
                cv[i + 1], cm[i + 1], ce[i + 1] = v, m, e
            self._dirty = n
            return
        vol = np.frombuffer(self._vol_nl, np.int64, n - d, 8 * d)  # integers: exact
        np.frombuffer(self._cum_nl, np.int64)[d + 1 : n + 1] = self._cum_nl[d] + np.cumsum(vol)
        states = np.frombuffer(self._state, np.int8, n - d, d)
        meas, est = np.cumsum(states == MEASURED), np.cumsum(states == ESTIMATED)
        np.frombuffer(self._cum_meas, np.int32)[d + 1 : n + 1] = self._cum_meas[d] + meas
        np.frombuffer(self._cum_est, np.int32)[d + 1 : n + 1] = self._cum_est[d] + est
        self._dirty = n

    def _clip(self, m: int) -> int:
        """Slot index for a window edge, clipped to the used buffer."""
        assert self._base is not None
        return min(max(m - self._base, 0), self._n)

    def sums(self, lo: int, hi: int) -> Sums:
        """Volume, measured and estimated minute counts over minutes [lo, hi)."""
        base = self._base
        if base is None or hi <= lo:
            return Sums(0.0, 0, 0)
        if self._dirty < self._n:
            self._refresh()
        n = self._n
        a = min(max(lo - base, 0), n)
        b = min(max(hi - base, 0), n)
        cv, cm, ce = self._cum_nl, self._cum_meas, self._cum_est
        return Sums((cv[b] - cv[a]) / NL_PER_ML, cm[b] - cm[a], ce[b] - ce[a])

    def slide_budget(self, lo: int, hi: int, budget_ml: float, limit: int) -> int:
        """How many minutes window [lo, hi) can slide forward before the minutes it
        sheds hold more than `budget_ml` (at most `limit`). New minutes only add
        volume, so until then its volume stays above (current - budget)."""
        if self._base is None or budget_ml < 0:
            return 0
        if self._dirty < self._n:
            self._refresh()
        a = min(max(lo - self._base, 0), self._n)
        b = min(max(hi - self._base, 0), self._n)
        cv = self._cum_nl
        # the last slot k in [a, b] with cv[k] - cv[a] <= budget (prefix sums ~monotone)
        k = bisect.bisect_right(cv, cv[a] + budget_ml * NL_PER_ML, a, b + 1) - 1
        return max(0, min(k - a + max(0, a - (lo - self._base)), limit))

    def stays_at_most(self, lo: int, hi: int, limit_ml: float, count: int) -> int:
        """How many of the windows [lo + j, hi + j), j = 0, 1, ..., count - 1, in a
        row from the first, hold at most `limit_ml`."""
        if self._base is None:
            return count
        if self._dirty < self._n:
            self._refresh()
        cv, n, base = self._cum_nl, self._n, self._base
        limit = limit_ml * NL_PER_ML
        for j in range(count):
            a = min(max(lo + j - base, 0), n)
            b = min(max(hi + j - base, 0), n)
            if cv[b] - cv[a] > limit:
                return j
        return count

    def trailing_quiet(self, end: int, max_ml: float, limit: int) -> int:
        """Length of the run of measured minutes ending at `end` (inclusive) whose
        total volume is at most `max_ml`, capped at `limit` minutes."""
        if self._base is None:
            return 0
        self._refresh()
        e = self._clip(end + 1)
        floor = max(0, e - limit)
        cum = np.frombuffer(self._cum_nl, np.int64, e + 1 - floor, 8 * floor)
        # earliest slot j >= floor with cum[e] - cum[j] <= max_ml (cum is ~monotone)
        j = int(np.searchsorted(cum, cum[-1] - max_ml * NL_PER_ML, side="left")) + floor
        # ... and no unknown or estimated minute in slots [j, e)
        meas = np.frombuffer(self._cum_meas, np.int32, e + 1 - floor, 4 * floor)
        unmeasured = np.arange(floor, e + 1) - meas
        k = int(np.searchsorted(unmeasured, unmeasured[-1], side="left")) + floor
        return e - max(j, k)

    def minutes(self, lo: int, hi: int) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.uint8]]:
        """Copies of volume (mL) and state for minutes [lo, hi); absent minutes are
        unknown."""
        vol, st = self._minutes_nl(lo, hi)
        return vol / NL_PER_ML, st

    def _minutes_nl(self, lo: int, hi: int) -> tuple[npt.NDArray[np.int64], npt.NDArray[np.uint8]]:
        n = max(0, hi - lo)
        vol = np.zeros(n, dtype=np.int64)
        st = np.zeros(n, dtype=np.uint8)
        if self._base is None or n == 0:
            return vol, st
        a, b = self._clip(lo), self._clip(hi)
        if b > a:
            off = a + self._base - lo
            vol[off : off + b - a] = np.frombuffer(self._vol_nl, np.int64, b - a, 8 * a)
            st[off : off + b - a] = np.frombuffer(self._state, np.int8, b - a, a)
        return vol, st

    def total(self) -> float:
        return sum(self._vol_nl[: self._n]) / NL_PER_ML

    def completed_hours(self) -> Iterator[HourTotal]:
        """Clock hours from the first data to the last hour that has fully passed."""
        if self.first_minute is None or self.latest_time is None or self._base is None:
            return
        first_hour = max(self.first_minute, self._base) // 60  # what is kept
        end_hour = math.floor(self.latest_time / 3600.0)  # hours before this are complete
        if end_hour <= first_hour:
            return
        vol, st = self._minutes_nl(first_hour * 60, end_hour * 60)
        hours = end_hour - first_hour
        v = vol.reshape(hours, 60).sum(axis=1) / NL_PER_ML  # summed exactly, in nL
        meas = (st.reshape(hours, 60) == MEASURED).mean(axis=1)
        est = (st.reshape(hours, 60) == ESTIMATED).mean(axis=1)
        for i in range(hours):
            yield HourTotal((first_hour + i) * 60, float(v[i]), float(meas[i]), float(est[i]))
