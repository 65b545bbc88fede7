"""Sharding a hospital by ward: a group of instances watches the wards it owns
(`[shard] wards`), and leaves every other ward to the group that owns it.

Shell side, before the journal: a message of another ward's bed is acknowledged to the
broker but neither journaled nor evaluated, so a replay or a restart of this group's
journal sees only its own wards. What belongs to another ward:
- a bed context naming a ward not owned (logged once per bed and ward);
- that bed's other topics (intake, vitals, labs) while its latest context says so;
- acknowledgements of that bed's alarms;
- readings of the meters that context binds (logged once per meter).
A bed whose context moves it into an owned ward is ours again from that context on.
What no context has placed yet (a meter never bound) is ours, as without sharding, and
the engine counts it as unbound.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from typing import Any, Protocol

from pydantic import ValidationError

from .engine.context import BedContext
from .engine.profiles import DeviceProfile
from .engine.strictjson import NotJson, validate


class _Message(Protocol):
    @property
    def topic(self) -> str: ...
    @property
    def payload(self) -> bytes: ...


class WardShard:
    def __init__(self, wards: Sequence[str], prefix: str, profiles: Sequence[DeviceProfile],
                 log: Any) -> None:  # fmt: skip
        self.wards = frozenset(wards)
        self.log = log
        root = prefix.rstrip("/")
        self._beds = root + "/beds/"
        self._ack = root + "/ack"
        # per profile topic: its levels and the index of the device id's level
        self._meters: list[tuple[list[str], int]] = []
        for p in profiles:
            levels = p.topic.split("/")
            self._meters.append((levels, levels.index("{device_id}")))
        self.foreign_beds: dict[str, str] = {}  # bed -> the other ward it is in
        self.foreign_devices: dict[str, str] = {}  # meter -> bed of another ward
        self._said: set[tuple[str, str]] = set()
        self.ignored = 0

    def admit(self, batch: Sequence[_Message]) -> list[bool]:
        """One verdict per message, in order: True = this group's."""
        if not self.wards:
            return [True] * len(batch)
        out = [self._ours(m.topic, m.payload) for m in batch]
        self.ignored += out.count(False)
        return out

    def _ours(self, topic: str, payload: bytes) -> bool:
        if topic.startswith(self._beds):
            rest = topic[len(self._beds) :].split("/")
            if len(rest) != 2 or not rest[0]:
                return True  # the engine refuses it with its reason
            bed, kind = rest
            if kind == "context":
                return self._context(bed, payload)
            return bed not in self.foreign_beds
        if topic == self._ack or topic.startswith(self._ack + "/"):
            return self._ack_bed(payload) not in self.foreign_beds
        device = self._device(topic)
        if device is not None and device in self.foreign_devices:
            self._say("shard_reading_ignored", device, device=device,
                      bed=self.foreign_devices[device])  # fmt: skip
            return False
        return True

    def _context(self, bed: str, payload: bytes) -> bool:
        try:
            ctx = validate(BedContext, payload)  # as strictly as the engine reads it
        except (ValidationError, NotJson):
            return True  # the engine refuses and counts it
        if ctx.ward in self.wards:
            self.foreign_beds.pop(bed, None)
            for dev in ctx.device_ids:  # a meter moved onto one of our beds
                self.foreign_devices.pop(dev, None)
            self._forget_devices_of(bed, keep=())
            return True
        self.foreign_beds[bed] = ctx.ward
        self._forget_devices_of(bed, keep=ctx.device_ids)
        for dev in ctx.device_ids:
            self.foreign_devices[dev] = bed
        self._say("shard_context_ignored", f"{bed}\x1f{ctx.ward}", bed=bed, ward=ctx.ward,
                  owned=sorted(self.wards))  # fmt: skip
        return False

    def _forget_devices_of(self, bed: str, keep: Sequence[str]) -> None:
        for dev in [d for d, b in self.foreign_devices.items() if b == bed and d not in keep]:
            del self.foreign_devices[dev]

    def _ack_bed(self, payload: bytes) -> str | None:
        try:
            obj = json.loads(payload)
        except (ValueError, RecursionError):
            return None
        alarm = obj.get("alarm_id") if isinstance(obj, dict) else None
        return alarm.split("/", 1)[0] if isinstance(alarm, str) else None

    def _device(self, topic: str) -> str | None:
        levels = topic.split("/")
        for pattern, at in self._meters:
            if len(levels) == len(pattern) and all(
                a == b for i, (a, b) in enumerate(zip(levels, pattern, strict=True)) if i != at
            ):
                return levels[at]
        return None

    def _say(self, event: str, key: str, **fields: Any) -> None:
        """One log line per bed and ward (or per meter), not one per message."""
        if (event, key) in self._said:
            return
        if len(self._said) > 100_000:  # bounded, like every table hostile input can grow
            self._said.clear()
        self._said.add((event, key))
        self.log.info(event, note="another ward's: not journaled, not evaluated", **fields)
