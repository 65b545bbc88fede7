"""Pure time parsing. Inside the engine a time is a float of UTC epoch seconds."""

from __future__ import annotations

import re
from datetime import UTC, datetime, timedelta, timezone, tzinfo

_OFFSET = re.compile(r"^([+-])(\d{2}):?(\d{2})$")
EPOCH_MAX_S = 32503680000.0  # 3000-01-01: epoch times must fall in 1970..3000


class TimeError(ValueError):
    """A time value that cannot be read unambiguously. `str()` quotes the value (for the
    person who typed it); `reason` says what was wrong without quoting it (for logs)."""

    def __init__(self, message: str, reason: str | None = None) -> None:
        super().__init__(message)
        self.reason = reason or message


def parse_offset(text: str) -> timezone:
    """'+01:00', '-0530', 'Z' or 'UTC' -> a fixed offset."""
    s = text.strip()
    if s in ("Z", "z", "UTC", "utc"):
        return UTC
    m = _OFFSET.match(s)
    if not m:
        raise TimeError(f"bad UTC offset {text!r}", "bad UTC offset")
    sign, hh, mm = m.groups()
    delta = timedelta(hours=int(hh), minutes=int(mm))
    if delta > timedelta(hours=14):
        raise TimeError(f"UTC offset out of range {text!r}", "UTC offset out of range")
    return timezone(-delta if sign == "-" else delta)


def parse_iso(text: str, offset: str | None = None) -> float:
    """ISO-8601 to epoch seconds. A time without an offset needs `offset`,
    because guessing the zone of a bedside clock would misplace hours."""
    try:
        dt = datetime.fromisoformat(text.strip())
    except (ValueError, AttributeError) as exc:
        raise TimeError(f"not an ISO-8601 time: {text!r}", "not an ISO-8601 time") from exc
    if dt.tzinfo is None:
        if offset is None:
            raise TimeError(f"time without UTC offset: {text!r}", "time without UTC offset")
        dt = dt.replace(tzinfo=parse_offset(offset))
    elif offset is not None:
        raise TimeError(
            f"time carries an offset and an offset field: {text!r}",
            "time carries an offset and an offset field",
        )
    return dt.timestamp()


def parse_epoch(value: object, scale: float) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float | str):
        raise TimeError(f"not an epoch number: {value!r}", "not an epoch number")
    try:
        seconds = float(value) / scale
    except (ValueError, OverflowError) as exc:
        raise TimeError(f"not an epoch number: {value!r}", "not an epoch number") from exc
    if not (0.0 < seconds < EPOCH_MAX_S):  # year 1970..3000
        raise TimeError(f"epoch out of range: {value!r}", "epoch out of range (1970-3000)")
    return seconds


def to_datetime(t: float) -> datetime:
    return datetime.fromtimestamp(t, tz=UTC)


def iso(t: float) -> str:
    """UTC ISO-8601 with 'Z', to the second (sub-second when present)."""
    dt = to_datetime(t)
    if dt.microsecond:
        return dt.isoformat().replace("+00:00", "Z")
    return dt.strftime("%Y-%m-%dT%H:%M:%SZ")


def as_epoch(when: datetime | float) -> float:
    """Accept an aware datetime or epoch seconds at the engine's boundary."""
    if isinstance(when, datetime):
        if when.tzinfo is None:
            raise TimeError("naive datetime given to the engine; times must be aware")
        return when.timestamp()
    return float(when)


def hhmm_utc(t: float) -> str:
    """A time as people read it on a page, when no local time zone is configured."""
    return to_datetime(t).strftime("%H:%M")


class LocalClock:
    """HH:MM in `tz` (a tzinfo made by the shell: reading the zone database is I/O).
    A class, not a closure, so an engine holding one can be pickled (snapshots)."""

    __slots__ = ("tz",)

    def __init__(self, tz: tzinfo) -> None:
        self.tz = tz

    def __call__(self, t: float) -> str:
        return datetime.fromtimestamp(t, self.tz).strftime("%H:%M")
