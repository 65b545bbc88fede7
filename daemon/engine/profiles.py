"""Device profile schema: how one meter family speaks, declared, never coded.

The shell reads the TOML files; this module only validates the parsed data, so
the engine never touches a file.
"""

from __future__ import annotations

import re
from enum import StrEnum
from typing import Annotated, Literal

from pydantic import BaseModel, ConfigDict, Field, model_validator

_NAME = r"^[a-z0-9][a-z0-9-]{1,62}$"


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class Encoding(StrEnum):
    JSON = "json"
    DELIMITED = "delimited"


class Semantics(StrEnum):
    CUMULATIVE = "cumulative"  # volume since the last bag change
    INTERVAL = "interval"  # volume produced in each reporting interval
    BAG_WEIGHT = "bag_weight"  # bag mass in grams since the last bag change


class TimeFormat(StrEnum):
    ISO8601 = "iso8601"
    EPOCH_S = "epoch_s"
    EPOCH_MS = "epoch_ms"


Unit = Literal["mL", "L", "g"]
FieldRef = str | int  # a dotted JSON path, or a 0-based column for delimited text

# Canonical unit for each spelling a meter may send.
UNIT_ALIASES: dict[str, str] = {
    "ml": "mL", "mL": "mL", "ML": "mL", "cc": "mL",
    "l": "L", "L": "L",
    "g": "g", "G": "g", "gram": "g", "grams": "g",
}  # fmt: skip


class Payload(_Strict):
    encoding: Encoding
    separator: str | None = Field(default=None, min_length=1, max_length=4)

    @model_validator(mode="after")
    def _separator_for_text(self) -> Payload:
        if self.encoding is Encoding.DELIMITED and self.separator is None:
            raise ValueError("delimited payloads need 'separator'")
        if self.encoding is Encoding.JSON and self.separator is not None:
            raise ValueError("'separator' only applies to delimited payloads")
        return self


class Fields(_Strict):
    time: FieldRef
    volume: FieldRef
    device_id: FieldRef | None = None
    seq: FieldRef | None = None
    unit: FieldRef | None = None
    utc_offset: FieldRef | None = None
    status: FieldRef | None = None
    bag_change_flag: FieldRef | None = None


class TimeSpec(_Strict):
    format: TimeFormat = TimeFormat.ISO8601


class Volume(_Strict):
    semantics: Semantics
    unit: Unit = "mL"  # when the payload has no unit field
    specific_gravity: Annotated[float, Field(ge=1.000, le=1.050)] = 1.015
    tare_g: Annotated[float, Field(ge=0)] = 0.0
    interval_s: Annotated[int, Field(gt=0, le=3600)] | None = None
    resolution_ml: Annotated[float, Field(gt=0, le=50)] = 1.0

    @model_validator(mode="after")
    def _consistent(self) -> Volume:
        if self.semantics is Semantics.INTERVAL and self.interval_s is None:
            raise ValueError("interval meters need 'interval_s'")
        if self.semantics is Semantics.BAG_WEIGHT and self.unit != "g":
            raise ValueError('bag_weight meters report grams: set unit = "g"')
        if self.semantics is not Semantics.BAG_WEIGHT and self.unit == "g":
            raise ValueError('unit "g" is only meaningful with semantics = "bag_weight"')
        return self


class Timing(_Strict):
    period_s: Annotated[int, Field(gt=0, le=3600)]
    reorder_tolerance_s: Annotated[int, Field(ge=0, le=3600)] = 180
    clock_tolerance_s: Annotated[int, Field(ge=0, le=3600)] = 120
    max_interpolation_gap_s: Annotated[int, Field(gt=0, le=86400)] = 1800
    store_forward_max_s: Annotated[int, Field(ge=0, le=7 * 86400)] = 86400


class Limits(_Strict):
    max_flow_ml_h: Annotated[float, Field(gt=0, le=20000)]
    min_ml: float = 0.0
    max_ml: Annotated[float, Field(gt=0)]
    # what the bag holds when full (cumulative and bag-weight meters); default max_ml
    capacity_ml: Annotated[float, Field(gt=0)] | None = None

    @model_validator(mode="after")
    def _range(self) -> Limits:
        if self.min_ml >= self.max_ml:
            raise ValueError("'min_ml' must be below 'max_ml'")
        if self.capacity_ml is not None and self.capacity_ml > self.max_ml:
            raise ValueError("'capacity_ml' must not be above 'max_ml'")
        return self


class BagChange(_Strict):
    detect: Literal["flag", "fall", "both"] = "both"
    near_zero_ml: Annotated[float, Field(ge=0)] = 20.0
    # A fall smaller than this is meter noise: the baseline holds.
    noise_fall_ml: Annotated[float, Field(ge=0)] = 5.0
    # A fall to near zero is an emptying only if it is at least this large; a
    # smaller one waits for the next reading (noise near an empty bag).
    min_fall_ml: Annotated[float, Field(ge=0)] = 30.0


class Status(_Strict):
    ok: list[str] = Field(default_factory=lambda: ["ok"])
    bag_change: list[str] = Field(default_factory=list)


class Smoothing(_Strict):
    # Cumulative readings are fitted monotone over this many recent readings;
    # older ones are final.
    points: Annotated[int, Field(ge=1, le=30)] = 5


class DeviceProfile(_Strict):
    schema_version: Literal[1] = Field(1, alias="schema")
    name: Annotated[str, Field(pattern=_NAME)]
    description: str = ""
    topic: str
    payload: Payload
    fields: Fields
    time: TimeSpec = TimeSpec()
    volume: Volume
    timing: Timing
    limits: Limits
    bag_change: BagChange = BagChange()
    status: Status = Status()
    smoothing: Smoothing = Smoothing()

    @model_validator(mode="after")
    def _check(self) -> DeviceProfile:
        if self.topic.count("{device_id}") != 1:
            raise ValueError("'topic' needs exactly one {device_id} placeholder")
        if any(c in self.topic for c in "+#"):
            raise ValueError("'topic' must not contain MQTT wildcards; use {device_id}")
        want: type = str if self.payload.encoding is Encoding.JSON else int
        for key, ref in self.fields.model_dump().items():
            if ref is not None and not isinstance(ref, want):
                kind = "a JSON path string" if want is str else "a 0-based column number"
                raise ValueError(f"fields.{key}: {self.payload.encoding} payloads need {kind}")
        no_flag = self.fields.bag_change_flag is None and not self.status.bag_change
        if self.bag_change.detect == "flag" and no_flag:
            raise ValueError(
                "bag_change.detect = 'flag' needs fields.bag_change_flag or status.bag_change"
            )
        if self.status.bag_change and self.fields.status is None:
            raise ValueError("status.bag_change needs fields.status")
        if self.volume.semantics is Semantics.INTERVAL and self.fields.bag_change_flag:
            raise ValueError("interval meters have no bag to change: drop bag_change_flag")
        return self

    @property
    def bag_capacity_ml(self) -> float | None:
        """The bag's capacity, for meters that fill a bag (None for interval meters)."""
        if self.volume.semantics is Semantics.INTERVAL:
            return None
        return self.limits.capacity_ml or self.limits.max_ml

    @property
    def subscription(self) -> str:
        """The MQTT filter for this family: the placeholder becomes '+'."""
        return self.topic.replace("{device_id}", "+")

    def topic_regex(self) -> re.Pattern[str]:
        head, tail = self.topic.split("{device_id}")
        return re.compile("^" + re.escape(head) + "([^/]+)" + re.escape(tail) + "$")
