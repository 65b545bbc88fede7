"""Turn one meter message into a reading, by the meter's profile.

Never raises for bad input: every failure is a `Rejected` with a reason code.
"""

from __future__ import annotations

import binascii
import json
import math
import re
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from .numbers import num
from .outcomes import DECODE_REJECTIONS, Outcome, withheld_reason
from .profiles import (
    UNIT_ALIASES,
    VOLUME_UNITS,
    ChecksumAlgorithm,
    DeviceProfile,
    Encoding,
    Semantics,
    TimeFormat,
)
from .timefmt import EPOCH_MAX_S, TimeError, parse_epoch, parse_iso, parse_offset

Payload = bytes | str | dict[str, Any] | list[Any]

_MISSING = object()
_DECODER = json.JSONDecoder()
_JSON = _DECODER.decode  # str only: skips json.loads' encoding sniffing
# the decoder's own scanner (C): one value from an index (not in the type stubs)
_SCAN: Callable[[str, int], tuple[Any, int]] = _DECODER.scan_once  # type: ignore[attr-defined]
_EXACT_INT = 2**53  # ints up to this size survive the checked path's float() unchanged
TIME_MEMO = 4096  # device times remembered per family (then forgotten all at once)
TIME_MEMO_LEN = 40  # ... each at most this long: a hostile payload must not fill memory


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
    key: str = ""  # the profile key most likely to fix it, when it may be the profile's


def _checksum(algorithm: ChecksumAlgorithm, data: bytes) -> tuple[int, int]:
    """(value, hex digits) of a payload's checksum."""
    if algorithm is ChecksumAlgorithm.XOR8:
        x = 0
        for b in data:
            x ^= b
        return x, 2
    if algorithm is ChecksumAlgorithm.CRC16_CCITT:
        return binascii.crc_hqx(data, 0xFFFF), 4
    return binascii.crc32(data) & 0xFFFFFFFF, 8


def checksum_text(algorithm: ChecksumAlgorithm, text: str) -> str:
    """The checksum of `text` as a meter writes it (upper-case hex, zero-padded)."""
    value, digits = _checksum(algorithm, text.encode("utf-8"))
    return f"{value:0{digits}X}"


_HEX = re.compile(r"^[0-9A-Fa-f]{1,8}$")


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


def _key_getter(ref: str | int) -> Callable[[Any], Any]:
    key = str(ref)  # a key name, literally (no dotted paths in key=value text)
    return lambda pairs: pairs.get(key, _MISSING)


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


class _OffsetError(TimeError):
    """The UTC offset field is missing or unreadable: fields.utc_offset is the key to
    check, not time.format."""


def _text_number(value: Any) -> float | None:
    """A number written as text (a delimited payload's column)."""
    if not isinstance(value, str) or "_" in value:
        return None  # float() takes "1_000"; no meter means that
    try:
        f = float(value.strip())
    except (ValueError, OverflowError):
        return None
    return f if math.isfinite(f) else None


def _json_text(text: str) -> Any:
    """`_JSON(text)`. The usual meter message, an object with nothing around it, is read
    by the decoder's scanner alone: `_JSON` would also look for blanks before and after
    it. Bad JSON raises what `_JSON` raises; anything else `_JSON` reads."""
    if text[:1] == "{":
        try:
            obj, end = _SCAN(text, 0)
        except StopIteration:  # a value missing inside it: `_JSON` says so as an error
            return _JSON(text)
        if end == len(text):
            return obj
    return _JSON(text)


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
        enc = profile.payload.encoding
        make = {Encoding.JSON: _json_getter, Encoding.DELIMITED: _column_getter,
                Encoding.KEYVALUE: _key_getter}[enc]  # fmt: skip
        self._get_time = make(f.time)
        self._get_volume = make(f.volume)
        self._get_device = make(f.device_id) if f.device_id is not None else None
        self._get_seq = make(f.seq) if f.seq is not None else None
        self._get_unit = make(f.unit) if f.unit is not None else None
        self._get_offset = make(f.utc_offset) if f.utc_offset is not None else None
        self._get_status = make(f.status) if f.status is not None else None
        self._get_flag = make(f.bag_change_flag) if f.bag_change_flag is not None else None
        self._json = enc is Encoding.JSON
        self._keyvalue = enc is Encoding.KEYVALUE
        self._num = _number if self._json else _text_number
        self._sep = profile.payload.separator or ","
        self._pair_sep, self._kv_sep = profile.payload.pairs, profile.payload.kv
        cs = profile.checksum
        self._checksum = cs
        self._cs_last = self._pair_sep if self._keyvalue else self._sep
        self._time_format = profile.time.format
        self._status_ok = frozenset(s.lower() for s in profile.status.ok)
        self._status_bag = frozenset(s.lower() for s in profile.status.bag_change)
        v = profile.volume
        self._default_unit = v.unit or "mL"
        self._default_scale = v.ml_per_unit  # mL per unit sent without a unit field
        # the key a reading outside the physical range points to: what made its mL
        self._range_key = (
            "fields.unit" if f.unit is not None
            else "volume.scale_to_ml" if v.scale_to_ml is not None
            else "volume.unit"
        )  # fmt: skip
        self._sg = v.specific_gravity
        self._tare = v.tare_g
        self._semantics = v.semantics
        self._min = profile.limits.min_ml
        self._max = profile.limits.max_ml
        self._plain = _plain_keys(profile)
        # device times read by the plain path: the meters of a ward mostly report on the
        # same minutes, so most of a message's time text was read for another meter
        self._times: dict[str, float] = {}

    def _parse(self, payload: Payload) -> Any | Rejected:
        if self._json and isinstance(payload, dict):
            return payload  # an object already (replay's log): never a withheld marker
        marked = withheld_reason(payload, DECODE_REJECTIONS)
        if marked is not None:
            return Rejected(marked, "payload withheld")
        if self._json:
            if isinstance(payload, bytes):
                try:
                    payload = payload.decode("utf-8")
                except UnicodeDecodeError:
                    return Rejected(Outcome.BAD_ENCODING, "payload is not UTF-8")
            if not isinstance(payload, str):
                return Rejected(Outcome.BAD_PAYLOAD, "JSON payload is not an object")
            try:
                obj = _json_text(payload)
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
            return Rejected(Outcome.BAD_PAYLOAD, f"{self.profile.payload.encoding} payload "
                            "is not text", key="payload.encoding")  # fmt: skip
        text = payload.strip()
        if self._checksum is not None:
            checked = self._verify(text)
            if isinstance(checked, Rejected):
                return checked
            text = checked
        if self._keyvalue:
            return self._pairs(text)
        return text.split(self._sep)

    def _pairs(self, text: str) -> dict[str, str] | Rejected:
        """key=value pairs; blanks around keys, values and separators are tolerated,
        unknown keys are kept (and ignored), a key given twice is refused."""
        out: dict[str, str] = {}
        for part in text.split(self._pair_sep):
            if not part.strip():
                continue  # a trailing separator, or an empty pair
            key, sep, value = part.partition(self._kv_sep)
            key = key.strip()
            if not sep or not key:
                return Rejected(Outcome.BAD_PAYLOAD, "not key=value pairs (see "
                                "payload.pair_separator and kv_separator)",
                                key="payload.kv_separator")  # fmt: skip
            if key in out:
                return Rejected(Outcome.BAD_PAYLOAD, "a key appears twice")
            out[key] = value.strip()
        if not out:
            return Rejected(Outcome.BAD_PAYLOAD, "no key=value pair")
        return out

    def _verify(self, text: str) -> str | Rejected:
        """The payload's text without its checksum, if the checksum matches."""
        cs = self._checksum
        assert cs is not None
        head, sep, tail = text.rpartition(self._cs_last)
        where = "checksum.field"
        if not sep:
            return Rejected(Outcome.BAD_CHECKSUM, "no checksum field", key=where)
        if self._keyvalue:
            key, kv, value = tail.partition(self._kv_sep)
            if not kv or key.strip() != cs.field:
                return Rejected(Outcome.BAD_CHECKSUM, "checksum is not the last pair", key=where)
        else:
            if text.count(self._sep) != int(cs.field):
                return Rejected(Outcome.BAD_CHECKSUM, "checksum is not in its column", key=where)
            value = tail
        value = value.strip()
        expected, digits = _checksum(cs.algorithm, head.encode("utf-8"))
        if not _HEX.match(value) or len(value) > digits:
            return Rejected(Outcome.BAD_CHECKSUM, f"checksum is not {digits} hex digits",
                            shown=_shown(value), key="checksum.algorithm")  # fmt: skip
        if int(value, 16) != expected:
            return Rejected(Outcome.BAD_CHECKSUM, "checksum does not match the payload",
                            shown=_shown(value), key="checksum.algorithm")  # fmt: skip
        return head

    def decode(self, topic_device: str, payload: Payload) -> Reading | Rejected:
        obj = self._parse(payload)
        if isinstance(obj, Rejected):
            obj.device_id = topic_device
            return obj
        if self._plain is not None:  # a JSON family: obj is a dict
            reading = self._decode_plain(topic_device, obj)
            if reading is not None:
                return reading

        device_id = topic_device
        if self._get_device is not None:
            named = self._get_device(obj)
            if named is _MISSING:
                return Rejected(Outcome.MISSING_FIELD, "device id field missing", topic_device,
                                key="fields.device_id")  # fmt: skip
            if not isinstance(named, str) or named.strip() != topic_device:
                return Rejected(
                    Outcome.DEVICE_ID_MISMATCH,
                    "payload names another device than its topic"
                    if isinstance(named, str)
                    else "device id field is not text",  # ids are text, even all digits
                    topic_device,
                    _shown(named),
                    "fields.device_id",
                )

        status_bag = False
        if self._get_status is not None:
            status = self._get_status(obj)
            if status is _MISSING:
                return Rejected(Outcome.MISSING_FIELD, "status field missing", device_id,
                                key="fields.status")  # fmt: skip
            code = str(status).strip().lower()
            if code in self._status_bag:
                status_bag = True
            elif code not in self._status_ok:
                return Rejected(
                    Outcome.DEVICE_FAULT, "status code is not a measuring one", device_id,
                    _shown(status), "status.ok",
                )  # fmt: skip

        raw_time = self._get_time(obj)
        if raw_time is _MISSING:
            return Rejected(Outcome.MISSING_FIELD, "time field missing", device_id,
                            key="fields.time")  # fmt: skip
        try:
            device_time = self._time(raw_time, obj)
        except TimeError as exc:
            return Rejected(Outcome.BAD_TIME, exc.reason, device_id, str(exc)[:120],
                            "fields.utc_offset" if isinstance(exc, _OffsetError)
                            else "time.format")  # fmt: skip

        raw_volume = self._get_volume(obj)
        if raw_volume is _MISSING:
            return Rejected(Outcome.MISSING_FIELD, "volume field missing", device_id,
                            key="fields.volume")  # fmt: skip
        value = self._num(raw_volume)
        if value is None:
            return Rejected(
                Outcome.BAD_NUMBER, "volume is not a finite number", device_id, _shown(raw_volume),
                "fields.volume",
            )  # fmt: skip

        if self._get_unit is not None:
            raw_unit = self._get_unit(obj)
            if raw_unit is _MISSING:
                return Rejected(Outcome.MISSING_FIELD, "unit field missing", device_id,
                                key="fields.unit")  # fmt: skip
            canon = UNIT_ALIASES.get(raw_unit.strip()) if isinstance(raw_unit, str) else None
            if canon is None or (canon == "g") != (self._semantics is Semantics.BAG_WEIGHT):
                return Rejected(
                    Outcome.BAD_UNIT, "unit not known for this meter", device_id, _shown(raw_unit),
                    "fields.unit",
                )  # fmt: skip
            volume_ml = self.to_ml(value, canon)
        elif self._semantics is Semantics.BAG_WEIGHT:
            volume_ml = self.to_ml(value, "g")
        else:
            volume_ml = value * self._default_scale
        if not (self._min <= volume_ml <= self._max):
            return Rejected(
                Outcome.OUT_OF_RANGE, f"{num(volume_ml, 1)} mL outside physical range", device_id,
                key=self._range_key,
            )  # fmt: skip

        seq: int | None = None
        if self._get_seq is not None:
            raw_seq = self._get_seq(obj)
            if raw_seq is not _MISSING:
                n = self._num(raw_seq)
                if n is None or n != int(n):
                    return Rejected(
                        Outcome.BAD_NUMBER,
                        "seq is not an integer",
                        device_id,
                        _shown(raw_seq),
                        "fields.seq",
                    )
                seq = int(n)

        flag = status_bag
        if self._get_flag is not None:
            raw_flag = self._get_flag(obj)
            flag = flag or (raw_flag is not _MISSING and _truthy(raw_flag))
        return Reading(device_id, device_time, volume_ml, seq, flag, value)

    def _decode_plain(self, device: str, obj: dict[str, Any]) -> Reading | None:
        """The usual message of a family `_plain_keys` allows, read without the general
        accessors; None for anything unusual, which `decode`'s checked path then reads
        again and, if it is bad, says why. The same reading as the checked path."""
        assert self._plain is not None
        device_key, time_key, volume_key, seq_key = self._plain
        if device_key is not None:
            named = obj.get(device_key)
            if type(named) is not str or named.strip() != device:
                return None
        raw_time = obj.get(time_key)
        if type(raw_time) is not str:
            return None
        times = self._times
        device_time = times.get(raw_time)
        if device_time is None:
            try:
                device_time = parse_iso(raw_time)
            except TimeError:
                return None
            if len(raw_time) <= TIME_MEMO_LEN:
                if len(times) >= TIME_MEMO:
                    times.clear()
                times[raw_time] = device_time
        raw_volume = obj.get(volume_key)
        value = raw_volume if type(raw_volume) is float else _number(raw_volume)
        if value is None or not math.isfinite(value):
            return None
        volume_ml = value * self._default_scale
        if not (self._min <= volume_ml <= self._max):
            return None
        seq: int | None = None
        if seq_key is not None:
            raw_seq = obj.get(seq_key, _MISSING)
            if raw_seq is not _MISSING:
                if type(raw_seq) is not int or not -_EXACT_INT <= raw_seq <= _EXACT_INT:
                    return None
                seq = raw_seq
        return Reading(device, device_time, volume_ml, seq, False, value)

    def status_code(self, payload: Payload) -> str | None:
        """The status code a payload carries, as sent (the probe counts them)."""
        if self._get_status is None:
            return None
        obj = self._parse(payload)
        if isinstance(obj, Rejected):
            return None
        code = self._get_status(obj)
        return None if code is _MISSING else str(code).strip()[:32]

    def to_ml(self, value: float, unit: str) -> float:
        """A value in a canonical unit (UNIT_ALIASES' values) in mL."""
        scale = VOLUME_UNITS.get(unit)
        if scale is not None:
            return value if scale == 1.0 else value * scale
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
                    raise _OffsetError("UTC offset field missing")
                if not isinstance(off, str):
                    raise _OffsetError(f"UTC offset is not a string: {off!r}", "bad UTC offset")
                offset = off
            try:
                return parse_iso(raw, offset)
            except TimeError:
                if offset is not None:  # the offset field's fault? (looked at only now)
                    try:
                        parse_offset(offset)
                    except TimeError as exc:
                        raise _OffsetError(str(exc), exc.reason) from None
                raise
        if self._json and (isinstance(raw, bool) or not isinstance(raw, int | float)):
            raise TimeError(
                f"epoch time is not a JSON number: {raw!r}", "epoch time is not a number"
            )
        scale = 1.0 if fmt is TimeFormat.EPOCH_S else 1000.0
        try:
            return parse_epoch(raw, scale)
        except TimeError as exc:
            other = 1000.0 if fmt is TimeFormat.EPOCH_S else 1.0
            if "range" in exc.reason and _in_epoch_range(raw, other):
                meant = "epoch_ms" if other == 1000.0 else "epoch_s"
                raise TimeError(f"{exc}; as {meant} it would be a date",
                                f"{exc.reason}; as {meant} it would be a date: "
                                "check time.format") from None  # fmt: skip
            raise


def _plain_keys(profile: DeviceProfile) -> tuple[str | None, str, str, str | None] | None:
    """(device id, time, volume, seq) keys of a family whose usual message `decode` may
    read on its plain path: a JSON object with these at its top level, an ISO time
    without an offset field, a volume in a fixed unit, no status and no bag-change flag.
    None for any other family."""
    f = profile.fields
    if (profile.payload.encoding is not Encoding.JSON
            or profile.time.format is not TimeFormat.ISO8601
            or profile.volume.semantics is Semantics.BAG_WEIGHT
            or any(x is not None for x in (f.utc_offset, f.status, f.unit, f.bag_change_flag))):
        return None  # fmt: skip
    keys = [None if k is None else str(k) for k in (f.device_id, f.time, f.volume, f.seq)]
    if any(k is not None and "." in k for k in keys):
        return None  # a nested field: the general accessors walk the path
    device_key, time_key, volume_key, seq_key = keys
    assert time_key is not None and volume_key is not None
    return device_key, time_key, volume_key, seq_key


def _in_epoch_range(raw: Any, scale: float) -> bool:
    try:
        return 0.0 < float(raw) / scale < EPOCH_MAX_S
    except (TypeError, ValueError, OverflowError):
        return False
