"""Restart recovery beside the notifier's own journal events: a paging channel's technical
alarm is journaled at the service's clock, which may run ahead of the engine's last event.
It must not hide the engine events that a crash left unjournaled (recovery publishes what
falls at or after the last ENGINE event; see daemon/recovery.py)."""

from __future__ import annotations

from daemon.engine.alarms import AlarmEvent
from daemon.journal import SqliteJournal
from daemon.recovery import recover
from tests.test_recovery import GUARD_S, WINDOW_S, engine, key, live, records, uninterrupted


def test_a_technical_alarm_journaled_after_a_crash_hides_no_lost_engine_event(tmp_path):
    recs = records(3.0)  # an invented 300 mL/h stream (sources in tests/test_recovery.py)
    produced = live(tmp_path / "full.db", recs)
    first = next(
        i for i, eff in enumerate(produced)
        if any(isinstance(e, AlarmEvent) and e.rule == "pod-hourly" for e in eff)
    )  # fmt: skip
    path = tmp_path / "j.db"
    live(path, recs, effects_until=first)  # died before journaling those effects
    with SqliteJournal(path) as j:  # ... while the notifier journaled a channel's alarm, later
        body: dict[str, object] = {"channel": "alert-mgr", "state": "active"}
        j.append_events([(recs[-1][0] + 30, "notify_alarm", None, "notify/alert-mgr/x", body)])
    now = recs[-1][0] + 60
    with SqliteJournal(path) as j:
        rec = recover(engine(), j, now, WINDOW_S, GUARD_S, "hourwatch")
    lost = [key(e) for eff in produced[first:] for e in eff if isinstance(e, AlarmEvent)]
    lost += [key(e) for e in uninterrupted(recs, now)]
    assert [key(e) for e in rec.to_publish if isinstance(e, AlarmEvent)] == lost
    assert rec.differs == []
