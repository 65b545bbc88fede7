"""Where recorded messages come from: a JSON Lines log or a journal file."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

from .errors import UserError
from .journal import is_sqlite, journal_items
from .logfile import BadLine, LogRecord, read_log


def open_source(path: Path) -> Iterator[tuple[int, LogRecord] | BadLine]:
    """Records in receive order from a log file or a journal; one-line UserError if unusable.

    From a log, the int is the line number; from a journal, the message id (a message the
    log format cannot hold comes as a BadLine with its id)."""
    if not path.is_file():
        raise UserError(f"{path}: no such file")
    if is_sqlite(path):
        return journal_items(path)
    return read_log(path)
