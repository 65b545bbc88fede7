"""The engine: routes each inbound message, cleans meter streams into per-bed
minute series and counts every outcome. Pure: no I/O, no clock; `now` is the
message's receive time, given by the caller.
"""

from __future__ import annotations

import bisect
import json
from collections import Counter
from collections.abc import Iterable
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from pydantic import ValidationError

from .cleaning import Cleaner, CumulativeCleaner, IntervalCleaner
from .context import BedContext
from .decode import Decoder, Payload, Reading, Rejected
from .effects import Effect, RejectedInput
from .outcomes import DECODE_REJECTIONS, DeviceQuality, Outcome
from .profiles import DeviceProfile, Semantics
from .series import MinuteSeries
from .timefmt import as_epoch

DEDUP_HORIZON_S = 86400.0


@dataclass(slots=True)
class _Device:
    device_id: str
    decoder: Decoder
    quality: DeviceQuality
    bed: str | None = None
    cleaner: Cleaner | None = None
    latest_t: float | None = None  # newest effective time accepted
    by_time: dict[float, float] = field(default_factory=dict)  # raw device time -> raw value
    by_seq: dict[int, float] = field(default_factory=dict)  # seq -> raw device time
    dedup_times: list[float] = field(default_factory=list)  # sorted keys, for pruning


@dataclass(slots=True)
class Bed:
    bed_id: str
    context: BedContext
    series: MinuteSeries


class Engine:
    def __init__(self, profiles: Iterable[DeviceProfile], topic_prefix: str = "hourwatch") -> None:
        self.profiles = list(profiles)
        names = [p.name for p in self.profiles]
        if len(set(names)) != len(names):
            raise ValueError("device profile names must be unique")
        self._routes = [(p.topic_regex(), Decoder(p)) for p in self.profiles]
        self.prefix = topic_prefix.rstrip("/")
        self._bed_topic = self.prefix + "/beds/"
        self.devices: dict[str, _Device] = {}
        self.beds: dict[str, Bed] = {}
        self._bound: dict[str, str] = {}  # device id -> bed id
        self.unrouted: Counter[Outcome] = Counter()
        self.context_rejections: Counter[str] = Counter()

    # --- inbound -------------------------------------------------------------
    def step(self, topic: str, payload: Payload, now: datetime | float) -> list[Effect]:
        t_now = as_epoch(now)
        if topic.startswith(self._bed_topic):
            return self._bed_message(topic, payload, t_now)
        for regex, decoder in self._routes:
            m = regex.match(topic)
            if m:
                return self._meter_message(topic, m.group(1), decoder, payload, t_now)
        self.unrouted[Outcome.UNKNOWN_TOPIC] += 1
        return [RejectedInput(t_now, topic, None, Outcome.UNKNOWN_TOPIC, "no profile matches")]

    def _device(self, device_id: str, decoder: Decoder) -> _Device:
        dev = self.devices.get(device_id)
        if dev is None or dev.decoder is not decoder:
            dev = _Device(device_id, decoder, DeviceQuality(decoder.profile.name))
            self.devices[device_id] = dev
            bed = self._bound.get(device_id)
            if bed is not None:
                self._attach(dev, bed)
        return dev

    def _meter_message(
        self, topic: str, device_id: str, decoder: Decoder, payload: Payload, now: float
    ) -> list[Effect]:
        dev = self._device(device_id, decoder)
        dev.quality.received += 1
        result = decoder.decode(device_id, payload)
        if isinstance(result, Rejected):
            dev.quality.add(result.reason)
            return [RejectedInput(now, topic, device_id, result.reason, result.detail)]
        if dev.cleaner is None:
            dev.quality.add(Outcome.UNBOUND)
            return [RejectedInput(now, topic, device_id, Outcome.UNBOUND, "device not on any bed")]
        outcomes = self._clean(dev, result, now)
        effects: list[Effect] = []
        for o in outcomes:
            if o is Outcome.SPIKE_HELD:
                continue  # pending: counted when the next reading settles it
            dev.quality.add(o)
            if o not in _SILENT:
                effects.append(RejectedInput(now, topic, device_id, o, _DETAIL.get(o, str(o))))
        return effects

    def _clean(self, dev: _Device, r: Reading, now: float) -> list[Outcome]:
        p = dev.decoder.profile.timing
        # duplicates first, so a redelivery days later still counts as a duplicate
        seen_value = dev.by_time.get(r.device_time)
        if seen_value is not None:
            return [
                Outcome.DUPLICATE if seen_value == r.raw_value else Outcome.CONFLICTING_DUPLICATE
            ]
        if r.seq is not None:
            seen_t = dev.by_seq.get(r.seq)
            if seen_t is not None and abs(seen_t - r.device_time) <= p.clock_tolerance_s:
                return [Outcome.DUPLICATE]
        # which clock to believe
        t = r.device_time
        adjusted: Outcome | None = None
        if t > now + p.clock_tolerance_s:
            t, adjusted = now, Outcome.CLOCK_SKEW
        elif t < now - p.store_forward_max_s:
            return [Outcome.TOO_OLD]
        elif t < now - max(p.clock_tolerance_s, 2 * p.period_s):
            adjusted = Outcome.STORE_FORWARD
        if dev.latest_t is not None and t < dev.latest_t - p.reorder_tolerance_s:
            return [Outcome.LATE]
        self._remember(dev, r)
        assert dev.cleaner is not None
        outcomes = dev.cleaner.feed(t, r)
        if dev.latest_t is None or t > dev.latest_t:
            dev.latest_t = t
        bed = self.beds[dev.bed] if dev.bed else None
        if bed is not None and outcomes[-1] not in _NOT_IN_SERIES:
            bed.series.note_reading(t)
        if adjusted is not None and outcomes[-1] is Outcome.ACCEPTED:
            outcomes[-1] = adjusted
        return outcomes

    def _remember(self, dev: _Device, r: Reading) -> None:
        dev.by_time[r.device_time] = r.raw_value
        bisect.insort(dev.dedup_times, r.device_time)
        if r.seq is not None:
            dev.by_seq[r.seq] = r.device_time
        if len(dev.dedup_times) > 4096:  # prune lazily, by device time
            cutoff = dev.dedup_times[-1] - DEDUP_HORIZON_S
            k = bisect.bisect_left(dev.dedup_times, cutoff)
            for old in dev.dedup_times[:k]:
                dev.by_time.pop(old, None)
            del dev.dedup_times[:k]
            dev.by_seq = {s: tt for s, tt in dev.by_seq.items() if tt >= cutoff}

    # --- bed context ---------------------------------------------------------
    def _bed_message(self, topic: str, payload: Payload, now: float) -> list[Effect]:
        rest = topic[len(self._bed_topic) :].split("/")
        if len(rest) != 2 or not rest[0] or rest[1] != "context":
            # later issues route intake, vitals and labs here
            self.unrouted[Outcome.UNKNOWN_TOPIC] += 1
            return [RejectedInput(now, topic, None, Outcome.UNKNOWN_TOPIC, "unknown bed topic")]
        bed_id = rest[0]
        try:
            obj: Any = payload
            if isinstance(payload, bytes | str):
                obj = json.loads(payload)
            ctx = BedContext.model_validate(obj)
        except ValidationError as exc:
            err = exc.errors()[0]
            where = ".".join(str(x) for x in err["loc"]) or "payload"
            return self._bad_context(topic, bed_id, now, f"{where}: {err['msg']}")
        except (ValueError, TypeError, RecursionError):
            return self._bad_context(topic, bed_id, now, "payload is not JSON")
        self._bind(bed_id, ctx)
        return []

    def _bad_context(self, topic: str, bed: str, now: float, detail: str) -> list[Effect]:
        self.context_rejections[bed] += 1
        return [RejectedInput(now, topic, None, Outcome.BAD_CONTEXT, detail[:200])]

    def _bind(self, bed_id: str, ctx: BedContext) -> None:
        bed = self.beds.get(bed_id)
        if bed is None:
            bed = self.beds[bed_id] = Bed(bed_id, ctx, MinuteSeries())
        bed.context = ctx
        wanted = set(ctx.device_ids)
        for dev_id, b in list(self._bound.items()):
            if b == bed_id and dev_id not in wanted:
                del self._bound[dev_id]
                if dev_id in self.devices:
                    self._detach(self.devices[dev_id])
        for dev_id in ctx.device_ids:
            if self._bound.get(dev_id) == bed_id:
                continue
            self._bound[dev_id] = bed_id
            dev = self.devices.get(dev_id)
            if dev is not None:
                self._attach(dev, bed_id)

    def _attach(self, dev: _Device, bed_id: str) -> None:
        # A meter moved to another bed starts afresh: what is in its bag is not
        # this patient's.
        series = self.beds[bed_id].series
        prof = dev.decoder.profile
        dev.bed = bed_id
        dev.cleaner = (
            IntervalCleaner(prof, series)
            if prof.volume.semantics is Semantics.INTERVAL
            else CumulativeCleaner(prof, series)
        )
        dev.latest_t = None

    def _detach(self, dev: _Device) -> None:
        dev.bed = None
        dev.cleaner = None
        dev.latest_t = None

    # --- time ----------------------------------------------------------------
    def next_wakeup(self) -> float | None:
        """Epoch seconds of the next time-driven change, or None (none yet)."""
        return None

    def tick(self, now: datetime | float) -> list[Effect]:
        as_epoch(now)
        return []

    # --- queries -------------------------------------------------------------
    def quality(self) -> dict[str, dict[str, object]]:
        out: dict[str, dict[str, object]] = {}
        for dev_id, dev in sorted(self.devices.items()):
            d = dev.quality.to_dict()
            d["bed"] = dev.bed
            d["held"] = dev.cleaner.pending() if dev.cleaner else 0
            out[dev_id] = d
        return out


_NOT_IN_SERIES = frozenset(
    {
        Outcome.SPIKE_HELD,
        Outcome.ARTEFACT_DROPPED,
        Outcome.LATE,
        Outcome.IMPLAUSIBLE_FLOW,
        Outcome.CONFLICTING_DUPLICATE,
    }
)
# Outcomes that are normal or adjusted, not worth a message on the rejected topic.
_SILENT = frozenset(
    {
        Outcome.ACCEPTED,
        Outcome.REORDERED,
        Outcome.STORE_FORWARD,
        Outcome.CLOCK_SKEW,
        Outcome.NOISE_FALL,
        Outcome.BAG_CHANGE,
        Outcome.BAG_CHANGE_INFERRED,
        Outcome.SPIKE_HELD,
        Outcome.SPIKE_CONFIRMED,
        Outcome.DUPLICATE,
    }
)
_DETAIL = {
    Outcome.LATE: "older than the reorder tolerance",
    Outcome.TOO_OLD: "older than the store-and-forward limit",
    Outcome.ARTEFACT_DROPPED: "jump or fall not confirmed by the next reading",
    Outcome.IMPLAUSIBLE_FLOW: "interval volume above the maximum plausible flow",
    Outcome.CONFLICTING_DUPLICATE: "same time as an earlier reading with another value",
}
assert DECODE_REJECTIONS.isdisjoint(_SILENT)
