"""The service's counters, and their Prometheus exposition through prometheus_client.

The counters are plain numbers under one lock (written by the worker and the MQTT
thread); at each scrape they become metric families and prometheus_client writes the
text format. The HTTP side (/health, /metrics) is daemon/web.
"""

from __future__ import annotations

import bisect
import threading
from collections import Counter
from collections.abc import Iterable, Iterator, Mapping

from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client.exposition import CONTENT_TYPE_PLAIN_0_0_4
from prometheus_client.metrics_core import (
    CounterMetricFamily,
    GaugeMetricFamily,
    HistogramMetricFamily,
    Metric,
)

CONTENT_TYPE = CONTENT_TYPE_PLAIN_0_0_4  # what generate_latest writes

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

    def family(self, name: str, help_: str) -> HistogramMetricFamily:
        """The histogram as one metric family: cumulative buckets, sum and count."""
        buckets: list[tuple[str, float]] = []
        cum = 0
        for bound, n in zip(self.buckets, self.counts, strict=False):
            cum += n
            buckets.append((str(float(bound)), cum))  # as prometheus_client writes le
        buckets.append(("+Inf", self.count))
        return HistogramMetricFamily(name, help_, buckets=buckets, sum_value=self.total)


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

    def families(
        self,
        gauges: Mapping[str, float],
        labelled: Iterable[tuple[str, Mapping[str, str], float]],
    ) -> list[Metric]:
        """The counters as metric families; `gauges` and `labelled` (name, labels, value)
        are sampled by the caller."""
        out: list[Metric] = []

        def counter(name: str, help_: str, value: float) -> None:
            out.append(CounterMetricFamily(f"hourwatch_{name}", help_, value=value))

        def gauge(name: str, help_: str, value: float) -> None:
            out.append(GaugeMetricFamily(f"hourwatch_{name}", help_, value=value))

        with self.lock:
            counter("messages_received_total", "MQTT messages received", self.received)
            counter("messages_journaled_total", "messages written durably", self.journaled)
            counter("messages_acked_total", "messages acknowledged to the broker", self.acked)
            counter("stale_acks_dropped_total",
                    "acks dropped because the message came on an earlier connection",
                    self.stale_acks)  # fmt: skip
            rejected = CounterMetricFamily("hourwatch_rejected_total", "inputs not used, by reason",
                                           labels=["reason"])  # fmt: skip
            for reason, n in sorted(self.rejected.items()):
                rejected.add_metric([reason], n)
            out.append(rejected)
            alarms = CounterMetricFamily("hourwatch_alarm_events_total",
                                         "alarm lifecycle events, by rule and state",
                                         labels=["rule", "state"])  # fmt: skip
            for (rule, state), n in sorted(self.alarms.items()):
                alarms.add_metric([rule, state], n)
            out.append(alarms)
            counter("alarms_published_total", "alarm events confirmed by the broker",
                    self.alarms_published)  # fmt: skip
            counter("publish_failures_total", "alarm events not confirmed in time",
                    self.publish_failures)  # fmt: skip
            counter("connects_total", "successful broker connections", self.connects)
            counter("disconnects_total", "broker connections lost", self.disconnects)
            gauge("recovery_seconds", "time the last restart recovery took", self.recovery_s)
            gauge("recovery_messages", "journal messages re-fed at the last start",
                  self.recovered_messages)  # fmt: skip
            out.append(self.latency.family("hourwatch_ingest_latency_seconds",
                                           "arrival to journaled, acknowledged and evaluated"))
            out.append(self.alarm_latency.family(
                "hourwatch_alarm_latency_seconds",
                "end to end: arrival of the reading that raised an alarm event to the "
                "broker's confirmation (PUBACK) of that event"))  # fmt: skip
        for name, value in sorted(gauges.items()):
            gauge(name, GAUGE_HELP.get(name, name.replace("_", " ")), value)
        by_name: dict[str, list[tuple[Mapping[str, str], float]]] = {n: [] for n in LABELLED_HELP}
        for name, labels, value in labelled:
            by_name.setdefault(name, []).append((labels, value))
        for name, samples in sorted(by_name.items()):
            # declared even while empty, so a dashboard finds every series from the start
            keys = sorted({k for labels, _ in samples for k in labels})
            fam = CounterMetricFamily(f"hourwatch_{name}",
                                      LABELLED_HELP.get(name, name.replace("_", " ")),
                                      labels=keys)  # fmt: skip
            for labels, value in sorted(samples, key=lambda s: sorted(s[0].items())):
                fam.add_metric([labels.get(k, "") for k in keys], value)
            out.append(fam)
        return out

    def render(self, gauges: Mapping[str, float],
               labelled: Iterable[tuple[str, Mapping[str, str], float]]) -> str:  # fmt: skip
        """Prometheus text exposition of `families`."""
        return exposition(self.families(gauges, labelled))


class _Families:
    """A collector of families already sampled (prometheus_client asks collectors)."""

    def __init__(self, families: Iterable[Metric]) -> None:
        self._families = list(families)

    def collect(self) -> Iterator[Metric]:
        return iter(self._families)


def exposition(families: Iterable[Metric]) -> str:
    """The text format (0.0.4) of these families, written by prometheus_client."""
    registry = CollectorRegistry(auto_describe=False)
    registry.register(_Families(families))
    return generate_latest(registry).decode("utf-8")


def render_ha(role: str, group: str, token: int | None, takeovers: int, lease_lost: int,
              last_takeover_s: float | None) -> str:  # fmt: skip
    """Active/standby (daemon/ha.py) in Prometheus text: appended to /metrics."""
    families: list[Metric] = []

    def metric(name: str, kind: str, help_: str, value: float) -> None:
        family = (CounterMetricFamily if kind == "counter" else GaugeMetricFamily)(
            f"hourwatch_{name}", help_, labels=["group"]
        )
        family.add_metric([group], value)
        families.append(family)

    metric("ha_active", "gauge", "1 while this instance is its group's active, 0 on standby",
           1.0 if role == "active" else 0.0)  # fmt: skip
    metric("ha_takeovers", "counter", "times this instance took the lease and became "
           "active (its first start included)", takeovers)  # fmt: skip
    metric("ha_lease_lost", "counter", "times this instance lost the lease while active "
           "(replaced, or not renewed in time) and stepped down", lease_lost)  # fmt: skip
    metric("ha_lease_token", "gauge", "the fencing token this instance writes under "
           "(0 on standby)", float(token or 0) if role == "active" else 0.0)  # fmt: skip
    if last_takeover_s is not None:
        metric("ha_takeover_seconds", "gauge", "the last takeover: lease taken to journal "
               "recovered and broker connection started", last_takeover_s)  # fmt: skip
    return exposition(families)
