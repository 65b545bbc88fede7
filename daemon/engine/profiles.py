"""Device profile schema: how one meter family speaks, declared, never coded.

The shell reads the TOML files; this module only validates the parsed data, so
the engine never touches a file. Every problem a profile has is reported at once
(`_problems`), each under the key to change.
"""

from __future__ import annotations

import difflib
import re
from dataclasses import dataclass
from enum import StrEnum
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator
from pydantic_core import InitErrorDetails, PydanticCustomError

NAME_PATTERN = r"^[a-z0-9][a-z0-9-]{1,62}$"


class _Strict(BaseModel):
    # allow_inf_nan: TOML has nan and inf; min_ml = nan refused every reading as out of
    # range, max_ml = inf checked nothing and left the bag never full
    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)


Problem = tuple[tuple[str | int, ...], str]  # (where: the key's path, what is wrong)


def _raise(title: str, problems: list[Problem]) -> None:
    """Raise every problem at once, each under its own key (pydantic keeps the list)."""
    if problems:
        raise ValidationError.from_exception_data(
            title,
            [
                InitErrorDetails(type=PydanticCustomError("profile", msg), loc=loc, input=None)
                for loc, msg in problems
            ],
        )


class Encoding(StrEnum):
    JSON = "json"
    DELIMITED = "delimited"  # columns of text, by position
    KEYVALUE = "keyvalue"  # key=value pairs of text, by key name


class Semantics(StrEnum):
    CUMULATIVE = "cumulative"  # volume since the last bag change
    INTERVAL = "interval"  # volume produced in each reporting interval
    BAG_WEIGHT = "bag_weight"  # bag mass in grams since the last bag change


class TimeFormat(StrEnum):
    ISO8601 = "iso8601"
    EPOCH_S = "epoch_s"
    EPOCH_MS = "epoch_ms"


Unit = Literal["mL", "cL", "dL", "L", "g"]
FieldRef = str | int  # a dotted JSON path, a key name, or a 0-based column

# Millilitres in one of each volume unit (SI prefixes: exact by definition). A per-message
# unit and `volume.unit` go through this one table; `g` is bag weight (specific gravity).
VOLUME_UNITS: dict[str, float] = {"mL": 1.0, "cL": 10.0, "dL": 100.0, "L": 1000.0}

# Canonical unit for each spelling a meter may send (the upper-case forms are UCUM's
# case-insensitive column: ML is millilitre there, not megalitre).
UNIT_ALIASES: dict[str, str] = {
    "ml": "mL", "mL": "mL", "ML": "mL", "cc": "mL",
    "cl": "cL", "cL": "cL", "CL": "cL",
    "dl": "dL", "dL": "dL", "DL": "dL",
    "l": "L", "L": "L",
    "g": "g", "G": "g", "gram": "g", "grams": "g",
}  # fmt: skip


class Payload(_Strict):
    encoding: Encoding = Field(
        description="json (fields by dotted path), delimited (columns by 0-based position) "
        "or keyvalue (key=value pairs, fields by key name)"
    )
    separator: str | None = Field(
        default=None, min_length=1, max_length=4,
        description="column separator; delimited payloads only",
    )  # fmt: skip
    pair_separator: str | None = Field(
        default=None, min_length=1, max_length=4,
        description='between pairs; keyvalue payloads only (default ";")',
    )  # fmt: skip
    kv_separator: str | None = Field(
        default=None, min_length=1, max_length=4,
        description='between a key and its value; keyvalue payloads only (default "=")',
    )  # fmt: skip

    @model_validator(mode="after")
    def _separators(self) -> Payload:
        problems: list[Problem] = []
        if self.encoding is Encoding.DELIMITED and self.separator is None:
            problems.append((("separator",), "delimited payloads need 'separator'"))
        if self.encoding is not Encoding.DELIMITED and self.separator is not None:
            problems.append((("separator",), "'separator' only applies to delimited payloads"
                             + (": keyvalue payloads use pair_separator and kv_separator"
                                if self.encoding is Encoding.KEYVALUE else "")))  # fmt: skip
        if self.encoding is not Encoding.KEYVALUE:
            for key in ("pair_separator", "kv_separator"):
                if getattr(self, key) is not None:
                    problems.append(((key,), f"'{key}' only applies to keyvalue payloads"))
        elif self.pairs == self.kv:
            problems.append((("kv_separator",), "must differ from pair_separator"))
        _raise("Payload", problems)
        return self

    @property
    def pairs(self) -> str:
        return self.pair_separator or ";"

    @property
    def kv(self) -> str:
        return self.kv_separator or "="


class Fields(_Strict):
    time: FieldRef = Field(description="where the device time is")
    volume: FieldRef = Field(description="where the volume (or bag weight) is")
    device_id: FieldRef | None = Field(
        default=None, description="a field that must equal the topic's device id"
    )
    seq: FieldRef | None = Field(default=None, description="message counter (duplicates)")
    unit: FieldRef | None = Field(
        default=None, description="per-message unit (mL, cL, dL, L; g for bag weight)"
    )
    utc_offset: FieldRef | None = Field(
        default=None, description="separate UTC offset for local times (+01:00)"
    )
    status: FieldRef | None = Field(default=None, description="status code (see [status])")
    bag_change_flag: FieldRef | None = Field(
        default=None, description="true when the bag was just emptied or swapped"
    )


class TimeSpec(_Strict):
    format: TimeFormat = Field(
        default=TimeFormat.ISO8601,
        description="iso8601 (with a UTC offset), epoch_s or epoch_ms",
    )


class Volume(_Strict):
    semantics: Semantics = Field(
        description="cumulative (since the last bag change), interval (volume per "
        "interval) or bag_weight (grams in the bag)"
    )
    unit: Unit | None = Field(
        default=None,
        description="unit when the payload has none: mL (when neither unit nor scale_to_ml "
        "is given), cL, dL, L; g exactly for bag_weight",
    )
    scale_to_ml: Annotated[float, Field(gt=0, le=100_000)] | None = Field(
        default=None,
        description="millilitres per unit sent, for a scale the unit names do not cover "
        "(instead of unit)",
    )
    specific_gravity: Annotated[float, Field(ge=1.000, le=1.050)] = Field(
        default=1.015, description="urine specific gravity for grams -> mL (bag_weight)"
    )
    tare_g: Annotated[float, Field(ge=0)] = Field(
        default=0.0, description="grams subtracted first (an empty bag the meter does not tare)"
    )
    interval_s: Annotated[int, Field(gt=0, le=3600)] | None = Field(
        default=None, description="interval length; interval meters only"
    )
    resolution_ml: Annotated[float, Field(gt=0, le=50)] = Field(
        default=1.0,
        description="the meter's resolution in mL; tests' tolerance, and steps far below "
        "it raise a sanity warning",
    )

    @model_validator(mode="after")
    def _consistent(self) -> Volume:
        problems: list[Problem] = []
        if self.semantics is Semantics.INTERVAL and self.interval_s is None:
            problems.append((("interval_s",), "interval meters need 'interval_s'"))
        if self.semantics is Semantics.BAG_WEIGHT and self.unit != "g":
            problems.append((("unit",), 'bag_weight meters report grams: set unit = "g"'))
        if self.semantics is not Semantics.BAG_WEIGHT and self.unit == "g":
            problems.append(
                (("unit",), 'unit "g" is only meaningful with semantics = "bag_weight"')
            )
        if self.scale_to_ml is not None:
            if self.semantics is Semantics.BAG_WEIGHT:
                problems.append((("scale_to_ml",), "bag_weight meters report grams: "
                                 "use specific_gravity, not scale_to_ml"))  # fmt: skip
            elif self.unit is not None:
                problems.append((("scale_to_ml",), "give unit or scale_to_ml, not both"))
        _raise("Volume", problems)
        return self

    @property
    def ml_per_unit(self) -> float:
        """Millilitres in one unit of a value sent without a unit (not for grams)."""
        if self.scale_to_ml is not None:
            return self.scale_to_ml
        return VOLUME_UNITS.get(self.unit or "mL", 1.0)


class Timing(_Strict):
    period_s: Annotated[int, Field(gt=0, le=3600)] = Field(
        description="expected reporting period (s)"
    )
    reorder_tolerance_s: Annotated[int, Field(ge=0, le=3600)] = Field(
        default=180, description="how far back an out-of-order reading is still inserted (s)"
    )
    clock_tolerance_s: Annotated[int, Field(ge=0, le=3600)] = Field(
        default=120, description="how far the device clock may be ahead before the receive "
        "time is used (s)",
    )  # fmt: skip
    max_interpolation_gap_s: Annotated[int, Field(gt=0, le=86400)] = Field(
        default=1800, description="longer gaps between readings are spread as estimated (s)"
    )
    store_forward_max_s: Annotated[int, Field(ge=0, le=7 * 86400)] = Field(
        default=86400, description="oldest buffered reading accepted (s)"
    )

    @property
    def stored_after_s(self) -> int:
        """How old a reading may be on arrival and still count as sent live; older ones
        are store-and-forward uploads."""
        return max(self.clock_tolerance_s, 2 * self.period_s)


class Limits(_Strict):
    max_flow_ml_h: Annotated[float, Field(gt=0, le=20000)] = Field(
        description="maximum plausible flow (mL/h); faster rises are held as spikes"
    )
    min_ml: float = Field(default=0.0, description="lowest physical value after conversion")
    max_ml: Annotated[float, Field(gt=0)] = Field(
        description="highest physical value after conversion (mL)"
    )
    capacity_ml: Annotated[float, Field(gt=0)] | None = Field(
        default=None, description="what the bag holds when full (default max_ml); the "
        "bag-full prompt comes at 90%",
    )  # fmt: skip

    @model_validator(mode="after")
    def _range(self) -> Limits:
        problems: list[Problem] = []
        if self.min_ml >= self.max_ml:
            problems.append((("min_ml",), "'min_ml' must be below 'max_ml'"))
        if self.capacity_ml is not None and self.capacity_ml > self.max_ml:
            problems.append((("capacity_ml",), "'capacity_ml' must not be above 'max_ml'"))
        _raise("Limits", problems)
        return self


class BagChange(_Strict):
    detect: Literal["flag", "fall", "both"] = Field(
        default="both", description="flag, fall or both (flag needs a flag field or a "
        "status code)",
    )  # fmt: skip
    near_zero_ml: Annotated[float, Field(ge=0)] = Field(
        default=20.0, description="a fall to this or less can be an emptying"
    )
    # A fall smaller than this is meter noise: the baseline holds.
    noise_fall_ml: Annotated[float, Field(ge=0)] = Field(
        default=5.0, description="falls up to this are noise"
    )
    # A fall to near zero is an emptying only if it is at least this large; a
    # smaller one waits for the next reading (noise near an empty bag).
    min_fall_ml: Annotated[float, Field(ge=0)] = Field(
        default=30.0, description="smallest fall taken as an emptying at once"
    )


StatusCode = Annotated[str, Field(min_length=1, max_length=32)]


class Status(_Strict):
    ok: list[StatusCode] = Field(
        default_factory=lambda: ["ok"],
        description='status codes meaning "measuring", as text: ["0"], not [0]',
    )
    bag_change: list[StatusCode] = Field(
        default_factory=list, description='status codes meaning "bag changed", as text'
    )


class Smoothing(_Strict):
    # Cumulative readings are fitted monotone over this many recent readings;
    # older ones are final.
    points: Annotated[int, Field(ge=1, le=30)] = Field(
        default=5, description="readings in the monotone-fit tail"
    )


class ChecksumAlgorithm(StrEnum):
    XOR8 = "xor8"  # XOR of every byte: 2 hex digits
    CRC16_CCITT = "crc16-ccitt"  # polynomial 0x1021, initial 0xFFFF: 4 hex digits
    CRC32 = "crc32"  # the zlib / IEEE 802.3 CRC: 8 hex digits


class Checksum(_Strict):
    """A checksum the meter appends to a text payload: the LAST pair (keyvalue) or column
    (delimited), in hex, over the payload's text before the separator that precedes it."""

    field: FieldRef = Field(description="key (keyvalue) or column (delimited) of the checksum")
    algorithm: ChecksumAlgorithm = Field(description="xor8, crc16-ccitt or crc32")


# A placeholder is a whole topic level: {name}, lower-case letters, digits and '_'.
_PLACEHOLDER = re.compile(r"^\{([a-z][a-z0-9_]{0,31})\}$")
DEVICE_LEVEL = "device_id"


@dataclass(frozen=True, slots=True)
class TopicPattern:
    """A profile's topic, compiled: the device id's level and the named metadata levels
    (`uo/{ward}/{device_id}/m` keeps the ward of every reading)."""

    levels: tuple[str, ...]  # literal levels, or a placeholder's name in braces
    names: tuple[str, ...]  # the placeholders in order, device_id among them

    @property
    def subscription(self) -> str:
        return "/".join("+" if _PLACEHOLDER.match(x) else x for x in self.levels)

    def regex(self) -> re.Pattern[str]:
        """One named group per placeholder: m.group("device_id"), m.group("ward")."""
        parts = []
        for x in self.levels:
            m = _PLACEHOLDER.match(x)
            parts.append(f"(?P<{m.group(1)}>[^/]+)" if m else re.escape(x))
        return re.compile("^" + "/".join(parts) + "$")

    def fill(self, values: dict[str, str]) -> str:
        """The topic with each placeholder replaced by its value."""
        out = []
        for x in self.levels:
            m = _PLACEHOLDER.match(x)
            out.append(values[m.group(1)] if m else x)
        return "/".join(out)

    def overlaps(self, other: TopicPattern) -> bool:
        """Some topic matches both patterns (then a message could go to either family)."""
        if len(self.levels) != len(other.levels):
            return False
        return all(
            a == b or _PLACEHOLDER.match(a) or _PLACEHOLDER.match(b)
            for a, b in zip(self.levels, other.levels, strict=True)
        )


def topic_problems(topic: str) -> list[str]:
    """What is wrong with a profile's topic: every problem, in words."""
    problems: list[str] = []
    if any(c in topic for c in "+#"):
        problems.append("must not contain MQTT wildcards; use {device_id} and {name} levels")
    seen: list[str] = []
    meant_device = False  # a misspelt {device_id} was pointed out already
    for n, level in enumerate(topic.split("/"), start=1):
        if "{" not in level and "}" not in level:
            continue
        m = _PLACEHOLDER.match(level)
        if m is None:
            hint = " (write {device_id})" if level.lower() == "{device_id}" else ""
            meant_device = meant_device or bool(hint)
            problems.append(
                f"level {n} {level[:40]!r}: a placeholder is a whole level, {{name}} in "
                f"lower-case letters, digits and '_'{hint}"
            )
            continue
        name = m.group(1)
        if name in seen:
            problems.append(f"placeholder {{{name}}} appears twice")
        elif name != DEVICE_LEVEL and _near_device_level(name):
            meant_device = True
            problems.append(f"unknown placeholder {{{name}}}: did you mean {{{DEVICE_LEVEL}}}?")
        seen.append(name)
    if seen.count(DEVICE_LEVEL) != 1 and not meant_device:
        problems.append("needs exactly one {device_id} placeholder")
    return problems


def _near_device_level(name: str) -> bool:
    """A misspelt {device_id} would quietly become a metadata level: refuse it."""
    squashed = name.replace("_", "")
    return squashed in ("deviceid", "devid", "device", "id", "meterid", "meter") or (
        difflib.SequenceMatcher(None, name, DEVICE_LEVEL).ratio() >= 0.8
    )


def compile_topic(topic: str) -> TopicPattern:
    levels = tuple(topic.split("/"))
    names = tuple(m.group(1) for x in levels if (m := _PLACEHOLDER.match(x)))
    return TopicPattern(levels, names)


class DeviceProfile(_Strict):
    schema_version: Literal[1] = Field(1, alias="schema", description="profile format version")
    name: Annotated[str, Field(pattern=NAME_PATTERN)] = Field(
        description="family name; equals the file name"
    )
    description: str = Field(default="", description="one line for people")
    topic: str = Field(
        description="MQTT topic: {device_id} is the meter's level; any other {name} level "
        "matches one level and is kept with the reading"
    )
    payload: Payload
    fields: Fields
    time: TimeSpec = TimeSpec()
    volume: Volume
    timing: Timing
    limits: Limits
    bag_change: BagChange = BagChange()
    status: Status = Status()
    smoothing: Smoothing = Smoothing()
    checksum: Checksum | None = None

    @field_validator("topic")
    @classmethod
    def _topic(cls, topic: str) -> str:  # on its own: reported even when a section fails
        _raise("topic", [((), p) for p in topic_problems(topic)])
        return topic

    @model_validator(mode="after")
    def _check(self) -> DeviceProfile:
        _raise("DeviceProfile", self._problems())
        return self

    def _problems(self) -> list[Problem]:
        """Every inconsistency between sections, each under the key to change."""
        problems: list[Problem] = []
        enc = self.payload.encoding
        want: type = int if enc is Encoding.DELIMITED else str
        kind = {
            Encoding.JSON: "a JSON path string",
            Encoding.DELIMITED: "a 0-based column number",
            Encoding.KEYVALUE: "a key name string",
        }[enc]
        refs = dict(self.fields.model_dump())
        for key, ref in refs.items():
            if ref is not None and not isinstance(ref, want):
                problems.append((("fields", key), f"{enc} payloads need {kind}"))
        if self.checksum is not None:
            ref = self.checksum.field
            if enc is Encoding.JSON:
                problems.append((("checksum",), "a checksum is for text payloads "
                                 "(delimited or keyvalue), not JSON"))  # fmt: skip
            elif not isinstance(ref, want):
                problems.append((("checksum", "field"), f"{enc} payloads need {kind}"))
            elif ref in refs.values():
                problems.append((("checksum", "field"), "names a field that carries data"))
            elif enc is Encoding.DELIMITED and isinstance(ref, int):
                used = [r for r in refs.values() if isinstance(r, int)]
                if used and ref <= max(used):
                    problems.append((("checksum", "field"), "the checksum must be the last "
                                     "column, after every data column"))  # fmt: skip
        no_flag = self.fields.bag_change_flag is None and not self.status.bag_change
        if self.bag_change.detect == "flag" and no_flag:
            why = "'flag' needs fields.bag_change_flag or status.bag_change"
            problems.append((("bag_change", "detect"), why))
        if self.status.bag_change and self.fields.status is None:
            problems.append((("status", "bag_change"), "needs fields.status"))
        if set(s.lower() for s in self.status.ok) & set(s.lower() for s in self.status.bag_change):
            problems.append((("status", "bag_change"), "a code cannot be both ok and bag_change"))
        if self.fields.utc_offset is not None and self.time.format is not TimeFormat.ISO8601:
            why = ('only read with time.format = "iso8601": an epoch time is UTC already, '
                   "and the field would be ignored")  # fmt: skip
            problems.append((("fields", "utc_offset"), why))
        interval_s = self.volume.interval_s
        interval = self.volume.semantics is Semantics.INTERVAL
        if interval and interval_s is not None and interval_s > self.timing.period_s:
            why = (f"longer than timing.period_s: a meter sending every "
                   f"{self.timing.period_s} s cannot cover {interval_s} s with each message "
                   "without overlapping the one before, and overlapping intervals are refused "
                   "(conflicting_duplicate); set it to the length one message covers")  # fmt: skip
            problems.append((("volume", "interval_s"), why))
        gap_s, period_s = self.timing.max_interpolation_gap_s, self.timing.period_s
        if not interval and gap_s <= period_s:
            why = (f"must be longer than timing.period_s ({period_s} s; twice it or more is "
                   "usual): else every gap between two ordinary readings counts as estimated, "
                   "and the low-output rules, which need 90% measured, never judge")  # fmt: skip
            problems.append((("timing", "max_interpolation_gap_s"), why))
        live_s = self.timing.stored_after_s
        if self.timing.store_forward_max_s < live_s:
            why = (f"must be at least {live_s} s (the larger of clock_tolerance_s and twice "
                   "period_s): a reading sent live may be that old on arrival, and a lower "
                   "limit refuses it as too_old")  # fmt: skip
            problems.append((("timing", "store_forward_max_s"), why))
        if interval and self.limits.min_ml < 0:
            why = "an interval's volume cannot be negative: 0 or more for interval meters"
            problems.append((("limits", "min_ml"), why))
        if self.volume.semantics is Semantics.INTERVAL and self.fields.bag_change_flag:
            why = "interval meters have no bag to change: drop bag_change_flag"
            problems.append((("fields", "bag_change_flag"), why))
        return problems

    @property
    def bag_capacity_ml(self) -> float | None:
        """The bag's capacity, for meters that fill a bag (None for interval meters)."""
        if self.volume.semantics is Semantics.INTERVAL:
            return None
        return self.limits.capacity_ml or self.limits.max_ml

    @property
    def topic_pattern(self) -> TopicPattern:
        return compile_topic(self.topic)

    @property
    def subscription(self) -> str:
        """The MQTT filter for this family: every placeholder becomes '+'."""
        return self.topic_pattern.subscription

    def topic_regex(self) -> re.Pattern[str]:
        """Matches this family's topics; a named group per placeholder ("device_id", ...)."""
        return self.topic_pattern.regex()

    def topic_for(self, device_id: str, levels: dict[str, str] | None = None) -> str:
        """A topic of this family: the device's, with the metadata levels given."""
        values = {n: (levels or {}).get(n, f"{n}-1") for n in self.topic_pattern.names}
        return self.topic_pattern.fill(values | {DEVICE_LEVEL: device_id})


class Calibration(_Strict):
    """A per-meter correction found on the bench: mL = factor x (the profile's mL) +
    offset_ml, applied after the profile's conversion (in the bed context or a devices
    file). The physical range is checked again after it."""

    factor: Annotated[float, Field(ge=0.5, le=2.0)] = 1.0
    offset_ml: Annotated[float, Field(ge=-500.0, le=500.0)] = 0.0

    def apply(self, volume_ml: float) -> float:
        return volume_ml * self.factor + self.offset_ml


DeviceKey = Annotated[str, Field(min_length=1, max_length=128)]


class DevicesFile(_Strict):
    """Per-meter settings kept apart from the bed context (`--devices FILE`, the service's
    `devices` key): `[devices.kv-0101]` with `factor` and `offset_ml`."""

    schema_version: Literal[1] = Field(1, alias="schema")
    devices: Annotated[dict[DeviceKey, Calibration], Field(max_length=100_000)] = Field(
        default_factory=dict
    )


def close_key(name: str, known: list[str]) -> str | None:
    """The known key a misspelt one most likely meant."""
    found = difflib.get_close_matches(name, known, n=1, cutoff=0.6)
    return found[0] if found else None


def known_keys(loc: tuple[str | int, ...]) -> list[str]:
    """The keys a profile may have at `loc` (a section's path), for did-you-mean."""
    model: Any = DeviceProfile
    for part in loc:
        field = model.model_fields.get(str(part)) if isinstance(part, str) else None
        if field is None:
            return []
        ann = field.annotation
        inner = [a for a in getattr(ann, "__args__", (ann,)) if isinstance(a, type)]
        model = next((a for a in inner if issubclass(a, BaseModel)), None)
        if model is None:
            return []
    return [f.alias or k for k, f in model.model_fields.items()]
