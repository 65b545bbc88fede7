"""The JSON Lines log format: one inbound message per line (shell side)."""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import IO, Any

from pydantic import AwareDatetime, BaseModel, ConfigDict, Field, ValidationError
from pydantic_core import from_json

from .errors import UserError

MAX_TOPIC = 512  # characters


class LogRecord(BaseModel):
    """{"time": receive time, "topic": str, "payload": JSON object or string}."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    time: AwareDatetime
    topic: str = Field(min_length=1, max_length=MAX_TOPIC)
    payload: dict[str, Any] | str


@dataclass(frozen=True, slots=True)
class BadLine:
    line_no: int
    reason: str


# (line, receive time in epoch seconds, topic, payload): a log record as replay uses it
Message = tuple[int, float, str, dict[str, Any] | str]


def read_log(path: Path) -> Iterator[tuple[int, LogRecord] | BadLine]:
    """Yield records in file order; a malformed line is reported, never raised."""
    with _open(path) as fh:
        for n, raw in enumerate(fh, start=1):
            item = _checked(n, raw)
            if item is not None:
                yield item


def read_messages(path: Path) -> Iterator[Message | BadLine]:
    """read_log's lines as messages, for replay: the same messages and the same BadLines,
    the usual line read without a LogRecord (building one costs more than reading it)."""
    with _open(path) as fh:
        for n, raw in enumerate(fh, start=1):
            plain = _plain(n, raw)
            if plain is not None:
                yield plain
                continue
            item = _checked(n, raw)
            if isinstance(item, BadLine):
                yield item
            elif item is not None:
                rec = item[1]
                yield n, rec.time.timestamp(), rec.topic, rec.payload


def as_messages(records: Iterable[tuple[int, LogRecord] | BadLine]) -> Iterator[Message | BadLine]:
    """Records (of a log, a journal, or made by hand) as messages."""
    for item in records:
        if isinstance(item, BadLine):
            yield item
        else:
            n, rec = item
            yield n, rec.time.timestamp(), rec.topic, rec.payload


def _open(path: Path) -> IO[bytes]:
    try:
        fh = path.open("rb")
    except OSError as exc:
        raise UserError(f"{path}: cannot open log: {exc.strerror}") from None
    # No JSON line holds a NUL byte: one in the first line is a program, an image or a
    # compressed file, not a log, and one line says so (not one "not JSON" per line).
    # Garbage further on stays a malformed line, reported and skipped.
    first = fh.readline(8192)
    if b"\0" in first:
        fh.close()
        if first.startswith((b"\xff\xfe", b"\xfe\xff")):  # a byte-order mark
            raise UserError(f"{path}: UTF-16 text, not a UTF-8 JSON Lines log: convert it")
        raise UserError(f"{path}: not a JSON Lines log (binary content)")
    fh.seek(0)
    return fh


_VALIDATE_JSON = LogRecord.__pydantic_validator__.validate_json  # model_validate_json's work


def _checked(n: int, raw: bytes) -> tuple[int, LogRecord] | BadLine | None:
    """A line through the model: a record, a BadLine with pydantic's reason, or None for
    a blank line."""
    if not raw.strip():
        return None
    try:
        return n, _VALIDATE_JSON(raw)
    except ValidationError as exc:
        err = exc.errors()[0]
        where = ".".join(str(x) for x in err["loc"])
        what = err["msg"]
        if err["type"] == "json_invalid":
            return BadLine(n, "not JSON")
        return BadLine(n, f"{where}: {what}" if where else what)


def _plain(n: int, raw: bytes) -> Message | None:
    """Line n as a message if it is the usual line: an object of exactly time, topic
    and payload, its time in UTC as YYYY-MM-DDTHH:MM:SS[.ffffff]Z. None for anything else,
    which the model then reads (and refuses with its own reason, if it does).

    The same JSON parser as the model's (pydantic-core's: big integers stay integers,
    NaN is read, a repeated key's last value counts), and a time the model reads alike."""
    try:
        obj = from_json(raw)
    except ValueError:
        return None
    if type(obj) is not dict or len(obj) != 3:
        return None
    text, topic, payload = obj.get("time"), obj.get("topic"), obj.get("payload")
    if type(topic) is not str or not 0 < len(topic) <= MAX_TOPIC:
        return None
    if type(payload) is not dict and type(payload) is not str:
        return None
    if type(text) is not str:
        return None
    form, k = text[4:20:3], len(text)  # the separators: "--T::" then "Z", or "." and digits
    if not (
        (form == "--T::Z" and k == 20) or (form == "--T::." and 22 <= k <= 27 and text[-1] == "Z")
    ):
        return None  # any other form of time, offsets included: the model's parser
    try:  # with the form fixed, fromisoformat takes only digits where they must be
        t = datetime.fromisoformat(text).timestamp()
    except ValueError:
        return None  # no such date or time (the model says which)
    return n, t, topic, payload
