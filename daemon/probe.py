"""A probe for the clinical engineer commissioning a meter: listen to one profile's topic
filter and tell, per device, how its messages decode, how often it reports and how far
its clock is from ours. It never touches a journal and never acknowledges anything on
the service's behalf: its own clean session, its own random client id.

`DeviceTally`/`ProbeTally` hold no I/O (times are arguments); `listen` is the MQTT side.
"""

from __future__ import annotations

import itertools
import secrets
import statistics
import threading
import time
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from .engine.decode import Decoder, Reading, Rejected
from .engine.profiles import DeviceProfile
from .errors import UserError

EXAMPLES_KEPT = 3  # details of the latest rejections shown per device


@dataclass
class DeviceTally:
    messages: int = 0
    retained: int = 0  # sent by the broker at subscribe time: stale receive times
    accepted: int = 0
    rejected: Counter[str] = field(default_factory=Counter)
    device_times: list[float] = field(default_factory=list)
    offsets: list[float] = field(default_factory=list)  # receive - device time, s
    last_volume_ml: float | None = None
    last_rejections: list[tuple[str, str]] = field(default_factory=list)  # newest last

    def period_s(self) -> float | None:
        """Median interval between successive distinct device times."""
        ts = sorted(set(self.device_times))
        gaps = [b - a for a, b in itertools.pairwise(ts)]
        return statistics.median(gaps) if gaps else None

    def offset_s(self) -> float | None:
        return statistics.median(self.offsets) if self.offsets else None


class ProbeTally:
    """Per-device decode results for one profile."""

    def __init__(self, profile: DeviceProfile) -> None:
        self.profile = profile
        self.decoder = Decoder(profile)
        self.pattern = profile.topic_regex()
        self.devices: dict[str, DeviceTally] = {}
        self.other_topics = 0  # matched the filter but not the profile's topic

    def observe(self, topic: str, payload: bytes, recv_time: float, retained: bool = False) -> None:
        m = self.pattern.match(topic)
        if m is None:
            self.other_topics += 1
            return
        device = m.group(1)
        d = self.devices.get(device)
        if d is None:
            d = self.devices[device] = DeviceTally()
        d.messages += 1
        d.retained += retained
        out = self.decoder.decode(device, payload)
        if isinstance(out, Rejected):
            reason = str(out.reason)
            d.rejected[reason] += 1
            d.last_rejections.append(
                (reason, f"{out.detail}: {out.shown}" if out.shown else out.detail)
            )
            del d.last_rejections[:-EXAMPLES_KEPT]
            return
        assert isinstance(out, Reading)
        d.accepted += 1
        d.device_times.append(out.device_time)
        if not retained:  # a retained message's receive time says nothing of its clock
            d.offsets.append(recv_time - out.device_time)
        d.last_volume_ml = out.volume_ml

    def report(self) -> list[str]:
        p = self.profile
        lines: list[str] = []
        if not self.devices:
            lines.append(f"no message on {p.subscription} from any device")
        for name in sorted(self.devices):
            d = self.devices[name]
            rej = sum(d.rejected.values())
            why = ", ".join(f"{r} {n}" for r, n in sorted(d.rejected.items()))
            lines.append(f"{name}: {d.messages} messages, {d.accepted} decoded, {rej} rejected"
                         + (f" ({why})" if why else "")
                         + (f", {d.retained} retained" if d.retained else ""))  # fmt: skip
            period = d.period_s()
            if period is None:
                lines.append(
                    f"  reporting period: needs two readings (profile {p.timing.period_s} s)"
                )
            else:
                n = len(set(d.device_times)) - 1
                lines.append(f"  reporting period: {period:g} s (median of {n} intervals; "
                             f"profile: {p.timing.period_s} s)")  # fmt: skip
            offset = d.offset_s()
            if offset is None:
                lines.append("  clock offset: no decoded live reading")
            else:
                tol = p.timing.clock_tolerance_s
                lines.append(f"  clock offset: {offset:+.1f} s (receive minus device time, "
                             f"median; profile tolerates {tol} s)")  # fmt: skip
            if d.last_volume_ml is not None:
                lines.append(f"  last volume: {d.last_volume_ml:g} mL ({p.volume.semantics})")
            for reason, detail in d.last_rejections:
                lines.append(f"  rejected: {reason}: {detail}")
        if self.other_topics:
            lines.append(f"{self.other_topics} messages on topics outside {p.topic}")
        return lines


def find_profile(profiles: list[DeviceProfile], name: str) -> DeviceProfile:
    for p in profiles:
        if p.name == name:
            return p
    known = ", ".join(sorted(p.name for p in profiles))
    raise UserError(f"--profile: unknown profile {name!r}; known: {known}")


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
