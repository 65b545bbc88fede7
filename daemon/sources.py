"""Where recorded messages come from: a JSON Lines log, a journal file or a PostgreSQL
journal."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

from .errors import UserError
from .journal import is_sqlite, journal_items
from .journal_api import JournalTarget, PgUrl
from .logfile import BadLine, LogRecord, Message, as_messages, read_log, read_messages


def open_source(path: JournalTarget) -> Iterator[tuple[int, LogRecord] | BadLine]:
    """Records in receive order from a log file, a journal file or a PostgreSQL journal
    (a postgresql:// URL); one-line UserError if unusable.

    From a log, the int is the line number; from a journal, the message id (a message the
    log format cannot hold comes as a BadLine with its id)."""
    if isinstance(path, PgUrl):
        from .journal_pg import journal_items as pg_items

        return pg_items(path)
    if not path.is_file():
        raise UserError(f"{path}: no such file")
    if is_sqlite(path):
        return journal_items(path)
    return read_log(path)


def open_messages(path: JournalTarget) -> Iterator[Message | BadLine]:
    """open_source's records as messages (line, receive time, topic, payload); a log
    file's read without building its records."""
    if isinstance(path, PgUrl) or not path.is_file() or is_sqlite(path):
        return as_messages(open_source(path))
    return read_messages(path)


def require(source: JournalTarget, what: str = "file") -> JournalTarget:
    """A command's SOURCE: a file that exists, or a PostgreSQL URL (checked on opening)."""
    if isinstance(source, Path) and not source.is_file():
        raise UserError(f"{source}: no such {what}")
    return source
