"""Counters in Prometheus text format, and a tiny HTTP endpoint for /health and /metrics.

stdlib only (http.server in a thread): an operator's probe needs nothing installed.
"""

from __future__ import annotations

import bisect
import json
import threading
from collections import Counter
from collections.abc import Callable, Iterable, Sequence
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any

# seconds, from a message's arrival at the client to its effects being journaled
LATENCY_BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0)


class Histogram:
    __slots__ = ("buckets", "count", "counts", "total")

    def __init__(self, buckets: tuple[float, ...] = LATENCY_BUCKETS) -> None:
        self.buckets = buckets
        self.counts = [0] * (len(buckets) + 1)
        self.count = 0
        self.total = 0.0

    def observe(self, v: float) -> None:
        self.counts[bisect.bisect_left(self.buckets, v)] += 1
        self.count += 1
        self.total += v

    def quantile(self, q: float) -> float | None:
        """Upper bound of the bucket holding the q-quantile (coarse, for logs)."""
        if not self.count:
            return None
        need, seen = q * self.count, 0
        for i, n in enumerate(self.counts):
            seen += n
            if seen >= need:
                return self.buckets[i] if i < len(self.buckets) else float("inf")
        return float("inf")

    def lines(self, name: str) -> list[str]:
        """Prometheus exposition lines: cumulative buckets, sum and count."""
        out: list[str] = []
        cum = 0
        for bound, n in zip(self.buckets, self.counts, strict=False):
            cum += n
            out.append(f'{name}_bucket{{le="{bound:g}"}} {cum}')
        out.append(f'{name}_bucket{{le="+Inf"}} {self.count}')
        out.append(f"{name}_sum {self.total:g}")
        out.append(f"{name}_count {self.count}")
        return out


# Help texts of the gauges and labelled counters the service samples at each scrape.
GAUGE_HELP = {
    "journal_bytes": "size of the journal on disk: the database file plus its WAL",
    "queue_depth": "received messages waiting for the worker",
    "backlog": "received messages not yet journaled (queued, or held by a full journal)",
    "journal_lag_seconds": "arrival to journal of the oldest message of the last batch",
    "journal_full": "1 while the journal cannot be written (disk or size cap full)",
    "payloads_too_large": "payloads over limits.max_payload_bytes, withheld (since start)",
    "inbound_full_waits": "times the inbound queue was full and the broker was made to wait",
    "outbox_depth": "messages to publish not yet confirmed by the broker",
    "connected": "1 while connected to the broker",
    "engine_errors": "engine failures caught (each one logged)",
    "technical_alarms": "technical alarms of the service itself now active",
    "shard_ignored": "messages of other wards' beds left to their group ([shard] wards)",
}
LABELLED_HELP = {
    "duplicates_total": "readings dropped as duplicates of one already counted, by profile",
}


class Metrics:
    """Service counters. Written by the worker and the MQTT thread, read by the HTTP
    thread; one lock keeps the numbers of a scrape consistent."""

    def __init__(self) -> None:
        self.lock = threading.Lock()
        self.received = 0
        self.journaled = 0
        self.acked = 0
        self.stale_acks = 0  # acks dropped: the message came on an earlier connection
        self.rejected: Counter[str] = Counter()
        self.alarms: Counter[tuple[str, str]] = Counter()  # (rule, state) journaled
        self.alarms_published = 0  # confirmed by the broker (PUBACK)
        self.publish_failures = 0
        self.connects = 0
        self.disconnects = 0
        self.latency = Histogram()
        self.alarm_latency = Histogram()
        self.recovery_s = 0.0
        self.recovered_messages = 0

    def render(self, gauges: dict[str, float], labelled: Iterable[tuple[str, str, float]]) -> str:
        """Prometheus text exposition; `gauges` and `labelled` are sampled by the caller."""
        out: list[str] = []

        def metric(name: str, kind: str, help_: str, value: float | None = None) -> None:
            out.append(f"# HELP hourwatch_{name} {help_}")
            out.append(f"# TYPE hourwatch_{name} {kind}")
            if value is not None:
                out.append(f"hourwatch_{name} {value:g}")

        with self.lock:
            metric("messages_received_total", "counter", "MQTT messages received",
                   self.received)  # fmt: skip
            metric("messages_journaled_total", "counter", "messages written durably",
                   self.journaled)  # fmt: skip
            metric("messages_acked_total", "counter", "messages acknowledged to the broker",
                   self.acked)  # fmt: skip
            metric("stale_acks_dropped_total", "counter",
                   "acks dropped because the message came on an earlier connection",
                   self.stale_acks)  # fmt: skip
            metric("rejected_total", "counter", "inputs not used, by reason")
            for reason, n in sorted(self.rejected.items()):
                out.append(f'hourwatch_rejected_total{{reason="{_esc(reason)}"}} {n}')
            metric("alarm_events_total", "counter", "alarm lifecycle events, by rule and state")
            for (rule, state), n in sorted(self.alarms.items()):
                out.append(
                    f'hourwatch_alarm_events_total{{rule="{_esc(rule)}",state="{_esc(state)}"}} {n}'
                )
            metric("alarms_published_total", "counter", "alarm events confirmed by the broker",
                   self.alarms_published)  # fmt: skip
            metric("publish_failures_total", "counter",
                   "alarm events not confirmed in time", self.publish_failures)  # fmt: skip
            metric("connects_total", "counter", "successful broker connections", self.connects)
            metric("disconnects_total", "counter", "broker connections lost", self.disconnects)
            metric("recovery_seconds", "gauge", "time the last restart recovery took",
                   self.recovery_s)  # fmt: skip
            metric("recovery_messages", "gauge", "journal messages re-fed at the last start",
                   self.recovered_messages)  # fmt: skip
            metric("ingest_latency_seconds", "histogram",
                   "arrival to journaled, acknowledged and evaluated")  # fmt: skip
            out += self.latency.lines("hourwatch_ingest_latency_seconds")
            metric("alarm_latency_seconds", "histogram",
                   "end to end: arrival of the reading that raised an alarm event to the "
                   "broker's confirmation (PUBACK) of that event")  # fmt: skip
            out += self.alarm_latency.lines("hourwatch_alarm_latency_seconds")
        for name, value in sorted(gauges.items()):
            metric(name, "gauge", GAUGE_HELP.get(name, name.replace("_", " ")), value)
        by_name: dict[str, list[tuple[str, float]]] = {name: [] for name in LABELLED_HELP}
        for name, label, value in labelled:
            by_name.setdefault(name, []).append((label, value))
        for name, samples in sorted(by_name.items()):
            # declared even while empty, so a dashboard finds every series from the start
            metric(name, "counter", LABELLED_HELP.get(name, name.replace("_", " ")))
            out += [f"hourwatch_{name}{{{label}}} {value:g}" for label, value in sorted(samples)]
        return "\n".join(out) + "\n"


def _esc(s: str) -> str:
    return s.replace("\\", "\\\\").replace('"', '\\"').replace("\n", " ")


def render_ha(role: str, group: str, token: int | None, takeovers: int, lease_lost: int,
              last_takeover_s: float | None) -> str:  # fmt: skip
    """Active/standby (daemon/ha.py) in Prometheus text: appended to /metrics."""
    out: list[str] = []

    def metric(name: str, kind: str, help_: str, value: float) -> None:
        out.append(f"# HELP hourwatch_{name} {help_}")
        out.append(f"# TYPE hourwatch_{name} {kind}")
        out.append(f'hourwatch_{name}{{group="{_esc(group)}"}} {value:g}')

    metric("ha_active", "gauge", "1 while this instance is its group's active, 0 on standby",
           1.0 if role == "active" else 0.0)  # fmt: skip
    metric("ha_takeovers_total", "counter", "times this instance took the lease and became "
           "active (its first start included)", takeovers)  # fmt: skip
    metric("ha_lease_lost_total", "counter", "times this instance lost the lease while active "
           "(replaced, or not renewed in time) and stepped down", lease_lost)  # fmt: skip
    metric("ha_lease_token", "gauge", "the fencing token this instance writes under "
           "(0 on standby)", float(token or 0) if role == "active" else 0.0)  # fmt: skip
    if last_takeover_s is not None:
        metric("ha_takeover_seconds", "gauge", "the last takeover: lease taken to journal "
               "recovered and broker connection started", last_takeover_s)  # fmt: skip
    return "\n".join(out) + "\n"


HealthFn = Callable[[], tuple[bool, dict[str, Any]]]
MetricsFn = Callable[[], str]
# More pages on the same server (the acknowledgement links): (method, path, body) ->
# (status, headers, body), or None when the path is not theirs.
RoutesFn = Callable[[str, str, bytes], tuple[int, Sequence[tuple[str, str]], bytes] | None]
# "active" or "standby" (daemon/ha.py); a service without a group is always "active".
RoleFn = Callable[[], str]
MAX_POST_BYTES = 16 * 1024


class HealthServer:
    """GET /health (200 healthy, 503 not, JSON body) and GET /metrics, on a thread."""

    def __init__(self, host: str, port: int, health: HealthFn, metrics: MetricsFn,
                 routes: RoutesFn | None = None, role: RoleFn | None = None) -> None:  # fmt: skip
        class Handler(BaseHTTPRequestHandler):
            def _routed(self, method: str, body: bytes = b"") -> bool:
                if routes is None:
                    return False
                reply = routes(method, self.path.split("?", 1)[0], body)
                if reply is None:
                    return False
                status, headers, data = reply
                self.send_response(status)
                for name, value in headers:
                    self.send_header(name, value)
                self.send_header("Content-Length", str(len(data)))
                self.end_headers()
                if method != "HEAD":
                    self.wfile.write(data)
                return True

            def do_POST(self) -> None:
                try:
                    n = int(self.headers.get("Content-Length") or 0)
                except ValueError:
                    n = -1
                if not 0 <= n <= MAX_POST_BYTES:
                    self._send(413, "text/plain", "request body too large\n")
                    return
                if not self._routed("POST", self.rfile.read(n) if n else b""):
                    self._send(404, "text/plain", "not found\n")

            def do_GET(self) -> None:
                path = self.path.split("?", 1)[0]
                if self._routed("GET"):
                    return
                if path == "/health":
                    ok, body = health()
                    body = {"role": role() if role is not None else "active", **body}
                    self._send(200 if ok else 503, "application/json", json.dumps(body))
                elif path == "/metrics":
                    self._send(200, "text/plain; version=0.0.4; charset=utf-8", metrics())
                else:
                    self._send(404, "text/plain", "not found: try /health or /metrics\n")

            def _send(self, code: int, ctype: str, text: str) -> None:
                data = text.encode()
                self.send_response(code)
                self.send_header("Content-Type", ctype)
                self.send_header("Content-Length", str(len(data)))
                self.end_headers()
                self.wfile.write(data)

            def log_message(self, format: str, *args: Any) -> None:
                pass  # scrapes every few seconds would drown the service log

        self.server = ThreadingHTTPServer((host, port), Handler)
        self.server.daemon_threads = True
        self.address: tuple[str, int] = self.server.server_address[:2]  # type: ignore[assignment]
        self._thread = threading.Thread(
            target=self.server.serve_forever, name="hourwatch-health", daemon=True
        )

    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        if self._thread.is_alive():  # shutdown() would wait forever for a loop never run
            self.server.shutdown()
            self._thread.join(2.0)
        self.server.server_close()
