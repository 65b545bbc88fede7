"""Turn one meter message into a reading, by the meter's profile.

Never raises for bad input: every failure is a `Rejected` with a reason code.
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from .numbers import num
from .outcomes import DECODE_REJECTIONS, Outcome, withheld_reason
from .profiles import UNIT_ALIASES, DeviceProfile, Encoding, Semantics, TimeFormat
from .timefmt import TimeError, parse_epoch, parse_iso

Payload = bytes | str | dict[str, Any] | list[Any]

_MISSING = object()
_JSON = json.JSONDecoder().decode  # str only: skips json.loads' encoding sniffing


@dataclass(slots=True)  # not frozen: one per message, and frozen init costs 5x
class Reading:
    device_id: str
    device_time: float  # epoch seconds as the meter stated it
    volume_ml: float  # converted to mL (cumulative, interval or bag content)
    seq: int | None
    bag_flag: bool
    raw_value: float  # as sent, before unit conversion (for dedup)


@dataclass(slots=True)
class Rejected:
    reason: Outcome
    detail: str  # what was wrong, in words of our own: never the payload's content
    device_id: str | None = None
    # the offending value as sent, for the commissioning probe only (a hostile payload
    # may carry anything): never journaled, logged or published
    shown: str = ""


def _json_getter(path: str | int) -> Callable[[Any], Any]:
    keys = str(path).split(".")
    if len(keys) == 1:
        key = keys[0]
        return lambda obj: obj.get(key, _MISSING) if isinstance(obj, dict) else _MISSING

    def get(obj: Any) -> Any:
        for k in keys:
            if not isinstance(obj, dict):
                return _MISSING
            obj = obj.get(k, _MISSING)
            if obj is _MISSING:
                return _MISSING
        return obj

    return get


def _column_getter(ref: str | int) -> Callable[[Any], Any]:
    index = int(ref)
    return lambda cols: cols[index].strip() if index < len(cols) else _MISSING


def _number(value: Any) -> float | None:
    """A JSON number as a finite float. Strings are not numbers in JSON, however much
    they look like one, and neither are true and false."""
    kind = type(value)
    if kind is float or kind is int or (isinstance(value, int | float) and kind is not bool):
        try:
            f = float(value)
        except OverflowError:  # a JSON integer too large for a float
            return None
        return f if math.isfinite(f) else None
    return None


def _text_number(value: Any) -> float | None:
    """A number written as text (a delimited payload's column)."""
    if not isinstance(value, str) or "_" in value:
        return None  # float() takes "1_000"; no meter means that
    try:
        f = float(value.strip())
    except (ValueError, OverflowError):
        return None
    return f if math.isfinite(f) else None


def _shown(value: Any) -> str:
    return repr(value)[:64]


def _truthy(value: Any) -> bool:
    if isinstance(value, str):
        return value.strip().lower() in ("1", "true", "yes", "y", "t")
    return bool(value) and value is not _MISSING


class Decoder:
    """A profile compiled into fast field accessors."""

    def __getstate__(self) -> DeviceProfile:
        return self.profile  # accessors are closures: rebuild them, don't pickle them

    def __setstate__(self, profile: DeviceProfile) -> None:
        self.__init__(profile)  # type: ignore[misc]

    def __init__(self, profile: DeviceProfile) -> None:
        self.profile = profile
        f = profile.fields
        json_payload = profile.payload.encoding is Encoding.JSON
        make = _json_getter if json_payload else _column_getter
        self._get_time = make(f.time)
        self._get_volume = make(f.volume)
        self._get_device = make(f.device_id) if f.device_id is not None else None
        self._get_seq = make(f.seq) if f.seq is not None else None
        self._get_unit = make(f.unit) if f.unit is not None else None
        self._get_offset = make(f.utc_offset) if f.utc_offset is not None else None
        self._get_status = make(f.status) if f.status is not None else None
        self._get_flag = make(f.bag_change_flag) if f.bag_change_flag is not None else None
        self._json = profile.payload.encoding is Encoding.JSON
        self._num = _number if self._json else _text_number
        self._sep = profile.payload.separator or ","
        self._time_format = profile.time.format
        self._status_ok = frozenset(s.lower() for s in profile.status.ok)
        self._status_bag = frozenset(s.lower() for s in profile.status.bag_change)
        v = profile.volume
        self._default_unit = v.unit
        self._sg = v.specific_gravity
        self._tare = v.tare_g
        self._semantics = v.semantics
        self._min = profile.limits.min_ml
        self._max = profile.limits.max_ml

    def _parse(self, payload: Payload) -> Any | Rejected:
        marked = withheld_reason(payload, DECODE_REJECTIONS)
        if marked is not None:
            return Rejected(marked, "payload withheld")
        if self._json:
            if isinstance(payload, dict):
                return payload
            if isinstance(payload, bytes):
                try:
                    payload = payload.decode("utf-8")
                except UnicodeDecodeError:
                    return Rejected(Outcome.BAD_ENCODING, "payload is not UTF-8")
            if not isinstance(payload, str):
                return Rejected(Outcome.BAD_PAYLOAD, "JSON payload is not an object")
            try:
                obj = _JSON(payload)
            except (ValueError, RecursionError):
                return Rejected(Outcome.BAD_PAYLOAD, "payload is not JSON")
            if not isinstance(obj, dict):
                return Rejected(Outcome.BAD_PAYLOAD, "JSON payload is not an object")
            return obj
        if isinstance(payload, bytes):
            try:
                payload = payload.decode("utf-8")
            except UnicodeDecodeError:
                return Rejected(Outcome.BAD_ENCODING, "payload is not UTF-8")
        if not isinstance(payload, str):
            return Rejected(Outcome.BAD_PAYLOAD, "delimited payload is not text")
        return payload.strip().split(self._sep)

    def decode(self, topic_device: str, payload: Payload) -> Reading | Rejected:
        obj = self._parse(payload)
        if isinstance(obj, Rejected):
            return Rejected(obj.reason, obj.detail, topic_device)

        device_id = topic_device
        if self._get_device is not None:
            named = self._get_device(obj)
            if named is _MISSING:
                return Rejected(Outcome.MISSING_FIELD, "device id field missing", topic_device)
            if not isinstance(named, str) or named.strip() != topic_device:
                return Rejected(
                    Outcome.DEVICE_ID_MISMATCH,
                    "payload names another device than its topic",
                    topic_device,
                    _shown(named),
                )

        status_bag = False
        if self._get_status is not None:
            status = self._get_status(obj)
            if status is _MISSING:
                return Rejected(Outcome.MISSING_FIELD, "status field missing", device_id)
            code = str(status).strip().lower()
            if code in self._status_bag:
                status_bag = True
            elif code not in self._status_ok:
                return Rejected(
                    Outcome.DEVICE_FAULT, "status code is not a measuring one", device_id,
                    _shown(status),
                )  # fmt: skip

        raw_time = self._get_time(obj)
        if raw_time is _MISSING:
            return Rejected(Outcome.MISSING_FIELD, "time field missing", device_id)
        try:
            device_time = self._time(raw_time, obj)
        except TimeError as exc:
            return Rejected(Outcome.BAD_TIME, exc.reason, device_id, str(exc)[:120])

        raw_volume = self._get_volume(obj)
        if raw_volume is _MISSING:
            return Rejected(Outcome.MISSING_FIELD, "volume field missing", device_id)
        value = self._num(raw_volume)
        if value is None:
            return Rejected(
                Outcome.BAD_NUMBER, "volume is not a finite number", device_id, _shown(raw_volume)
            )

        unit = self._default_unit
        if self._get_unit is not None:
            raw_unit = self._get_unit(obj)
            if raw_unit is _MISSING:
                return Rejected(Outcome.MISSING_FIELD, "unit field missing", device_id)
            canon = UNIT_ALIASES.get(raw_unit.strip()) if isinstance(raw_unit, str) else None
            if canon is None or (canon == "g") != (self._semantics is Semantics.BAG_WEIGHT):
                return Rejected(
                    Outcome.BAD_UNIT, "unit not known for this meter", device_id, _shown(raw_unit)
                )
            unit = canon  # type: ignore[assignment]
        volume_ml = self.to_ml(value, unit)
        if not (self._min <= volume_ml <= self._max):
            return Rejected(
                Outcome.OUT_OF_RANGE, f"{num(volume_ml, 1)} mL outside physical range", device_id
            )

        seq: int | None = None
        if self._get_seq is not None:
            raw_seq = self._get_seq(obj)
            if raw_seq is not _MISSING:
                n = self._num(raw_seq)
                if n is None or n != int(n):
                    return Rejected(
                        Outcome.BAD_NUMBER, "seq is not an integer", device_id, _shown(raw_seq)
                    )
                seq = int(n)

        flag = status_bag
        if self._get_flag is not None:
            raw_flag = self._get_flag(obj)
            flag = flag or (raw_flag is not _MISSING and _truthy(raw_flag))
        return Reading(device_id, device_time, volume_ml, seq, flag, value)

    def to_ml(self, value: float, unit: str) -> float:
        if unit == "mL":
            return value
        if unit == "L":
            return value * 1000.0
        # Bag weight: mass / specific gravity (1 g of water taken as 1 mL; the
        # 0.2-0.3% density-of-water difference is below the meters' resolution).
        return (value - self._tare) / self._sg

    def _time(self, raw: Any, obj: Any) -> float:
        fmt = self._time_format
        if fmt is TimeFormat.ISO8601:
            if not isinstance(raw, str):
                raise TimeError(f"time is not a string: {raw!r}", "time is not a string")
            offset = None
            if self._get_offset is not None:
                off = self._get_offset(obj)
                if off is _MISSING:
                    raise TimeError("UTC offset field missing")
                if not isinstance(off, str):
                    raise TimeError(f"UTC offset is not a string: {off!r}", "bad UTC offset")
                offset = off
            return parse_iso(raw, offset)
        if self._json and (isinstance(raw, bool) or not isinstance(raw, int | float)):
            raise TimeError(
                f"epoch time is not a JSON number: {raw!r}", "epoch time is not a number"
            )
        return parse_epoch(raw, 1.0 if fmt is TimeFormat.EPOCH_S else 1000.0)
