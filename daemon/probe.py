"""A probe for the clinical engineer commissioning a meter: listen to one profile's topic
filter and tell, per device, how its messages decode, what the service's cleaning would
make of them, how often it reports and how far its clock is from ours. It never touches a
journal and never acknowledges anything on the service's behalf: its own clean session,
its own random client id. With a capture file, it writes what it hears as a JSON Lines
log, for `hourwatch replay CAPTURE --bind DEVICE`.

`DeviceTally`/`ProbeTally` hold no I/O (times are arguments; the capture is a callable);
`listen` is the MQTT side.
"""

from __future__ import annotations

import itertools
import json
import secrets
import statistics
import threading
import time
from collections import Counter, deque
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any, TextIO

from .engine.decode import Decoder, Reading, Rejected
from .engine.effects import RejectedInput
from .engine.engine import Engine, ReadingTrace
from .engine.numbers import num
from .engine.outcomes import COUNTED_IN_SERIES, DECODE_REJECTIONS, Outcome
from .engine.profiles import DEVICE_LEVEL, Calibration, DeviceProfile, Semantics
from .engine.timefmt import iso
from .errors import UserError
from .journal import log_payload

SAMPLE_KEPT = 3  # latest decoded readings shown per device
CODES_KEPT = 32  # distinct status codes counted per device
# distinct details kept per rejection reason and device: one reason code can have several
# causes to fix (a missing status, a missing volume), each shown with its own example
DETAILS_KEPT = 4
TIMES_KEPT = 4096  # (receive, device) times kept per device for the period and bursts
# A store-and-forward burst: this many readings or more, each received within
# max(BURST_GAP_S, a tenth of the period) of the one before, whose device times are a
# reporting period apart or more. A meter that sends its buffer after an outage does
# that; a wrong clock sends every reading on time, each equally far off.
BURST_MIN = 3
BURST_GAP_S = 2.0
PROBE_BED = "probe-{n}"  # the temporary bed each heard device is bound to
PROBE_WARD = "probe"


@dataclass
class DeviceTally:
    messages: int = 0
    retained: int = 0  # sent by the broker at subscribe time: stale receive times
    accepted: int = 0
    rejected: Counter[str] = field(default_factory=Counter)
    # per (reason, detail): the first example (detail with the value sent, profile key to
    # check) and how many; at most DETAILS_KEPT details a reason, the rest counted in its last
    examples: dict[tuple[str, str], tuple[str, str]] = field(default_factory=dict)
    example_counts: Counter[tuple[str, str]] = field(default_factory=Counter)
    status_codes: Counter[str] = field(default_factory=Counter)
    levels: dict[str, str] = field(default_factory=dict)  # the topic's metadata levels
    # (receive time, device time, retained) of decoded readings, in arrival order
    times: deque[tuple[float, float, bool]] = field(
        default_factory=lambda: deque(maxlen=TIMES_KEPT)
    )
    sample: deque[tuple[float, float, float | None]] = field(
        default_factory=lambda: deque(maxlen=SAMPLE_KEPT)
    )  # (device time, mL, implied mL/h)
    last: tuple[float, float] | None = None  # (device time, mL) of the last reading
    bed: str | None = None  # its temporary bed in the probe's engine

    def add_rejection(self, out: Rejected) -> None:
        reason = str(out.reason)
        self.rejected[reason] += 1
        at = (reason, out.detail)
        if at not in self.examples:
            kept = [k for k in self.examples if k[0] == reason]
            if len(kept) >= DETAILS_KEPT:
                self.example_counts[kept[-1]] += 1
                return
            shown = f"{out.detail}: {out.shown}" if out.shown else out.detail
            self.examples[at] = (shown, out.key)
        self.example_counts[at] += 1

    @property
    def device_times(self) -> list[float]:
        return [d for _, d, _ in self.times]

    def period_s(self) -> float | None:
        """Median interval between successive distinct device times."""
        ts = sorted(set(self.device_times))
        gaps = [b - a for a, b in itertools.pairwise(ts)]
        return statistics.median(gaps) if gaps else None

    def _live(self) -> list[tuple[float, float]]:
        return [(r, d) for r, d, retained in self.times if not retained]

    def bursts(self, period_s: float, stored_after_s: float) -> list[tuple[int, float, float]]:
        """Store-and-forward bursts: (buffered readings, receive span s, device span s)."""
        live = self._live()
        return [
            (len(run), live[run[-1]][0] - live[run[0]][0], live[run[-1]][1] - live[run[0]][1])
            for run in _bursts(live, period_s, stored_after_s)
        ]

    def offset_s(self, period_s: float | None = None, stored_after_s: float = 0.0
                 ) -> float | None:  # fmt: skip
        """Median of receive minus device time over the live readings: not retained ones,
        and not the buffered ones of a burst."""
        live = self._live()
        runs = _bursts(live, period_s, stored_after_s) if period_s else []
        buffered = {i for run in runs for i in run}
        offsets = [r - d for i, (r, d) in enumerate(live) if i not in buffered]
        return statistics.median(offsets) if offsets else None


def _bursts(live: list[tuple[float, float]], period_s: float, stored_after_s: float
            ) -> list[list[int]]:  # fmt: skip
    """The buffered readings (indices, in arrival order) of each burst: a run of readings
    received close together whose device times lie a reporting period or more apart, with
    at least BURST_MIN of them older on arrival than the engine's store-and-forward line
    (those are the buffered ones; the run's newest readings were sent on time)."""
    gap = max(BURST_GAP_S, period_s / 10.0)
    runs: list[list[int]] = []

    def close(run: list[int]) -> None:
        old = [i for i in run if live[i][0] - live[i][1] > stored_after_s]
        if len(old) >= BURST_MIN:
            runs.append(old)

    run = [0] if live else []
    for i in range(1, len(live)):
        (r0, d0), (r1, d1) = live[i - 1], live[i]
        if r1 - r0 <= gap and d1 - d0 >= 0.9 * period_s:
            run.append(i)
            continue
        close(run)
        run = [i]
    close(run)
    return runs


class ProbeTally:
    """Per-device decode results for one profile, and what the service's cleaning makes
    of them: each device heard is bound to a temporary bed of a rule-less engine."""

    def __init__(
        self,
        profile: DeviceProfile,
        save: Callable[[float, str, bytes], None] | None = None,
        calibration: dict[str, Calibration] | None = None,
    ) -> None:
        self.profile = profile
        self.decoder = Decoder(profile)
        self.pattern = profile.topic_regex()
        self.engine = Engine([profile], calibration=calibration, observe=self._traced)
        self._trace: ReadingTrace | None = None  # what the engine made of the message
        self.devices: dict[str, DeviceTally] = {}
        self.other_topics = 0  # matched the filter but not the profile's topic
        self.save = save

    def observe(self, topic: str, payload: bytes, recv_time: float, retained: bool = False) -> None:
        if self.save is not None:
            self.save(recv_time, topic, payload)
        m = self.pattern.match(topic)
        if m is None:
            self.other_topics += 1
            return
        device = m.group(DEVICE_LEVEL)
        d = self.devices.get(device)
        if d is None:
            d = self.devices[device] = DeviceTally()
            self._bind(device, d, recv_time)
        d.messages += 1
        d.retained += retained
        d.levels = {k: v for k, v in m.groupdict().items() if k != DEVICE_LEVEL}
        code = self.decoder.status_code(payload)
        if code is not None:
            if code not in d.status_codes and len(d.status_codes) >= CODES_KEPT:
                code = "(other codes)"  # a meter sending anything must not grow the probe
            d.status_codes[code] += 1
        self._trace = None
        effects = self.engine.step(topic, payload, recv_time)
        out = self._calibrated(self.decoder.decode(device, payload), effects)
        if isinstance(out, Rejected):
            d.add_rejection(out)
            return
        assert isinstance(out, Reading)
        d.accepted += 1
        d.times.append((recv_time, out.device_time, retained))
        d.sample.append((out.device_time, out.volume_ml, self._rate(d, out)))
        d.last = (out.device_time, out.volume_ml)

    def _traced(self, trace: ReadingTrace) -> None:
        self._trace = trace

    def _calibrated(self, out: Reading | Rejected, effects: Sequence[object]) -> Reading | Rejected:
        """The reading as the engine took it: corrected by the meter's calibration, or
        refused when the correction leaves the physical range (the probe's own decoder
        knows no calibration; it gives the value sent and the key to check)."""
        trace = self._trace
        if isinstance(out, Rejected) or trace is None:
            return out
        if trace.volume_ml is None and trace.outcomes[-1] in DECODE_REJECTIONS:
            reason = trace.outcomes[-1]
            said = [e.detail for e in effects
                    if isinstance(e, RejectedInput) and e.reason == reason]  # fmt: skip
            detail = said[0] if said else str(reason)
            shown = f"{num(out.volume_ml, 1)} mL before calibration"
            return Rejected(reason, detail, out.device_id, shown, "calibration")
        if trace.volume_ml is not None:
            out.volume_ml = trace.volume_ml
        return out

    def _bind(self, device: str, d: DeviceTally, now: float) -> None:
        """A temporary bed for the device, so the engine cleans its readings."""
        bed = PROBE_BED.format(n=len(self.devices))
        ctx = {"ward": PROBE_WARD, "device_ids": [device],
               "device_profiles": {device: self.profile.name}}  # fmt: skip
        refused = self.engine.step(f"hourwatch/beds/{bed}/context", ctx, now)
        if not refused:  # an id no context may hold stays unbound: decoding only
            d.bed = bed

    def _rate(self, d: DeviceTally, r: Reading) -> float | None:
        """Implied mL/h: an interval's volume over its length, or the rise since the last
        reading (none across a fall: a bag change or noise)."""
        p = self.profile
        if p.volume.semantics is Semantics.INTERVAL:
            return r.volume_ml * 3600.0 / float(p.volume.interval_s or p.timing.period_s)
        if d.last is None or r.bag_flag:
            return None
        dt = r.device_time - d.last[0]
        rise = r.volume_ml - d.last[1]
        return rise * 3600.0 / dt if dt > 0 and rise >= 0 else None

    def report(self) -> list[str]:
        p = self.profile
        lines: list[str] = []
        if not self.devices:
            # mosquitto grants a subscription its ACL forbids, then delivers nothing
            pattern = p.topic_pattern
            acl = pattern.fill({n: "%u" if n == DEVICE_LEVEL else "+" for n in pattern.names})
            lines += [f"no message on {p.subscription} from any device: check that the meter "
                      f"publishes on {p.topic}, and, where the broker has an ACL "
                      "(deploy/mosquitto/acl),",
                      f"  that it has 'pattern write {acl}' for the meters and 'topic read "
                      f"{p.subscription}' for this login and the service's"]  # fmt: skip
        quality = self.engine.quality()
        for name in sorted(self.devices):
            lines += self._device_report(name, self.devices[name], quality.get(name))
        if self.other_topics:
            lines.append(f"{self.other_topics} messages on topics outside {p.topic}")
        return lines

    def _device_report(self, name: str, d: DeviceTally, q: dict[str, object] | None) -> list[str]:
        p = self.profile
        rej = sum(d.rejected.values())
        why = ", ".join(f"{r} {n}" for r, n in sorted(d.rejected.items()))
        lines = [f"{name}: {d.messages} messages, {d.accepted} decoded, {rej} rejected"
                 + (f" ({why})" if why else "")
                 + (f", {d.retained} retained" if d.retained else "")]  # fmt: skip
        if d.levels:
            levels = ", ".join(f"{k}={v!r}" for k, v in d.levels.items())
            lines.append(f"  topic levels: {levels}")
        for t, ml, rate in d.sample:
            per_h = f"{num(rate, 1)} mL/h" if rate is not None else "- mL/h"
            lines.append(f"  decoded: {iso(t)}  {num(ml, 1)} mL ({p.volume.semantics})  {per_h}")
        period = d.period_s()
        if period is None:
            lines.append(f"  reporting period: needs two readings (profile {p.timing.period_s} s)")
        else:
            n = len(set(d.device_times)) - 1
            lines.append(f"  reporting period: {period:g} s (median of {n} intervals; "
                         f"profile: {p.timing.period_s} s)")  # fmt: skip
        lines += self._clock(d)
        if d.status_codes:
            codes = ", ".join(f"{c!r} {n}" for c, n in sorted(d.status_codes.items()))
            lines.append(f"  status codes: {codes}")
        if q is not None and d.bed is not None:
            counts = q["outcomes"]
            assert isinstance(counts, dict)
            bags = counts.get(Outcome.BAG_CHANGE, 0) + counts.get(Outcome.BAG_CHANGE_INFERRED, 0)
            lines.append(f"  bag changes: {bags}")
            shown = {o: n for o, n in sorted(counts.items()) if Outcome(o) not in DECODE_REJECTIONS}
            series = sum(n for o, n in shown.items() if Outcome(o) in COUNTED_IN_SERIES)
            held = " (1 held for confirmation)" if q.get("held") else ""
            lines.append(f"  cleaning, as the service would: {series} into the series; "
                         + ", ".join(f"{o} {n}" for o, n in shown.items()) + held)  # fmt: skip
        for (reason, _), (detail, key) in sorted(d.examples.items(), key=lambda x: x[0][0]):
            n = d.example_counts[reason, _]
            check = f"; check {key}" if key else ""
            lines.append(f"  rejected: {reason}: {detail}  ({n}; e.g. the first{check})")
        for w in self.engine.sanity_warnings():
            if w.device_id == name:
                lines.append(f"  WARNING {w.line()}")
        return lines

    def _clock(self, d: DeviceTally) -> list[str]:
        p = self.profile
        period = float(p.timing.period_s)
        lines = []
        tol = p.timing.clock_tolerance_s
        stored_after = p.timing.stored_after_s  # as the engine tells a stored reading
        bursts = d.bursts(period, stored_after)
        for n, recv_span, dev_span in bursts:
            lines.append(f"  buffered upload: {n} readings received within {num(recv_span, 1)} s, "
                         f"device times spanning {num(dev_span / 60, 1)} min: the meter's store "
                         "sent after an outage, not a clock error")  # fmt: skip
        offset = d.offset_s(period, stored_after)
        if offset is None:
            lines.append("  clock offset: no decoded live reading")
            return lines
        what = "median of live readings" + (", bursts left out" if bursts else "")
        lines.append(f"  clock offset: {offset:+.1f} s (receive minus device time, {what}; "
                     f"profile tolerates {tol} s)")  # fmt: skip
        if -offset > tol:
            what = "the receive time is used (clock_skew)"
            lines.append(f"  clock error: the device clock runs {num(-offset, 0)} s ahead of "
                         f"ours on every live reading: {what}")  # fmt: skip
        elif offset > stored_after:
            fate = ("each is refused as too_old (older than timing.store_forward_max_s)"
                    if offset > p.timing.store_forward_max_s
                    else "each counts as store-and-forward")  # fmt: skip
            what = f"{fate} (check the meter's clock, its time zone, or time.format)"
            lines.append(f"  clock error: the device clock runs {num(offset, 0)} s behind ours "
                         f"on every live reading: {what}")  # fmt: skip
        return lines


def find_profile(
    profiles: list[DeviceProfile], name: str, option: str = "--profile"
) -> DeviceProfile:
    for p in profiles:
        if p.name == name:
            return p
    known = ", ".join(sorted(p.name for p in profiles))
    raise UserError(f"{option}: unknown profile {name!r}; known: {known}")


def capture_writer(fh: TextIO) -> Callable[[float, str, bytes], None]:
    """Writes each message heard as a line of the JSON Lines log format (the payload as
    the journal keeps it: a JSON object, else the text), flushed at once."""

    def write(recv_time: float, topic: str, payload: bytes) -> None:
        if not 0 < len(topic) <= 512:
            return  # the log format cannot hold it (nor can a broker send it)
        line = {"time": iso(recv_time), "topic": topic, "payload": log_payload(payload)}
        fh.write(json.dumps(line, ensure_ascii=False) + "\n")
        fh.flush()

    return write


def listen(
    host: str,
    port: int,
    profile: DeviceProfile,
    tally: ProbeTally,
    stop: threading.Event,
    *,
    username: str | None = None,
    password: str | None = None,
    ca_file: str | None = None,
    clock: Callable[[], float] = time.time,
    connect_timeout_s: float = 10.0,
    on_ready: Callable[[], None] | None = None,
) -> None:
    """Subscribe (clean session, random client id, QoS 1) until `stop` is set; `on_ready`
    is called once the broker confirmed the subscription. Feeds `tally` under a lock.
    UserError when the broker cannot be reached or refuses."""
    import paho.mqtt.client as mqtt
    from paho.mqtt.enums import CallbackAPIVersion

    lock = threading.Lock()
    ready = threading.Event()
    refused: list[str] = []
    c = mqtt.Client(
        CallbackAPIVersion.VERSION2,
        client_id=f"hourwatch-probe-{secrets.token_hex(4)}",
        clean_session=True,
    )
    if username is not None:
        c.username_pw_set(username, password)
    if ca_file is not None:
        c.tls_set(ca_certs=ca_file)

    def on_connect(client: Any, userdata: Any, flags: Any, rc: Any, props: Any) -> None:
        if rc.is_failure:
            refused.append(str(rc))
            ready.set()
            return
        client.subscribe(profile.subscription, 1)

    def on_subscribe(client: Any, userdata: Any, mid: int, rcs: Any, props: Any) -> None:
        if any(r.is_failure for r in rcs):
            refused.append(f"subscription to {profile.subscription} refused: {rcs[0]}")
        ready.set()

    def on_message(client: Any, userdata: Any, msg: Any) -> None:
        with lock:
            tally.observe(msg.topic, bytes(msg.payload), clock(), bool(msg.retain))

    c.on_connect = on_connect
    c.on_subscribe = on_subscribe
    c.on_message = on_message
    try:
        c.connect(host, port, keepalive=30)
    except (OSError, ValueError) as exc:
        raise UserError(f"--broker: cannot connect to {host}:{port}: {exc}") from None
    c.loop_start()
    try:
        if not ready.wait(connect_timeout_s):
            raise UserError(f"--broker: {host}:{port} did not accept us within "
                            f"{connect_timeout_s:g} s")  # fmt: skip
        if refused:
            raise UserError(f"--broker: {host}:{port}: {refused[0]}")
        if on_ready is not None:
            on_ready()
        stop.wait()
    finally:
        c.disconnect()
        c.loop_stop()
