"""Hypothesis strategies for hostile and broken input on every inbound topic, and a driver
that interleaves them with a good meter stream (tests/test_fuzz.py, benchmarks/bench_fuzz.py).

What the fuzz sends: meter payloads of every shipped profile (junk bytes and text, JSON of
any shape, the profile's own fields holding anything, well-formed readings with wild
values and times) for the good meter's id on every family's topic and for other ids; bed
contexts, intake, vitals and labs for the good bed, other beds and beds whose ids are no
identifiers; acknowledgements on the shared and per-user topics; topics that match
nothing; redeliveries of good messages.

What may legitimately change the good bed's volumes is left out (a well-formed reading of
the good meter on its own topic, a valid context for the good bed, a context naming the
good meter in `replaces`): the property is that nothing else can.

Meters, beds, people and volumes are invented; no patient data.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

import numpy as np
from hypothesis import strategies as st

from daemon.engine.decode import Decoder, Reading, checksum_text
from daemon.engine.engine import Engine
from daemon.engine.escalation import EscalationPolicy
from daemon.engine.profiles import DeviceProfile, Encoding
from daemon.engine.rules import RuleDef
from daemon.profile_files import load_profiles
from simulator.encode import encode
from simulator.meterlog import MeterFaults, SimStream, constant, simulate

PROFILES: dict[str, DeviceProfile] = {p.name: p for p in load_profiles()}
NAMES = sorted(PROFILES)
T0 = datetime(2026, 3, 14, 0, 0, tzinfo=UTC).timestamp()  # an invented night
GOOD_BED = "bed-good"
GOOD_DEVICE = "good-1"
OTHER_BEDS = ["bed-2", "bed-3"]
DEVICES = [GOOD_DEVICE, "other-1", "other-2"]
FLOW_ML_H = 150.0  # invented steady flow of the good meter

# --- any JSON, any text ------------------------------------------------------------------
# integers kept below float overflow here: the huge-integer case has its own test
json_scalars = (
    st.none()
    | st.booleans()
    | st.integers(-(10**30), 10**30)
    | st.floats(allow_nan=True, allow_infinity=True)
    | st.text(max_size=30)
)
json_values = st.recursive(
    json_scalars,
    lambda inner: (
        st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner, max_size=4)
    ),
    max_leaves=20,
)
numberish = (
    st.floats(allow_nan=True, allow_infinity=True)
    | st.integers(-(10**6), 10**6)
    | st.floats(-1e4, 1e4).map(str)  # a number as a JSON string: refused, never read
    | st.sampled_from(["0", "12", "", "NaN", "1e400", " 5 ", "1_000"])
    | st.booleans()
    | st.none()
)
times = st.one_of(
    st.floats(-1e10, 1e11, allow_nan=False),
    st.sampled_from([T0 - 365 * 86400, T0 + 365 * 86400, T0 + 5 * 60, 0.0, 32503680000.0]),
    st.floats(T0 - 86400, T0 + 86400),
)


def iso_or_junk(t: float) -> st.SearchStrategy[Any]:
    try:
        text = datetime.fromtimestamp(t, UTC).isoformat().replace("+00:00", "Z")
    except (ValueError, OverflowError, OSError):
        text = "2026-13-40T99:99:99Z"
    return st.sampled_from([text, text[:19], "yesterday", t, "", None])


@st.composite
def shaped_like(draw: st.DrawFn, name: str) -> Any:
    """A JSON object with the profile's own field paths holding arbitrary values."""
    p = PROFILES[name]
    obj: dict[str, Any] = {}
    for ref in p.fields.model_dump().values():
        if ref is None or not isinstance(ref, str) or draw(st.integers(0, 5)) == 0:
            continue
        *parents, last = ref.split(".")
        node = obj
        for key in parents:
            nxt = node.setdefault(key, {})
            if not isinstance(nxt, dict):
                break
            node = nxt
        else:
            node[last] = draw(json_values)
    return obj


def signed(p: DeviceProfile, text: str) -> str:
    """A text payload with the checksum its family expects appended (a meter that signs
    what it sends, whatever that is), so the fuzz reaches past the checksum."""
    cs = p.checksum
    if cs is None:
        return text
    if p.payload.encoding is Encoding.KEYVALUE:
        return f"{text}{p.payload.pairs}{cs.field}{p.payload.kv}{checksum_text(cs.algorithm, text)}"
    sep = p.payload.separator or ","
    cols = text.split(sep)
    cols += [""] * max(0, int(cs.field) - len(cols))
    text = sep.join(cols[: int(cs.field)])
    return text + sep + checksum_text(cs.algorithm, text)


def unsigned(p: DeviceProfile, text: str) -> str:
    """A family's text payload without its checksum (the part a meter signs)."""
    if p.checksum is None:
        return text
    last = p.payload.pairs if p.payload.encoding is Encoding.KEYVALUE else p.payload.separator
    return text.rpartition(last or ",")[0]


def _columns(name: str) -> st.SearchStrategy[str]:
    p = PROFILES[name]
    cell = st.text(max_size=12) | st.floats().map(str) | st.integers().map(str)
    if p.payload.encoding is Encoding.KEYVALUE:
        keys = st.sampled_from(
            [str(r) for r in p.fields.model_dump().values() if r is not None]
        ) | st.text(max_size=6)
        pair = st.tuples(keys, cell).map(lambda kv: f"{kv[0]}{p.payload.kv}{kv[1]}")
        text = st.lists(pair, max_size=7).map(p.payload.pairs.join)
    else:
        text = st.lists(cell, max_size=6).map((p.payload.separator or ",").join)
    return text | text.map(lambda t: signed(p, t))


@st.composite
def wild_reading(draw: st.DrawFn, name: str, device: str) -> Any:
    """A well-formed message of the family with wild values, times and flags."""
    p = PROFILES[name]
    value = draw(st.floats(-100, 2 * p.limits.max_ml, allow_nan=False) | st.just(0.0))
    kw: dict[str, Any] = {"seq": draw(st.integers(0, 10**6)), "decimals": 1}
    if p.fields.bag_change_flag is not None or p.status.bag_change:
        kw["bag_flag"] = draw(st.booleans())
    if p.fields.status is not None and draw(st.booleans()):
        kw["status"] = draw(st.sampled_from(["ERR", "MOV", "fault", "OK", "run", ""]))
    t = draw(times)
    try:
        return encode(p, device, t, value, **kw)[1]
    except (ValueError, OverflowError, OSError):  # a time no datetime can hold
        return encode(p, device, T0, value, **kw)[1]


@st.composite
def stringly_reading(draw: st.DrawFn, name: str, device: str) -> Any:
    """A well-formed message whose volume (or counter) is a number written as text:
    the fault-injection run's "0" and "12". JSON must refuse it; text columns are text."""
    p = PROFILES[name]
    payload = encode(p, device, draw(st.floats(T0 - 600, T0 + 7200)), 12.0, seq=7)[1]
    text = draw(st.sampled_from(["0", "12", "12.5", " 7 ", "1e3"]))
    if draw(st.booleans()):  # or a time no one can read unambiguously
        key, text = (
            "time",
            draw(
                st.sampled_from(
                    [
                        "yesterday",
                        "2026-03-14T02:00:00",
                        "1773453600000",
                        "",
                        "2026-02-30T00:00:00Z",
                    ]
                )
            ),
        )
    else:
        key = draw(st.sampled_from(["volume", "seq"]))
    if isinstance(payload, dict):
        ref = getattr(p.fields, key)
        if ref is None:
            return payload
        node = payload
        *parents, last = str(ref).split(".")
        for k in parents:
            node = node[k]
        node[last] = text
        return payload
    if key != "time":
        text = draw(st.sampled_from(["twelve", "1_000", "nan", "inf"]))
    ref = getattr(p.fields, "time" if key == "time" else "volume")
    body = unsigned(p, payload)
    if p.payload.encoding is Encoding.KEYVALUE:
        pairs = [x.partition(p.payload.kv) for x in body.split(p.payload.pairs)]
        body = p.payload.pairs.join(f"{k}{sep}{text if k == ref else v}" for k, sep, v in pairs)
    else:
        cols = body.split(p.payload.separator or ",")
        cols[int(ref)] = text
        body = (p.payload.separator or ",").join(cols)
    return signed(p, body)


def payloads(name: str) -> st.SearchStrategy[Any]:
    """Anything that may arrive on a meter family's topic."""
    return st.one_of(
        st.binary(max_size=200),
        st.text(max_size=200),
        json_values.map(json.dumps),
        json_values.map(lambda v: json.dumps(v).encode()),
        shaped_like(name),
        shaped_like(name).map(json.dumps),
        _columns(name),
    )


# --- messages ------------------------------------------------------------------------------
device_ids = st.sampled_from(DEVICES) | st.text(
    st.characters(blacklist_characters="/", blacklist_categories=("Cs",)), min_size=1, max_size=10
)
bed_ids = st.sampled_from([GOOD_BED, *OTHER_BEDS, "bed 9", "b" * 70, "bed+1", "x.y"]) | st.text(
    st.characters(blacklist_characters="/", blacklist_categories=("Cs",)), max_size=12
)


@st.composite
def meter_message(draw: st.DrawFn) -> tuple[str, Any]:
    name = draw(st.sampled_from(NAMES))
    device = draw(device_ids)
    topic = PROFILES[name].topic_for(device)
    payload = draw(payloads(name) | wild_reading(name, device) | stringly_reading(name, device))
    return topic, payload


@st.composite
def context_message(draw: st.DrawFn) -> tuple[str, Any]:
    bed = draw(bed_ids)
    body: dict[str, Any] = {}
    if draw(st.booleans()):
        body["ward"] = draw(
            st.sampled_from(["icu-east", "4 East", "w/1", ""]) | st.text(max_size=8)
        )
    if draw(st.integers(0, 4)):
        body["device_ids"] = draw(st.lists(device_ids, max_size=4) | json_values)
    for key, strategy in (
        ("weight_kg", numberish),
        ("weight_basis", st.sampled_from(["actual", "ideal", "guess"])),
        ("device_profiles", st.dictionaries(device_ids, st.sampled_from([*NAMES, "nope"]),
                                            max_size=2)),
        ("replaces", st.lists(device_ids, max_size=2)),
        ("episodes", st.lists(st.fixed_dictionaries({
            "kind": st.sampled_from(["obstruction_relieved", "catheter_inserted", "x"]),
            "at": times.flatmap(iso_or_junk)}), max_size=2)),
        ("tbw_fraction", numberish),
        ("sensitive", st.text(max_size=10)),  # a field no context has
    ):  # fmt: skip
        if draw(st.integers(0, 3)) == 0:
            body[key] = draw(strategy)
    payload = draw(st.sampled_from(["obj", "json", "bytes", "junk"]))
    if payload == "junk":
        return f"hourwatch/beds/{bed}/context", draw(st.binary(max_size=60) | st.text(max_size=60))
    return f"hourwatch/beds/{bed}/context", (
        body if payload == "obj" else json.dumps(body) if payload == "json" else
        json.dumps(body).encode()
    )  # fmt: skip


@st.composite
def clinical_message(draw: st.DrawFn) -> tuple[str, Any]:
    bed = draw(bed_ids)
    what = draw(st.sampled_from(["intake", "vitals", "labs", "notes"]))
    body: dict[str, Any] = {"time": draw(times.flatmap(iso_or_junk))}
    fields = {
        "intake": ["volume_ml", "fluid", "route"],
        "vitals": ["heart_rate_bpm", "systolic_mmhg", "diastolic_mmhg", "mean_mmhg"],
        "labs": ["serum_na_mmol_l", "serum_k_mmol_l", "urine_na_mmol_l", "urine_k_mmol_l"],
        "notes": ["text"],
    }[what]
    for key in fields:
        if draw(st.booleans()):
            body[key] = draw(numberish | st.text(max_size=10))
    if draw(st.integers(0, 5)) == 0:
        body["schema"] = draw(json_scalars)
    return f"hourwatch/beds/{bed}/{what}", draw(st.sampled_from([body, json.dumps(body)]))


@st.composite
def ack_message(draw: st.DrawFn) -> tuple[str, Any]:
    user = draw(st.sampled_from(["nurse-1", "visitor", "nurse 2", ""]) | st.text(max_size=8))
    topic = draw(st.sampled_from(["hourwatch/ack", f"hourwatch/ack/{user}"]))
    body = {
        "alarm_id": draw(st.sampled_from([f"{GOOD_BED}/pod-hourly/x", ""]) | json_scalars),
        "role": draw(st.sampled_from(["bedside-nurse", "visitor", "icu-physician"]) | json_scalars),
    }
    if draw(st.booleans()):
        body["by"] = draw(st.sampled_from(["nurse-1", "nurse-9"]) | json_scalars)
    return topic, draw(st.sampled_from([body, json.dumps(body)]) | json_values)


junk_topics = st.one_of(
    st.text(max_size=40),
    st.sampled_from(
        [
            "#",
            "+",
            "hourwatch",
            "hourwatch/beds",
            "hourwatch/beds/b1",
            "hourwatch/beds//context",
            "hourwatch/ack/a/b",
            "meters//volume",
            "meters/x/volume/extra",
            "hourwatch/rejected",
        ]
    ),
)


@st.composite
def junk_message(draw: st.DrawFn) -> tuple[str, Any]:
    return draw(junk_topics), draw(json_values | st.binary(max_size=100) | st.text(max_size=100))


hostile_message = st.one_of(
    meter_message(), context_message(), clinical_message(), ack_message(), junk_message()
)


# --- the good stream and the driver ---------------------------------------------------------
@dataclass
class GoodStream:
    profile: str
    records: list[tuple[float, str, Any]]  # (receive time, topic, payload), in order
    context: dict[str, Any]
    sim: SimStream
    other_contexts: list[tuple[str, dict[str, Any]]] = field(default_factory=list)


def good_stream(profile: str, hours: float = 2.0, seed: int = 0) -> GoodStream:
    p = PROFILES[profile]
    faults = MeterFaults(bag_change_every_s=3000.0, duplicate_p=0.02)
    sim = simulate(p, GOOD_DEVICE, datetime.fromtimestamp(T0, UTC), hours,
                   constant(FLOW_ML_H), faults, seed=seed, initial_bag_ml=50.0)  # fmt: skip
    ctx = {"ward": "icu-east", "device_ids": [GOOD_DEVICE], "weight_kg": 80,
           "weight_basis": "actual", "device_profiles": {GOOD_DEVICE: profile}}  # fmt: skip
    others = [(b, {"ward": "icu-east", "device_ids": [f"other-{i + 1}"]})
              for i, b in enumerate(OTHER_BEDS)]  # fmt: skip
    return GoodStream(profile, sim.records, ctx, sim, others)


class Screen:
    """Tells what may legitimately change the good bed, so the fuzz leaves it out."""

    def __init__(self, good: GoodStream) -> None:
        self.engine = Engine(PROFILES.values())
        self.decoder = Decoder(PROFILES[good.profile])
        self.good_topic = PROFILES[good.profile].topic_for(GOOD_DEVICE)
        self.good_context = f"hourwatch/beds/{GOOD_BED}/context"

    def allowed(self, topic: str, payload: Any) -> bool:
        if topic == self.good_topic:
            return not isinstance(self.decoder.decode(GOOD_DEVICE, payload), Reading)
        if topic == self.good_context:
            return self.engine.screen(topic, payload) is not None
        if topic.startswith("hourwatch/beds/") and topic.endswith("/context"):
            try:
                body = json.loads(payload) if isinstance(payload, bytes | str) else payload
            except (ValueError, RecursionError):
                return True
            replaces = body.get("replaces") if isinstance(body, dict) else None
            return not (isinstance(replaces, list) and GOOD_DEVICE in replaces)
        return True


@dataclass
class Run:
    engine: Engine
    messages: int = 0
    fuzz: int = 0


def drive(
    good: GoodStream,
    fuzz: list[tuple[int, tuple[str, Any]]],
    rules: list[RuleDef],
    policy: EscalationPolicy,
) -> Run:
    """The good stream with fuzz message k of each (index, message) pair sent just after
    good record `index` (modulo the stream's length), as the live service would: the
    engine's clock advanced first, then the message. No exception may escape."""
    engine = Engine(PROFILES.values(), rules, policy)
    run = Run(engine)
    t = T0 - 60.0

    def send(topic: str, payload: Any, at: float) -> None:
        engine.advance(at)
        engine.step(topic, payload, at)
        run.messages += 1

    send(f"hourwatch/beds/{GOOD_BED}/context", good.context, t)
    for bed, ctx in good.other_contexts:
        send(f"hourwatch/beds/{bed}/context", ctx, t)
    after: dict[int, list[tuple[str, Any]]] = {}
    n = len(good.records)
    for index, msg in fuzz:
        after.setdefault(index % n, []).append(msg)
    for i, (recv, topic, payload) in enumerate(good.records):
        t = max(t, recv)
        send(topic, payload, t)
        for f_topic, f_payload in after.get(i, ()):
            if f_topic == "replay":  # a redelivery of an earlier good message
                _, r_topic, r_payload = good.records[int(f_payload) % (i + 1)]
                send(r_topic, r_payload, t)
            else:
                send(f_topic, f_payload, t)
            run.fuzz += 1
    engine.advance(t + 3600.0)
    return run


def good_bed_minutes(engine: Engine) -> tuple[np.ndarray, np.ndarray]:
    s = engine.beds[GOOD_BED].series
    lo = math.floor((T0 - 3600) / 60)
    return s.minutes(lo, lo + 6 * 60)


def check(clean: Run, fuzzed: Run) -> None:
    """The fuzz properties: every message counted exactly once by its outcome, and the
    good bed's minutes, hours and measured states exactly as without the fuzz."""
    for run in (clean, fuzzed):
        e = run.engine
        assert e.messages_counted() == run.messages, (e.messages_counted(), run.messages)
        for dev, q in e.quality().items():
            outcomes = q["outcomes"]
            assert isinstance(outcomes, dict) and all(v > 0 for v in outcomes.values()), dev
            assert q["received"] == sum(outcomes.values()) + q["held"], (dev, q)
    a_vol, a_state = good_bed_minutes(clean.engine)
    b_vol, b_state = good_bed_minutes(fuzzed.engine)
    np.testing.assert_allclose(b_vol, a_vol, atol=1e-9)
    np.testing.assert_array_equal(b_state, a_state)
    ha = [(h.hour_start_min, round(h.volume_ml, 9), h.measured_fraction)
          for h in clean.engine.beds[GOOD_BED].series.completed_hours()]  # fmt: skip
    hb = [(h.hour_start_min, round(h.volume_ml, 9), h.measured_fraction)
          for h in fuzzed.engine.beds[GOOD_BED].series.completed_hours()]  # fmt: skip
    assert ha == hb
    qa = clean.engine.quality()[GOOD_DEVICE]
    qb = fuzzed.engine.quality()[GOOD_DEVICE]
    # the good meter's own counts differ only by redeliveries (duplicates) and by
    # refused messages on its own topic, never in what went into the series
    kept = ("accepted", "noise_fall", "bag_change", "bag_change_inferred", "spike_confirmed",
            "reordered", "store_forward", "clock_skew", "artefact_dropped")  # fmt: skip
    oa, ob = qa["outcomes"], qb["outcomes"]
    assert isinstance(oa, dict) and isinstance(ob, dict)
    assert {k: oa.get(k, 0) for k in kept} == {k: ob.get(k, 0) for k in kept}
