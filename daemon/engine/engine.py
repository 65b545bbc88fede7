"""The engine: routes each inbound message, cleans meter streams into per-bed
minute series, runs the rules and the alarm lifecycle, and counts every
outcome. Pure: no I/O, no clock; `now` is given by the caller (a message's
receive time, or a wake-up the engine declared).
"""

from __future__ import annotations

import bisect
import heapq
import math
import re
from array import array
from collections import Counter
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime, tzinfo
from typing import NamedTuple, TypeVar

from pydantic import BaseModel, ValidationError

from .advice import (
    DEFAULT_POLICY,
    FLUIDS,
    PROMPTING,
    AdviceKind,
    AdvicePolicy,
    Sodium,
    advise,
    ended_advice,
)
from .alarms import AlarmEvent
from .bedstate import BedState, Vitals
from .checks import DeviceSeen
from .cleaning import Cleaner, CumulativeCleaner, IntervalCleaner
from .clinical import AckMessage, IntakeMessage, LabsMessage, VitalsMessage
from .context import BedContext
from .decode import Decoder, Payload, Reading, Rejected
from .effects import AdviceIssued, Effect, RejectedInput
from .escalation import EscalationPolicy
from .evaluator import Evaluator, Notice, criterion_holds
from .lifecycle import AlarmBook
from .outcomes import COUNTED_IN_SERIES, DECODE_REJECTIONS, DeviceQuality, Outcome, withheld_reason
from .profiles import DEVICE_LEVEL, Calibration, DeviceProfile, Semantics
from .rules import Hypovolaemia, ReplacementRatio, RuleDef
from .sanity import Change, SanityWarning, SanityWatch
from .series import MinuteSeries
from .strictjson import NotJson, first_error, validate
from .timefmt import LocalClock, as_epoch
from .windows import measure

M = TypeVar("M", bound=BaseModel)

DEDUP_HORIZON_S = 86400.0  # readings remembered for duplicates: this far behind the newest
DEDUP_SLACK_S = 3600.0  # ... pruned once the oldest is this much further behind
DEDUP_MAX = 16_384  # duplicate keys kept per device at most, whatever the device times
NO_SEQ = math.nan  # a reading without a sequence number (equal to no other)
SEQ_LOOKBACK = 8  # remembered readings searched first for a seq's window (then all)
ADVICE_FRESH_S = 2 * 3600.0  # older advice is not attached to a page
# Bed ids, ward names and acknowledging users: letters, digits, '-', '_' and '.', up to
# 64 characters. No spaces, no MQTT separators or wildcards; a site that wants another
# pattern configures it. Never a patient's name or record number (docs/operations.md).
ID_PATTERN = r"^[A-Za-z0-9._-]{1,64}$"
REFUSED_LEVEL = "{refused}"  # stands in a topic for a level that is not an identifier
CLINICAL_AHEAD_S = 3600.0  # a clinical time may be this far ahead of its receive time
UNBOUND_EXPIRY_S = 86400.0  # an unbound meter's entry is forgotten after a day of silence
MAX_UNBOUND_DEVICES = 10_000  # and never more than this many unbound entries are kept
MAX_BEDS = 2_000
MAX_REJECTION_KEYS = 1_000  # beds named in the context-rejection counts
Labels = tuple[tuple[str, str], ...]  # a topic's metadata levels: (("ward", "4-east"),)


class ReadingTrace(NamedTuple):
    """What happened to one meter message, for an optional observer (review tools);
    a tuple, since one is made per message.

    `outcomes` has two items when the message also settled a reading held before
    it (the first is that earlier reading's final outcome).
    """

    received: float
    topic: str
    device_id: str
    bed: str | None
    device_time: float | None  # None when the message never became a reading
    volume_ml: float | None
    seq: int | None
    outcomes: tuple[Outcome, ...]
    # earlier readings of this device now found to be artefacts (a jump or fall they
    # followed was taken back): (effective time, the outcome they were counted with)
    revised: tuple[tuple[float, Outcome], ...] = ()
    # the topic's metadata levels, e.g. (("ward", "4-east"),) for uo/{ward}/{device_id}/m
    labels: Labels = ()


@dataclass(slots=True)
class _Device:
    device_id: str
    decoder: Decoder
    quality: DeviceQuality
    bed: str | None = None
    cleaner: Cleaner | None = None
    latest_t: float | None = None  # newest effective time accepted
    last_seen: float | None = None  # receive time of its last message
    # receive time of its last usable reading (one that reached the bed's series), or
    # when it was attached to its bed; what it sent since, by outcome
    last_usable: float | None = None
    sent_since: Counter[str] = field(default_factory=Counter)
    bag_ml: float | None = None  # what its bag held at its last usable reading
    # readings remembered for duplicates, by raw device time: sorted times, and per time
    # the raw value and the seq (NO_SEQ: none); typed arrays, 24 bytes a reading, where
    # dicts of Python floats took about 170 (a day of a meter every minute: 1,440)
    dedup_times: array[float] = field(default_factory=lambda: array("d"))
    dedup_values: array[float] = field(default_factory=lambda: array("d"))
    dedup_seqs: array[float] = field(default_factory=lambda: array("d"))
    # its family is fixed: it spoke on a bed, or a bed context named the family
    owned: bool = False
    # of its family, kept here: every message or evaluation reads them
    period_s: int = 0
    max_ml_per_min: float = 0.0
    clock_tolerance_s: float = 0.0
    store_forward_max_s: float = 0.0
    stored_after_s: float = 0.0  # older than this on arrival: sent from the meter's store
    reorder_tolerance_s: float = 0.0
    capacity_ml: float | None = None
    labels: Labels = ()  # its topic's metadata levels, as last heard
    sanity: SanityWatch | None = None

    def __post_init__(self) -> None:
        p = self.decoder.profile.timing
        self.period_s = p.period_s
        self.max_ml_per_min = _max_ml_per_min(self.decoder.profile)
        self.clock_tolerance_s = p.clock_tolerance_s
        self.store_forward_max_s = p.store_forward_max_s
        self.stored_after_s = max(p.clock_tolerance_s, 2 * p.period_s)
        self.reorder_tolerance_s = p.reorder_tolerance_s
        self.capacity_ml = self.decoder.profile.bag_capacity_ml


_CLINICAL: dict[str, type[IntakeMessage | VitalsMessage | LabsMessage]] = {
    "intake": IntakeMessage,
    "vitals": VitalsMessage,
    "labs": LabsMessage,
}
_BED_WITHHELD = frozenset({Outcome.BAD_CONTEXT, Outcome.TOO_LARGE})
_CLINICAL_WITHHELD = frozenset({Outcome.BAD_CLINICAL_INPUT, Outcome.TOO_LARGE})
_ACK_WITHHELD = frozenset({Outcome.BAD_ACK, Outcome.TOO_LARGE})
Refusal = tuple[Outcome, str]  # (reason, detail)


def _parse(model: type[M], payload: Payload, reason: Outcome, marked: frozenset[Outcome],
           ) -> M | Refusal:  # fmt: skip
    """A message model from a payload, strictly (see strictjson), or why not."""
    withheld = withheld_reason(payload, marked)
    if withheld is not None:
        return withheld, "payload withheld"
    try:
        return validate(model, payload)
    except ValidationError as exc:
        return reason, first_error(exc)
    except NotJson:
        return reason, "payload is not JSON"


# A skipped reading leaves the bed's wake-up where the last evaluation put it; one
# this close ahead is re-declared by evaluating now rather than by a wake-up later.
REFRESH_AHEAD_S = 90.0


def _max_ml_per_min(p: DeviceProfile) -> float:
    """The most one meter's accepted readings can add per minute (see cleaning)."""
    return p.limits.max_flow_ml_h / 60.0 + p.bag_change.noise_fall_ml * 60.0 / p.timing.period_s


def _bedside_only() -> EscalationPolicy:
    """Used when no policy is given (intake-only use): page the bedside nurse once."""
    one = {"tiers": [{"roles": ["bedside-nurse"], "after_s": 0}]}
    return EscalationPolicy.model_validate({p: one for p in ("high", "medium", "low", "info")})


class Engine:
    def __init__(
        self,
        profiles: Iterable[DeviceProfile],
        rules: Iterable[RuleDef] = (),
        policy: EscalationPolicy | None = None,
        topic_prefix: str = "hourwatch",
        ack_validity_s: int = 3600,
        observe: Callable[[ReadingTrace], None] | None = None,
        *,
        advice_policy: AdvicePolicy = DEFAULT_POLICY,
        timezone: tzinfo = UTC,
        id_pattern: str = ID_PATTERN,
        clinical_ahead_s: float = CLINICAL_AHEAD_S,
        unbound_expiry_s: float = UNBOUND_EXPIRY_S,
        max_unbound_devices: int = MAX_UNBOUND_DEVICES,
        max_beds: int = MAX_BEDS,
        ack_topic: str | None = None,
        ack_users: Mapping[str, Iterable[str]] | None = None,
        calibration: Mapping[str, Calibration] | None = None,
        series_keep_s: float | None = None,
    ) -> None:
        self.observe = observe  # told the fate of every meter message (review tools)
        self.profiles = list(profiles)
        names = [p.name for p in self.profiles]
        if len(set(names)) != len(names):
            raise ValueError("device profile names must be unique")
        self._routes = [(p.topic_regex(), Decoder(p)) for p in self.profiles]
        self._decoders = {d.profile.name: d for _, d in self._routes}
        # per-meter calibration: a devices file's, unless a bed context gives one
        self._calibration = dict(calibration or {})
        self._calibrated = bool(self._calibration)  # any at all (a context may add some)
        # sanity warnings raised and cleared since the shell last took them
        self._sanity_changes: list[Change] = []
        self.prefix = topic_prefix.rstrip("/")
        self._bed_topic = self.prefix + "/beds/"
        self._ack_topic = self.prefix + "/ack"
        self._ack_users = self._ack_topic + "/"  # {prefix}/ack/{user}: who, from the broker
        # where alarm messages say to acknowledge (the service: the per-user topic)
        self._ack_advertised = ack_topic or self._ack_topic
        try:
            self._id = re.compile(id_pattern)
        except re.error as exc:
            raise ValueError(f"identifier pattern: {exc}") from None
        self._clinical_ahead_s = clinical_ahead_s
        self._unbound_expiry_s = unbound_expiry_s
        self._max_unbound = max_unbound_devices
        self._max_beds = max_beds
        # a bed's minute series keeps this much before its newest minute (None: all, as
        # replay and its reports want); the live service keeps the longest rule window
        self._series_keep_min = None if series_keep_s is None else math.ceil(series_keep_s / 60)
        self._unbound: dict[str, float] = {}  # unbound device -> last message, oldest first
        self.devices_forgotten = 0  # unbound entries expired or pushed out
        self.received_forgotten = 0  # the messages those entries had counted
        # non-meter messages that were used: context, clinical, ack (each counted once;
        # the refused ones are in unrouted, context_rejections and input_rejections)
        self.applied: Counter[str] = Counter()
        self._slowest_period = max((p.timing.period_s for p in self.profiles), default=60)
        self._max_ml_per_min = max((_max_ml_per_min(p) for p in self.profiles), default=0.0)
        self._route_cache: dict[str, tuple[Decoder, str, Labels] | tuple[()]] = {}
        self.devices: dict[str, _Device] = {}
        self.beds: dict[str, BedState] = {}
        self._bound: dict[str, str] = {}  # device id -> bed id
        self.unrouted: Counter[Outcome] = Counter()
        self.context_rejections: Counter[str] = Counter()
        self.input_rejections: Counter[str] = Counter()
        self.rules = [r for r in rules if r.enabled]
        policy = policy or _bedside_only()
        self.book = AlarmBook(policy, ack_validity_s)
        # only the roles the escalation policy names may acknowledge (DESIGN section 5)
        self._ack_roles = frozenset(
            role
            for prio in (policy.high, policy.medium, policy.low, policy.info)
            for tier in prio.tiers
            for role in tier.roles
        )
        # optionally, who may acknowledge and in which roles (the site's staff list)
        self._staff = None if ack_users is None else {u: frozenset(r) for u, r in ack_users.items()}
        if self._staff is not None:
            strays = {r for roles in self._staff.values() for r in roles} - self._ack_roles
            if strays:
                raise ValueError(f"roles not in the escalation policy: {', '.join(sorted(strays))}")
        self.advice_policy = advice_policy
        # what people read says local clock time (pages, summaries); data stays UTC
        self.clock = LocalClock(timezone)
        self.evaluator = Evaluator(self.rules, self.book, hypotonic=self._hypotonic,
                                   end_hold_s=advice_policy.criterion_end_hold_s,
                                   clock=self.clock)  # fmt: skip
        # rules whose met criterion brings replacement advice every completed hour
        self._advice_sources = tuple(r.id for r in self.rules if r.replacement_advice)
        # alarms whose page carries the advice: those, and the replacement checks on them
        self._advice_rules = set(self._advice_sources) | {
            r.id for r in self.rules
            if set(r.while_active) & set(self._advice_sources)
            and isinstance(r.check, ReplacementRatio)
        }  # fmt: skip
        self._ack_valid = {r.id: r.ack_valid_s for r in self.rules if r.ack_valid_s}
        # while one of these holds, no replacement rate is suggested
        self._hypovolaemia_rules = {r.id for r in self.rules if isinstance(r.check, Hypovolaemia)}
        self._due: dict[str, float] = {}  # bed -> its rules' next due time
        self._heap: list[tuple[float, str]] = []  # (due, bed), stale entries skipped

    # --- inbound -------------------------------------------------------------
    def step(self, topic: str, payload: Payload, now: datetime | float) -> list[Effect]:
        """One inbound message, received at `now`."""
        t_now = now if type(now) is float else as_epoch(now)  # epoch seconds: as they are
        effects = self._step(topic, payload, t_now)  # step_at, one call less
        return self._finish(effects) if effects else []

    def step_at(self, topic: str, payload: Payload, t_now: float) -> list[Effect]:
        """`step` at epoch seconds (replay's clock)."""
        effects = self._step(topic, payload, t_now)
        return self._finish(effects) if effects else []  # a list of the caller's own

    def _step(self, topic: str, payload: Payload, t_now: float) -> list[Effect]:
        route = self._route_cache.get(topic)
        if route:  # a meter topic heard before (bed and ack topics are never in the cache)
            decoder, device_id, labels = route
            return self._meter_message(topic, device_id, decoder, payload, t_now, labels)
        if topic.startswith(self._bed_topic):
            return self._bed_message(topic, payload, t_now)
        if topic == self._ack_topic:
            return self._ack(topic, None, payload, t_now)
        if topic.startswith(self._ack_users):
            return self._ack(topic, topic[len(self._ack_users) :], payload, t_now)
        if route is None:
            route = self._route(topic)
        if route:
            return self._meter_message(topic, route[1], route[0], payload, t_now, route[2])
        self.unrouted[Outcome.UNKNOWN_TOPIC] += 1
        return [RejectedInput(t_now, topic, None, Outcome.UNKNOWN_TOPIC, "no profile matches")]

    def _route(self, topic: str) -> tuple[Decoder, str, Labels] | tuple[()]:
        """Which profile a meter topic belongs to, the device id and the topic's metadata
        levels (a level that is not an identifier is kept as {refused}: it could be
        anything, a patient's name included); remembered, since topics repeat."""
        route: tuple[Decoder, str, Labels] | tuple[()] = ()  # () = no profile matches
        for regex, decoder in self._routes:
            m = regex.match(topic)
            if m:
                labels = tuple(
                    (k, v if self.is_identifier(v) else REFUSED_LEVEL)
                    for k, v in m.groupdict().items() if k != DEVICE_LEVEL
                )  # fmt: skip
                route = (decoder, m.group(DEVICE_LEVEL), labels)
                break
        if len(self._route_cache) < 100_000:  # bounded: junk topics must not grow it
            self._route_cache[topic] = route
        return route

    def _device(self, device_id: str, decoder: Decoder, now: float) -> _Device:
        """A new entry for a device (first heard of, or its family not fixed yet: then
        what it counted so far stays counted)."""
        quality = DeviceQuality(decoder.profile.name)
        old = self.devices.get(device_id)
        if old is not None:
            self._drop_held(old)
            quality.received, quality.counts = old.quality.received, old.quality.counts
        dev = _Device(device_id, decoder, quality)
        self.devices[device_id] = dev
        bed = self._bound.get(device_id)
        if bed is not None:
            self._attach(dev, bed, self.beds[bed].bound_at)
        else:
            self._unbound.pop(device_id, None)
            self._seen_unbound(device_id, now)
        return dev

    def _seen_unbound(self, device_id: str, now: float) -> None:
        """Keep unbound entries in order of their last message; forget the ones silent
        for too long, and the oldest when there are too many (a flood of invented ids
        must not grow the engine)."""
        table = self._unbound
        table.pop(device_id, None)
        table[device_id] = now
        horizon = now - self._unbound_expiry_s
        while table:
            oldest, seen = next(iter(table.items()))
            if seen >= horizon and len(table) <= self._max_unbound:
                break
            del table[oldest]
            self.received_forgotten += self.devices.pop(oldest).quality.received
            self.devices_forgotten += 1

    def _wrong_profile(self, topic: str, dev: _Device, now: float) -> list[Effect]:
        """A message for a device on another family's topic: not the device's, whatever
        it holds; counted apart, and the device's own state is left as it is."""
        self.unrouted[Outcome.WRONG_PROFILE] += 1
        detail = f"device belongs to the {dev.decoder.profile.name} family"
        return [RejectedInput(now, topic, dev.device_id, Outcome.WRONG_PROFILE, detail)]

    def _meter_message(
        self, topic: str, device_id: str, decoder: Decoder, payload: Payload, now: float,
        labels: Labels = (),
    ) -> list[Effect]:  # fmt: skip
        dev = self.devices.get(device_id)
        if dev is None or dev.decoder is not decoder:
            if dev is not None and dev.owned:
                return self._wrong_profile(topic, dev, now)
            dev = self._device(device_id, decoder, now)
        elif dev.bed is None:
            self._seen_unbound(device_id, now)
        if dev.bed is not None:
            dev.owned = True  # the family that first spoke on a bed keeps the id
        dev.quality.received += 1
        if dev.last_seen is None and dev.bed is not None:
            # its first word on the bed: its own period replaces the slowest family's
            # in the silence limit, which may bring the bed's wake-up forward
            self.beds[dev.bed].forget_quiet()
        dev.last_seen = now
        if labels is not dev.labels:
            dev.labels = labels
        result = decoder.decode(device_id, payload)
        if self._calibrated and not isinstance(result, Rejected):
            result = self._calibrate(dev, result)
        if isinstance(result, Rejected):
            dev.quality.add(result.reason)
            dev.sent_since[result.reason] += 1
            if self.observe is not None:
                self.observe(ReadingTrace(now, topic, device_id, dev.bed, None, None, None,
                                          (result.reason,), (), labels))  # fmt: skip
            return [RejectedInput(now, topic, device_id, result.reason, result.detail)]
        sanity = dev.sanity
        if sanity is None:
            sanity = dev.sanity = SanityWatch(device_id, decoder.profile, self._sanity_changes)
        if dev.cleaner is None:
            sanity.clock(now, result.device_time)  # an unbound meter's clock can be wrong too
            dev.quality.add(Outcome.UNBOUND)
            if self.observe is not None:
                trace = ReadingTrace(now, topic, device_id, None, result.device_time,
                                     result.volume_ml, result.seq, (Outcome.UNBOUND,),
                                     (), labels)  # fmt: skip
                self.observe(trace)
            return [RejectedInput(now, topic, device_id, Outcome.UNBOUND, "device not on any bed")]
        cleaner, bed_id = dev.cleaner, dev.bed  # a cleaner is made for a meter on a bed
        outcomes = self._clean(dev, result, now)
        last = outcomes[-1]
        sanity.cleaned(now, result.device_time, result.volume_ml, last)
        revised = cleaner.take_revised() if isinstance(cleaner, CumulativeCleaner) else []
        if last in COUNTED_IN_SERIES:  # a usable reading: the meter sees
            dev.last_usable = now
            if dev.sent_since:
                dev.sent_since.clear()
            dev.bag_ml = result.volume_ml
        else:
            dev.sent_since[last] += 1
        bed = self.beds[bed_id] if bed_id is not None else None
        if bed is not None and (revised or not _PLAIN.issuperset(outcomes)):
            # volume beyond the plain per-minute bound, or moved between minutes:
            # no rule may rely on having proved itself quiet
            bed.forget_quiet()
        if self.observe is not None:
            self.observe(ReadingTrace(now, topic, device_id, bed_id, result.device_time,
                                      result.volume_ml, result.seq, tuple(outcomes),
                                      tuple(revised), labels))  # fmt: skip
        effects = self._after_reading(bed, now) if bed is not None else []
        counts = dev.quality.counts
        for _, was in revised:  # counted before; an artefact after all
            counts[was] -= 1
            if not counts[was]:
                del counts[was]
            counts[Outcome.ARTEFACT_DROPPED] += 1
            effects.append(RejectedInput(now, topic, device_id, Outcome.ARTEFACT_DROPPED,
                                         _DETAIL_REVERTED))  # fmt: skip
        for o in outcomes:
            if o is _HELD:
                continue  # pending: counted when the next reading settles it
            counts[o] += 1
            if o not in _SILENT:
                effects.append(RejectedInput(now, topic, device_id, o, _DETAIL.get(o, str(o))))
        return effects

    def _calibrate(self, dev: _Device, r: Reading) -> Reading | Rejected:
        """The meter's calibration (its bed context's, else the devices file's), then the
        physical range again."""
        bed = self._bound.get(dev.device_id)
        cal = self.beds[bed].context.calibration.get(dev.device_id) if bed else None
        cal = cal or self._calibration.get(dev.device_id)
        if cal is None:
            return r
        r.volume_ml = cal.apply(r.volume_ml)
        lim = dev.decoder.profile.limits
        if not (lim.min_ml <= r.volume_ml <= lim.max_ml):
            return Rejected(Outcome.OUT_OF_RANGE, "outside physical range after calibration",
                            dev.device_id, key="calibration")  # fmt: skip
        return r

    def _clean(self, dev: _Device, r: Reading, now: float) -> list[Outcome]:
        t = r.device_time
        # duplicates first, so a redelivery a day later still counts as a duplicate
        times = dev.dedup_times
        n = len(times)
        # the usual reading is newer than every one remembered: no search for its place
        at = n if not n or times[-1] < t else bisect.bisect_left(times, t)
        if at < n and times[at] == t:
            same = dev.dedup_values[at] == r.raw_value
            return [Outcome.DUPLICATE if same else Outcome.CONFLICTING_DUPLICATE]
        seq = NO_SEQ if r.seq is None else float(r.seq)
        if r.seq is not None and self._seq_seen(dev, seq, t, at):
            return [Outcome.DUPLICATE]
        # which clock to believe
        adjusted: Outcome | None = None
        if t > now + dev.clock_tolerance_s:
            t, adjusted = now, Outcome.CLOCK_SKEW
        elif t < now - dev.store_forward_max_s:
            return [Outcome.TOO_OLD]
        elif t < now - dev.stored_after_s:
            adjusted = Outcome.STORE_FORWARD
        if dev.latest_t is not None and t < dev.latest_t - dev.reorder_tolerance_s:
            return [Outcome.LATE]
        self._remember(dev, r, seq, at)
        cleaner = dev.cleaner
        assert cleaner is not None
        outcomes = cleaner.feed(t, r)
        # a refused reading must not move the lateness horizon (a held one does)
        if outcomes[-1] not in _REFUSED and (dev.latest_t is None or t > dev.latest_t):
            dev.latest_t = t
        newest = cleaner.last_t
        if newest is not None:
            # the newest reading in the series (its bed's: see _attach): this one, or
            # a held one it let in
            cleaner.series.note_reading(newest)
        if adjusted is not None and outcomes[-1] is Outcome.ACCEPTED:
            outcomes[-1] = adjusted
        return outcomes

    @staticmethod
    def _seq_seen(dev: _Device, seq: float, t: float, at: int) -> bool:
        """A remembered reading with this seq and a device time within the clock
        tolerance of t: the same reading, re-stamped. `at` is t's place in the
        remembered times (bisect_left): the window's ends lie either side of it."""
        times, tol = dev.dedup_times, dev.clock_tolerance_s
        # the window's start usually lies a few readings before t: search there first
        start = at - SEQ_LOOKBACK
        if start <= 0 or times[start] >= t - tol:
            start = 0
        lo = bisect.bisect_left(times, t - tol, start, at)
        hi = bisect.bisect_right(times, t + tol, at)
        return seq in dev.dedup_seqs[lo:hi]  # by ==: seq is never NO_SEQ (NaN)

    @staticmethod
    def _remember(dev: _Device, r: Reading, seq: float, at: int) -> None:
        """Remember the reading (its seq as a float, or NO_SEQ) at its place `at` in time
        order; forget, by device time, what lies more than the horizon behind the newest."""
        times, values, seqs = dev.dedup_times, dev.dedup_values, dev.dedup_seqs
        if at == len(times):  # the usual case: in order
            times.append(r.device_time)
            values.append(r.raw_value)
            seqs.append(seq)
        else:
            times.insert(at, r.device_time)
            values.insert(at, r.raw_value)
            seqs.insert(at, seq)
        newest = times[-1]
        if times[0] < newest - DEDUP_HORIZON_S - DEDUP_SLACK_S or len(times) > DEDUP_MAX:
            # device times far apart (a wild clock) must not keep every key: the oldest
            # go first past DEDUP_MAX
            k = max(bisect.bisect_left(times, newest - DEDUP_HORIZON_S), len(times) - DEDUP_MAX)
            del times[:k], values[:k], seqs[:k]

    # --- identifiers -----------------------------------------------------------
    def is_identifier(self, text: str) -> bool:
        return self._id.match(text) is not None

    def echo_topic(self, topic: str) -> str:
        """The topic as effects and logs may repeat it: a bed or user level that is not
        an identifier (it could be anything, a patient's name included) is replaced."""
        for root in (self._bed_topic, self._ack_users):
            if topic.startswith(root):
                levels = topic[len(root) :].split("/")
                safe = [lv if self.is_identifier(lv) else REFUSED_LEVEL for lv in levels]
                return root + "/".join(safe)
        return topic

    def _refused(self, topic: str, reason: str, detail: str, now: float,
                 device_id: str | None = None) -> RejectedInput:  # fmt: skip
        return RejectedInput(now, self.echo_topic(topic), device_id, reason, detail[:200])

    # --- content checks (no state: also what an export redacts) ------------------
    def _bed_topic_levels(self, topic: str) -> tuple[str, str, Refusal | None]:
        """(bed id, what, None), or why the topic is refused."""
        rest = topic[len(self._bed_topic) :].split("/")
        if len(rest) != 2 or (rest[1] != "context" and rest[1] not in _CLINICAL):
            return "", "", (Outcome.UNKNOWN_TOPIC, "unknown bed topic")
        if not self.is_identifier(rest[0]):
            why = "bed id is not an identifier (see the id pattern)"
            return "", "", (Outcome.BAD_IDENTIFIER, why)
        return rest[0], rest[1], None

    def _check_context(self, payload: Payload) -> BedContext | Refusal:
        ctx = _parse(BedContext, payload, Outcome.BAD_CONTEXT, _BED_WITHHELD)
        if not isinstance(ctx, BedContext):
            return ctx
        bad = Outcome.BAD_CONTEXT
        if not self.is_identifier(ctx.ward):
            return bad, "ward: not an identifier (see the id pattern)"
        listed = set(ctx.device_ids)
        for dev_id, name in ctx.device_profiles.items():
            if dev_id not in listed:
                return bad, f"device_profiles: {dev_id[:64]!r} is not in device_ids"
            if name not in self._decoders:
                return bad, f"device_profiles: no device profile {name[:64]!r}"
        for dev_id in ctx.replaces:
            if dev_id not in listed:
                return bad, f"replaces: {dev_id[:64]!r} is not in device_ids"
        for dev_id in ctx.calibration:
            if dev_id not in listed:
                return bad, f"calibration: {dev_id[:64]!r} is not in device_ids"
        return ctx

    def screen(self, topic: str, payload: Payload) -> Refusal | None:
        """Why the engine refuses this message for its content alone (its topic and
        payload, whatever the state), or None. `hourwatch export` redacts these."""
        try:
            if topic.startswith(self._bed_topic):
                _, what, refused = self._bed_topic_levels(topic)
                if refused is not None:
                    return refused
                if what == "context":
                    ctx = self._check_context(payload)
                    return None if isinstance(ctx, BedContext) else ctx
                msg = _parse(_CLINICAL[what], payload, Outcome.BAD_CLINICAL_INPUT,
                             _CLINICAL_WITHHELD)  # fmt: skip
                return msg if isinstance(msg, tuple) else None
            if topic == self._ack_topic or topic.startswith(self._ack_users):
                user = None if topic == self._ack_topic else topic[len(self._ack_users) :]
                ack = self._check_ack(user, payload)
                return ack if isinstance(ack, tuple) else None
            route = self._route_cache.get(topic)
            if route is None:
                route = self._route(topic)
            if not route:
                return Outcome.UNKNOWN_TOPIC, "no profile matches"
            result = route[0].decode(route[1], payload)
            return (result.reason, result.detail) if isinstance(result, Rejected) else None
        except Exception:  # a screen must never be the thing that fails
            return Outcome.BAD_PAYLOAD, "could not be read"

    # --- bed context ---------------------------------------------------------
    def _bed_message(self, topic: str, payload: Payload, now: float) -> list[Effect]:
        bed_id, what, refused = self._bed_topic_levels(topic)
        if refused is not None:
            self.unrouted[refused[0]] += 1
            return [self._refused(topic, *refused, now)]
        if what != "context":
            return self._clinical(topic, bed_id, what, payload, now)
        ctx = self._check_context(payload)
        if not isinstance(ctx, BedContext):
            return self._bad_context(topic, bed_id, now, *ctx)
        ahead = self._ahead(max((e.at.timestamp() for e in ctx.episodes), default=None), now)
        if ahead is not None:
            return self._bad_context(topic, bed_id, now, Outcome.FUTURE_TIME, ahead)
        if bed_id not in self.beds and len(self.beds) >= self._max_beds:
            detail = f"too many beds: this engine keeps at most {self._max_beds}"
            return self._bad_context(topic, bed_id, now, Outcome.BAD_CONTEXT, detail)
        effects, moved_from = self._bind(topic, bed_id, ctx, now)
        self._calibrated = self._calibrated or bool(ctx.calibration)
        self.applied["context"] += 1
        for other in sorted(moved_from):  # they lost a meter: their rules may change
            effects += self._evaluate(self.beds[other], now)
        return effects + self._evaluate(self.beds[bed_id], now)

    def _ahead(self, t: float | None, now: float) -> str | None:
        """Why a clinical time is refused: too far ahead of the receive time."""
        if t and t > now + self._clinical_ahead_s:
            return f"time is {(t - now) / 3600:.1f} h ahead of the receive time"
        return None

    def _clinical(
        self, topic: str, bed_id: str, what: str, payload: Payload, now: float
    ) -> list[Effect]:
        bed = self.beds.get(bed_id)
        if bed is None:
            self.input_rejections[Outcome.UNKNOWN_BED] += 1
            return [RejectedInput(now, topic, None, Outcome.UNKNOWN_BED, "no context for this bed")]
        msg = _parse(_CLINICAL[what], payload, Outcome.BAD_CLINICAL_INPUT, _CLINICAL_WITHHELD)
        if isinstance(msg, tuple):
            reason, detail = msg
        else:
            ahead = self._ahead(msg.time.timestamp(), now)
            if ahead is None:
                self._record_clinical(bed, msg, now)
                self.applied[what] += 1
                return self._evaluate(bed, now)
            reason, detail = Outcome.FUTURE_TIME, ahead
        self.input_rejections[reason] += 1
        return [RejectedInput(now, topic, None, reason, detail)]

    @staticmethod
    def _record_clinical(
        bed: BedState, msg: IntakeMessage | VitalsMessage | LabsMessage, now: float
    ) -> None:
        if isinstance(msg, IntakeMessage):
            bed.add_intake(msg.time.timestamp(), msg.volume_ml, now)
        elif isinstance(msg, VitalsMessage):
            bed.add_vitals(Vitals(msg.time.timestamp(), msg.heart_rate_bpm, msg.systolic_mmhg,
                                  msg.diastolic_mmhg, msg.mean_mmhg))  # fmt: skip
        else:
            t = msg.time.timestamp()
            for analyte, value in msg.model_dump(exclude={"time", "schema_version"}).items():
                if value is not None:
                    bed.add_lab(analyte, t, float(value), now)

    # --- acknowledgements ------------------------------------------------------
    def _check_ack(self, user: str | None, payload: Payload) -> AckMessage | Refusal:
        """Who acknowledges: on `{prefix}/ack/{user}` the broker's user (the ACL lets a
        client publish only under its own name); on `{prefix}/ack` the payload's `by`,
        for brokers without authentication and for older logs."""
        if user is not None and not self.is_identifier(user):
            return Outcome.BAD_ACK, "user level is not an identifier (see the id pattern)"
        ack = _parse(AckMessage, payload, Outcome.BAD_ACK, _ACK_WITHHELD)
        if isinstance(ack, tuple):
            return ack
        if user is None:
            if ack.by is None:
                return Outcome.BAD_ACK, "by: needed on the shared acknowledgement topic"
            return ack
        if ack.by is not None and ack.by != user:
            return Outcome.BAD_ACK, "by: names another person than the topic's user"
        return ack.model_copy(update={"by": user})

    def _ack(self, topic: str, user: str | None, payload: Payload, now: float) -> list[Effect]:
        ack = self._check_ack(user, payload)
        if isinstance(ack, tuple):
            reason, detail = ack
        elif ack.role not in self._ack_roles:
            reason, detail = Outcome.UNKNOWN_ROLE, "role not named by the escalation policy"
        elif self._staff is not None and ack.role not in self._staff.get(ack.by or "", ()):
            reason, detail = Outcome.UNKNOWN_ROLE, "not a role this user may acknowledge in"
        else:
            assert ack.by is not None
            result = self.book.acknowledge(now, ack.alarm_id, ack.by, ack.role)
            if isinstance(result, str):
                self.input_rejections[result] += 1
                return [self._refused(topic, result, f"alarm {ack.alarm_id[:80]!r}", now)]
            self.applied["ack"] += 1
            effects: list[Effect] = list(result)
            bed = self.beds.get(result[0].bed) if result else None
            if bed is not None:  # an acknowledged technical alarm stops suppressing
                effects += self._evaluate(bed, now)
            return effects
        self.input_rejections[reason] += 1
        return [self._refused(topic, reason, detail, now)]

    def _bad_context(
        self, topic: str, bed: str, now: float, reason: Outcome, detail: str
    ) -> list[Effect]:
        if bed in self.context_rejections or len(self.context_rejections) < MAX_REJECTION_KEYS:
            self.context_rejections[bed] += 1
        else:
            self.context_rejections["(other beds)"] += 1
        return [RejectedInput(now, topic, None, reason, detail[:200])]

    def _bind(
        self, topic: str, bed_id: str, ctx: BedContext, now: float
    ) -> tuple[list[Effect], set[str]]:
        """Bind the context's meters to the bed. A meter another bed holds moves only
        when the context names it in `replaces` (noted on the bed); otherwise it stays
        where it is, the refusal is reported, and the rest of the context applies."""
        effects: list[Effect] = []
        moved_from: set[str] = set()
        refused = [
            d for d in ctx.device_ids
            if self._bound.get(d, bed_id) != bed_id and d not in ctx.replaces
        ]  # fmt: skip
        for dev_id in refused:
            detail = (f"meter {dev_id[:64]} is bound to bed {self._bound[dev_id]}; a context "
                      "takes it over only when its 'replaces' names it")  # fmt: skip
            effects.append(RejectedInput(now, topic, dev_id, Outcome.DEVICE_ON_OTHER_BED, detail))
        if refused:
            kept = [d for d in ctx.device_ids if d not in refused]
            ctx = ctx.model_copy(update={"device_ids": kept})
        bed = self.beds.get(bed_id)
        if bed is None:
            bed = self.beds[bed_id] = BedState(bed_id, ctx, MinuteSeries(self._series_keep_min),
                                                      bound_at=now)
        bed.set_context(ctx)
        bed.notices.clear()  # a new context may supply what was missing
        wanted = set(ctx.device_ids)
        for dev_id, b in list(self._bound.items()):
            if b == bed_id and dev_id not in wanted:
                del self._bound[dev_id]
                if dev_id in self.devices:
                    self._detach(self.devices[dev_id], now)
        for dev_id in ctx.device_ids:
            named = self._decoders.get(ctx.device_profiles.get(dev_id, ""))
            old = self._bound.get(dev_id)
            if old == bed_id:
                if named is not None:
                    self._own(dev_id, named, bed_id, now)
                continue
            if old is not None:  # taken over, as the context says: the old bed lets go
                held = self.beds[old]
                rest = [d for d in held.context.device_ids if d != dev_id]
                held.context = held.context.model_copy(update={"device_ids": rest})
                moved_from.add(old)
                effects.append(Notice(now, bed_id, ctx.ward, "device_moved",
                                      f"meter {dev_id} moved here from bed {old}"))  # fmt: skip
            self._bound[dev_id] = bed_id
            if named is not None:
                self._own(dev_id, named, bed_id, now)
                continue
            dev = self.devices.get(dev_id)
            if dev is not None:
                self._unbound.pop(dev_id, None)
                self._attach(dev, bed_id, now)
        return effects, moved_from

    def _own(self, dev_id: str, decoder: Decoder, bed_id: str, now: float) -> None:
        """The context names the meter's family: its entry is of that family from now."""
        dev = self.devices.get(dev_id)
        if dev is None or dev.decoder is not decoder:
            self._unbound.pop(dev_id, None)
            dev = self._device(dev_id, decoder, now)
        elif dev.bed != bed_id:
            self._unbound.pop(dev_id, None)
            self._attach(dev, bed_id, now)
        dev.owned = True

    @staticmethod
    def _drop_held(dev: _Device) -> None:
        """A reading held for confirmation whose cleaner goes away (the meter leaves its
        bed, or its family is named anew) is never confirmed: it is an artefact."""
        if dev.cleaner is not None and dev.cleaner.pending():
            dev.quality.counts[Outcome.ARTEFACT_DROPPED] += dev.cleaner.pending()

    def _attach(self, dev: _Device, bed_id: str, now: float) -> None:
        # A meter moved to another bed starts afresh: what is in its bag is not
        # this patient's.
        self._drop_held(dev)
        series = self.beds[bed_id].series
        prof = dev.decoder.profile
        dev.bed = bed_id
        dev.last_seen = None
        dev.last_usable, dev.bag_ml = now, None  # silent, for its limit, from here
        dev.sent_since.clear()
        dev.cleaner = (
            IntervalCleaner(prof, series)
            if prof.volume.semantics is Semantics.INTERVAL
            else CumulativeCleaner(prof, series)
        )
        dev.latest_t = None

    def _detach(self, dev: _Device, now: float) -> None:
        self._drop_held(dev)
        dev.bed = None
        dev.cleaner = None
        dev.latest_t = None
        self._seen_unbound(dev.device_id, now)  # unbound now: forgotten in time

    # --- time ----------------------------------------------------------------
    def _devices_of(self, bed: BedState) -> tuple[DeviceSeen, ...]:
        out = []
        for dev_id in bed.context.device_ids:
            dev = self.devices.get(dev_id)
            if dev is not None and dev.bed == bed.bed_id and dev.last_usable is not None:
                if dev.last_seen is None:  # attached, not heard from since
                    period = dev.period_s
                    out.append(DeviceSeen(dev_id, dev.last_usable, period, dev.max_ml_per_min,
                                          capacity_ml=dev.capacity_ml))  # fmt: skip
                    continue
                sent = tuple(dev.sent_since.items()) if dev.sent_since else ()
                out.append(DeviceSeen(dev_id, dev.last_usable, dev.period_s, dev.max_ml_per_min,
                                      sent, dev.bag_ml, dev.capacity_ml))  # fmt: skip
                continue
            # bound but never heard from: silent since the binding; its family is
            # unknown until it speaks, so allow the slowest family's period
            period = dev.period_s if dev else self._slowest_period
            rate = dev.max_ml_per_min if dev else self._max_ml_per_min
            out.append(DeviceSeen(dev_id, bed.bound_at, period, rate))
        return tuple(out)

    def _after_reading(self, bed: BedState, now: float) -> list[Effect]:
        """Rules on windows change only when the latest minute moves on."""
        if not self.rules:
            return []  # an intake-only engine (replay without rules, the probe)
        latest = bed.series.latest_minute()
        prev = bed.last_eval_minute
        if latest is None or latest == prev:
            return []
        due = self._due.get(bed.bed_id)
        if latest <= bed.quiet_floor and (due is None or due > now + REFRESH_AHEAD_S):
            # no alarm open and every rule proved quiet; a wake-up close ahead is
            # most likely a silence this very reading ended, so then evaluate instead
            bed.last_eval_minute = latest
            return []
        return self._evaluate(bed, now, shortcut=True)

    def _evaluate(self, bed: BedState, now: float, shortcut: bool = False) -> list[Effect]:
        if not self.rules:
            return []
        bed.last_eval_minute = bed.series.latest_minute()
        events, due = self.evaluator.run(bed, now, self._devices_of(bed), shortcut)
        if due is None:
            self._due.pop(bed.bed_id, None)
        elif self._due.get(bed.bed_id) != due:
            self._due[bed.bed_id] = due
            heapq.heappush(self._heap, (due, bed.bed_id))
        if self._advice_sources:  # a new page carries the suggestion with it
            return self._advice(bed, now) + events
        return list(events)

    def _hypotonic(self, fluid: str) -> bool:
        f = FLUIDS.get(fluid)
        return f is not None and f.hypotonic(self.advice_policy)

    def _advice(self, bed: BedState, now: float) -> list[Effect]:
        """Advice while a criterion that brings it holds (its condition, not a latch;
        see criterion_holds): at each completed clock hour, and at once when what it may
        say changes (an order, signs of hypovolaemia, a sodium result). When none holds
        any more, one last message, then nothing."""
        holding = self._holding(bed.bed_id, now)
        last = bed.last_advice
        prompting = last is not None and last.advice.kind in PROMPTING
        latest = bed.series.latest_minute()
        first = bed.series.first_minute
        if (not holding and not prompting) or latest is None or first is None:
            return []
        hour = (latest + 1) // 60 - 1
        if hour * 60 < first:
            return []  # no completed clock hour of monitoring yet
        w = measure(bed.series, hour * 60 + 59, 60, bed.residual)
        ctx = bed.context
        if not holding:
            adv = ended_advice(hour * 3600.0, w.volume_ml, ctx.replacement, w.residual_ml)
            issued = AdviceIssued(now, bed.bed_id, ctx.ward, adv, ())
            bed.last_advice, bed.last_advice_hour = issued, hour
            return [issued]
        pol = self.advice_policy
        na = bed.latest_lab("serum_na_mmol_l", now)
        urine = [bed.latest_lab(a, now) for a in ("urine_na_mmol_l", "urine_k_mmol_l")]
        una, uk = (x[1] if x is not None and now - x[0] <= pol.sodium_max_age_s else None
                   for x in urine)  # fmt: skip
        adv = advise(
            hour * 3600.0, w.volume_ml, ctx.replacement, now,
            sodium=Sodium(na[1], na[0]) if na is not None else None, urine_na=una, urine_k=uk,
            weight_kg=ctx.weight_kg, tbw_fraction=ctx.tbw_fraction,
            hypovolaemia=self._hypovolaemia_signs(bed), residual_ml=w.residual_ml, policy=pol,
            clock=self.clock,
        )  # fmt: skip
        if (
            last is not None
            and bed.last_advice_hour == hour
            and last.advice.kind is adv.kind
            and last.advice.order == adv.order
            and last.advice.serum_na == adv.serum_na
        ):
            return []  # said already this hour
        issued = AdviceIssued(now, bed.bed_id, ctx.ward, adv, self._alarm_ids(bed, holding))
        bed.last_advice, bed.last_advice_hour = issued, hour
        return [issued]

    def _holding(self, bed_id: str, now: float) -> tuple[str, ...]:
        """The rules bringing advice whose criterion holds on the bed at `now`."""
        is_open = self.book.is_open
        for rid in self._advice_sources:  # a loop, not any(...): asked at every evaluation
            if is_open(bed_id, rid):
                break
        else:
            return ()  # the usual case
        opened = self.book.open_rules(bed_id)
        hold = self.advice_policy.criterion_end_hold_s
        return tuple(
            rid for rid in self._advice_sources
            if rid in opened and criterion_holds(opened[rid], now, hold)[0]
        )  # fmt: skip

    def _alarm_ids(self, bed: BedState, rules: tuple[str, ...]) -> tuple[str, ...]:
        return tuple(a.alarm_id for a in self.book.active(bed.bed_id) if a.rule in rules)

    def _hypovolaemia_signs(self, bed: BedState) -> str | None:
        """The signs, while a hypovolaemia alarm is open on the bed: from its onset until
        its condition has stayed clear for the rule's clear-hold (no advice that flaps
        with each set of vitals)."""
        opened = self.book.open_rules(bed.bed_id)
        if not any(r in opened for r in self._hypovolaemia_rules):
            return None
        for a in self.book.active(bed.bed_id):
            if a.rule in self._hypovolaemia_rules:
                return str(a.evidence.get("what") or "see the hypovolaemia alarm")
        return "see the hypovolaemia alarm"

    def _finish(self, effects: list[Effect]) -> list[Effect]:
        """Alarm events leave the engine knowing how to be acknowledged and, for
        high-output alarms, carrying the bed's current replacement advice."""
        out: list[Effect] = []
        for e in effects:
            if isinstance(e, AlarmEvent):
                bed = self.beds.get(e.bed)
                adv = bed.last_advice if bed is not None else None
                current = (  # the advice in force now: none unless a criterion holds
                    adv is not None and e.time - adv.time <= ADVICE_FRESH_S
                    and adv.advice.kind is not AdviceKind.ENDED and e.rule in self._advice_rules
                    and bool(self._holding(e.bed, e.time))
                )  # fmt: skip
                e = replace(
                    e, ack_topic=self._ack_advertised,
                    ack_valid_s=self._ack_valid.get(e.rule, self.book.ack_validity_s),
                    clock=self.clock(e.time),
                    advice=adv.to_json() if adv is not None and current else None,
                )  # fmt: skip
            out.append(e)
        return out

    def next_wakeup(self) -> float | None:
        """Epoch seconds of the next time-driven change, or None."""
        heap, dues = self._heap, self._due
        while heap and dues.get(heap[0][1]) != heap[0][0]:
            heapq.heappop(heap)  # stale
        book = self.book.next_due()
        if not heap:
            return book
        bed = heap[0][0]
        return bed if book is None or bed < book else book

    def advance(self, to: datetime | float) -> list[Effect]:
        """Fire every wake-up due at or before `to`, each at its own due time.

        Live and replay both call this before each message and from the timer,
        so a time-driven event carries the time it fell due, however late the
        caller got round to it.
        """
        t = as_epoch(to)
        effects: list[Effect] = []
        wake = self.next_wakeup()
        while wake is not None and wake <= t:
            effects += self.tick(wake)
            wake = self.next_wakeup()
        return effects

    def tick(self, now: datetime | float) -> list[Effect]:
        """Carry out everything due at or before `now`."""
        return self._finish(self._tick(as_epoch(now)))

    def _tick(self, t: float) -> list[Effect]:
        effects: list[Effect] = list(self.book.tick(t))
        due_beds = set()
        heap = self._heap
        while heap and heap[0][0] <= t:
            due, bed_id = heapq.heappop(heap)
            if self._due.get(bed_id) == due:
                del self._due[bed_id]
                due_beds.add(bed_id)
        for bed_id in sorted(due_beds | {e.bed for e in effects if isinstance(e, AlarmEvent)}):
            effects += self._evaluate(self.beds[bed_id], t, shortcut=True)
        return effects

    # --- queries -------------------------------------------------------------
    def messages_counted(self) -> int:
        """Every message stepped, each counted exactly once by its outcome: meter
        messages per device (also those of forgotten devices), the rest by what became
        of them."""
        return (
            sum(d.quality.received for d in self.devices.values())
            + self.received_forgotten
            + sum(self.unrouted.values())
            + sum(self.context_rejections.values())
            + sum(self.input_rejections.values())
            + sum(self.applied.values())
        )

    def quality(self) -> dict[str, dict[str, object]]:
        out: dict[str, dict[str, object]] = {}
        for dev_id, dev in sorted(self.devices.items()):
            d = dev.quality.to_dict()
            d["bed"] = dev.bed
            d["held"] = dev.cleaner.pending() if dev.cleaner else 0
            if dev.labels:
                d["topic_levels"] = dict(dev.labels)
            if dev.sanity is not None and dev.sanity.history:
                d["warnings"] = [w.to_json() for w in dev.sanity.history]
            out[dev_id] = d
        return out

    def sanity_warnings(self) -> list[SanityWarning]:
        """Every meter's active sanity warning (a profile that looks wrong), by meter:
        for the data-quality summary, the service's metrics and the ward board."""
        return [
            w for _, dev in sorted(self.devices.items()) if dev.sanity is not None
            for w in dev.sanity.active.values()
        ]  # fmt: skip

    def sanity_history(self) -> list[SanityWarning]:
        """Every sanity warning raised (the newest per meter), cleared or not, by meter."""
        return [
            w for _, dev in sorted(self.devices.items()) if dev.sanity is not None
            for w in dev.sanity.history
        ]  # fmt: skip

    def take_sanity_changes(self) -> list[Change]:
        """Sanity warnings raised or cleared since the last call, in order (the shell logs
        them); at most sanity.MAX_CHANGES are kept between calls, the newest."""
        out = list(self._sanity_changes)
        self._sanity_changes.clear()
        return out


# Read for every reading: a module name is several times cheaper than an Enum class
# attribute (the enum's metaclass defines __getattr__, so Outcome.X is never cached).
_HELD = Outcome.SPIKE_HELD
_NOT_IN_SERIES = frozenset(
    {
        Outcome.SPIKE_HELD,
        Outcome.ARTEFACT_DROPPED,
        Outcome.LATE,
        Outcome.IMPLAUSIBLE_FLOW,
        Outcome.CONFLICTING_DUPLICATE,
    }
)
# Outcomes whose volume keeps within a meter's per-minute bound, in order.
_PLAIN = frozenset(
    {
        Outcome.ACCEPTED,
        Outcome.NOISE_FALL,
        Outcome.STORE_FORWARD,
        Outcome.CLOCK_SKEW,
        Outcome.DUPLICATE,
        Outcome.SPIKE_HELD,
        Outcome.ARTEFACT_DROPPED,
        Outcome.LATE,
        Outcome.TOO_OLD,
        Outcome.CONFLICTING_DUPLICATE,
        Outcome.IMPLAUSIBLE_FLOW,
    }
)
_REFUSED = frozenset(
    {
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
_DETAIL_REVERTED = "a reading after a jump or fall, taken back: the meter went back to its level"
_DETAIL = {
    Outcome.LATE: "older than the reorder tolerance",
    Outcome.TOO_OLD: "older than the store-and-forward limit",
    Outcome.ARTEFACT_DROPPED: "jump or fall not confirmed by the next reading",
    Outcome.IMPLAUSIBLE_FLOW: "interval volume above the maximum plausible flow",
    Outcome.CONFLICTING_DUPLICATE: "same time as an earlier reading with another value",
}
assert DECODE_REJECTIONS.isdisjoint(_SILENT)
