"""Live updates over a REAL HTTP server (uvicorn on a loopback port): the event stream
starts with the whole ward, a new alarm reaches it as a card within 2 s, and the
service's trouble reaches it as a status the board shows. The engine is real
(tests/boardsite.py, the invented example ward); every wait is bounded."""

from __future__ import annotations

import json
import queue
import threading
import time
from datetime import UTC, datetime

import httpx2 as httpx
import pytest

from daemon.web.app import build_app
from daemon.web.server import WebServer
from tests.boardsite import LogSite

# source: Adrogue HJ, Madias NE. Hypernatremia. N Engl J Med 2000;342:1493-9 --
# hypernatraemia is a serum sodium above 145 mmol/L (alert_rules/sodium-high.toml)
SODIUM_HIGH = 151.0
UPDATE_WITHIN_S = 2.0  # the bound: a board shows an event within 2 s


class Stream:
    """Reads one board's event stream on a thread: (event, data) into a queue."""

    def __init__(self, url: str) -> None:
        self.events: queue.Queue[tuple[float, str, dict]] = queue.Queue()
        self._client = httpx.Client(timeout=httpx.Timeout(10.0, read=30.0))
        self._thread = threading.Thread(target=self._read, args=(url,), daemon=True)
        self._thread.start()

    def _read(self, url: str) -> None:
        event = None
        try:
            with self._client.stream("GET", url) as r:
                assert r.headers["content-type"].startswith("text/event-stream")
                for line in r.iter_lines():
                    if line.startswith("event: "):
                        event = line[7:]
                    elif line.startswith("data: ") and event:
                        self.events.put((time.monotonic(), event, json.loads(line[6:])))
        except httpx.HTTPError:
            pass

    def until(self, pred, timeout: float, what: str) -> tuple[float, str, dict]:
        deadline = time.monotonic() + timeout
        while (left := deadline - time.monotonic()) > 0:
            try:
                item = self.events.get(timeout=left)
            except queue.Empty:
                break
            if pred(item[1], item[2]):
                return item
        raise AssertionError(f"no {what} within {timeout} s")

    def close(self) -> None:
        self._client.close()


@pytest.fixture
def served():
    site = LogSite()
    server = WebServer(build_app(site.site()), {"board": ("127.0.0.1", 0)})
    server.start()
    host, port = server.address
    yield site, f"http://{host}:{port}"
    server.stop()


def test_a_stream_starts_with_the_whole_ward_and_carries_a_new_alarm(served):
    site, base = served
    s = Stream(f"{base}/events/ward/4-East")
    try:
        _, _, ward = s.until(lambda e, d: e == "ward", 5, "ward event")
        assert ward["beds"] == ["bed-01", "bed-02", "bed-03", "bed-04"]
        seen = set()
        while seen != set(ward["beds"]):
            _, _, card = s.until(lambda e, d: e == "card", 5, "the first cards")
            seen.add(card["bed"])
        s.until(lambda e, d: e == "status" and d["state"] == "ok", 5, "status ok")
        lab = {"time": datetime.fromtimestamp(site.now - 60, UTC).isoformat(),
               "serum_na_mmol_l": SODIUM_HIGH}  # fmt: skip
        sent = time.monotonic()
        effects = site.step("hourwatch/beds/bed-01/labs", lab)
        assert any(getattr(e, "rule", "") == "sodium-high" for e in effects)
        got, _, card = s.until(lambda e, d: e == "card" and d["bed"] == "bed-01"
                               and "Serum sodium above 145" in d["html"],
                               UPDATE_WITHIN_S, "the new alarm on bed-01's card")  # fmt: skip
        assert got - sent < UPDATE_WITHIN_S
        assert "ALARM" in card["html"] and "prio-medium" in card["html"]
    finally:
        s.close()


def test_the_stream_says_when_the_service_is_not_working(served):
    site, base = served
    s = Stream(f"{base}/events/ward/4-East")
    try:
        s.until(lambda e, d: e == "status" and d["state"] == "ok", 5, "status ok")
        site.health = (False, {"status": "unhealthy", "connected": False, "worker_alive": True})
        site.changes.touch()
        _, _, st = s.until(lambda e, d: e == "status" and d["state"] != "ok", 7, "trouble")
        assert st["state"] == "unhealthy"
        assert "not working" in st["text"] and "lost the MQTT broker" in st["text"]
    finally:
        s.close()


def test_stopping_the_server_ends_open_streams():
    site = LogSite()
    server = WebServer(build_app(site.site()), {"board": ("127.0.0.1", 0)})
    server.start()
    host, port = server.address
    s = Stream(f"http://{host}:{port}/events/ward/4-East")
    try:
        s.until(lambda e, d: e == "status", 5, "status")
        t = time.monotonic()
        server.stop()
        assert time.monotonic() - t < 6.0  # an open stream does not hold the service up
        s._thread.join(5)
        assert not s._thread.is_alive()
    finally:
        s.close()
