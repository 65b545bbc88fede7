"""The JSON Lines log format: one inbound message per line (shell side)."""

from __future__ import annotations

import re
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

import orjson
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


# The receive times loggers write: a date, a time with up to 6 decimals, Z or an offset.
_PLAIN_TIME = re.compile(
    r"[0-9]{4}-[0-9]{2}-[0-9]{2}T[0-9]{2}:[0-9]{2}:[0-9]{2}(\.[0-9]{1,6})?(Z|[+-][0-9]{2}:[0-9]{2})"
)
_FIELDS = frozenset({"time", "topic", "payload"})
# orjson reads an integer beyond 64 bits (signed) as a float, the model keeps it exact: a line
# with such a long run of digits (anywhere) goes to the model
_LONG_NUMBER = re.compile(rb"[0-9]{19}")
_new, _set = object.__new__, object.__setattr__


def _built(t: datetime, topic: str, payload: dict[str, Any] | str) -> LogRecord:
    """A record from checked values, as model_construct makes one, at a third of its
    cost (a log has a record per line)."""
    rec: LogRecord = _new(LogRecord)
    _set(rec, "__dict__", {"time": t, "topic": topic, "payload": payload})
    _set(rec, "__pydantic_fields_set__", _FIELDS)
    _set(rec, "__pydantic_extra__", None)
    _set(rec, "__pydantic_private__", None)
    return rec


def _construct(t: datetime, topic: str, payload: dict[str, Any] | str) -> LogRecord:
    return LogRecord.model_construct(time=t, topic=topic, payload=payload)


def _pick_builder() -> Any:
    """The quick builder, unless this pydantic keeps a model's state otherwise."""
    line = b'{"time": "2026-01-01T00:00:00Z", "topic": "t", "payload": {"v": 1}}'
    ref = LogRecord.model_validate_json(line)
    try:
        quick = _built(ref.time, ref.topic, ref.payload)
        if quick == ref and quick.model_dump_json() == ref.model_dump_json():
            return _built
    except Exception:  # pragma: no cover - another pydantic
        pass
    return _construct  # pragma: no cover


_build = _pick_builder()


def plain_record(raw: bytes) -> LogRecord | None:
    """The common line, read without the model: valid JSON (orjson), exactly the three
    fields, a topic of 1-512 characters, an object or string payload and a plain
    ISO 8601 receive time with its offset. Whatever is not plain gets None, and the
    model decides (with its error message): the same record either way."""
    if _LONG_NUMBER.search(raw) is not None:
        return None
    try:
        obj = orjson.loads(raw)
    except orjson.JSONDecodeError:
        return None
    if type(obj) is not dict or obj.keys() != _FIELDS:
        return None
    when, topic, payload = obj["time"], obj["topic"], obj["payload"]
    if type(topic) is not str or not 0 < len(topic) <= 512:
        return None
    if type(payload) is not dict and type(payload) is not str:
        return None
    if type(when) is not str or _PLAIN_TIME.fullmatch(when) is None:
        return None
    try:
        t = datetime.fromisoformat(when)
    except ValueError:  # 24:00, a 30th of February, an offset of 99 hours ...
        return None
    rec: LogRecord = _build(t, topic, payload)
    return rec


def read_log(path: Path, checked: bool = False) -> Iterator[tuple[int, LogRecord] | BadLine]:
    """Yield records in file order; a malformed line is reported, never raised.
    `checked`: every line through the model (the reference the fast path is tested
    against)."""
    try:
        fh = path.open("rb")
    except OSError as exc:
        raise UserError(f"{path}: cannot open log: {exc.strerror}") from None
    fast = None if checked else plain_record
    with fh:
        for n, raw in enumerate(fh, start=1):
            if fast is not None:
                rec = fast(raw)
                if rec is not None:
                    yield n, rec
                    continue
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
