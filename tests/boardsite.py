"""A ward board around a REAL engine fed from a log (no broker): for the HTTP app's unit
tests, the browser tests without a service, and the screenshots.

The engine runs the bundled profiles, rules and escalation policy; the log is replayed
on its own clock; acknowledgements go through `engine.step` on the user's
acknowledgement topic, as the service's worker would do. The events the engine returns
are kept as the journal would keep them. All data is invented (examples/ward-night.jsonl).
"""

from __future__ import annotations

import itertools
import json
import threading
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

from daemon.config import BoardConfig
from daemon.engine.alarms import AlarmEvent
from daemon.engine.effects import AdviceIssued, Effect, RejectedInput
from daemon.engine.engine import Engine
from daemon.journal import StoredEvent
from daemon.notify.acklinks import AckOutcome
from daemon.profile_files import load_profiles
from daemon.replay import drive
from daemon.rule_files import load_advice, load_policy, load_rules
from daemon.sources import open_source
from daemon.web.live import ChangeFeed
from daemon.web.marks import ReadingMarks
from daemon.web.site import BoardData, Site
from daemon.web.users import UserStore, add_user

ROOT = Path(__file__).resolve().parent.parent
EXAMPLE = ROOT / "examples" / "ward-night.jsonl"
PASSWORD = "invented-password-1"  # test accounts only


class LogSite:
    def __init__(self, log: Path | None = EXAMPLE, tz: str = "UTC") -> None:
        self.marks = ReadingMarks()
        self.engine = Engine(load_profiles(), load_rules(), load_policy(),
                             observe=self.marks.observe, advice_policy=load_advice(),
                             timezone=ZoneInfo(tz))  # fmt: skip
        self.tz = ZoneInfo(tz)
        self.lock = threading.RLock()
        self.changes = ChangeFeed()
        self.events: list[StoredEvent] = []
        self.advice: dict[str, dict[str, Any]] = {}
        self._ids = itertools.count(1)
        self.now = 0.0
        self.acks: list[tuple[str, str, str]] = []  # (topic, alarm id, outcome) fed to the engine
        self.health: tuple[bool, dict[str, Any]] = (True, {"status": "ok"})
        if log is not None:
            records = list(open_source(log))
            drive(self.engine, records, self.keep)
            self.now = max(r[1].time.timestamp() for r in records if isinstance(r, tuple))

    def keep(self, effects: list[Effect]) -> None:
        for e in effects:
            if isinstance(e, AlarmEvent):
                self.events.append(StoredEvent(next(self._ids), e.time, "alarm", e.bed,
                                               e.alarm_id, e.to_json(), None))  # fmt: skip
                self.changes.touch(e.bed)
            elif isinstance(e, AdviceIssued):
                body = e.to_json()
                self.events.append(StoredEvent(next(self._ids), e.time, "advice", e.bed, None,
                                               body, None))  # fmt: skip
                self.advice[e.bed] = {k: v for k, v in body.items() if k != "caution"}
                self.changes.touch(e.bed)

    def step(self, topic: str, payload: Any, t: float | None = None) -> list[Effect]:
        """One more message, at `t` (default: the site's clock), as the worker does."""
        raw = payload if isinstance(payload, bytes) else json.dumps(payload).encode()
        with self.lock:
            self.now = max(self.now, t if t is not None else self.now)
            effects = self.engine.advance(self.now) + self.engine.step(topic, raw, self.now)
        self.keep(effects)
        self.changes.touch()
        return effects

    def acknowledge(self, alarm_id: str, user: str, role: str) -> AckOutcome:
        topic = f"hourwatch/ack/{user}"
        effects = self.step(topic, {"alarm_id": alarm_id, "role": role})
        for e in effects:
            if isinstance(e, AlarmEvent) and e.alarm_id == alarm_id and e.by == user:
                self.acks.append((topic, alarm_id, "acknowledged"))
                return AckOutcome(True, f"{e.state}: {e.reason}")
            if isinstance(e, RejectedInput):
                self.acks.append((topic, alarm_id, e.reason))
                return AckOutcome(False, f"not acknowledged ({e.reason})")
        self.acks.append((topic, alarm_id, "nothing"))
        return AckOutcome(False, "not acknowledged: the alarm is not open")

    def bed_events(self, bed: str, since: float) -> list[StoredEvent]:
        return [e for e in self.events if e.bed == bed and e.time >= since]

    def data(self, users_file: Path | None = None, **settings: Any) -> BoardData:
        cfg = BoardConfig.model_validate({"listen": "127.0.0.1:0"} | settings)
        return BoardData(
            engine=self.engine, lock=self.lock, clock=lambda: self.now, timezone=self.tz,
            latest_advice=self.advice.get, bed_events=self.bed_events,
            acknowledge=self.acknowledge, users=UserStore(users_file), settings=cfg,
            marks=self.marks, changes=self.changes, journal="journal.db",
        )  # fmt: skip

    def site(self, users_file: Path | None = None, health: tuple[bool, dict[str, Any]] | None
             = None, **settings: Any) -> Site:  # fmt: skip
        if health is not None:
            self.health = health
        data = self.data(users_file, **settings)
        data.service_state = lambda: self.health
        return Site(lambda: self.health, lambda: "# no metrics here\n", board=data)


def users_file(tmp: Path, users: dict[str, list[str]]) -> Path:
    """A users file with these users (each with PASSWORD)."""
    path = tmp / "users.json"
    roles = {r for rs in users.values() for r in rs}
    for name, rs in users.items():
        add_user(path, name, rs, PASSWORD, roles, replace=True)
    return path


def open_alarms(site: LogSite, bed: str | None = None) -> list[Any]:
    with site.lock:
        return [a for a in site.engine.book.active(bed) if a.state.value in ("active",
                                                                              "escalated")]
