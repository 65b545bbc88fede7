"""A bed's urine output as one-minute bins.

Minute m covers [m*60, (m+1)*60) epoch seconds. Each bin holds the volume
produced in it (mL) and a state: unknown (no reading covers it), estimated
(covered only by a long-gap interpolation or a bag-change estimate) or
measured. Volume between two readings is spread evenly over the time between
them, so an emptying logged late lands in the hours it was produced.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

UNKNOWN = 0
ESTIMATED = 1
MEASURED = 2

DAY = 1440  # minutes per storage chunk


@dataclass(frozen=True, slots=True)
class HourTotal:
    hour_start_min: int  # minute index of the clock hour's first minute
    volume_ml: float
    measured_fraction: float
    estimated_fraction: float


class MinuteSeries:
    __slots__ = ("_state", "_vol", "first_minute", "latest_time")

    def __init__(self) -> None:
        self._vol: dict[int, npt.NDArray[np.float64]] = {}
        self._state: dict[int, npt.NDArray[np.uint8]] = {}
        self.latest_time: float | None = None  # time of the latest accepted reading
        self.first_minute: int | None = None

    # --- writing -------------------------------------------------------------
    def note_reading(self, t: float) -> None:
        if self.latest_time is None or t > self.latest_time:
            self.latest_time = t

    def _chunk(self, day: int) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.uint8]]:
        vol = self._vol.get(day)
        if vol is None:
            vol = self._vol[day] = np.zeros(DAY)
            self._state[day] = np.zeros(DAY, dtype=np.uint8)
        return vol, self._state[day]

    def spread(self, t0: float, t1: float, volume: float, state: int) -> None:
        """Attribute `volume` evenly over (t0, t1]; a zero-length span lands in t1's minute."""
        if t1 <= t0:
            m = math.floor(t1 / 60.0)
            vol, st = self._chunk(m // DAY)
            vol[m % DAY] += volume
            if st[m % DAY] < state:
                st[m % DAY] = state
            self._first(m)
            return
        m0 = math.floor(t0 / 60.0)
        m1 = math.ceil(t1 / 60.0) - 1  # last minute with positive overlap
        self._first(m0)
        if m0 == m1:
            vol, st = self._chunk(m0 // DAY)
            vol[m0 % DAY] += volume
            if st[m0 % DAY] < state:
                st[m0 % DAY] = state
            return
        rate = volume / (t1 - t0)
        # first and last minutes are partial, the ones between are whole
        self._add_minute(m0, rate * ((m0 + 1) * 60.0 - t0), state)
        self._add_minute(m1, rate * (t1 - m1 * 60.0), state)
        if m1 - m0 > 1:
            self._add_range(m0 + 1, m1, rate * 60.0, state)

    def _add_minute(self, m: int, volume: float, state: int) -> None:
        vol, st = self._chunk(m // DAY)
        vol[m % DAY] += volume
        if st[m % DAY] < state:
            st[m % DAY] = state

    def _add_range(self, lo: int, hi: int, per_minute: float, state: int) -> None:
        """Add per_minute to minutes [lo, hi)."""
        m = lo
        while m < hi:
            day = m // DAY
            a = m % DAY
            b = min(DAY, a + (hi - m))
            vol, st = self._chunk(day)
            vol[a:b] += per_minute
            np.maximum(st[a:b], state, out=st[a:b])
            m += b - a

    def _first(self, m: int) -> None:
        if self.first_minute is None or m < self.first_minute:
            self.first_minute = m

    def forget_before(self, minute: int) -> None:
        """Drop whole days before `minute` (bounded memory in a long-running engine)."""
        for day in [d for d in self._vol if (d + 1) * DAY <= minute]:
            del self._vol[day]
            del self._state[day]

    # --- reading -------------------------------------------------------------
    def latest_minute(self) -> int | None:
        """The minute holding the latest accepted reading (windows end here)."""
        return None if self.latest_time is None else math.floor(self.latest_time / 60.0)

    def minutes(self, lo: int, hi: int) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.uint8]]:
        """Copies of volume and state for minutes [lo, hi); absent minutes are unknown."""
        n = max(0, hi - lo)
        vol = np.zeros(n)
        st = np.zeros(n, dtype=np.uint8)
        m = lo
        while m < hi:
            day = m // DAY
            a = m % DAY
            b = min(DAY, a + (hi - m))
            i = m - lo
            chunk = self._vol.get(day)
            if chunk is not None:
                vol[i : i + b - a] = chunk[a:b]
                st[i : i + b - a] = self._state[day][a:b]
            m += b - a
        return vol, st

    def total(self) -> float:
        return float(sum(float(v.sum()) for v in self._vol.values()))

    def completed_hours(self) -> Iterator[HourTotal]:
        """Clock hours from the first data to the last hour that has fully passed."""
        if self.first_minute is None or self.latest_time is None:
            return
        first_hour = self.first_minute // 60
        end_hour = math.floor(self.latest_time / 3600.0)  # hours before this are complete
        if end_hour <= first_hour:
            return
        vol, st = self.minutes(first_hour * 60, end_hour * 60)
        hours = end_hour - first_hour
        v = vol.reshape(hours, 60).sum(axis=1)
        meas = (st.reshape(hours, 60) == MEASURED).mean(axis=1)
        est = (st.reshape(hours, 60) == ESTIMATED).mean(axis=1)
        for i in range(hours):
            yield HourTotal((first_hour + i) * 60, float(v[i]), float(meas[i]), float(est[i]))
