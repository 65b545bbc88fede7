"""The notifier: takes journaled alarm events to people over the configured channels.

Threads (all daemon threads, stopped by `stop`):
- the dispatcher follows the journal (events after the outbox cursor), turns each event
  with roles to notify into deliveries, one per recipient (store.enqueue, one transaction
  with the cursor), and checks the channels' failure bound;
- one sender thread per channel claims its due deliveries, sends them, and records the
  answer: confirmed, or retried with backoff until the give-up time.

A channel that keeps failing (fail_after_attempts failed attempts in a row, or
fail_after_s since its first failure, whichever is first) raises a technical alarm of the
service: journaled as an event of kind "notify_alarm", paged to the roles routed on that
channel (and `technical_roles`) over their routes on the OTHER channels, listed in /health,
/metrics and the retained status. It is resolved (journaled and paged the same way) when
the channel confirms a page again, or, with nothing waiting, answers a probe.
It is a condition of the service, not of a bed, so it stays out of the engine's alarm book:
replay of the journal's messages gives the engine's alarms only, and the journal keeps
these events beside them. A restart finds an open one in the journal and does not raise it
again; its pages are deliveries like any other, so nobody is paged twice for it.
"""

from __future__ import annotations

import functools
import threading
import time
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from prometheus_client.metrics_core import CounterMetricFamily, GaugeMetricFamily, Metric
from pydantic import ValidationError

from ..engine.alarms import (
    ALARM_CAUTION,
    PAGER_CAUTION,
    PAGER_MAX,
    STATE_WORDS,
    State,
    ascii_text,
    shorten,
)
from ..engine.timefmt import iso
from ..errors import UserError
from ..health import Histogram, exposition
from ..journal_api import PgUrl
from ..messages import SCHEMA, AlarmMessage
from . import acklinks
from .channels import Sender, sender_for
from .channels.hl7 import StatusListener, StatusReport
from .pages import Answer, Page
from .settings import Hl7Channel, NotifyConfig, Route, Secrets
from .store import Delivery, DeliveryStore, JournaledEvent, NewDelivery, SqliteDeliveryStore

ENDED = frozenset({"acknowledged", "resolved", "inactive"})  # nothing left to page
BATCH = 20  # deliveries claimed per round by one channel
FOLLOW_EVERY_S = 0.25  # the dispatcher looks at the journal at least this often
IDLE_WAIT_S = 1.0
PRUNE_EVERY_S = 3600.0
TECH_PAGER_MAX = PAGER_MAX  # a failing channel's page: what failed, how, and the caution
TECH_CAUTION = PAGER_CAUTION  # the same short caution as every pager line
DELIVERY_BUCKETS = (0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 60.0, 300.0, 1800.0)


@dataclass
class ChannelState:
    name: str
    kind: str
    failures: int = 0  # failed attempts in a row
    failing_since: float | None = None  # start of the first failed attempt since a success
    in_flight_since: float | None = None  # an attempt is under way since
    last_ok: float | None = None
    last_error: str | None = None
    last_error_at: float | None = None
    alarm_id: str | None = None  # the open failing-channel alarm
    alarm_since: float | None = None
    next_probe: float = 0.0


@dataclass(frozen=True)
class TechnicalCondition:
    code: str
    text: str
    since: float
    alarm_id: str


def _route_key(r: Route) -> tuple[str, str]:
    return (r.role, r.channel)


class Notifier:
    def __init__(
        self,
        cfg: NotifyConfig,
        secrets: Secrets,
        journal_path: Path | PgUrl,
        *,
        clock: Callable[[], float] = time.time,
        log: Any = None,
        store_factory: Callable[[Any], DeliveryStore] = SqliteDeliveryStore,
    ) -> None:
        self.cfg = cfg
        self.clock = clock
        self.log = log
        self._path = journal_path
        self._store_factory = store_factory
        self.store: DeliveryStore | None = None
        self.senders: dict[str, Sender] = {
            c.name: sender_for(c, secrets.channel.get(c.name)) for c in cfg.channels
        }
        self.ack_key = secrets.ack_key
        self.states = {c.name: ChannelState(c.name, c.kind) for c in cfg.channels}
        self.counts: Counter[tuple[str, str]] = Counter()  # (channel, outcome)
        self.latency = Histogram(DELIVERY_BUCKETS)  # event time to confirmation
        self.lock = threading.Lock()  # states, counts, latency
        self._alarm_lock = threading.Lock()  # raising or resolving a failing-channel alarm
        self._stop = threading.Event()
        self._wake = threading.Event()
        self._channel_wake = {name: threading.Event() for name in self.senders}
        self._threads: list[threading.Thread] = []
        self._next_prune = 0.0
        self.ack_links: acklinks.AckLinks | None = None
        self.status_listeners: list[StatusListener] = []
        self._submit: acklinks.Submit | None = None

    # --- lifecycle ---------------------------------------------------------------------
    def start(self, submit_ack: acklinks.Submit | None = None) -> None:
        """Open the outbox (before the service journals anything new, so that events
        from the downtime are paged), restore open channel alarms, start the threads."""
        self.store = store = self._store_factory(self._path)
        for name, ev in store.latest_notify_alarms().items():
            if ev.body.get("state") != "active":
                continue
            st = self.states.get(name)
            if st is None:  # the channel is no longer configured: its alarm ends
                self._journal_alarm_event(name, str(ev.body.get("channel_kind", "")), ev,
                                          "resolved", "channel_removed", self.clock())  # fmt: skip
                continue
            st.alarm_id, st.alarm_since = ev.alarm_id, ev.time
        if self.ack_key is not None and self.cfg.ack_base_url and submit_ack is not None:
            self.ack_links = acklinks.AckLinks(self.ack_key, store, submit_ack, self.clock)
        self._submit = submit_ack
        if submit_ack is not None:
            self._listen_for_status()
        self._threads = [threading.Thread(target=self._dispatch, name="hourwatch-notify",
                                          daemon=True)]  # fmt: skip
        for name in self.senders:
            self._threads.append(threading.Thread(
                target=self._send_loop, args=(name,), name=f"hourwatch-notify-{name}",
                daemon=True))  # fmt: skip
        for t in self._threads:
            t.start()

    def _listen_for_status(self) -> None:
        for i, c in enumerate(self.cfg.channels):
            if not isinstance(c, Hl7Channel) or c.status_listen is None:
                continue
            host, _, port = c.status_listen.rpartition(":")
            try:
                listener = StatusListener(c, host.strip("[]"), int(port),
                                          functools.partial(self.on_status, c), self.clock,
                                          self.log)  # fmt: skip
            except OSError as exc:
                for other in self.status_listeners:
                    other.stop()
                raise UserError(f"notify.channels.{i}.status_listen: cannot listen on "
                                f"{c.status_listen}: {exc.strerror or exc}") from None  # fmt: skip
            listener.start()
            self.status_listeners.append(listener)
            self._log("info", "hl7_status_listening", channel=c.name,
                      address=f"{listener.address[0]}:{listener.address[1]}")  # fmt: skip

    def on_status(self, cfg: Hl7Channel, r: StatusReport) -> tuple[str, str]:
        """A status report from the alert manager: AA, or AE with the reason. A status in
        `ack_statuses` acknowledges the alarm as the role its page to that recipient went
        to, through the engine like any acknowledgement."""
        self._log("info", "hl7_status", channel=cfg.name, alarm_id=r.alarm_id, status=r.status,
                  by=r.by, recipient=r.recipient)  # fmt: skip
        if r.status.lower() not in {x.lower() for x in cfg.ack_statuses}:
            return "AA", ""
        store, submit = self.store, self._submit
        if store is None or submit is None:
            return "AE", "not running"
        sent = [d for d in store.deliveries(r.alarm_id) if d.channel == cfg.name
                and d.status == "confirmed" and r.recipient in (None, d.recipient)]  # fmt: skip
        if not sent:
            return "AE", "no page of this alarm went to that recipient over this channel"
        page = sent[-1]
        outcome = submit(r.alarm_id, (r.by or page.recipient)[: acklinks.BY_MAX], page.role)
        return ("AA", "") if outcome.ok else ("AE", outcome.text)

    def stop(self, wait_s: float = 5.0) -> None:
        for listener in self.status_listeners:
            listener.stop()
        self.status_listeners = []
        self._stop.set()
        self._wake.set()
        for ev in self._channel_wake.values():
            ev.set()
        deadline = time.monotonic() + wait_s
        for t in self._threads:
            t.join(max(0.0, deadline - time.monotonic()))
        if self.store is not None and not any(t.is_alive() for t in self._threads):
            self.store.close()
            self.store = None

    def wake(self) -> None:
        """New events were journaled: look now rather than at the next poll."""
        self._wake.set()

    # --- the dispatcher ---------------------------------------------------------------
    def _dispatch(self) -> None:
        while not self._stop.is_set():
            self._wake.wait(FOLLOW_EVERY_S)
            self._wake.clear()
            if self._stop.is_set():
                return
            try:
                self.follow()
                self.check_channels()
                self._housekeeping()
            except Exception:  # the journal is busy or broken: log, try again
                self._log("error", "notify_dispatch_failed", exc_info=True)
                self._stop.wait(1.0)

    def follow(self) -> int:
        """Queue deliveries for every journaled event past the cursor; returns how many."""
        store = self.store
        assert store is not None
        added = 0
        cursor = store.cursor()
        while True:
            events = store.events_after(cursor, 200)
            if not events:
                return added
            now = self.clock()
            new: list[NewDelivery] = []
            ended: list[str] = []
            for ev in events:
                if ev.kind == "alarm" and str(ev.body.get("state")) in ENDED and ev.alarm_id:
                    ended.append(ev.alarm_id)
                new += self._deliveries_for(ev, now)
            added += store.enqueue(events[-1].id, new, ended, now)
            cursor = events[-1].id
            for ch in {d.channel for d in new}:
                self._channel_wake[ch].set()

    def routes_for(self, role: str, ward: str | None, exclude: str | None = None) -> list[Route]:
        return [r for r in self.cfg.routes
                if r.role == role and r.channel != exclude
                and (r.ward is None or ward is None or r.ward == ward)]  # fmt: skip

    def _deliveries_for(self, ev: JournaledEvent, now: float) -> list[NewDelivery]:
        b = ev.body
        roles = b.get("notify") or []
        if not isinstance(roles, list) or not ev.alarm_id:
            return []
        if ev.kind == "alarm":
            ward, exclude = b.get("ward"), None
        else:  # a failing-channel alarm concerns every ward; never over its own channel
            ward, exclude = None, str(b.get("channel"))
        old = now - ev.time > self.cfg.give_up_after_s
        out: list[NewDelivery] = []
        for role in roles:
            for r in self.routes_for(str(role), str(ward) if ward else None, exclude):
                for to in r.to:
                    out.append(NewDelivery(
                        ev.id, ev.alarm_id, str(b.get("state")), int(b.get("tier", 0) or 0),
                        str(b.get("reason", "")), ev.time, r.channel, to, str(role), old,
                    ))  # fmt: skip
        return out

    def _housekeeping(self) -> None:
        store = self.store
        assert store is not None
        now = self.clock()
        for d in store.expire_old(now, now - self.cfg.give_up_after_s):
            with self.lock:
                self.counts[(d.channel, "expired")] += 1
            self._log("error", "page_given_up", alarm_id=d.alarm_id, channel=d.channel,
                      recipient=d.recipient, attempts=d.attempts, answer=d.answer)  # fmt: skip
        if time.monotonic() >= self._next_prune:
            self._next_prune = time.monotonic() + PRUNE_EVERY_S
            n = store.prune(now - max(7 * 86400.0, 2 * self.cfg.give_up_after_s))
            if n:
                self._log("info", "notify_pruned", rows=n)

    # --- the failure bound and the failing-channel alarm -------------------------------
    def check_channels(self) -> None:
        """Raise a failing channel's alarm once. The dispatcher and the channel's own sender
        both call this: the check, the journaling and the marking are one step under
        `_alarm_lock` (two threads once both raised it), and a resolve waits for it."""
        now = self.clock()
        for st in self.states.values():
            with self._alarm_lock:
                self._check_channel(st, now)

    def _check_channel(self, st: ChannelState, now: float) -> None:
        with self.lock:
            since = st.failing_since if st.failing_since is not None else None
            if st.in_flight_since is not None and st.failures:
                since = min(since or now, st.in_flight_since)
            due = (
                st.alarm_id is None
                and since is not None
                and (
                    st.failures >= self.cfg.fail_after_attempts
                    or now - since >= self.cfg.fail_after_s
                )
            )
        if due:
            self._raise(st, now)

    def _raise(self, st: ChannelState, now: float) -> None:
        roles = sorted({r.role for r in self.cfg.routes if r.channel == st.name}
                       | set(self.cfg.technical_roles))  # fmt: skip
        alarm_id = f"notify/{st.name}/{time.strftime('%Y%m%dT%H%M%SZ', time.gmtime(now))}"
        since = st.failing_since if st.failing_since is not None else now
        reach = [r for role in roles for r in self.routes_for(role, None, st.name)]
        others = sorted({r.channel for r in reach})
        summary = (f"paging channel {st.name} ({st.kind}) failing: {st.failures} failed "
                   f"attempt(s) since {time.strftime('%H:%M UTC', time.gmtime(since))}; "
                   f"last answer: {st.last_error or 'none yet'}")  # fmt: skip
        body = self._alarm_body(st, alarm_id, now, "active", "channel_failing", roles, summary)
        body |= {"failures": st.failures, "failing_since": iso(since), "last_answer": st.last_error,
                 "reached_over": others}  # fmt: skip
        self.store_event(now, alarm_id, body)
        with self.lock:
            st.alarm_id, st.alarm_since = alarm_id, now
            st.next_probe = now + self.cfg.retry_max_s
            self.counts[(st.name, "technical_alarm")] += 1
        self._log("error", "notify_channel_failing", channel=st.name, alarm_id=alarm_id,
                  failures=st.failures, last_answer=st.last_error, roles=roles,
                  paged_over=others)  # fmt: skip
        unreachable = [role for role in roles if not self.routes_for(role, None, st.name)]
        if unreachable:
            self._log("error", "notify_roles_unreachable", channel=st.name, roles=unreachable,
                      note="no route on another channel: only /health, /metrics and the "
                      "retained status show the failure")  # fmt: skip

    def _resolve(self, st: ChannelState, now: float, reason: str) -> None:
        with self._alarm_lock:  # an alarm being raised is journaled before it resolves
            self._resolve_raised(st, now, reason)

    def _resolve_raised(self, st: ChannelState, now: float, reason: str) -> None:
        with self.lock:
            alarm_id, st.alarm_id, st.alarm_since = st.alarm_id, None, None
        if alarm_id is None:
            return
        roles = sorted({r.role for r in self.cfg.routes if r.channel == st.name}
                       | set(self.cfg.technical_roles))  # fmt: skip
        summary = f"paging channel {st.name} ({st.kind}) delivering again"
        self.store_event(
            now, alarm_id, self._alarm_body(st, alarm_id, now, "resolved", reason, roles, summary)
        )
        self._log("info", "notify_channel_recovered", channel=st.name, alarm_id=alarm_id,
                  reason=reason)  # fmt: skip

    def _alarm_body(self, st: ChannelState, alarm_id: str, now: float, state: str, reason: str,
                    roles: list[str], summary: str) -> dict[str, object]:  # fmt: skip
        word = STATE_WORDS[State(state)]  # the one table of state words
        head = f"hourwatch {word} {self.cfg.technical_priority}: technical: "
        room = TECH_PAGER_MAX - len(head) - len(TECH_CAUTION) - 2
        pager = f"{head}{shorten(ascii_text(summary), room)}. {TECH_CAUTION}"  # as an alarm's
        return {
            "schema": SCHEMA, "time": iso(now), "alarm_id": alarm_id, "channel": st.name,
            "channel_kind": st.kind, "kind": "technical", "priority": self.cfg.technical_priority,
            "state": state, "reason": reason, "summary": summary, "tier": 0, "notify": roles,
            "title": f"Paging channel {st.name} failing", "pager": pager,
            "caution": ALARM_CAUTION,
        }  # fmt: skip

    def _journal_alarm_event(self, name: str, kind: str, ev: JournaledEvent, state: str,
                             reason: str, now: float) -> None:  # fmt: skip
        st = ChannelState(name, kind)
        roles = [str(r) for r in (ev.body.get("notify") or [])]
        assert ev.alarm_id is not None
        self.store_event(
            now,
            ev.alarm_id,
            self._alarm_body(
                st, ev.alarm_id, now, state, reason, roles, f"paging channel {name} removed"
            ),
        )

    def store_event(self, now: float, alarm_id: str, body: dict[str, object]) -> None:
        assert self.store is not None
        self.store.append_event(now, "notify_alarm", alarm_id, body)
        self._wake.set()

    # --- a channel's sender thread -------------------------------------------------------
    def _send_loop(self, name: str) -> None:
        sender, st, wake = self.senders[name], self.states[name], self._channel_wake[name]
        while not self._stop.is_set():
            try:
                if self.send_due(name):
                    continue
                store = self.store
                assert store is not None
                now = self.clock()
                if st.alarm_id is not None and now >= st.next_probe:
                    self._probe(sender, st, now)
                nxt = store.next_due(name)
                wait = IDLE_WAIT_S if nxt is None else min(IDLE_WAIT_S, max(0.0, nxt - now))
            except Exception:
                self._log("error", "notify_sender_failed", channel=name, exc_info=True)
                wait = IDLE_WAIT_S
            if wait > 0:
                wake.wait(wait)
                wake.clear()

    def send_due(self, name: str) -> int:
        """Send the channel's due deliveries once; returns how many were attempted."""
        store = self.store
        assert store is not None
        sender, st = self.senders[name], self.states[name]
        now = self.clock()
        batch = store.claim(name, now, BATCH)
        if not batch:
            return 0
        pages: list[Page] = []
        for d in batch:
            page = self.page_for(d)
            if page is None:  # its event is gone (pruned by the retention): nothing to send
                store.drop(d.id, now, "not sent: its event is no longer in the journal")
                with self.lock:
                    self.counts[(name, "expired")] += 1
                continue
            pages.append(page)
        with self.lock:
            st.in_flight_since = now
        answers = sender.send(pages) if pages else []
        done = self.clock()
        by_key = {d.key: d for d in batch}
        ok = failed = 0
        for page, answer in zip(pages, answers, strict=True):
            d = by_key[page.key]
            if answer.ok:
                ok += 1
                store.confirm(d.id, done, answer.text)
                with self.lock:
                    self.counts[(name, "confirmed")] += 1
                    self.latency.observe(max(0.0, done - d.event_time))
                self._log("info", "page_delivered", channel=name, alarm_id=d.alarm_id,
                          state=d.state, tier=d.tier, recipient=d.recipient, role=d.role,
                          attempts=d.attempts, answer=answer.text)  # fmt: skip
            else:
                failed += 1
                store.retry(d.id, done + self._backoff(d.attempts), answer.text)
                with self.lock:
                    self.counts[(name, "failed_attempt")] += 1
                self._log("warning", "page_not_delivered", channel=name,
                          alarm_id=d.alarm_id, recipient=d.recipient, attempts=d.attempts,
                          answer=answer.text)  # fmt: skip
        self._outcome(st, now, done, ok, failed, answers)
        return len(batch)

    def _outcome(self, st: ChannelState, started: float, done: float, ok: int, failed: int,
                 answers: list[Answer]) -> None:  # fmt: skip
        resolve = False
        with self.lock:
            st.in_flight_since = None
            if ok:
                st.failures, st.failing_since, st.last_ok = 0, None, done
                resolve = st.alarm_id is not None
            if failed:
                last = next(a for a in reversed(answers) if not a.ok)
                st.failures += failed if not ok else 0
                if not ok and st.failing_since is None:
                    st.failing_since = started
                st.last_error, st.last_error_at = last.text, done
        if resolve:
            self._resolve(st, done, "channel_delivering")
        if failed and not ok:
            self.check_channels()

    def _probe(self, sender: Sender, st: ChannelState, now: float) -> None:
        answer = sender.probe()
        with self.lock:
            st.next_probe = self.clock() + self.cfg.retry_max_s
            if not answer.ok:
                st.last_error, st.last_error_at = answer.text, self.clock()
        if answer.ok and self.store is not None and self.store.next_due(st.name) is None:
            with self.lock:
                st.failures, st.failing_since, st.last_ok = 0, None, self.clock()
            self._resolve(st, self.clock(), "channel_answering")

    def _backoff(self, attempts: int) -> float:
        step = self.cfg.retry_min_s * 2.0 ** max(0, attempts - 1)
        return float(min(self.cfg.retry_max_s, step))

    # --- pages -------------------------------------------------------------------------
    def page_for(self, d: Delivery) -> Page | None:
        assert self.store is not None
        ev = self.store.event(d.event_id)
        if ev is None:
            return None
        b = ev.body
        if ev.kind == "alarm":
            try:
                alarm: dict[str, Any] = AlarmMessage.model_validate(b).model_dump(
                    by_alias=True, mode="json"
                )
            except ValidationError:  # as the service publishes it: the engine's own JSON
                alarm = {"schema": SCHEMA} | b
            ptype = "alarm"
        else:
            alarm, ptype = dict(b), "technical"
        url = until = None
        if ptype == "alarm" and self.ack_key is not None and self.cfg.ack_base_url:
            until = d.created + self.cfg.ack_link_valid_s
            claims = acklinks.LinkClaims(d.alarm_id, f"{d.channel}:{d.recipient}", d.role,
                                         until, d.key)  # fmt: skip
            url = acklinks.link(self.cfg.ack_base_url, self.ack_key, claims)
        return Page(
            key=d.key, type=ptype, text=str(b.get("pager") or b.get("summary") or ""),  # type: ignore[arg-type]
            alarm=alarm, alarm_id=d.alarm_id, ward=_str(b.get("ward")), bed=_str(b.get("bed")),
            priority=str(b.get("priority", "")), alarm_kind=str(b.get("kind", "")),
            state=d.state, rule=str(b.get("rule") or "notify-channel"),
            title=str(b.get("title") or ""), event_time=d.event_time, channel=d.channel,
            recipient=d.recipient, role=d.role, ack_url=url, ack_until=until,
            caution=str(b.get("caution") or ALARM_CAUTION),
        )  # fmt: skip

    # --- what /health, /metrics and the status show -------------------------------------
    def technical(self) -> list[TechnicalCondition]:
        with self.lock:
            return [
                TechnicalCondition("notify_channel_failing",
                                   f"paging channel {st.name} ({st.kind}) failing: "
                                   f"{st.last_error or 'no answer'}", st.alarm_since, st.alarm_id)
                for st in self.states.values()
                if st.alarm_id is not None and st.alarm_since is not None
            ]  # fmt: skip

    def health(self) -> dict[str, Any]:
        store = self.store
        pending = store.open_counts() if store is not None else {}
        out: dict[str, Any] = {}
        with self.lock:
            for st in self.states.values():
                state = ("failing" if st.alarm_id else "retrying" if st.failures
                         else "ok" if st.last_ok is not None else "idle")  # fmt: skip
                out[st.name] = {
                    "kind": st.kind, "state": state, "pending": pending.get(st.name, 0),
                    "failed_attempts_in_a_row": st.failures,
                    "last_confirmed": iso(st.last_ok) if st.last_ok is not None else None,
                    "last_error": st.last_error,
                    "last_error_at": iso(st.last_error_at) if st.last_error_at else None,
                    "technical_alarm": st.alarm_id,
                    "confirmed": self.counts[(st.name, "confirmed")],
                    "failed_attempts": self.counts[(st.name, "failed_attempt")],
                }  # fmt: skip
        return {"channels": out}

    def metric_families(self) -> list[Metric]:
        store = self.store
        pending = store.open_counts() if store is not None else {}
        pages = CounterMetricFamily("hourwatch_notify_pages_total",
                                    "pages by channel and outcome (confirmed, failed_attempt, "
                                    "expired, technical_alarm)",
                                    labels=["channel", "outcome"])  # fmt: skip
        queued = GaugeMetricFamily("hourwatch_notify_pending",
                                   "pages queued or being sent, by channel",
                                   labels=["channel"])  # fmt: skip
        failing = GaugeMetricFamily("hourwatch_notify_channel_failing",
                                    "1 while the channel's technical alarm is active",
                                    labels=["channel"])  # fmt: skip
        with self.lock:
            for (ch, outcome), n in sorted(self.counts.items()):
                pages.add_metric([ch, outcome], n)
            for ch in sorted(self.states):
                queued.add_metric([ch], pending.get(ch, 0))
            for ch, st in sorted(self.states.items()):
                failing.add_metric([ch], 1 if st.alarm_id else 0)
            latency = self.latency.family("hourwatch_notify_delivery_seconds",
                                          "alarm event to the channel's confirmation")
        return [pages, queued, failing, latency]

    def metrics_text(self) -> str:
        return exposition(self.metric_families())

    def _log(self, level: str, event: str, **kw: Any) -> None:
        if self.log is not None:
            getattr(self.log, level)(event, **kw)


def _str(v: object) -> str | None:
    return None if v is None else str(v)
