"""What the service needs from a journal, and where a journal is.

Two journals give the same semantics (messages, events, the delivery outbox, annotations,
retention): `SqliteJournal` (daemon/journal.py), one file, the default for one machine,
and `PostgresJournal` (daemon/journal_pg.py), for an active/standby pair (daemon/ha.py)
and a hospital that runs PostgreSQL already. A journal is named by a file path or by a
libpq URL `postgresql://user@host:5432/db`; the password never comes from that URL (see
`pg_password`).

Fencing: a PostgreSQL journal opened with a `FenceToken` checks, in every write
transaction, that the group's lease still carries that token; a write from an instance
that has lost its lease raises `Fenced` and changes nothing.
"""

from __future__ import annotations

import os
import sqlite3
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Protocol, Self
from urllib.parse import urlsplit, urlunsplit

from .errors import UserError

if TYPE_CHECKING:
    from .journal import BedFilter, Checkpoint, StoredEvent, StoredMessage, StoredSnapshot

ENV_PG_PASSWORD = "HOURWATCH_PG_PASSWORD"
ENV_PG_PASSWORD_FILE = "HOURWATCH_PG_PASSWORD_FILE"
URL_SCHEMES = ("postgresql", "postgres")


class Fenced(Exception):
    """This instance no longer holds its group's lease: nothing was written."""


@dataclass(frozen=True)
class FenceToken:
    """The lease an active instance writes under: its group and the token it was given."""

    group: str
    token: int


@dataclass(frozen=True)
class PgUrl:
    """A PostgreSQL journal, named by a libpq URL (without a password)."""

    url: str

    def __str__(self) -> str:
        return self.url

    @property
    def name(self) -> str:  # as a Path's name, for messages that name the source
        return self.url


JournalTarget = Path | PgUrl


def is_url(text: str) -> bool:
    return text.split("://", 1)[0].lower() in URL_SCHEMES and "://" in text


def pg_url(text: str, where: str = "journal.url") -> PgUrl:
    """A libpq URL checked for what must not be in it (a password) and what must."""
    try:
        parts = urlsplit(text)
    except ValueError as exc:
        raise UserError(f"{where}: not a URL: {exc}") from None
    if parts.scheme.lower() not in URL_SCHEMES:
        raise UserError(f"{where}: expected postgresql://USER@HOST:PORT/DATABASE, got {text!r}")
    if parts.password is not None:
        raise UserError(f"{where}: the URL carries a password: put it in the environment "
                        f"({ENV_PG_PASSWORD} or PGPASSWORD) or a file ({ENV_PG_PASSWORD_FILE} "
                        "or ~/.pgpass), never in the configuration")  # fmt: skip
    if "password=" in parts.query:
        raise UserError(f"{where}: the URL carries a password parameter; use the environment")
    if not parts.path.strip("/"):
        raise UserError(f"{where}: name the database: postgresql://USER@HOST:PORT/DATABASE")
    return PgUrl(urlunsplit(parts))


def target(text: str | Path) -> JournalTarget:
    """A command line's SOURCE or JOURNAL: a postgresql:// URL, else a file path."""
    if isinstance(text, str) and is_url(text):
        return pg_url(text, "journal")
    return Path(text)


def pg_password(env: Mapping[str, str] | None = None) -> str | None:
    """The database password from HOURWATCH_PG_PASSWORD or the file HOURWATCH_PG_PASSWORD_FILE
    names; None leaves it to libpq (PGPASSWORD, PGPASSFILE, ~/.pgpass, or no password)."""
    env = os.environ if env is None else env
    if env.get(ENV_PG_PASSWORD):
        return env[ENV_PG_PASSWORD]
    path = env.get(ENV_PG_PASSWORD_FILE)
    if path:
        try:
            return Path(path).read_text(encoding="utf-8").rstrip("\r\n")
        except OSError as exc:
            raise UserError(f"{ENV_PG_PASSWORD_FILE}: cannot read {path}: {exc.strerror}") from None
    return None


class Journal(Protocol):
    """The service's journal: durable on return of every write, one transaction each."""

    def append_messages(self, rows: Sequence[tuple[float, str, bytes, int]]) -> list[int]: ...
    def append_events(
        self, rows: Sequence[tuple[float, str, str | None, str | None, dict[str, object]]]
    ) -> list[int]: ...
    def mark_delivered(self, event_ids: Sequence[int], at: float) -> None: ...
    def save_snapshot(self, taken_at: float, message_id: int, body: bytes,
                      keep: int = 3) -> int: ...  # fmt: skip
    def snapshots(self) -> list[StoredSnapshot]: ...
    def prune(self, now: float, batch: int = 2000, *, pause_s: float = 0.002,
              max_batches: int = 0) -> int: ...  # fmt: skip
    def checkpoint(self, mode: str = "PASSIVE", *,
                   min_interval_s: float = 1.0) -> Checkpoint | None: ...  # fmt: skip
    def size_bytes(self) -> int: ...
    def undelivered_events(self) -> list[StoredEvent]: ...
    def messages_between(
        self, t0: float | None, t1: float | None, bed_topics: BedFilter | None = None
    ) -> Iterator[StoredMessage]: ...
    def events_between(self, t0: float | None, t1: float | None,
                       bed: str | None = None) -> Iterator[StoredEvent]: ...  # fmt: skip
    def alarm_event_keys(self, since: float) -> set[tuple[str, str, str, float]]: ...
    def close(self) -> None: ...
    def __enter__(self) -> Self: ...
    def __exit__(self, *exc: object) -> None: ...


def open_journal(where: JournalTarget, *, retention_days: float = 30.0, max_bytes: int = 0,
                 fence: FenceToken | None = None, pool_size: int = 4) -> Journal:  # fmt: skip
    """The journal at `where`, created (or migrated) to the current schema."""
    if isinstance(where, PgUrl):
        from .journal_pg import PostgresJournal

        return PostgresJournal(where, retention_days=retention_days, fence=fence,
                               pool_size=pool_size)  # fmt: skip
    from .journal import SqliteJournal

    return SqliteJournal(where, retention_days=retention_days, max_bytes=max_bytes)


def is_full(exc: BaseException) -> bool:
    """The journal's disk (or its size cap) is full, in either journal."""
    if isinstance(exc, sqlite3.OperationalError):
        return getattr(exc, "sqlite_errorcode", None) == sqlite3.SQLITE_FULL
    return getattr(exc, "sqlstate", None) == "53100"  # PostgreSQL: disk_full
