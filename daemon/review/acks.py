"""Recorded acknowledgements in a what-if replay.

A log's acknowledgements name the alarms of the rules it was recorded under
(BED/RULE/ONSET). Under other rules the same alarm may start at another minute and so
have another id: the recorded acknowledgement would then be refused as unknown, and
the what-if would count escalations and re-notifications that a nurse had in fact
stopped (a higher threshold would look like more pages). An acknowledgement naming an
alarm this replay never raised therefore goes to the one alarm of the same bed and rule
open at that moment, if there is one; one naming an alarm it raised is left alone.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator

from ..engine.alarms import AlarmEvent, State
from ..engine.effects import Effect
from ..engine.engine import Engine
from ..logfile import BadLine
from .explain import ALARM_ID
from .recorder import Record

# pending too: an alarm whose delay runs out just before the acknowledgement is made
# active when the acknowledgement is stepped (wake-ups due before it fire first)
_ACKABLE = (State.PENDING, State.ACTIVE, State.ESCALATED, State.ACKNOWLEDGED)


class AckCarrier:
    def __init__(self) -> None:
        self.engine: Engine | None = None
        self.raised: set[str] = set()  # alarm ids this replay has emitted
        self.carried = 0  # acknowledgements moved to this replay's alarm
        self.unmatched = 0  # naming an alarm never raised here, and none open to take them

    def attach(self, engine: Engine) -> Engine:
        self.engine = engine
        return engine

    def on_effects(self, effects: list[Effect]) -> None:
        for e in effects:
            if isinstance(e, AlarmEvent):
                self.raised.add(e.alarm_id)

    def records(self, records: Iterable[Record]) -> Iterator[Record]:
        assert self.engine is not None
        topic = self.engine.prefix + "/ack"
        for item in records:
            if not isinstance(item, BadLine):
                n, rec = item
                if rec.topic == topic or rec.topic.startswith(topic + "/"):
                    payload = self._carry(rec.payload)
                    if payload is not rec.payload:
                        item = (n, rec.model_copy(update={"payload": payload}))
            yield item

    def _carry(self, payload: object) -> object:
        assert self.engine is not None
        if not isinstance(payload, dict):
            return payload
        alarm_id = payload.get("alarm_id")
        if not isinstance(alarm_id, str) or alarm_id in self.raised:
            return payload
        m = ALARM_ID.match(alarm_id)
        if m is None:
            self.unmatched += 1
            return payload
        bed, rule = m.group(1), m.group(2)
        views = self.engine.book.active(bed)
        open_ = [v for v in views if v.rule == rule and v.state in _ACKABLE]
        if len(open_) != 1:
            self.unmatched += 1
            return payload
        self.carried += 1
        return {**payload, "alarm_id": open_[0].alarm_id}

    def counts(self) -> dict[str, int]:
        return {"carried": self.carried, "unmatched": self.unmatched}
