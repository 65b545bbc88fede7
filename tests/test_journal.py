"""The durable journal (daemon/journal.py): storage, durability settings, pruning, refusal.

Topics, devices, beds and payloads are invented; no patient data.
"""

from __future__ import annotations

import base64
import json
import sqlite3
import subprocess
import sys
import threading
from pathlib import Path

import pytest

from daemon.errors import UserError
from daemon.journal import (
    APPLICATION_ID,
    BINARY_MARKER,
    DAY_S,
    SCHEMA_VERSION,
    BedFilter,
    SqliteJournal,
    StoredMessage,
    is_journal,
    is_sqlite,
    journal_items,
    journal_records,
    log_payload,
)
from daemon.logfile import BadLine
from tests.conftest import T0


@pytest.fixture
def jpath(tmp_path: Path) -> Path:
    return tmp_path / "j.db"


def _ctx(devices: list[str], replaces: list[str] | None = None) -> bytes:
    body: dict[str, object] = {"ward": "icu-east", "device_ids": devices}
    if replaces:
        body["replaces"] = replaces
    return json.dumps(body).encode()


# --- storing and reading ---------------------------------------------------------------
def test_messages_round_trip_with_binary_payloads_and_ids_in_order(jpath: Path) -> None:
    rows = [
        (T0 + 0.5, "meters/m-01/volume", b'{"volume_ml": 12.5}', 1),
        (T0 + 1.25, "wardscale/g-01/mass", b"7;2026-03-14T00:00:01Z;8.0;OK", 1),
        (T0 + 2.0, "odd/\u00e9t\u00e9/x", bytes(range(256)), 0),  # every byte value
        (T0 + 3.0, "odd/empty", b"", 0),
        (T0 + 4.0, "odd/nul", b"\x00\xff\x00", 1),
    ]
    with SqliteJournal(jpath) as j:
        ids = j.append_messages(rows[:2])
        ids += j.append_messages(rows[2:])
        assert ids == sorted(ids) and len(set(ids)) == len(rows)
        got = list(j.messages_between(None, None))
    assert got == [StoredMessage(i, *r) for i, r in zip(ids, rows, strict=True)]
    assert isinstance(got[2].payload, bytes)


def test_ids_continue_after_reopen_and_after_everything_was_pruned(jpath: Path) -> None:
    with SqliteJournal(jpath, retention_days=1) as j:
        first = j.append_messages([(T0, "a/b", b"1", 1), (T0 + 1, "a/b", b"2", 1)])
        assert j.prune(T0 + 10 * DAY_S) == 2
    with SqliteJournal(jpath, retention_days=1) as j:
        (third,) = j.append_messages([(T0 + 10 * DAY_S, "a/b", b"3", 1)])
    assert third > max(first)  # AUTOINCREMENT: an id is never handed out twice


def test_time_ranges_are_half_open_and_keep_receive_order(jpath: Path) -> None:
    # receive times go back once (a clock step); the journal keeps receive (id) order
    times = [T0, T0 + 60, T0 + 30, T0 + 120, T0 + 180]
    with SqliteJournal(jpath) as j:
        ids = j.append_messages([(t, f"m/{k}", b"{}", 1) for k, t in enumerate(times)])
        got = [m.id for m in j.messages_between(T0 + 30, T0 + 180)]
        assert got == [ids[1], ids[2], ids[3]]  # 180 excluded, 30 included
        assert [m.id for m in j.messages_between(T0 + 60, None)] == [ids[1], ids[3], ids[4]]
        assert [m.id for m in j.messages_between(None, T0 + 60)] == [ids[0], ids[2]]


def test_an_open_ended_range_is_read_through_the_time_index(jpath: Path) -> None:
    """Recovery reads the last 24 h of a 30-day journal: never a scan of the whole table."""
    SqliteJournal(jpath).close()
    db = sqlite3.connect(jpath)
    plan = db.execute(
        "EXPLAIN QUERY PLAN SELECT id FROM messages WHERE recv_time >= ? AND recv_time < ? "
        "ORDER BY id",
        (T0, float("inf")),
    ).fetchall()
    db.close()
    assert any("INDEX messages_time" in row[-1] for row in plan), plan


def test_events_round_trip_by_time_and_bed(jpath: Path) -> None:
    body: dict[str, object] = {"alarm_id": "b01/pod-hourly/1", "state": "active"}
    body["evidence"] = {"ml": [1.5, 2]}
    rows: list[tuple[float, str, str | None, str | None, dict[str, object]]] = [
        (T0, "alarm", "b01", "b01/pod-hourly/1", body),
        (T0 + 5, "notice", "b02", None, {"text": "no weight"}),
        (T0 + 9, "service", None, None, {"status": "online"}),
        (T0 + 12, "advice", "b01", None, {"summary": "s"}),
    ]
    with SqliteJournal(jpath) as j:
        ids = j.append_events(rows)
        assert ids == sorted(ids)
        every = list(j.events_between(None, None))
        assert [(e.time, e.kind, e.bed, e.alarm_id, e.body) for e in every] == rows
        assert all(e.delivered_at is None for e in every)
        assert [e.kind for e in j.events_between(None, None, bed="b01")] == ["alarm", "advice"]
        assert [e.kind for e in j.events_between(T0 + 5, T0 + 12)] == ["notice", "service"]
        with pytest.raises(TypeError):  # not JSON: refused before anything is written
            j.append_events([(T0, "alarm", "b01", None, {"bad": object()})])
        assert len(list(j.events_between(None, None))) == 4


def test_undelivered_and_mark_delivered(jpath: Path) -> None:
    with SqliteJournal(jpath) as j:
        a1, n1, adv, a2 = j.append_events([
            (T0, "alarm", "b01", "b01/r/1", {"state": "active"}),
            (T0 + 1, "notice", "b01", None, {}),
            (T0 + 2, "advice", "b01", None, {}),
            (T0 + 3, "alarm", "b02", "b02/r/1", {"state": "active"}),
        ])  # fmt: skip
        assert [e.id for e in j.undelivered_events()] == [a1, adv, a2]  # oldest first
        j.mark_delivered([adv, a1], T0 + 10)
        assert [e.id for e in j.undelivered_events()] == [a2]
        j.mark_delivered([a1], T0 + 99)  # a late duplicate PUBACK keeps the first time
        delivered = {e.id: e.delivered_at for e in j.events_between(None, None)}
    assert delivered == {a1: T0 + 10, n1: None, adv: T0 + 10, a2: None}


def test_alarm_event_keys_for_reconciliation(jpath: Path) -> None:
    with SqliteJournal(jpath) as j:
        j.append_events([
            (T0, "alarm", "b01", "b01/r/1", {"state": "active", "reason": "condition_met"}),
            (T0 + 60, "alarm", "b01", "b01/r/1", {"state": "escalated", "reason": "due"}),
            (T0 + 60, "advice", "b01", None, {"state": "x", "reason": "y"}),
        ])  # fmt: skip
        assert j.alarm_event_keys(T0 + 1) == {("b01/r/1", "escalated", "due", T0 + 60)}
        assert len(j.alarm_event_keys(T0)) == 2


def test_a_reader_sees_one_snapshot_while_the_writer_goes_on(jpath: Path) -> None:
    with SqliteJournal(jpath) as j:
        j.append_messages([(T0 + k, "m/x", b"{}", 1) for k in range(3)])
        it = j.messages_between(None, None)
        first = next(it)
        j.append_messages([(T0 + 10, "m/x", b"{}", 1)])  # the writer is not blocked
        assert [first, *it] == list(j.messages_between(None, T0 + 10))


# --- durability settings ---------------------------------------------------------------
def test_wal_full_sync_and_schema_marks_are_set(jpath: Path) -> None:
    j = SqliteJournal(jpath)
    assert j._db.execute("PRAGMA synchronous").fetchone()[0] == 2  # FULL: fsync every commit
    assert j._db.execute("PRAGMA busy_timeout").fetchone()[0] > 0
    assert j._db.execute("PRAGMA wal_autocheckpoint").fetchone()[0] == 0  # not inside commits
    j.append_messages([(T0, "m/x", b"{}", 1)])
    other = sqlite3.connect(jpath)  # journal_mode and the header marks live in the file
    assert other.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert other.execute("PRAGMA application_id").fetchone()[0] == APPLICATION_ID
    assert other.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION
    other.close()
    j.close()
    # and again when an existing journal is opened
    with SqliteJournal(jpath) as j2:
        assert j2._db.execute("PRAGMA synchronous").fetchone()[0] == 2
        assert j2._db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"


def test_each_append_is_one_committed_transaction(jpath: Path) -> None:
    with SqliteJournal(jpath) as j:
        trace: list[str] = []
        j._db.set_trace_callback(trace.append)
        j.append_messages([(T0 + k, "m/x", b"{}", 1) for k in range(16)])
        j.append_events([(T0, "notice", "b01", None, {})] * 3)
        j._db.set_trace_callback(None)
    assert [s for s in trace if s in ("BEGIN IMMEDIATE", "COMMIT")] == [
        "BEGIN IMMEDIATE",
        "COMMIT",
    ] * 2
    # committed: a fresh connection sees every row without the writer closing
    db = sqlite3.connect(jpath)
    assert db.execute("SELECT count(*) FROM messages").fetchone()[0] == 16
    db.close()


# --- pruning ---------------------------------------------------------------------------
def _fill(j: SqliteJournal, n_old: int, n_new: int, now: float) -> None:
    old = now - 31 * DAY_S  # retention default 30 days, from issue 4
    new = now - 29 * DAY_S
    j.append_messages([(old + k, "m/x", b"{}", 1) for k in range(n_old)])
    j.append_messages([(new + k, "m/x", b"{}", 1) for k in range(n_new)])
    j.append_events([(old + k, "notice", "b01", None, {}) for k in range(n_old // 10)])
    j.append_events([(new + k, "alarm", "b01", "b01/r/1", {}) for k in range(5)])


def test_prune_deletes_only_rows_past_retention(jpath: Path) -> None:
    now = T0 + 40 * DAY_S
    with SqliteJournal(jpath) as j:
        _fill(j, 250, 40, now)
        assert j.prune(now, batch=100) == 250 + 25
        assert len(list(j.messages_between(None, None))) == 40
        assert all(m.recv_time >= now - 30 * DAY_S for m in j.messages_between(None, None))
        assert [e.kind for e in j.events_between(None, None)] == ["alarm"] * 5
        assert j.prune(now, batch=100) == 0


def test_prune_commits_every_batch_and_lets_another_writer_in_between(jpath: Path) -> None:
    now = T0 + 40 * DAY_S
    with SqliteJournal(jpath) as j:
        _fill(j, 1000, 10, now)
        other = sqlite3.connect(jpath, isolation_level=None, timeout=0)  # no waiting at all
        trace: list[str] = []
        wrote_between = 0

        def on_statement(sql: str) -> None:
            nonlocal wrote_between
            trace.append(sql)
            if sql == "BEGIN IMMEDIATE" and trace.count(sql) > 1:
                # the previous batch has committed: another connection can write right now
                other.execute("INSERT INTO events (time, kind, body) VALUES (?, 'service', '{}')",
                              (now,))  # fmt: skip
                wrote_between += 1

        j._db.set_trace_callback(on_statement)
        deleted = j.prune(now, batch=100, pause_s=0)
        j._db.set_trace_callback(None)
        other.close()
    assert deleted == 1000 + 100
    begins, commits = trace.count("BEGIN IMMEDIATE"), trace.count("COMMIT")
    # 1000 messages in 10 full batches + 1 short, 100 events in 1 full + 1 short
    assert begins == commits == 13
    assert wrote_between == 12


def test_prune_max_batches_stops_early(jpath: Path) -> None:
    now = T0 + 40 * DAY_S
    with SqliteJournal(jpath) as j:
        _fill(j, 300, 0, now)
        # at most 2 batches per table: 200 of the 300 messages, and all 30 events
        assert j.prune(now, batch=100, max_batches=2) == 200 + 30
        assert j.prune(now, batch=100) == 100


@pytest.mark.parametrize("n_old_messages", [0, 1000])
def test_prune_one_batch_at_a_time_reaches_the_events_too(jpath: Path, n_old_messages: int) -> None:
    """With max_batches=1 (the service prunes in small steps) an expired event goes, whether
    the messages have nothing to prune or a backlog of many batches."""
    now = T0 + 40 * DAY_S
    old = now - 31 * DAY_S  # past the 30-day default retention
    with SqliteJournal(jpath) as j:
        j.append_messages([(old + k, "m/x", b"{}", 1) for k in range(n_old_messages)])
        j.append_events([(old, "notice", "b01", None, {})])
        j.append_events([(now, "notice", "b01", None, {})])  # within retention: stays
        deleted = [j.prune(now, batch=100, max_batches=1) for _ in range(3)]
        assert [e.time for e in j.events_between(None, None)] == [now]
        remaining = len(list(j.messages_between(None, None)))
    assert remaining == max(n_old_messages - 300, 0)
    assert sum(deleted) == min(n_old_messages, 300) + 1


# --- refusing what is not a journal ----------------------------------------------------
def _one_line(exc: pytest.ExceptionInfo[UserError]) -> str:
    text = str(exc.value)
    assert "\n" not in text and text
    return text


def test_other_sqlite_file_is_refused_and_left_alone(tmp_path: Path) -> None:
    other = tmp_path / "other.db"
    db = sqlite3.connect(other)
    db.execute("CREATE TABLE t (x)")
    db.commit()
    db.close()
    before = other.read_bytes()
    with pytest.raises(UserError) as exc:
        SqliteJournal(other)
    assert "not a Hourwatch journal" in _one_line(exc)
    with pytest.raises(UserError) as exc:
        journal_records(other)
    assert "not a Hourwatch journal" in _one_line(exc)
    assert other.read_bytes() == before
    assert not is_journal(other)


def test_newer_schema_is_refused(jpath: Path) -> None:
    SqliteJournal(jpath).close()
    assert is_journal(jpath)
    db = sqlite3.connect(jpath)
    db.execute(f"PRAGMA user_version = {SCHEMA_VERSION + 1}")
    db.commit()
    db.close()
    with pytest.raises(UserError) as exc:
        SqliteJournal(jpath)
    assert "newer" in _one_line(exc)
    with pytest.raises(UserError) as exc:
        list(journal_records(jpath))
    assert "newer" in _one_line(exc)


def test_text_file_and_missing_file(tmp_path: Path) -> None:
    log = tmp_path / "night.jsonl"
    log.write_text('{"time": "2026-03-14T00:00:00Z", "topic": "t", "payload": "x"}\n')
    with pytest.raises(UserError) as exc:
        SqliteJournal(log)
    assert "not an SQLite database" in _one_line(exc)
    assert not is_journal(log) and not is_journal(tmp_path / "missing.db")
    with pytest.raises(UserError) as exc:
        journal_records(tmp_path / "missing.db")
    assert "no such file" in _one_line(exc)
    with pytest.raises(UserError) as exc:
        SqliteJournal(tmp_path / "no-such-folder" / "j.db")
    _one_line(exc)


def test_empty_file_becomes_a_journal(tmp_path: Path) -> None:
    p = tmp_path / "new.db"
    p.touch()
    with SqliteJournal(p) as j:
        j.append_messages([(T0, "m/x", b"{}", 1)])
    assert is_journal(p)


# --- the journal as log records --------------------------------------------------------
@pytest.mark.parametrize(
    ("raw", "expected"),
    [
        (b'{"volume_ml": 12.5, "seq": 3}', {"volume_ml": 12.5, "seq": 3}),
        (b'  {"a": {"b": [1, 2]}}', {"a": {"b": [1, 2]}}),
        (b'{"a": "\\ud83d\\ude00"}', {"a": "\U0001f600"}),  # an escaped surrogate pair is fine
        (b"[1, 2]", "[1, 2]"),  # JSON, but not an object: the engine decides on the text
        (b'"text"', '"text"'),
        (b"7;2026-03-14T00:00:01Z;8.0;OK", "7;2026-03-14T00:00:01Z;8.0;OK"),
        (b'{"a": NaN}', '{"a": NaN}'),  # strict JSON cannot write these back
        (b'{"a": 1e999}', '{"a": 1e999}'),
        (b'{"a": "\\udcff"}', '{"a": "\\udcff"}'),
        (b'{"a": 1', '{"a": 1'),
        ('{"w": "\u00e9"}'.encode(), {"w": "\u00e9"}),
    ],
)
def test_log_payload(raw: bytes, expected: object) -> None:
    assert log_payload(raw) == expected


def test_log_payload_keeps_non_utf8_bytes_recoverable() -> None:
    raw = b"\xff\xfe\x00meter"
    text = log_payload(raw)
    assert isinstance(text, str) and text.startswith(BINARY_MARKER)
    assert base64.b64decode(text[len(BINARY_MARKER) :]) == raw


def test_journal_records_times_topics_and_skipped_topics(jpath: Path) -> None:
    with SqliteJournal(jpath) as j:
        ids = j.append_messages([
            (T0 + 0.123456, "meters/m-01/volume", b'{"volume_ml": 1}', 1),
            (T0 + 1, "x" * 513, b"{}", 0),  # legal in MQTT, too long for the log format
            (T0 + 2, "meters/m-01/volume", b"\x80", 1),
        ])  # fmt: skip
    items = list(journal_items(jpath))
    assert isinstance(items[1], BadLine) and items[1].line_no == ids[1]
    recs = list(journal_records(jpath))
    assert [i for i, _ in recs] == [ids[0], ids[2]]
    assert recs[0][1].time.timestamp() == pytest.approx(T0 + 0.123456, abs=1e-6)
    assert recs[0][1].payload == {"volume_ml": 1}
    assert recs[1][1].payload == BINARY_MARKER + "gA=="


# --- which messages belong to a bed ----------------------------------------------------
def test_bed_filter_follows_bindings_in_receive_order(jpath: Path) -> None:
    rows = [
        (T0, "hourwatch/beds/b01/context", _ctx(["m-1"]), 1),  # 0: b01 binds m-1
        (T0 + 10, "meters/m-1/volume", b"{}", 1),  # 1: b01's
        (T0 + 11, "meters/m-10/volume", b"{}", 1),  # 2: m-10 is not m-1 (whole level only)
        (T0 + 12, "hourwatch/beds/b01/intake", b"{}", 1),  # 3: b01's own topic
        (T0 + 13, "hourwatch/ack", b'{"alarm_id": "b01/pod-hourly/x"}', 1),  # 4: b01's ack
        (T0 + 14, "hourwatch/ack", b'{"alarm_id": "b010/pod-hourly/x"}', 1),  # 5: not b01
        (T0 + 15, "hourwatch/beds/b02/context", b"not json", 1),  # 6: ignored, as live
        (T0 + 16, "meters/m-1/volume", b"{}", 1),  # 7: still b01's
        (T0 + 18, "hourwatch/beds/b02/context", _ctx(["m-1"]), 1),  # 8: refused: b01 holds it
        (T0 + 19, "meters/m-1/volume", b"{}", 1),  # 9: still b01's
        (T0 + 20, "hourwatch/beds/b02/context", _ctx(["m-1"], ["m-1"]), 1),  # 10: b02 takes m-1
        (T0 + 30, "meters/m-1/volume", b"{}", 1),  # 11: b02's
        (T0 + 40, "hourwatch/beds/b02/context", _ctx([]), 1),  # 12: b02 lets it go
        (T0 + 50, "meters/m-1/volume", b"{}", 1),  # 13: nobody's
    ]
    with SqliteJournal(jpath) as j:
        ids = j.append_messages(rows)

        def kept(bed: str, t0: float | None = None) -> list[int]:
            return [ids.index(m.id) for m in j.messages_between(t0, None, BedFilter(bed))]

        assert kept("b01") == [0, 1, 3, 4, 7, 9]
        assert kept("b02") == [6, 8, 10, 11, 12]
        # a range starting after the binding still knows it (contexts before t0 are read)
        assert kept("b01", T0 + 5) == [1, 3, 4, 7, 9]
        assert kept("b02", T0 + 25) == [11, 12]
    assert [i for i, _ in journal_records(jpath, bed="b01")] == [ids[k] for k in (0, 1, 3, 4, 7, 9)]


def test_bed_filter_uses_the_topic_prefix(jpath: Path) -> None:
    with SqliteJournal(jpath) as j:
        j.append_messages([
            (T0, "ward7/beds/b01/context", _ctx(["m-1"]), 1),
            (T0 + 1, "meters/m-1/volume", b"{}", 1),
        ])  # fmt: skip
    assert len(list(journal_records(jpath, bed="b01", prefix="ward7"))) == 2
    assert list(journal_records(jpath, bed="b01")) == []


# --- checkpoints: outside commits, and a WAL that stays bounded --------------------------
PAYLOAD = b'{"volume_ml": 12.5, "seq": 3, "note": "' + b"x" * 150 + b'"}'  # invented reading


def _batch(k: int) -> list[tuple[float, str, bytes, int]]:
    return [(T0 + k + i / 16, "meters/m-01/volume", PAYLOAD, 1) for i in range(16)]


def test_wal_stays_small_with_checkpoints_and_grows_without(tmp_path: Path) -> None:
    sizes = {}
    for with_checkpoints in (True, False):
        path = tmp_path / f"{with_checkpoints}.db"
        with SqliteJournal(path) as j:
            largest = 0
            for k in range(250):
                j.append_messages(_batch(k))
                if with_checkpoints and k % 10 == 9:  # about the service's once a second
                    done = j.checkpoint(min_interval_s=0)
                    assert done is not None and done.complete
                largest = max(largest, j.wal_bytes())
            assert j.wal_bytes() == (path.parent / f"{path.name}-wal").stat().st_size
            sizes[with_checkpoints] = largest
            # durability settings as before
            assert j._db.execute("PRAGMA synchronous").fetchone()[0] == 2
            assert j._db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        with SqliteJournal(path) as j:
            assert len(list(j.messages_between(None, None))) == 250 * 16
    # 10 commits of a few 4 KiB pages each between checkpoints
    assert sizes[True] < 512 * 1024
    # no automatic checkpoint: SQLite's default one would have stopped near 4 MiB (1000 pages)
    assert sizes[False] > 5 * 1024 * 1024


def test_checkpoint_runs_at_most_once_per_interval(jpath: Path) -> None:
    with SqliteJournal(jpath) as j:
        j.append_messages(_batch(0))
        assert j.checkpoint(min_interval_s=60) is not None
        j.append_messages(_batch(1))
        assert j.checkpoint(min_interval_s=60) is None  # skipped: the last one was just now
        with pytest.raises(ValueError):
            j.checkpoint("EVERYTHING")


def test_a_stuck_checkpoint_is_forced_once_the_wal_is_large(
    jpath: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A reader holding an old snapshot stops PASSIVE checkpoints short and the WAL grows;
    past the size limit the journal waits for the reader (briefly) and empties the WAL."""
    monkeypatch.setattr("daemon.journal.WAL_LIMIT_BYTES", 256 * 1024)
    monkeypatch.setattr("daemon.journal.CHECKPOINT_STUCK_CALLS", 3)
    monkeypatch.setattr("daemon.journal.FORCE_BUSY_MS", 5000)
    with SqliteJournal(jpath) as j:
        j.append_messages(_batch(0))
        reader = sqlite3.connect(jpath, isolation_level=None, check_same_thread=False)
        reader.execute("BEGIN")
        reader.execute("SELECT count(*) FROM messages").fetchone()  # holds this snapshot
        for k in range(1, 200):
            j.append_messages(_batch(k))
            if j.wal_bytes() > 256 * 1024:
                break
        assert j.wal_bytes() > 256 * 1024
        for _ in range(2):
            r = j.checkpoint(min_interval_s=0)
            assert r is not None and not r.complete and not r.forced  # the reader holds it
        # the third incomplete one forces: the reader ends 0.2 s into the forced wait
        ender = threading.Timer(0.2, lambda: reader.execute("COMMIT"))
        ender.start()
        r = j.checkpoint(min_interval_s=0)
        ender.join()
        reader.close()
        assert r is not None and r.forced and r.complete
        assert j.wal_bytes() == 0  # TRUNCATE empties the file
        j.append_messages(_batch(500))
        assert len(list(j.messages_between(None, None))) == (k + 2) * 16


def test_a_forced_checkpoint_gives_up_while_the_reader_stays(
    jpath: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr("daemon.journal.WAL_LIMIT_BYTES", 128 * 1024)
    monkeypatch.setattr("daemon.journal.CHECKPOINT_STUCK_CALLS", 2)
    monkeypatch.setattr("daemon.journal.FORCE_BUSY_MS", 50)
    with SqliteJournal(jpath) as j:
        j.append_messages(_batch(0))
        reader = j.messages_between(None, None)
        next(reader)  # an export in progress holds its snapshot
        for k in range(1, 100):
            j.append_messages(_batch(k))
        forced = []
        for _ in range(6):
            r = j.checkpoint(min_interval_s=0)
            assert r is not None and not r.complete
            forced.append(r.forced)
        assert forced == [False, True] * 3  # one forced try per 2 calls, not at every call
        assert sum(1 for _ in reader) == 15  # the export still reads its own snapshot
        # the reader is gone: the next checkpoint completes and the WAL shrinks at its reset
        r = j.checkpoint(min_interval_s=0)
        assert r is not None and r.complete
        j.append_messages(_batch(200))
        assert j.wal_bytes() <= 128 * 1024


# --- never opening the database file outside SQLite -----------------------------------
# Closing any descriptor of a file drops all of the process's POSIX locks on it, the
# writer's included; another process closing its journal then deleted the live WAL.
HOLDER = """
import json, sys
from pathlib import Path
from daemon.journal import SqliteJournal, is_journal, is_sqlite, journal_records
path, t0 = Path(sys.argv[1]), float(sys.argv[2])
wal = path.with_name(path.name + "-wal")
j = SqliteJournal(path)
j.append_messages([(t0 + k, "meters/m-01/volume", b"{}", 1) for k in range(10)])
# every way this process looks at its own file while the writer is open
n = len(list(j.messages_between(None, None))) + len(list(j.events_between(None, None)))
n += len(list(journal_records(path))) + is_journal(path) + is_sqlite(path)
print(json.dumps({"read": n, "wal": wal.exists()}), flush=True)
sys.stdin.readline()  # the other process has opened and closed its own journal
out = {"wal": wal.exists()}
try:
    j.append_messages([(t0 + 100 + k, "meters/m-01/volume", b"{}", 1) for k in range(10)])
    out["read"] = len(list(j.messages_between(None, None)))
except Exception as exc:
    out["error"] = repr(exc)
j.close()
print(json.dumps(out), flush=True)
"""


def test_another_process_closing_its_journal_leaves_the_writers_wal_alone(jpath: Path) -> None:
    root = Path(__file__).resolve().parent.parent
    holder = subprocess.Popen(
        [sys.executable, "-c", HOLDER, str(jpath), str(T0)],
        cwd=root, stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True,
    )  # fmt: skip
    assert holder.stdin is not None and holder.stdout is not None
    try:
        before = json.loads(holder.stdout.readline())
        assert before == {"read": 10 + 0 + 10 + 2, "wal": True}
        with SqliteJournal(jpath) as other:  # e.g. a review tool, or a restart attempt
            assert len(list(other.messages_between(None, None))) == 10
        assert is_journal(jpath) and is_sqlite(jpath)
        holder.stdin.write("go\n")
        holder.stdin.flush()
        after = json.loads(holder.stdout.readline())
    finally:
        holder.stdin.close()
        assert holder.wait(30) == 0
    assert after == {"wal": True, "read": 20}
    db = sqlite3.connect(jpath)
    assert db.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    assert db.execute("SELECT count(*) FROM messages").fetchone()[0] == 20
    db.close()


def test_a_file_that_is_not_sqlite_is_refused_untouched(tmp_path: Path) -> None:
    log = tmp_path / "night.jsonl"
    log.write_text('{"time": "2026-03-14T00:00:00Z", "topic": "t", "payload": "x"}\n' * 50)
    before = log.read_bytes()
    with pytest.raises(UserError) as exc:
        SqliteJournal(log)
    assert "not an SQLite database" in _one_line(exc)
    with pytest.raises(UserError) as exc:
        journal_records(log)
    assert "not an SQLite database" in _one_line(exc)
    assert not is_sqlite(log) and not is_journal(log)
    assert log.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["night.jsonl"]  # no -wal, no -shm


def test_is_sqlite(tmp_path: Path, jpath: Path) -> None:
    SqliteJournal(jpath).close()
    other = tmp_path / "other.db"
    db = sqlite3.connect(other)
    db.execute("CREATE TABLE t (x)")
    db.commit()
    db.close()
    empty = tmp_path / "empty.jsonl"
    empty.touch()
    assert is_sqlite(jpath) and is_sqlite(other)
    assert not is_sqlite(empty) and not is_journal(empty)  # an empty log, not a database
    assert not is_sqlite(tmp_path / "missing.db") and not is_sqlite(tmp_path)
    # nothing created beside a file that is not a WAL database (a closed journal's reader
    # may leave an empty -wal and -shm, as SQLite's read-only connections do)
    names = sorted(p.name for p in tmp_path.iterdir() if not p.name.startswith("j.db"))
    assert names == ["empty.jsonl", "other.db"]


# --- a full disk ---------------------------------------------------------------------------


def test_a_full_journal_says_so_and_takes_rows_again_once_there_is_room(jpath: Path) -> None:
    """The size cap stands for a full disk: an append fails with SQLITE_FULL (not with
    a second error from undoing it), keeps nothing of the failed batch, and appends
    succeed again once the cap is lifted or pruning frees pages."""
    from daemon.journal import is_full

    with SqliteJournal(jpath, max_bytes=256 * 1024) as j:
        n = 0
        with pytest.raises(sqlite3.OperationalError) as exc:
            while True:
                j.append_messages(_batch(n))
                n += 1
        assert is_full(exc.value), exc.value
        stored = len(list(j.messages_between(None, None)))
        assert stored == n * 16  # the failed batch left nothing behind
        j.limit(0)
        j.append_messages(_batch(n))
        assert len(list(j.messages_between(None, None))) == (n + 1) * 16
