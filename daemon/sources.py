"""Where recorded messages come from: a JSON Lines log (or, later, the journal)."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

from .errors import UserError
from .logfile import BadLine, LogRecord, read_log


def open_source(path: Path) -> Iterator[tuple[int, LogRecord] | BadLine]:
    """Records in receive order from a log file; one-line UserError if unusable."""
    if not path.is_file():
        raise UserError(f"{path}: no such file")
    return read_log(path)
