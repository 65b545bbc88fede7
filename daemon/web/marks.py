"""Bag changes per bed, noted as the engine reports the fate of each reading.

The engine keeps no history of bag changes (it needs none); the bed page draws them.
`ReadingMarks.observe` is the engine's optional observer (`Engine(observe=...)`): it is
called under the engine lock for every meter message, so it only appends.
"""

from __future__ import annotations

import bisect
from collections import deque

from ..engine.engine import ReadingTrace
from ..engine.outcomes import Outcome

BAG_CHANGES = frozenset({Outcome.BAG_CHANGE, Outcome.BAG_CHANGE_INFERRED})
KEEP_S = 48 * 3600.0  # the bed page shows 24 h; a day more for a page opened late
MAX_PER_BED = 2_000  # bounded whatever a meter sends


def effective_time(tr: ReadingTrace) -> float:
    """The time the engine used for the reading (its receive time when the meter clock
    was not believed)."""
    t = tr.device_time
    return tr.received if t is None or tr.outcomes[-1] is Outcome.CLOCK_SKEW else t


class ReadingMarks:
    """Times of bag changes per bed (epoch s), newest last, for the last KEEP_S."""

    def __init__(self) -> None:
        self.bags: dict[str, deque[float]] = {}
        self._held: dict[str, float] = {}  # device -> time of the reading it holds

    def observe(self, tr: ReadingTrace) -> None:
        bed = tr.bed
        if bed is None or tr.device_time is None:
            return
        outs = tr.outcomes
        if len(outs) == 2:  # this message settled the reading the device held before
            held = self._held.pop(tr.device_id, None)
            if held is not None and outs[0] in BAG_CHANGES:
                self._add(bed, held)
        t = effective_time(tr)
        if outs[-1] is Outcome.SPIKE_HELD:
            self._held[tr.device_id] = t
        elif outs[-1] in BAG_CHANGES:
            self._add(bed, t)
        for when, was in tr.revised:  # a fall taken back: it was never a bag change
            if was in BAG_CHANGES:
                self._remove(bed, when)

    def _add(self, bed: str, t: float) -> None:
        marks = self.bags.get(bed)
        if marks is None:
            marks = self.bags[bed] = deque(maxlen=MAX_PER_BED)
        if marks and t < marks[-1]:  # out of order (a reordered reading): keep sorted
            items = sorted([*marks, t])
            marks.clear()
            marks.extend(items)
        else:
            marks.append(t)
        while marks and marks[0] < marks[-1] - KEEP_S:
            marks.popleft()

    def _remove(self, bed: str, t: float) -> None:
        marks = self.bags.get(bed)
        if marks and t in marks:
            marks.remove(t)

    def state(self) -> dict[str, object]:
        """What a snapshot keeps (plain data), so a restart from it shows the bag changes
        before it as a full re-feed would."""
        return {"bags": {bed: list(ts) for bed, ts in self.bags.items()},
                "held": dict(self._held)}  # fmt: skip

    def load(self, state: object) -> None:
        """Back from `state()`; what is not of its shape is left out (a snapshot is
        checked whole before this, so that would be a bug of ours, not a misreading)."""
        self.bags.clear()
        self._held.clear()
        if not isinstance(state, dict):
            return
        bags, held = state.get("bags"), state.get("held")
        for bed, ts in (bags.items() if isinstance(bags, dict) else ()):
            if isinstance(bed, str) and isinstance(ts, list):
                times = sorted(float(t) for t in ts if isinstance(t, (int, float)))
                self.bags[bed] = deque(times[-MAX_PER_BED:], maxlen=MAX_PER_BED)
        for dev, t in (held.items() if isinstance(held, dict) else ()):
            if isinstance(dev, str) and isinstance(t, (int, float)):
                self._held[dev] = float(t)

    def bag_changes(self, bed: str, since: float) -> list[float]:
        marks = list(self.bags.get(bed, ()))
        return marks[bisect.bisect_left(marks, since) :]
