"""The outbox: everything the service publishes, in order, until the broker confirms it.

Used by the worker thread only. While the broker is away, messages wait here in order
and go out on reconnect; what paho already accepted it resends itself. An event is
marked delivered in the journal only when its PUBACK arrives. An alarm event not
confirmed within the bound is a technical alarm of the service (`overdue`).
"""

from __future__ import annotations

from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, field


@dataclass(slots=True)
class Outgoing:
    topic: str
    payload: bytes
    qos: int
    retain: bool
    event_ids: list[int] = field(default_factory=list)  # journal events it carries
    alarm_id: str | None = None  # set for alarm lifecycle events (delivery is watched)
    created: float = 0.0  # service clock
    mid: int | None = None
    overdue: bool = False


# publish(topic, payload, qos, retain) -> (mid, accepted)
PublishFn = Callable[[str, bytes, int, bool], tuple[int, bool]]


class Outbox:
    def __init__(self, publish: PublishFn, confirm_timeout_s: float) -> None:
        self._publish = publish
        self.timeout = confirm_timeout_s
        self.waiting: deque[Outgoing] = deque()  # not yet handed to paho
        self.in_flight: dict[int, Outgoing] = {}  # mid -> handed over, no PUBACK yet
        self._latest: dict[str, Outgoing] = {}  # retained topic -> its waiting message

    def __len__(self) -> int:
        return len(self.waiting) + len(self.in_flight)

    def put(self, msg: Outgoing, first: bool = False) -> None:
        """Queue a message; `first` puts it ahead of those waiting (a status that says a
        backlog follows)."""
        if msg.retain and not msg.event_ids:
            # a retained snapshot (bed state, status): only the newest matters
            older = self._latest.get(msg.topic)
            if older is not None and older.mid is None:
                older.payload = msg.payload
                return
            self._latest[msg.topic] = msg
        if first:
            self.waiting.appendleft(msg)
        else:
            self.waiting.append(msg)

    def flush(self, connected: bool) -> int:
        """Hand waiting messages to paho, in order, while connected."""
        sent = 0
        while connected and self.waiting:
            msg = self.waiting[0]
            mid, accepted = self._publish(msg.topic, msg.payload, msg.qos, msg.retain)
            if not accepted:
                break  # connection just went; keep it (and order) for the reconnect
            self.waiting.popleft()
            if self._latest.get(msg.topic) is msg:
                del self._latest[msg.topic]
            msg.mid = mid
            self.in_flight[mid] = msg
            sent += 1
        return sent

    def unconfirmed(self) -> list[Outgoing]:
        return [*self.waiting, *self.in_flight.values()]

    def confirmed(self, mid: int) -> Outgoing | None:
        return self.in_flight.pop(mid, None)

    def newly_overdue(self, now: float) -> list[Outgoing]:
        """Alarm events older than the bound and not confirmed, each reported once."""
        out = []
        for msg in self.unconfirmed():
            if msg.alarm_id is not None and not msg.overdue and now - msg.created > self.timeout:
                msg.overdue = True
                out.append(msg)
        return out

    def overdue_count(self) -> int:
        return sum(1 for m in (*self.waiting, *self.in_flight.values()) if m.alarm_id and m.overdue)
