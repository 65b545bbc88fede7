"""The MQTT side of the service, on paho-mqtt 2.x (FIELD-NOTES.md).

A persistent session with a fixed client id and manual acknowledgement: the broker
keeps redelivering a reading until the worker has journaled it and calls `ack()`.
paho's callbacks run on paho's network thread; they only convert and enqueue.
"""

from __future__ import annotations

import queue
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion, MQTTErrorCode, MQTTProtocolVersion
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties
from paho.mqtt.reasoncodes import ReasonCode

from .config import BrokerConfig
from .engine.outcomes import Outcome, withheld

SUBSCRIBE_QOS = 1  # at-least-once for every input; duplicates are the engine's business
SLOT_WAIT_S = 0.5  # a full inbound queue: paho's thread checks this often for a stop
TOO_LARGE = withheld(Outcome.TOO_LARGE).encode("utf-8")


@dataclass(frozen=True, slots=True)
class Inbound:
    """One received message, tagged with the connection it came on."""

    conn: int
    mid: int
    qos: int
    topic: str
    payload: bytes
    recv_time: float  # from the service clock: the engine's `now` for this message
    arrived: float  # perf_counter, for the latency histogram


@dataclass(frozen=True, slots=True)
class Published:
    """paho's on_publish: the broker confirmed (QoS 1: PUBACK) our message `mid`."""

    mid: int
    ok: bool
    reason: str


@dataclass(frozen=True, slots=True)
class Connection:
    """Connected (with its counter) or lost."""

    conn: int
    up: bool
    session_present: bool = False
    reason: str = ""


Item = Inbound | Published | Connection


class MqttLink:
    """Owns the paho client. Received messages go to `out`; confirmations and connection
    changes go to `control` (so that, under load, they do not wait behind a backlog of
    readings) followed by a call of `wake`.

    Bounds: a received message takes one of `slots` (the worker gives it back when it
    takes the message); with none free, paho's thread waits, so the service stops
    reading from the broker, which then holds the rest (QoS 1: unacknowledged, kept in
    our session). A payload over `max_payload` is never kept: it becomes the
    withheld marker for too_large, journaled and counted like any refused message."""

    def __init__(
        self,
        cfg: BrokerConfig,
        subscriptions: list[str],
        out: queue.SimpleQueue[Any],
        control: queue.SimpleQueue[Any],
        wake: Callable[[], None],
        clock: Callable[[], float],
        will: tuple[str, bytes],
        log: Any,
        *,
        slots: threading.Semaphore | None = None,
        stopping: threading.Event | None = None,
        max_payload: int = 0,
    ) -> None:
        self.cfg = cfg
        self.subscriptions = subscriptions
        self._slots = slots
        self._stopping = stopping or threading.Event()
        self._max_payload = max_payload
        self.oversize = 0  # payloads withheld as too large
        self.full_waits = 0  # times paho's thread waited for the worker
        self._out = out
        self._control = control
        self._wake = wake
        self._clock = clock
        self._log = log
        self.conn = 0  # bumped on every successful connect
        self.connected = threading.Event()
        self.last_error: str | None = None
        self.v5 = cfg.protocol == "5"
        proto = MQTTProtocolVersion.MQTTv5 if self.v5 else MQTTProtocolVersion.MQTTv311
        c = mqtt.Client(
            CallbackAPIVersion.VERSION2,
            client_id=cfg.client_id,
            protocol=proto,
            # 3.1.1: the session survives us; MQTT 5 says so in connect (clean_start)
            clean_session=None if self.v5 else False,
            manual_ack=True,
        )
        if cfg.username is not None:
            c.username_pw_set(cfg.username, cfg.secret())
        if cfg.tls is not None:
            c.tls_set(
                ca_certs=str(cfg.tls.ca_file),
                certfile=str(cfg.tls.cert_file) if cfg.tls.cert_file else None,
                keyfile=str(cfg.tls.key_file) if cfg.tls.key_file else None,
            )
        c.will_set(will[0], will[1], qos=1, retain=True)
        c.reconnect_delay_set(cfg.reconnect_min_s, cfg.reconnect_max_s)
        c.max_queued_messages_set(0)  # our outbox bounds what we hand over
        c.max_inflight_messages_set(100)
        c.on_connect = self._on_connect
        c.on_disconnect = self._on_disconnect
        c.on_message = self._on_message
        c.on_publish = self._on_publish
        c.on_subscribe = self._on_subscribe
        c.on_connect_fail = self._on_connect_fail
        self.client = c

    # --- control (service threads) -------------------------------------------
    def start(self) -> None:
        cfg = self.cfg
        if self.v5:
            props = Properties(PacketTypes.CONNECT)  # type: ignore[no-untyped-call]
            props.SessionExpiryInterval = cfg.session_expiry_s
            props.ReceiveMaximum = cfg.receive_maximum
            self.client.connect_async(
                cfg.host, cfg.port, cfg.keepalive_s, clean_start=False, properties=props
            )
        else:
            self.client.connect_async(cfg.host, cfg.port, cfg.keepalive_s)
        self.client.loop_start()

    def stop(self) -> None:
        """Clean disconnect (the broker then does not publish the last will)."""
        if self.v5:
            props = Properties(PacketTypes.DISCONNECT)  # type: ignore[no-untyped-call]
            # keep the session: readings published while we are down are kept for us
            props.SessionExpiryInterval = self.cfg.session_expiry_s
            self.client.disconnect(properties=props)
        else:
            self.client.disconnect()
        self.client.loop_stop()

    def ack(self, mid: int, qos: int) -> bool:
        return self.client.ack(mid, qos) == MQTTErrorCode.MQTT_ERR_SUCCESS

    def publish(self, topic: str, payload: bytes, qos: int, retain: bool) -> tuple[int, bool]:
        """Hand a message to paho: (mid, accepted). paho keeps a QoS 1 message it
        accepted across reconnects and resends it until the broker confirms it."""
        info = self.client.publish(topic, payload, qos=qos, retain=retain)
        accepted = info.rc == MQTTErrorCode.MQTT_ERR_SUCCESS or (
            qos > 0 and info.rc == MQTTErrorCode.MQTT_ERR_NO_CONN
        )
        return info.mid, accepted

    # --- paho callbacks (paho's thread): convert and enqueue only ---------------
    def _signal(self, item: Published | Connection) -> None:
        self._control.put(item)
        self._wake()

    def _on_connect(
        self,
        client: mqtt.Client,
        userdata: Any,
        flags: mqtt.ConnectFlags,
        reason: ReasonCode,
        props: Properties | None,
    ) -> None:
        if reason.is_failure:
            self.last_error = f"broker refused the connection: {reason}"
            self._log.error("mqtt_refused", reason=str(reason))
            return
        self.conn += 1
        self.last_error = None
        # Re-issued on every connect: a broker that lost its state still gets them.
        client.subscribe([(f, SUBSCRIBE_QOS) for f in self.subscriptions])
        self.connected.set()
        self._signal(Connection(self.conn, True, bool(flags.session_present)))

    def _on_disconnect(
        self,
        client: mqtt.Client,
        userdata: Any,
        flags: mqtt.DisconnectFlags,
        reason: ReasonCode,
        props: Properties | None,
    ) -> None:
        was_up = self.connected.is_set()
        self.connected.clear()
        if was_up:
            self._signal(Connection(self.conn, False, reason=str(reason)))
        elif not (self.last_error or "").startswith("broker refused"):
            self.last_error = f"cannot connect: {reason}"  # a refusal says more: keep it

    def _on_connect_fail(self, client: mqtt.Client, userdata: Any) -> None:
        if self.last_error is None or not self.last_error.startswith("broker refused"):
            self.last_error = f"cannot reach the broker at {self.cfg.host}:{self.cfg.port}"
        self._log.warning("mqtt_unreachable", error=self.last_error)  # retried with backoff

    def _on_message(self, client: mqtt.Client, userdata: Any, msg: mqtt.MQTTMessage) -> None:
        try:
            topic = msg.topic
        except UnicodeDecodeError:  # a broker should refuse these; drop, but say so
            self._log.warning("mqtt_bad_topic", mid=msg.mid)
            return
        if self._max_payload and len(msg.payload) > self._max_payload:
            self.oversize += 1
            payload = TOO_LARGE
        else:
            payload = bytes(msg.payload)
        slots = self._slots
        if slots is not None and not slots.acquire(blocking=False):
            self.full_waits += 1
            while not slots.acquire(timeout=SLOT_WAIT_S):
                if self._stopping.is_set():
                    return  # not acknowledged: the broker sends it again next time
        self._out.put(
            Inbound(self.conn, msg.mid, msg.qos, topic, payload, self._clock(),
                    time.perf_counter())
        )  # fmt: skip

    def _on_publish(
        self,
        client: mqtt.Client,
        userdata: Any,
        mid: int,
        reason: ReasonCode,
        props: Properties | None,
    ) -> None:
        self._signal(Published(mid, not reason.is_failure, str(reason)))

    def _on_subscribe(
        self,
        client: mqtt.Client,
        userdata: Any,
        mid: int,
        reasons: list[ReasonCode],
        props: Properties | None,
    ) -> None:
        for f, r in zip(self.subscriptions, reasons, strict=False):
            if r.is_failure:
                self._log.error("mqtt_subscribe_refused", filter=f, reason=str(r))
