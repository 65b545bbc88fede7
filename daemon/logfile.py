"""The JSON Lines log format: one inbound message per line (shell side)."""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from pydantic import AwareDatetime, BaseModel, ConfigDict, Field, ValidationError

from .errors import UserError


class LogRecord(BaseModel):
    """{"time": receive time, "topic": str, "payload": JSON object or string}."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    time: AwareDatetime
    topic: str = Field(min_length=1, max_length=512)
    payload: dict[str, Any] | str


@dataclass(frozen=True, slots=True)
class BadLine:
    line_no: int
    reason: str


def read_log(path: Path) -> Iterator[tuple[int, LogRecord] | BadLine]:
    """Yield records in file order; a malformed line is reported, never raised."""
    try:
        fh = path.open("rb")
    except OSError as exc:
        raise UserError(f"{path}: cannot open log: {exc.strerror}") from None
    with fh:
        for n, raw in enumerate(fh, start=1):
            if not raw.strip():
                continue
            try:
                yield n, LogRecord.model_validate_json(raw)
            except ValidationError as exc:
                err = exc.errors()[0]
                where = ".".join(str(x) for x in err["loc"])
                what = err["msg"]
                if err["type"] == "json_invalid":
                    yield BadLine(n, "not JSON")
                else:
                    yield BadLine(n, f"{where}: {what}" if where else what)
