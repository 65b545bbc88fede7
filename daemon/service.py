"""`hourwatch run`: the live service, the imperative shell around the pure engine.

Threads and who owns what:
- paho's network thread: callbacks convert and enqueue (mqtt_ingest.py).
- the worker (one thread) owns the journal and the outbox: batch of received messages →
  journal (durable) → ack to the broker, in order → engine → journal the effects → publish.
- APScheduler's thread: ONE job, re-armed to `engine.next_wakeup()`, calls
  `engine.advance(now)` under the engine lock and hands the effects to the worker.
- the HTTP thread (daemon/web: /health, /metrics, the ward board) reads counters, and
  copies the board's numbers out of the engine under the engine lock.

The engine never reads the clock: the service passes `clock()` (time.time by default;
tests inject a fake one to run a night in seconds).
"""

from __future__ import annotations

import contextlib
import json
import logging
import math
import queue
import sys
import threading
import time
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from typing import TYPE_CHECKING, Any, TextIO

import structlog
from apscheduler.executors.pool import ThreadPoolExecutor  # type: ignore[import-untyped]
from apscheduler.schedulers.background import BackgroundScheduler  # type: ignore[import-untyped]
from apscheduler.triggers.date import DateTrigger  # type: ignore[import-untyped]
from pydantic import ValidationError

from .caution import CAUTION
from .config import ServiceConfig, split_address, zone_info
from .engine import snapshot
from .engine.alarms import AlarmEvent
from .engine.effects import AdviceIssued, Effect, RejectedInput
from .engine.engine import Engine
from .engine.evaluator import Notice
from .engine.outcomes import Outcome
from .engine.sanity import SanityWarning
from .engine.timefmt import iso
from .errors import UserError
from .health import Metrics, exposition
from .journal import StoredEvent
from .journal_api import Fenced, FenceToken, Journal, is_full, open_journal
from .messages import (
    SCHEMA,
    ActiveAlarm,
    AdviceMessage,
    AlarmMessage,
    OutputWindow,
    RejectedMessage,
    StateMessage,
    StatusMessage,
    TechnicalAlarm,
    offline_status,
)
from .mqtt_ingest import Connection, Inbound, MqttLink, Published
from .notify.acklinks import AckOutcome
from .notify.notifier import Notifier
from .notify.settings import check_notify, policy_roles
from .notify.store import open_store
from .profile_files import check_prefix, load_devices, load_profiles
from .publisher import Outbox, Outgoing
from .recovery import Recovery, longest_window_s, recover, series_keep_s
from .rule_files import load_advice, load_policy, load_rules
from .shard import WardShard
from .web.live import ChangeFeed
from .web.marks import ReadingMarks

if TYPE_CHECKING:
    from .web.server import WebServer

OutboundOf = AlarmMessage | AdviceMessage | RejectedMessage
# Received messages journaled per fsync. The broker stops sending once this many are
# unacknowledged: mosquitto's default is 20 (FIELD-NOTES.md), which MQTT 5's Receive
# Maximum raises; half of it leaves the broker sending while a batch is written.
BATCH_MAX_311 = 16
BATCH_MAX_CAP = 256
BATCH_WAIT_S = 0.020  # upper bound on how long a received message waits for its batch
BOARD_MARKS = "board_marks"  # the board's bag changes, in the engine's snapshots
HOUSEKEEPING_S = 0.25  # the worker wakes at least this often
HOUSEKEEPING_EVERY_S = 0.05  # timeouts, retained state and status at most this often
PRUNE_EVERY_S = 600.0
PRUNE_BATCH = 500  # rows per pruning transaction: a few ms of the worker's time
STOP_CONFIRM_S = 2.0  # at stop: wait this long for outstanding confirmations
JOB_ID = "engine-wakeup"


def configure_logging(level: str = "info", stream: TextIO | None = None) -> None:
    """structlog JSON lines on stdout (or `stream`): one event per line, with bed and alarm
    ids, never patient names (the engine knows none). Libraries' stdlib warnings come out
    as JSON too. stdout, so that systemd's journal or a container runtime collects them."""
    out = stream or sys.stdout
    stamp = structlog.processors.TimeStamper(fmt="iso", utc=True)
    structlog.configure(
        processors=[
            structlog.processors.add_log_level,
            stamp,
            structlog.processors.format_exc_info,
            structlog.processors.JSONRenderer(),
        ],
        wrapper_class=structlog.make_filtering_bound_logger(
            logging.getLevelNamesMapping()[level.upper()]
        ),
        logger_factory=structlog.PrintLoggerFactory(out),
        cache_logger_on_first_use=False,
    )
    handler = logging.StreamHandler(out)
    handler.setFormatter(
        structlog.stdlib.ProcessorFormatter(
            processors=[
                structlog.stdlib.ProcessorFormatter.remove_processors_meta,
                structlog.processors.JSONRenderer(),
            ],
            foreign_pre_chain=[
                structlog.stdlib.add_logger_name,
                structlog.processors.add_log_level,
                stamp,
            ],
        )
    )
    root = logging.getLogger()
    root.handlers = [handler]
    root.setLevel(logging.WARNING)  # paho and APScheduler: only what needs attention


def _taken(address: tuple[str, int]) -> bool:
    """Whether this address cannot be bound now (to name the key in the error)."""
    from .web.server import bind

    try:
        bind(*address).close()
    except OSError:
        return True
    return False


def bed_of(alarm_id: str | None) -> str | None:
    """The bed of an alarm id (BED/RULE/ONSET, engine/lifecycle.py), for log lines."""
    return alarm_id.split("/", 1)[0] if alarm_id else None


ALARM_LATENCY_KEPT = 10_000  # arrival times kept for alarms awaiting their PUBACK


def topic_level(text: str) -> str:
    """A ward or bed id as one topic level: no separator, no wildcard, never empty."""
    out = text.replace("/", "_").replace("+", "_").replace("#", "_")
    return out or "_"


EventRow = tuple[float, str, str | None, str | None, dict[str, object]]


def journal_row(e: Effect) -> EventRow:
    """An engine effect as the journal's (time, kind, bed, alarm_id, body)."""
    if isinstance(e, AlarmEvent):
        return (e.time, "alarm", e.bed, e.alarm_id, e.to_json())
    if isinstance(e, AdviceIssued):
        return (e.time, "advice", e.bed, None, e.to_json())
    if isinstance(e, RejectedInput):
        return (e.time, "rejected", None, None, e.to_json())
    body: dict[str, object] = {"bed": e.bed, "ward": e.ward, "code": e.code, "text": e.text,
                               "time": iso(e.time)}  # fmt: skip
    return (e.time, "notice", e.bed, None, body)


class _Stop:
    pass


class _Wake:
    pass


_STOP = _Stop()
_WAKE = _Wake()
LOCAL_ACK_WAIT_S = 10.0  # an acknowledgement from a link waits this long for the worker


@dataclass
class _LocalInput:
    """A message that did not come over MQTT (an acknowledgement from a page's link):
    journaled and fed to the engine by the worker exactly like a received one, so a
    replay of the journal sees it too. `done` is set once `effects` holds the result."""

    topic: str
    payload: bytes
    done: threading.Event = field(default_factory=threading.Event)
    effects: list[Effect] = field(default_factory=list)
    error: str | None = None


@dataclass
class _Bed:
    """What the publisher remembers per bed."""

    ward_level: str | None = None  # the ward its retained state was last published under
    last_state: float = -math.inf
    dirty: bool = False
    urgent: bool = False  # an alarm or advice changed: publish the state now
    latest_advice: dict[str, Any] | None = None
    last_content: bytes = b""  # the last state published, without its time


@dataclass
class _Technical:
    code: str
    text: str
    since: float
    alarm_id: str | None = None


@dataclass
class ServiceStats:
    recovery: Recovery | None = None
    started: float = 0.0
    engine_errors: int = 0
    technical: dict[str, _Technical] = field(default_factory=dict)


class Service:
    def __init__(
        self,
        cfg: ServiceConfig,
        *,
        clock: Callable[[], float] = time.time,
        clock_rate: float = 1.0,
        fence: FenceToken | None = None,
    ) -> None:
        self.cfg = cfg
        # The lease this instance is active under (daemon/ha.py): every journal write
        # checks it, so a replaced active writes nothing. None: no active/standby group.
        self.fence = fence
        self.fenced = False  # lost the lease: stop without saying anything on the broker
        self.clock = clock
        # seconds of `clock` per wall-clock second: the demo runs a simulated day in
        # minutes, and the wake-up job must then wait in wall time
        self.clock_rate = clock_rate
        self.prefix = cfg.topic_prefix
        self.log = structlog.get_logger("hourwatch")
        # the ward board (daemon/web): bag changes seen, and which beds changed; the
        # bag changes travel in the engine's snapshots (a restart shows those before it)
        self.marks = ReadingMarks()
        self._board_marks = bool(cfg.board.listen)
        self.changes = ChangeFeed()
        profiles = load_profiles(cfg.profiles)
        check_prefix(profiles, self.prefix, cfg.profiles)
        self.rules = load_rules(cfg.rules)
        self.policy = load_policy(cfg.rules)
        self.subscriptions = [p.subscription for p in profiles] + [
            f"{self.prefix}/beds/+/+",
            f"{self.prefix}/ack/+",  # per user: the broker's ACL vouches for the user
        ]
        if not cfg.ack.per_user_topic:  # a broker without logins: the payload names them
            self.subscriptions.append(f"{self.prefix}/ack")
        lim = cfg.limits
        self.guard_s = longest_window_s(self.rules)
        self.window_s = self.guard_s + cfg.recovery.margin_s
        try:
            self.engine = Engine(
                profiles, self.rules, self.policy, topic_prefix=self.prefix,
                advice_policy=load_advice(cfg.rules), timezone=zone_info(cfg.timezone),
                id_pattern=cfg.identifiers.pattern, clinical_ahead_s=lim.clinical_ahead_s,
                unbound_expiry_s=lim.unbound_expiry_s,
                max_unbound_devices=lim.max_unbound_devices,
                ack_topic=f"{self.prefix}/ack/{{user}}" if cfg.ack.per_user_topic else None,
                ack_users=cfg.ack.users or None, calibration=load_devices(cfg.devices),
                observe=self.marks.observe if self._board_marks else None,  # bag changes
                series_keep_s=series_keep_s(self.rules, cfg.recovery.margin_s),
            )  # fmt: skip
        except ValueError as exc:  # e.g. ack.users names a role the policy does not
            raise UserError(f"ack.users: {exc}") from None
        self.batch_max = (
            min(BATCH_MAX_CAP, cfg.broker.receive_maximum // 2)
            if cfg.broker.protocol == "5"
            else BATCH_MAX_311
        )
        self.lock = threading.RLock()  # the engine's: worker and timer job
        self.queue: queue.SimpleQueue[Any] = queue.SimpleQueue()  # received messages
        # one slot per received message not yet journaled (queued or held): a bound
        self.slots = threading.Semaphore(lim.inbound_queue)
        # the journal's disk (or cap) is full: what waits to be journaled, in order
        self._held: list[Inbound] = []
        self._held_effects: list[tuple[list[Effect], dict[int, float] | None]] = []
        self._next_retry = -math.inf  # monotonic
        self._journal_lag = 0.0  # seconds from arrival to journal, last batch
        self.control: queue.SimpleQueue[Any] = queue.SimpleQueue()  # confirmations, connection
        self.metrics = Metrics()
        self.stats = ServiceStats()
        self._sanity_raised: Counter[str] = Counter()  # under self.lock: raised, by code
        self.journal: Journal | None = None
        self.link: MqttLink | None = None
        self.outbox: Outbox | None = None
        self.health: WebServer | None = None  # /health, /metrics, links and the board
        self._now = -math.inf  # engine time so far (monotone)
        # the newest message journaled and fed to the engine (a snapshot's position)
        self._last_message_id = 0
        self._next_snapshot = -math.inf  # engine time of the next snapshot
        self._snapshot_at: tuple[float, int] | None = None  # (engine time, id) of the last
        self._timer_effects: list[Effect] = []
        # journal event id -> perf_counter arrival of the reading that raised the alarm
        self._alarm_arrived: dict[int, float] = {}
        self._armed: float | None = None
        self._beds: dict[str, _Bed] = {}
        self._readings_since_state = False  # a message may have changed any bed's output
        self._connected = False
        self._connected_at = -math.inf  # service clock at the latest connect
        self._last_status: tuple[object, ...] | None = None
        self._worker: threading.Thread | None = None
        self._next_prune = -math.inf  # monotonic time of the next pruning batch
        self._next_housekeeping = -math.inf
        self._stopping = threading.Event()
        self._stop_reason = "stopped"
        self.failed: str | None = None  # the worker died: the process must exit non-zero
        self.done = threading.Event()  # set when the worker has ended
        self.scheduler = BackgroundScheduler(
            executors={"default": ThreadPoolExecutor(1)}, timezone=UTC
        )
        # Paging channels (daemon/notify): none configured = pages stay on MQTT.
        self.notifier: Notifier | None = None
        if cfg.notify.enabled:
            secrets = check_notify(cfg.notify, policy_roles(self.policy), "configuration")
            where = cfg.journal.target()
            self.notifier = Notifier(cfg.notify, secrets, where, clock=clock, log=self.log,
                                     store_factory=lambda w: open_store(w, fence))  # fmt: skip
        # Sharding by ward ([shard] wards): other wards' beds are not ours to watch.
        self.shard = WardShard(cfg.shard.wards, self.prefix, profiles, self.log)

    # --- lifecycle --------------------------------------------------------------
    def start(self) -> None:
        """Recover from the journal, then connect. A UserError (bad journal, health address
        taken) leaves nothing running."""
        try:
            self._start()
        except BaseException:
            self.stop("start failed")
            raise

    def _start(self) -> None:
        cfg = self.cfg
        self.stats.started = self.clock()
        if cfg.health.listen or cfg.board.listen:  # first: a taken address fails before all
            self.health = self._web_server()
        # Recovery reads through the journal's own read connections, whose file checks
        # open and close the database file: in one process, closing any descriptor of a
        # file drops all its POSIX locks, including the writer's. So recovery gets a
        # journal of its own, closed before the worker's long-lived one is opened.
        where, jc = cfg.journal.target(), cfg.journal
        with open_journal(where, retention_days=jc.retention_days, fence=self.fence) as j:
            self._recover(j)
        self.journal = open_journal(where, retention_days=jc.retention_days,
                                    max_bytes=jc.max_bytes, fence=self.fence,
                                    pool_size=jc.pool_size)  # fmt: skip
        will = offline_status(self.clock(), "connection lost", self.stats.started)
        self.link = MqttLink(
            cfg.broker, self.subscriptions, self.queue, self.control,
            lambda: self.queue.put(_WAKE), self.clock,
            (self._topic("status"), will.to_bytes()), self.log,
            slots=self.slots, stopping=self._stopping,
            max_payload=cfg.limits.max_payload_bytes,
        )  # fmt: skip
        self.outbox = Outbox(self.link.publish, cfg.publish.confirm_timeout_s)
        if self.notifier is not None:  # before anything new is journaled: downtime pages too
            self.notifier.start(self.acknowledge_from_link)
        self._queue_recovered()
        self.scheduler.start()
        with self.lock:
            self._arm()
        self._worker = threading.Thread(target=self._work, name="hourwatch-worker", daemon=True)
        self._worker.start()
        if self.health is not None:
            self.health.start()
            for name, (host, port) in self.health.addresses.items():
                self.log.info(f"{name}_listening", address=f"{host}:{port}")
        self.link.start()
        self.log.info(
            "service_started", broker=f"{cfg.broker.host}:{cfg.broker.port}",
            protocol=cfg.broker.protocol, client_id=cfg.broker.client_id,
            journal=str(where), subscriptions=self.subscriptions,
        )  # fmt: skip

    def step_down(self, reason: str) -> None:
        """This instance lost its group's lease (daemon/ha.py): stop at once, acknowledging,
        journaling and publishing nothing more (the new active does that)."""
        self.fenced = True
        self.stop(reason)

    def stop(self, reason: str = "stopped") -> None:
        """Drain what was received, publish the status "offline", disconnect cleanly."""
        if self._stopping.is_set():
            return
        self._stopping.set()
        self._stop_reason = reason
        if self.scheduler.running:
            self.scheduler.shutdown(wait=False)
        if self._worker is not None and self._worker.is_alive():
            self.queue.put(_STOP)
            self._worker.join(STOP_CONFIRM_S * 3 + 5)
        if self.link is not None:
            if self.failed is not None and self.link.connected.is_set() and not self.fenced:
                # the worker is gone: say so in the retained status before the clean
                # disconnect (which sends no last will)
                status = offline_status(self.clock(), reason, self.stats.started)
                info = self.link.client.publish(
                    self._topic("status"), status.to_bytes(), qos=1, retain=True
                )
                with contextlib.suppress(RuntimeError, ValueError):
                    info.wait_for_publish(STOP_CONFIRM_S)
            self.link.stop()
        if self.health is not None:
            self.health.stop()
        if self.notifier is not None:  # pages still queued go at the next start
            self.notifier.stop()
        if self.journal is not None:
            self.journal.close()
            self.journal = None
        if self._worker is not None:  # a start that failed says so in its own error line
            self.log.info("service_stopped", reason=reason)

    # --- recovery -----------------------------------------------------------------
    def _recover(self, journal: Journal) -> None:
        now = self.clock()
        with self.lock:
            rec = recover(
                self.engine, journal, now, self.window_s, self.guard_s, self.prefix,
                max_lookback_s=self.cfg.journal.retention_days * 86400.0,
                extras={BOARD_MARKS: self.marks.load} if self._board_marks else None,
            )  # fmt: skip
            self._now = max(now, rec.last_message_time or now)
            self._last_message_id = rec.last_message_id or 0
            self._next_snapshot = self._now  # one at once: a crash soon after restarts fast
        self.stats.recovery = rec
        for why in rec.snapshots_ignored:
            self.log.warning("snapshot_ignored", why=why[:300],
                             note="not read; the journal is re-fed instead")  # fmt: skip
        with self.metrics.lock:
            self.metrics.recovery_s = rec.seconds
            self.metrics.recovered_messages = rec.messages
        self.log.info(
            "recovery_done", seconds=round(rec.seconds, 3),
            window_h=round((rec.now - rec.window_start) / 3600, 2), complete=rec.complete,
            messages=rec.messages, contexts=rec.contexts, beds=len(self.engine.beds),
            snapshot=rec.snapshot_id,
            already_journaled=rec.already_journaled, new_events=len(rec.to_publish),
            undelivered=len(rec.undelivered), differs=len(rec.differs),
            engine_errors=len(rec.engine_errors),
        )  # fmt: skip
        for err in rec.engine_errors[:10]:
            self.log.error("recovery_engine_error", error=err)
        self.stats.engine_errors += len(rec.engine_errors)
        for e in rec.differs[:20]:  # the count is in recovery_done; a sample is enough
            self.log.warning(
                "recovery_differs", alarm_id=e.alarm_id, bed=e.bed, state=str(e.state),
                reason=e.reason, time=iso(e.time),
                note="rebuilt history gives an event the journal does not hold; not published",
            )  # fmt: skip

    def _queue_recovered(self) -> None:
        """Journal and queue what recovery found new; re-queue what was never confirmed."""
        rec = self.stats.recovery
        assert rec is not None and self.outbox is not None
        for ev in rec.undelivered:
            self._requeue(ev)
        self._emit(rec.to_publish)
        for e in rec.to_publish:
            if isinstance(e, AlarmEvent):
                self.log.info("downtime_event", alarm_id=e.alarm_id, bed=e.bed,
                              state=str(e.state), reason=e.reason, time=iso(e.time))  # fmt: skip
        for bed in self.engine.beds:
            self._bed(bed).dirty = True

    def _requeue(self, ev: StoredEvent) -> None:
        assert self.outbox is not None
        body = ev.body
        try:
            if ev.kind == "alarm":
                msg = AlarmMessage.model_validate(body)
                topic = self._topic("alarms", msg.ward, msg.bed)
                out = Outgoing(topic, msg.to_bytes(), 1, False, [ev.id], msg.alarm_id, ev.time)
            elif ev.kind == "advice":
                adv = AdviceMessage.model_validate(body)
                topic = self._topic("advice", adv.ward, adv.bed)
                out = Outgoing(topic, adv.to_bytes(), 1, False, [ev.id], None, ev.time)
            else:
                return
        except ValueError as exc:
            self.log.error("journal_event_unreadable", event_id=ev.id, error=str(exc)[:200])
            return
        self.log.info("republishing_unconfirmed", event_id=ev.id, kind=ev.kind,
                      alarm_id=ev.alarm_id, bed=ev.bed)  # fmt: skip
        self.outbox.put(out)

    # --- the worker -----------------------------------------------------------------
    def _work(self) -> None:
        try:
            while True:
                items, stop = self._collect()
                self._handle(items)
                if stop:
                    self._finish()
                    return
                if (self._held or self._held_effects) and time.monotonic() >= self._next_retry:
                    self._retry_journal()
                if time.monotonic() >= self._next_housekeeping:
                    self._next_housekeeping = time.monotonic() + HOUSEKEEPING_EVERY_S
                    self._housekeeping()
                if self._now >= self._next_snapshot and self.cfg.recovery.snapshot_every_s:
                    self._snapshot()
        except Fenced as exc:  # replaced by another instance: nothing was written
            self.fenced = True
            self.failed = f"fenced: {exc}"
            self.log.error("lease_lost_on_write", error=str(exc))
        except Exception as exc:  # never ack what was not journaled: die loudly instead
            self.failed = f"{type(exc).__name__}: {exc}"
            self.log.critical("worker_failed", error=self.failed, exc_info=True)
        finally:
            self.done.set()

    def _collect(self) -> tuple[list[Any], bool]:
        """Block for the first item, then take what is already queued, up to `batch_max`
        received messages (a group commit: under load batches fill, when idle a lone
        reading is journaled at once)."""
        items: list[Any] = []
        try:
            first = self.queue.get(timeout=HOUSEKEEPING_S)
        except queue.Empty:
            self._journal_lag = 0.0  # nothing waits
            return items, False
        if first is _STOP:
            return items, True
        items.append(first)
        n = 1 if isinstance(first, Inbound) else 0
        deadline = time.perf_counter() + BATCH_WAIT_S
        while n < self.batch_max and time.perf_counter() < deadline:
            try:
                item = self.queue.get_nowait()
            except queue.Empty:
                break
            if item is _STOP:
                return items, True
            items.append(item)
            n += isinstance(item, Inbound)
        return items, False

    def _handle(self, items: list[Any]) -> None:
        assert self.journal is not None and self.outbox is not None and self.link is not None
        confirmed: list[Published] = []
        while True:  # confirmations and connection changes first: they never wait
            try:
                item = self.control.get_nowait()
            except queue.Empty:
                break
            if isinstance(item, Published):
                confirmed.append(item)
            elif isinstance(item, Connection):
                self._connection(item)
        if confirmed:
            self._confirm(confirmed)
        inbound = [item for item in items if isinstance(item, Inbound)]
        if self._held or self._held_effects:
            self._held += inbound  # the journal is full: nothing is acknowledged
        elif inbound:
            self._ingest(inbound)
        else:
            with self.lock:
                effects, self._timer_effects = self._timer_effects, []
            self._emit(effects)
        for item in items:
            if isinstance(item, _LocalInput):
                self._local_input(item)
        self.outbox.flush(self._connected)

    def _ingest(self, batch: list[Inbound]) -> None:
        assert self.journal is not None and self.link is not None
        # The engine lock is held from journaling to feeding, so each message is journaled
        # with the very time the engine used for it, and a timer tick cannot fall between:
        # a restart's re-feed of the journal then gives exactly the live events.
        # Another group's wards ([shard]): acknowledged in order, never journaled or evaluated.
        ours = self.shard.admit(batch)
        with self.lock:
            times = []
            for m in batch:
                self._now = max(self._now, m.recv_time)  # time.time() can step back
                times.append(self._now)
            rows = [(t, m.topic, m.payload, m.qos)
                    for t, m, mine in zip(times, batch, ours, strict=True) if mine]  # fmt: skip
            try:
                ids = self.journal.append_messages(rows)  # durable on return
            except Exception as exc:
                if not is_full(exc):
                    raise  # any other failure: stop, acknowledging nothing
                self._journal_full(batch, exc)
                return
            if ids:  # fed below, under this same hold of the lock
                self._last_message_id = max(self._last_message_id, ids[-1])
            self.slots.release(len(batch))
            self._journal_lag = time.perf_counter() - min(m.arrived for m in batch)
            acked = stale = 0
            conn = self.link.conn
            up = self.link.connected.is_set()
            for m in batch:  # in arrival order
                if m.qos == 0:
                    continue
                if m.conn == conn and up and self.link.ack(m.mid, m.qos):
                    acked += 1
                else:
                    stale += 1  # an earlier connection's id: the broker redelivers it
            effects, self._timer_effects = self._timer_effects, []
            arrived: dict[int, float] = {}  # id(alarm event) -> its reading's arrival
            for t, m, mine in zip(times, batch, ours, strict=True):
                if not mine:
                    continue
                try:
                    effects += self.engine.advance(t)
                    stepped = self.engine.step(m.topic, m.payload, t)
                except Exception:  # an engine bug must not stop the ward's monitoring
                    self.stats.engine_errors += 1
                    self.log.error("engine_error", topic=m.topic[:200], exc_info=True)
                    continue
                effects += stepped
                for e in stepped:
                    if isinstance(e, AlarmEvent):
                        arrived[id(e)] = m.arrived
            self._arm()
            sanity = self.engine.take_sanity_changes()
            self._sanity_raised.update(w.code for what, w in sanity if what == "raised")
        self._log_sanity(sanity)
        self._readings_since_state = True
        self.changes.touch()  # any bed's output may have moved
        with self.metrics.lock:
            self.metrics.received += len(batch)
            self.metrics.journaled += len(rows)
            self.metrics.acked += acked
            self.metrics.stale_acks += stale
        self._emit(effects, arrived)
        done = time.perf_counter()
        with self.metrics.lock:
            for m in batch:
                self.metrics.latency.observe(done - m.arrived)

    def _log_sanity(self, changes: list[tuple[str, SanityWarning]]) -> None:
        """A meter's profile looks wrong (or looks right again): logged, never paged; the
        active ones are in /metrics (engine.sanity)."""
        for what, w in changes:
            log = self.log.warning if what == "raised" else self.log.info
            log(f"profile_sanity_{what}", device_id=w.device_id, profile=w.profile,
                code=w.code, key=w.key, detail=w.detail)  # fmt: skip

    def _connection(self, c: Connection) -> None:
        assert self.outbox is not None
        self._connected = c.up
        with self.metrics.lock:
            if c.up:
                self.metrics.connects += 1
            else:
                self.metrics.disconnects += 1
        if c.up:
            self._connected_at = self.clock()
            self.log.info("mqtt_connected", connection=c.conn, session_present=c.session_present,
                          waiting=len(self.outbox.waiting))  # fmt: skip
            self._last_status = None  # the broker may have lost the retained one
            self._publish_status()  # before the backlog: "degraded" while it goes out
        else:
            self.log.warning("mqtt_disconnected", connection=c.conn, reason=c.reason)

    def _confirm(self, confirmed: list[Published]) -> None:
        assert self.journal is not None and self.outbox is not None
        delivered: list[int] = []
        now = self.clock()
        for p in confirmed:
            msg = self.outbox.confirmed(p.mid)
            if msg is None:
                continue
            if not p.ok:
                self.log.error("publish_refused", topic=msg.topic, alarm_id=msg.alarm_id,
                               bed=bed_of(msg.alarm_id), reason=p.reason)  # fmt: skip
                if msg.alarm_id is not None:
                    self._publish_failed(msg, f"broker refused: {p.reason}")
                continue
            delivered += msg.event_ids
            if msg.alarm_id is not None:
                t_confirmed = time.perf_counter()
                with self.metrics.lock:
                    self.metrics.alarms_published += 1
                    for eid in msg.event_ids:
                        t_arrived = self._alarm_arrived.pop(eid, None)
                        if t_arrived is not None:
                            self.metrics.alarm_latency.observe(t_confirmed - t_arrived)
                if msg.overdue:
                    self.log.warning("alarm_delivered_late", alarm_id=msg.alarm_id,
                                     bed=bed_of(msg.alarm_id),
                                     after_s=round(now - msg.created, 1))  # fmt: skip
        try:
            self.journal.mark_delivered(delivered, now)
        except Exception as exc:  # a full disk: sent again after a restart, at worst
            if not is_full(exc):
                raise
            self._hold_journal(exc)

    def _finish(self) -> None:
        """At stop: send what is waiting, wait briefly for confirmations, say offline."""
        assert self.outbox is not None and self.journal is not None and self.link is not None
        if self.fenced:
            return  # not ours any more: what was received stays with the broker
        with self.lock:
            effects, self._timer_effects = self._timer_effects, []
        self._emit(effects)
        if self.cfg.recovery.snapshot_every_s:
            self._snapshot()  # the next start reads it and feeds nothing before it
        self._publish_states(force=True)
        status = offline_status(self.clock(), self._stop_reason, self.stats.started)
        self.outbox.put(Outgoing(self._topic("status"), status.to_bytes(), 1, True))
        self.outbox.flush(self._connected)
        deadline = time.monotonic() + STOP_CONFIRM_S
        # received messages still queued are left unacknowledged: the broker keeps them
        while self.outbox.in_flight and self._connected and time.monotonic() < deadline:
            try:
                item = self.control.get(timeout=0.05)
            except queue.Empty:
                continue
            if isinstance(item, Published):
                self._confirm([item])
            elif isinstance(item, Connection):
                self._connection(item)
        left = [m for m in self.outbox.waiting if m.event_ids] + [
            m for m in self.outbox.in_flight.values() if m.event_ids
        ]
        if left:
            self.log.warning("stopping_with_unconfirmed", events=len(left),
                             note="sent again at the next start")  # fmt: skip

    # --- snapshots: the next start loads the newest (daemon/recovery.py) --------------
    def _snapshot(self) -> None:
        """Journal the engine's state, with the newest message it has been fed. Taken only
        where every effect the engine has made is journaled (a snapshot must not hold an
        event the journal lacks: recovery would never find it again). Encoded under the
        engine lock (tens of ms for a ward), compressed after it, written by the worker,
        which owns the journal."""
        assert self.journal is not None
        self._next_snapshot = self._now + max(self.cfg.recovery.snapshot_every_s, 1.0)
        if self._held or self._held_effects or self.fenced:
            return
        started = time.perf_counter()
        with self.lock:
            if self._timer_effects:  # not journaled yet: at the next turn
                self._next_snapshot = self._now
                return
            at = (self._now, self._last_message_id)
            if at == self._snapshot_at or not math.isfinite(self._now):
                return  # nothing new since the last one
            try:
                extra = {BOARD_MARKS: self.marks.state()} if self._board_marks else None
                captured = snapshot.take_captured(self.engine, extra)
            except Exception:  # a state the walker cannot carry: restarts re-feed instead
                self.log.error("snapshot_failed", exc_info=True)
                return
        encoded = time.perf_counter() - started
        body = captured.pack()  # compressed with the engine free again
        try:
            self.journal.save_snapshot(at[0], at[1], body)
        except Fenced:
            raise
        except Exception as exc:
            if not is_full(exc):
                raise
            self.log.warning("snapshot_not_saved", error=str(exc)[:200])
            return
        self._snapshot_at = at
        self.log.info("snapshot_saved", bytes=len(body), message_id=at[1],
                      locked_ms=round(encoded * 1000, 1),
                      total_ms=round((time.perf_counter() - started) * 1000, 1))  # fmt: skip

    # --- a full journal: hold, say so, retry -----------------------------------------
    def _journal_full(self, batch: list[Inbound], exc: Exception) -> None:
        """Received messages that could not be journaled: kept in order, never
        acknowledged (the broker still has them should we stop), retried every
        journal.full_retry_s; new ones queue behind them until the slots run out."""
        self._held = batch + self._held
        self._hold_journal(exc)

    def _hold_journal(self, exc: Exception) -> None:
        self._next_retry = time.monotonic() + self.cfg.journal.full_retry_s
        if "journal_full" not in self.stats.technical:
            text = ("the journal cannot be written (disk or size cap full): nothing new is "
                    "acknowledged or evaluated until there is room")  # fmt: skip
            self.stats.technical["journal_full"] = _Technical("journal_full", text, self.clock())
            self.log.error("journal_full", error=str(exc), path=str(self.cfg.journal.path),
                           retry_s=self.cfg.journal.full_retry_s)  # fmt: skip

    def _retry_journal(self) -> None:
        """Effects first (they came first), then the held messages, a batch at a time."""
        while self._held_effects:
            effects, arrived = self._held_effects[0]
            if not self._emit(effects, arrived, retry=True):
                return
            self._held_effects.pop(0)
        while self._held:
            batch = self._held[: self.batch_max]
            del self._held[: self.batch_max]
            self._ingest(batch)
            if self._held_effects or (self._held and self._held[0] is batch[0]):
                return  # still full
        if "journal_full" in self.stats.technical:
            del self.stats.technical["journal_full"]
            self.log.info("journal_writable_again")

    # --- effects → journal → outbox ----------------------------------------------------
    def _emit(
        self,
        effects: list[Effect],
        arrived: dict[int, float] | None = None,
        retry: bool = False,
    ) -> bool:
        """Journal the effects, then publish them; False if the journal is full (they are
        held, in order, and published once journaled)."""
        if not effects:
            return True
        assert self.journal is not None and self.outbox is not None
        if self._held_effects and not retry:
            self._held_effects.append((effects, arrived))
            return False
        rows = [journal_row(e) for e in effects]
        try:
            ids = self.journal.append_events(rows)  # journaled before it is published
        except Exception as exc:
            if not is_full(exc):
                raise
            if not retry:
                self._held_effects.append((effects, arrived))
            self._hold_journal(exc)
            return False
        if self.notifier is not None:
            self.notifier.wake()  # it pages from the journal
        now = self.clock()
        for e, event_id in zip(effects, ids, strict=True):
            if isinstance(e, AlarmEvent):
                self._alarm(e, event_id, now)
                if arrived and id(e) in arrived and len(self._alarm_arrived) < ALARM_LATENCY_KEPT:
                    self._alarm_arrived[event_id] = arrived[id(e)]
            elif isinstance(e, AdviceIssued):
                body = self._body(AdviceMessage, e)
                topic = self._topic("advice", e.ward, e.bed)
                self.outbox.put(Outgoing(topic, body, 1, False, [event_id], None, now))
                b = self._bed(e.bed)
                b.latest_advice = {k: v for k, v in json.loads(body).items() if k != "caution"}
                b.dirty = b.urgent = True
                self.changes.touch(e.bed)
            elif isinstance(e, RejectedInput):
                with self.metrics.lock:
                    self.metrics.rejected[str(e.reason)] += 1
                self.log.info("input_rejected", topic=e.topic[:200], device_id=e.device_id,
                              reason=str(e.reason), detail=e.detail[:200])  # fmt: skip
                if self._connected:  # diagnostics: not kept for a reconnect (journal has it)
                    body = self._body(RejectedMessage, e)
                    self.outbox.put(
                        Outgoing(self._topic("rejected"), body, 0, False, [], None, now)
                    )
            elif isinstance(e, Notice):
                self.log.info("bed_notice", bed=e.bed, ward=e.ward, code=e.code, text=e.text)
                self._bed(e.bed).dirty = True
                self.changes.touch(e.bed)
        return True

    def _alarm(self, e: AlarmEvent, event_id: int, now: float) -> None:
        assert self.outbox is not None
        body = self._body(AlarmMessage, e)
        topic = self._topic("alarms", e.ward, e.bed)
        self.outbox.put(Outgoing(topic, body, 1, False, [event_id], e.alarm_id, now))
        with self.metrics.lock:
            self.metrics.alarms[(e.rule, str(e.state))] += 1
        self.log.info(
            "alarm_event", alarm_id=e.alarm_id, bed=e.bed, ward=e.ward, rule=e.rule,
            state=str(e.state), reason=e.reason, priority=str(e.priority), tier=e.tier,
            notify=list(e.notify), time=iso(e.time),
        )  # fmt: skip
        b = self._bed(e.bed)
        b.dirty = b.urgent = True
        self.changes.touch(e.bed)

    def _body(self, model: type[OutboundOf], e: Any) -> bytes:
        """The message's bytes from its model. Should the engine's output ever not fit the
        model, the page still goes out (as the engine's own JSON) and the log says why."""
        try:
            return model.of(e).to_bytes()
        except ValidationError as exc:
            self.stats.engine_errors += 1
            self.log.error("message_model_mismatch", model=model.__name__,
                           error=str(exc).splitlines()[0][:200])  # fmt: skip
            return json.dumps({"schema": SCHEMA} | e.to_json()).encode()

    def _publish_failed(self, msg: Outgoing, why: str) -> None:
        assert self.journal is not None
        now = self.clock()
        body: dict[str, object] = {"alarm_id": msg.alarm_id, "topic": msg.topic, "reason": why,
                                   "raised": iso(msg.created), "time": iso(now)}  # fmt: skip
        try:
            self.journal.append_events([(now, "publish_failed", None, msg.alarm_id, body)])
        except Exception as exc:
            if not is_full(exc):
                raise
            self._hold_journal(exc)  # the log line below still says it
        with self.metrics.lock:
            self.metrics.publish_failures += 1
        self.log.error("alarm_not_delivered", alarm_id=msg.alarm_id, bed=bed_of(msg.alarm_id),
                       reason=why, waited_s=round(now - msg.created, 1))  # fmt: skip
        key = f"alarm_not_delivered:{msg.alarm_id}"
        self.stats.technical.setdefault(
            key, _Technical("alarm_not_delivered",
                            f"alarm event not confirmed by the broker: {why}", now, msg.alarm_id)
        )  # fmt: skip

    # --- housekeeping: timeouts, retained state, status ------------------------------
    def _housekeeping(self) -> None:
        assert self.outbox is not None and self.journal is not None
        now = self.clock()
        for msg in self.outbox.newly_overdue(now):
            self._publish_failed(
                msg, f"not confirmed within {self.cfg.publish.confirm_timeout_s:g} s"
                + ("" if self._connected else " (broker unreachable)"),
            )  # fmt: skip
        if self.stats.technical and self.outbox.overdue_count() == 0:
            unconfirmed = {m.alarm_id for m in self.outbox.in_flight.values() if m.alarm_id}
            unconfirmed |= {m.alarm_id for m in self.outbox.waiting if m.alarm_id}
            for key, tech in list(self.stats.technical.items()):
                if tech.code == "alarm_not_delivered" and tech.alarm_id not in unconfirmed:
                    del self.stats.technical[key]
                    self.log.info("technical_alarm_cleared", code=tech.code,
                                  alarm_id=tech.alarm_id, bed=bed_of(tech.alarm_id))  # fmt: skip
        self._backlog_alarm()
        self._publish_states(force=False)
        self._publish_status()
        self.outbox.flush(self._connected)
        self._prune()
        try:  # at most once a second; the journal never checkpoints inside a commit
            self.journal.checkpoint()
        except Exception:  # the WAL just grows a little longer: try again next time
            self.log.error("journal_checkpoint_failed", exc_info=True)

    def _backlog_alarm(self) -> None:
        """Behind (a backlog or a journal lag past its limit): a technical condition of
        the service, in its retained status, until it has caught up."""
        why = self.degraded_because()
        tech = self.stats.technical
        if why and "inbound_backlog" not in tech:
            text = "the service is behind its inbound messages: " + ", ".join(why)
            tech["inbound_backlog"] = _Technical("inbound_backlog", text, self.clock())
            self.log.warning("inbound_backlog", backlog=self.backlog(),
                             journal_lag_s=round(self._journal_lag, 3))  # fmt: skip
        elif not why and "inbound_backlog" in tech:
            del tech["inbound_backlog"]
            self.log.info("inbound_backlog_cleared")

    def _publish_states(self, force: bool) -> None:
        assert self.outbox is not None
        now = self.clock()
        if self._readings_since_state:
            self._readings_since_state = False
            for bed_id in list(self.engine.beds):
                self._bed(bed_id).dirty = True
        every = self.cfg.publish.state_interval_s
        for bed_id, b in self._beds.items():
            if not b.dirty or not (force or b.urgent or now - b.last_state >= every):
                continue
            with self.lock:
                built = self._state(bed_id, now)
            b.dirty = b.urgent = False
            if built is None:
                continue
            ward_level, msg = built
            content = msg.model_copy(update={"time": ""}).to_bytes()
            if content == b.last_content and ward_level == b.ward_level:
                continue  # nothing new for this bed
            if b.ward_level is not None and b.ward_level != ward_level:
                # the bed moved ward: clear the retained state under the old one
                old = self._topic("state", b.ward_level, bed_id, raw=True)
                self.outbox.put(Outgoing(old, b"", 1, True))
            topic = self._topic("state", ward_level, bed_id, raw=True)
            self.outbox.put(Outgoing(topic, msg.to_bytes(), 1, True))
            b.ward_level, b.last_state, b.last_content = ward_level, now, content

    def _state(self, bed_id: str, now: float) -> tuple[str, StateMessage] | None:
        """The bed's retained state (called under the engine lock)."""
        bed = self.engine.beds.get(bed_id)
        if bed is None:
            return None
        series = bed.series
        latest = series.latest_minute()

        def window(minutes: int) -> OutputWindow | None:
            if latest is None:
                return None
            s = series.sums(latest - minutes + 1, latest + 1)
            return OutputWindow(minutes=minutes, volume_ml=round(s.volume_ml, 1),
                                measured_fraction=round(s.measured_min / minutes, 3),
                                estimated_fraction=round(s.estimated_min / minutes, 3))  # fmt: skip

        last_hour: dict[str, Any] | None = None
        if series.latest_time is not None and series.first_minute is not None:
            end_hour = math.floor(series.latest_time / 3600.0)
            start = (end_hour - 1) * 60
            if start >= (series.first_minute // 60) * 60:
                s = series.sums(start, start + 60)
                last_hour = {"hour_start": iso(start * 60.0), "volume_ml": round(s.volume_ml, 1),
                             "measured_fraction": round(s.measured_min / 60, 3)}  # fmt: skip
        quality: dict[str, dict[str, Any]] = {}
        for dev_id in bed.context.device_ids:
            dev = self.engine.devices.get(dev_id)
            if dev is not None and dev.bed == bed_id:
                quality[dev_id] = dev.quality.to_dict()
        alarms = [
            ActiveAlarm(
                alarm_id=a.alarm_id, rule=a.rule, title=a.title, priority=str(a.priority),
                kind=str(a.kind), state=str(a.state), tier=a.tier, onset=iso(a.onset),
                condition_present=a.condition_present, suppressed_by=a.suppressed_by,
                ack_by=a.ack_by, ack_role=a.ack_role,
                ack_until=iso(a.ack_until) if a.ack_until is not None else None,
                summary=a.summary,
            )
            for a in self.engine.book.active(bed_id)
        ]  # fmt: skip
        b = self._bed(bed_id)
        msg = StateMessage(
            time=iso(now), bed=bed_id, ward=bed.context.ward,
            latest_reading=iso(series.latest_time) if series.latest_time is not None else None,
            active_alarms=alarms, output_60min=window(60), output_24h=window(1440),
            last_completed_hour=last_hour, latest_advice=b.latest_advice,
            notices=sorted(bed.notices), data_quality=quality,
        )  # fmt: skip
        return topic_level(bed.context.ward), msg

    def _delivery(self) -> str:
        assert self.outbox is not None
        if not self._connected or self.outbox.overdue_count():
            return "degraded"
        since = self._connected_at
        if any(m.alarm_id and m.created < since for m in self.outbox.unconfirmed()):
            return "degraded"  # alarms held during the outage are still going out
        return "ok"

    def _publish_status(self) -> None:
        assert self.outbox is not None
        if not self._connected:
            return
        delivery = self._delivery()
        tech = sorted(list(self.stats.technical.values()) + self._notify_technical(),
                      key=lambda t: (t.since, t.code))  # fmt: skip
        key = (delivery, tuple((t.code, t.alarm_id) for t in tech))
        if key == self._last_status:
            return
        self._last_status = key
        status = StatusMessage(
            status="online" if delivery == "ok" and not tech else "degraded",
            time=iso(self.clock()), started=iso(self.stats.started), delivery=delivery,
            technical_alarms=[TechnicalAlarm(code=t.code, text=t.text, since=iso(t.since),
                                             alarm_id=t.alarm_id) for t in tech],
        )  # fmt: skip
        self.outbox.put(Outgoing(self._topic("status"), status.to_bytes(), 1, True), first=True)
        self.log.info("status", status=status.status, delivery=delivery,
                      technical_alarms=len(tech))  # fmt: skip

    # --- timer ----------------------------------------------------------------------
    def _arm(self) -> None:
        """Re-arm the one wake-up job to the engine's next wake-up (under the lock)."""
        nxt = self.engine.next_wakeup()
        armed = self._armed
        if nxt is None or not self.scheduler.running or (armed is not None and armed <= nxt):
            # An armed job that fires before the next wake-up finds nothing due and re-arms:
            # far cheaper than re-arming the scheduler after every message.
            return
        self._armed = nxt
        # the service clock may be a test's fake one or the demo's fast one
        delay = max(0.0, nxt - self.clock()) / self.clock_rate
        run_at = datetime.now(UTC) + timedelta(seconds=delay)
        self.scheduler.add_job(
            self.timer_fired, DateTrigger(run_date=run_at, timezone=UTC), id=JOB_ID,
            replace_existing=True, coalesce=True, max_instances=1, misfire_grace_time=None,
        )  # fmt: skip

    def timer_fired(self) -> None:
        """The job: run the engine's clock to now and hand the effects to the worker."""
        with self.lock:
            t = max(self._now, self.clock())
            self._now = t
            try:
                self._timer_effects += self.engine.advance(t)
            except Exception:
                self.stats.engine_errors += 1
                self.log.error("engine_error", where="advance", exc_info=True)
            self._armed = None
            self._arm()
        self.queue.put(_WAKE)

    # --- pruning: one small batch at a time, between ingest batches ------------------
    def _prune(self) -> None:
        """Retention: a batch of at most PRUNE_BATCH rows per call (a few ms), then again
        soon while there is more, else in PRUNE_EVERY_S. Done by the worker itself, so the
        journal keeps one connection per process (see `start`)."""
        if time.monotonic() < self._next_prune:
            return
        assert self.journal is not None
        try:
            n = self.journal.prune(self.clock(), batch=PRUNE_BATCH, pause_s=0, max_batches=2)
        except Exception:  # e.g. the disk is busy: ingest matters more, try later
            self.log.error("journal_prune_failed", exc_info=True)
            n = 0
        if n:
            self.log.info("journal_pruned", rows=n, retention_days=self.cfg.journal.retention_days)
        self._next_prune = time.monotonic() + (1.0 if n >= PRUNE_BATCH else PRUNE_EVERY_S)

    # --- helpers ----------------------------------------------------------------------
    def _topic(self, kind: str, ward: str | None = None, bed: str | None = None,
               raw: bool = False) -> str:  # fmt: skip
        parts = [self.prefix, kind]
        if ward is not None:
            parts.append(ward if raw else topic_level(ward))
        if bed is not None:
            parts.append(bed if raw else topic_level(bed))
        return "/".join(parts)

    def _bed(self, bed_id: str) -> _Bed:
        b = self._beds.get(bed_id)
        if b is None:
            b = self._beds[bed_id] = _Bed()
        return b

    @property
    def connected(self) -> bool:
        return self._connected

    def backlog(self) -> int:
        """Received messages not yet journaled: queued, or held by a full journal."""
        return self.queue.qsize() + len(self._held)

    def degraded_because(self) -> list[str]:
        lim = self.cfg.limits
        why = []
        if self.backlog() > lim.degraded_backlog:
            why.append(f"backlog over {lim.degraded_backlog} messages")
        if self._journal_lag > lim.degraded_lag_s:
            why.append(f"journal lag over {lim.degraded_lag_s:g} s")
        return why

    def health_report(self) -> tuple[bool, dict[str, Any]]:
        """200 "ok"; 200 "degraded" (working, but behind: a backlog or a journal lag past
        its limit); 503 "unhealthy" (worker dead, broker lost, or journal full)."""
        alive = self._worker is not None and self._worker.is_alive() and self.failed is None
        full = bool(self._held or self._held_effects)
        ok = alive and self._connected and not full
        degraded = self.degraded_because()
        outbox = self.outbox
        body: dict[str, Any] = {
            "status": ("degraded" if degraded else "ok") if ok else "unhealthy",
            "role": "active",  # a service without a group is always its own active (ha.py)
            "connected": self._connected,
            "worker_alive": alive,
            "worker_error": self.failed,
            "broker_error": self.link.last_error if self.link else None,
            "queue_depth": self.queue.qsize(),
            "backlog": self.backlog(),
            "journal_lag_s": round(self._journal_lag, 3),
            "journal_full": full,
            "degraded": degraded,
            "outbox": len(outbox) if outbox else 0,
            "delivery": self._delivery() if outbox is not None else "unknown",
            "technical_alarms": [
                {"code": t.code, "alarm_id": t.alarm_id, "since": iso(t.since)}
                for t in list(self.stats.technical.values())  # the worker may change it
            ]
            + [
                {"code": t.code, "alarm_id": t.alarm_id, "since": iso(t.since)}
                for t in self._notify_technical()
            ],
            "caution": CAUTION,
        }
        if self.notifier is not None:
            body["notify"] = self.notifier.health()
        return ok, body

    def render_metrics(self) -> str:
        outbox = self.outbox
        size = 0
        path = self.cfg.journal.path
        journal = self.journal
        if journal is not None:
            with contextlib.suppress(Exception):  # a scrape must not fail on the journal
                size = journal.size_bytes()
        else:
            for p in (path, path.with_name(path.name + "-wal")):
                with contextlib.suppress(OSError):
                    size += p.stat().st_size
        link = self.link
        gauges = {
            "queue_depth": float(self.queue.qsize()),
            "backlog": float(self.backlog()),
            "journal_lag_seconds": self._journal_lag,
            "journal_full": 1.0 if (self._held or self._held_effects) else 0.0,
            "payloads_too_large": float(link.oversize if link else 0),
            "inbound_full_waits": float(link.full_waits if link else 0),
            "outbox_depth": float(len(outbox) if outbox else 0),
            "connected": 1.0 if self._connected else 0.0,
            "journal_bytes": float(size),
            "engine_errors": float(self.stats.engine_errors),
            "technical_alarms": float(len(self.stats.technical)),
            "shard_ignored": float(self.shard.ignored),
        }
        labelled: list[tuple[str, dict[str, str], float]] = []
        with self.lock:  # engine counters: read under the engine lock
            dups: dict[str, int] = {}
            for dev in self.engine.devices.values():
                n = dev.quality.counts.get(Outcome.DUPLICATE, 0)
                if n:
                    prof = dev.decoder.profile.name
                    dups[prof] = dups.get(prof, 0) + n
            # meters whose profile looks wrong now; warnings raised since the start, by sign
            gauges["profile_sanity_warnings"] = float(len(self.engine.sanity_warnings()))
            raised = sorted(self._sanity_raised.items())
        for prof, n in sorted(dups.items()):
            labelled.append(("duplicates_total", {"profile": prof}, float(n)))
        for code, n in raised:
            labelled.append(("profile_sanity_warnings_total", {"code": code}, float(n)))
        families = self.metrics.families(gauges, labelled)
        if self.notifier is not None:
            families += self.notifier.metric_families()
        return exposition(families)

    # --- paging channels (daemon/notify) -----------------------------------------------
    def _notify_technical(self) -> list[_Technical]:
        if self.notifier is None:
            return []
        return [_Technical(t.code, t.text, t.since, t.alarm_id) for t in self.notifier.technical()]

    def _web_server(self) -> WebServer:
        """The one HTTP application (daemon/web) on health.listen and board.listen."""
        from .web.app import build_app
        from .web.server import WebServer
        from .web.site import BoardData, Site
        from .web.users import UserStore

        cfg = self.cfg
        board = None
        if cfg.board.listen:
            board = BoardData(
                engine=self.engine, lock=self.lock, clock=self.clock,
                timezone=zone_info(cfg.timezone), latest_advice=self.latest_advice,
                bed_events=self.bed_events, acknowledge=self.acknowledge_from_board,
                users=UserStore(cfg.board.users_file), settings=cfg.board, marks=self.marks,
                changes=self.changes, journal=cfg.journal.url or str(cfg.journal.path),
                service_state=self.health_report,
            )  # fmt: skip
        site = Site(self.health_report, self.render_metrics,
                    lambda: self.notifier.ack_links if self.notifier is not None else None,
                    board)  # fmt: skip
        addresses = {}
        for key, listen in (("health", cfg.health.listen), ("board", cfg.board.listen)):
            if listen:
                host, port = split_address(listen, allow_zero=True)
                addresses[key] = (host, port)
        try:
            return WebServer(build_app(site), addresses)
        except OSError as exc:
            key = next((k for k in addresses if _taken(addresses[k])), next(iter(addresses)))
            host, port = addresses[key]
            raise UserError(f"{key}.listen: cannot listen on {host}:{port}: "
                            f"{exc.strerror or exc}") from None  # fmt: skip

    def latest_advice(self, bed: str) -> dict[str, Any] | None:
        b = self._beds.get(bed)
        return None if b is None else b.latest_advice

    def bed_events(self, bed: str, since: float) -> list[StoredEvent]:
        """The bed's journaled events since `since` (a read-only connection of its own)."""
        journal = self.journal
        if journal is None:
            return []
        try:
            return list(journal.events_between(since, None, bed))
        except Exception:  # the board shows less; the service goes on
            self.log.error("board_journal_read_failed", bed=bed, exc_info=True)
            return []

    def acknowledge_from_board(self, alarm_id: str, user: str, role: str) -> AckOutcome:
        """An acknowledgement by a user logged in on the board: on the user's own
        acknowledgement topic, exactly as if the user had sent it over MQTT."""
        payload = json.dumps({"alarm_id": alarm_id, "role": role}).encode()
        return self._acknowledge(f"{self._topic('ack')}/{user}", payload, alarm_id, user, role,
                                 "ack_board")  # fmt: skip

    def acknowledge_from_link(self, alarm_id: str, by: str, role: str) -> AckOutcome:
        """An acknowledgement from a page's link, through the worker like an MQTT one:
        journaled as a message on the acknowledgement topic (who and role in it), fed to
        the engine, published. Waits for the engine's answer."""
        payload = json.dumps({"alarm_id": alarm_id, "by": by, "role": role}).encode()
        return self._acknowledge(self._topic("ack"), payload, alarm_id, by, role, "ack_link_used")

    def _acknowledge(self, topic: str, payload: bytes, alarm_id: str, by: str, role: str,
                     event: str) -> AckOutcome:  # fmt: skip
        if self._worker is None or not self._worker.is_alive() or self._stopping.is_set():
            return AckOutcome(False, "the service is not running; acknowledge another way")
        item = _LocalInput(topic, payload)
        self.queue.put(item)
        if not item.done.wait(LOCAL_ACK_WAIT_S):
            return AckOutcome(False, "the service did not answer in time; check the alarm "
                              "before acknowledging again")  # fmt: skip
        outcome = AckOutcome(False, item.error or "not acknowledged: the alarm is not open")
        for e in item.effects:
            if isinstance(e, AlarmEvent) and e.alarm_id == alarm_id and e.by == by:
                outcome = AckOutcome(True, f"{e.state}: {e.reason}")
                break
            if isinstance(e, RejectedInput):
                outcome = AckOutcome(False, f"not acknowledged ({e.reason}): the alarm may "
                                     "have ended or been acknowledged already")  # fmt: skip
                break
        self.log.info(event, alarm_id=alarm_id, bed=bed_of(alarm_id), by=by,
                      role=role, acknowledged=outcome.ok, detail=outcome.text)  # fmt: skip
        return outcome

    def _local_input(self, item: _LocalInput) -> None:
        """As `_ingest` for one message that needs no broker acknowledgement."""
        assert self.journal is not None
        try:
            with self.lock:
                self._now = t = max(self._now, self.clock())
                ids = self.journal.append_messages([(t, item.topic, item.payload, 0)])
                self._last_message_id = max(self._last_message_id, *ids)
                effects, self._timer_effects = self._timer_effects, []
                try:
                    effects += self.engine.advance(t)
                    stepped = self.engine.step(item.topic, item.payload, t)
                except Exception:
                    self.stats.engine_errors += 1
                    self.log.error("engine_error", topic=item.topic[:200], exc_info=True)
                    stepped = []
                    item.error = "the engine failed on it (logged)"
                effects += stepped
                self._arm()
            with self.metrics.lock:
                self.metrics.journaled += 1
            self._emit(effects)
            item.effects = stepped
        finally:
            item.done.set()
