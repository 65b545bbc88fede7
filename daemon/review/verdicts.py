"""Reviewers' verdicts on alarms, in a small SQLite file beside the source, or, for a
PostgreSQL journal, in its own database (table `annotation`, migration 3 of
daemon/journal_pg.py).

`SOURCE.annotations.sqlite` holds one row per alarm id: actionable or not, a note,
and the alarm's bed, rule and annunciated span, so a comparison under another rule
set can still tell whether it would have raised the same alarm.
"""

from __future__ import annotations

import sqlite3
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from ..engine.rules import canonical_alarm_id, canonical_rule_id
from ..journal_api import JournalTarget, PgUrl

SUFFIX = ".annotations.sqlite"
SCHEMA_VERSION = 1

_DDL = """
CREATE TABLE IF NOT EXISTS annotation (
    alarm_id     TEXT PRIMARY KEY,
    bed          TEXT NOT NULL,
    rule         TEXT NOT NULL,
    span_start   REAL NOT NULL,   -- epoch s UTC: activation (or onset if never annunciated)
    span_end     REAL,            -- epoch s UTC: resolution; NULL = open at the end of the source
    actionable   INTEGER NOT NULL CHECK (actionable IN (0, 1)),
    note         TEXT,
    annotated_at TEXT NOT NULL    -- ISO-8601 UTC, when the verdict was stored
)
"""


@dataclass(frozen=True, slots=True)
class Annotation:
    alarm_id: str
    bed: str
    rule: str
    span_start: float
    span_end: float | None
    actionable: bool
    note: str | None
    annotated_at: str


def store_path(source: JournalTarget) -> JournalTarget:
    """Where the verdicts on `source` are kept: a PostgreSQL journal keeps its own."""
    if isinstance(source, PgUrl):
        return source
    return source.with_name(source.name + SUFFIX)


def _connect(path: Path) -> sqlite3.Connection:
    con = sqlite3.connect(path)
    version = con.execute("PRAGMA user_version").fetchone()[0]
    if version not in (0, SCHEMA_VERSION):
        con.close()
        raise ValueError(f"{path}: annotation schema {version}, expected {SCHEMA_VERSION}")
    con.execute(_DDL)
    con.execute(f"PRAGMA user_version = {SCHEMA_VERSION}")
    return con


def put(path: JournalTarget, a: Annotation) -> Annotation | None:
    """Store a verdict (replacing an earlier one for the same alarm); return the earlier."""
    if isinstance(path, PgUrl):
        return _pg_put(path, a)
    con = _connect(path)
    try:
        with con:
            before = _rows(con, "WHERE alarm_id = ?", (a.alarm_id,))
            con.execute(
                "INSERT OR REPLACE INTO annotation VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                (
                    a.alarm_id,
                    a.bed,
                    a.rule,
                    a.span_start,
                    a.span_end,
                    int(a.actionable),
                    a.note,
                    a.annotated_at,
                ),
            )
    finally:
        con.close()
    return before[0] if before else None


def load(path: JournalTarget) -> list[Annotation]:
    """Every verdict in the file, oldest alarm first; none if there is no file yet."""
    if isinstance(path, PgUrl):
        return _pg_load(path)
    if not path.is_file():
        return []
    con = _connect(path)
    try:
        return _rows(con, "ORDER BY span_start, alarm_id", ())
    finally:
        con.close()


_COLS = "alarm_id, bed, rule, span_start, span_end, actionable, note, annotated_at"


def _pg_put(url: PgUrl, a: Annotation) -> Annotation | None:
    import psycopg

    from ..journal_pg import open_reader

    try:
        with open_reader(url) as conn, conn.transaction():
            before = conn.execute(f"SELECT {_COLS} FROM annotation WHERE alarm_id = %s "
                                  "FOR UPDATE", (a.alarm_id,)).fetchall()  # fmt: skip
            conn.execute(
                f"INSERT INTO annotation ({_COLS}) VALUES (%s, %s, %s, %s, %s, %s, %s, %s) "
                "ON CONFLICT (alarm_id) DO UPDATE SET bed = EXCLUDED.bed, rule = EXCLUDED.rule, "
                "span_start = EXCLUDED.span_start, span_end = EXCLUDED.span_end, "
                "actionable = EXCLUDED.actionable, note = EXCLUDED.note, "
                "annotated_at = EXCLUDED.annotated_at",
                (a.alarm_id, a.bed, a.rule, a.span_start, a.span_end, a.actionable, a.note,
                 a.annotated_at))  # fmt: skip
    except psycopg.Error as exc:
        raise ValueError(str(exc).strip().splitlines()[0]) from None
    return _annotations(before)[0] if before else None


def _pg_load(url: PgUrl) -> list[Annotation]:
    import psycopg

    from ..journal_pg import open_reader

    try:
        with open_reader(url) as conn:
            rows = conn.execute(f"SELECT {_COLS} FROM annotation "
                                "ORDER BY span_start, alarm_id").fetchall()  # fmt: skip
    except psycopg.Error as exc:
        raise ValueError(str(exc).strip().splitlines()[0]) from None
    return _annotations(rows)


def _rows(con: sqlite3.Connection, tail: str, params: tuple[object, ...]) -> list[Annotation]:
    cur = con.execute(f"SELECT {_COLS} FROM annotation {tail}", params)
    return _annotations(cur.fetchall())


def _annotations(rows: list[Any]) -> list[Annotation]:
    return [  # an annotation of an alarm under a rule's old id counts for its current id
        Annotation(
            canonical_alarm_id(r[0]),
            r[1],
            canonical_rule_id(r[2]),
            float(r[3]),
            None if r[4] is None else float(r[4]),
            bool(r[5]),
            r[6],
            r[7],
        )
        for r in rows
    ]


def now_iso() -> str:
    return datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
