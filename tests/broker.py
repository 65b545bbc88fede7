"""A REAL Mosquitto broker for integration tests (never a public broker, never a mock).

testcontainers' Mosquitto module is tried first; where no Docker engine is reachable
(the usual case on our machines, see FIELD-NOTES.md) the local `mosquitto` binary is
started on a free loopback port with a config of its own. If neither is available the
test is skipped with the reason.

Use:  `from tests.broker import broker`  (a function-scoped fixture; each test gets
a fresh broker with persistence on, so session state never leaks between tests).
"""

from __future__ import annotations

import contextlib
import json
import os
import subprocess
import sys
import tempfile
import threading
import time
import warnings
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest

# One definition of how a local mosquitto is found, configured and waited for: the
# demo's and the tests' must not drift apart.
from daemon.local_broker import (
    STOP_GRACE_S,
    Mosquitto,
    mosquitto_binary,
    wait_port,
)


@dataclass
class LocalBroker(Mosquitto):
    """Debian's mosquitto binary on a free loopback port, in its own session."""

    kind: str = "local-binary"

    def restart(self, down_s: float = 0.0) -> None:
        """SIGTERM, optionally stay down a while, start again on the same port."""
        self.stop()
        if down_s:
            time.sleep(down_s)
        self.start()

    def log(self) -> str:
        path = self.data_dir / "mosquitto.log"
        return path.read_text(errors="replace") if path.exists() else ""


@dataclass
class ContainerBroker:
    """testcontainers' Mosquitto module, started with our own config."""

    container: Any
    data_dir: Path
    host: str = ""
    port: int = 0
    kind: str = "testcontainers"

    @property
    def address(self) -> str:
        return f"{self.host}:{self.port}"

    def start(self) -> None:
        conf = self.data_dir / "mosquitto.conf"
        conf.write_text(
            "listener 1883\nallow_anonymous true\npersistence true\n"
            "persistence_location /data/\nmax_queued_messages 0\nmax_queued_bytes 0\n"
        )
        self.container.start(configfile=str(conf))
        self.host = self.container.get_container_host_ip()
        self.port = int(self.container.get_exposed_port(1883))
        wait_port(self.host, self.port, 30.0, None)

    def stop(self) -> None:
        self.container.stop()

    def restart(self, down_s: float = 0.0) -> None:
        wrapped = self.container.get_wrapped_container()
        wrapped.stop(timeout=int(STOP_GRACE_S))
        if down_s:
            time.sleep(down_s)
        wrapped.start()
        self.port = int(self.container.get_exposed_port(1883))
        wait_port(self.host, self.port, 30.0, None)

    def log(self) -> str:
        out, err = self.container.get_logs()
        return (out + err).decode(errors="replace")


Broker = LocalBroker | ContainerBroker


_docker_unusable: list[str] = []  # remembered for the session: asking Docker costs ~1 s


def _try_container(data_dir: Path) -> ContainerBroker | None:
    if _docker_unusable or os.environ.get("HOURWATCH_TEST_NO_DOCKER"):
        return None
    try:
        with warnings.catch_warnings():  # its module warns about its own decorators
            warnings.simplefilter("ignore", DeprecationWarning)
            from testcontainers.community.mqtt import MosquittoContainer

        b = ContainerBroker(MosquittoContainer(), data_dir)
        b.start()
        return b
    except Exception as exc:  # docker.errors.DockerException, no daemon, no image: fall back
        _docker_unusable.append(f"{type(exc).__name__}: {exc}")
        return None


@contextlib.contextmanager
def running_broker(listener_config: str = "") -> Iterator[Broker]:
    """A started broker, stopped on exit. `listener_config` (see mosquitto_config) needs the
    local binary."""
    with tempfile.TemporaryDirectory(prefix="hw-broker-") as tmp:
        data_dir = Path(tmp)
        b: Broker | None = None if listener_config else _try_container(data_dir)
        if b is None:
            binary = mosquitto_binary()
            if binary is None:
                pytest.skip(
                    "no MQTT broker: no Docker engine reachable and no mosquitto binary "
                    "(apt-get install mosquitto, or run `make mosquitto`)"
                )
            b = LocalBroker(binary, data_dir, listener_config=listener_config)
            b.start()
        try:
            yield b
        finally:
            b.stop()


@pytest.fixture
def broker() -> Iterator[Broker]:
    with running_broker() as b:
        yield b


# --- clients and a service harness for the integration tests --------------------------
class Watcher:
    """A paho subscriber that records everything on a filter (retained flag included)."""

    def __init__(
        self,
        b: Broker,
        topic: str = "hourwatch/#",
        client_id: str = "test-watch",
        persistent: bool = False,  # keep the session (and queued messages) over a restart
    ):
        import paho.mqtt.client as mqtt
        from paho.mqtt.enums import CallbackAPIVersion

        self.messages: list[tuple[str, bytes, bool]] = []
        self._cond = threading.Condition()
        c = mqtt.Client(
            CallbackAPIVersion.VERSION2, client_id=client_id, clean_session=not persistent
        )
        c.reconnect_delay_set(1, 1)

        def on_message(client: Any, userdata: Any, msg: Any) -> None:
            with self._cond:
                self.messages.append((msg.topic, bytes(msg.payload), bool(msg.retain)))
                self._cond.notify_all()

        subscribed = threading.Event()
        c.on_message = on_message
        c.on_subscribe = lambda *a: subscribed.set()
        c.connect(b.host, b.port)
        c.subscribe(topic, 1)
        c.loop_start()
        if not subscribed.wait(5):
            raise RuntimeError("watcher could not subscribe")
        self.client = c

    def json(self, prefix: str) -> list[dict[str, Any]]:
        with self._cond:
            return [json.loads(p) for t, p, _ in self.messages if t.startswith(prefix) and p]

    def wait_for(
        self, pred: Callable[[Watcher], Any], timeout: float = 10.0, what: str = "condition"
    ) -> Any:
        deadline = time.monotonic() + timeout
        with self._cond:
            while True:
                found = pred(self)
                if found:
                    return found
                left = deadline - time.monotonic()
                if left <= 0:
                    raise AssertionError(f"timed out after {timeout} s waiting for {what}")
                self._cond.wait(min(left, 0.1))

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def publisher(b: Broker, client_id: str = "test-pub") -> Any:
    import paho.mqtt.client as mqtt
    from paho.mqtt.enums import CallbackAPIVersion

    c = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client_id)
    c.connect(b.host, b.port)
    c.loop_start()
    return c


def publish_all(client: Any, msgs: Iterable[tuple[str, Any]], qos: int = 1, retain: bool = False,
                timeout: float = 20.0) -> int:  # fmt: skip
    """Publish (topic, payload) pairs in order; return once the broker confirmed all."""
    infos = []
    for topic, payload in msgs:
        body = payload if isinstance(payload, bytes | str) else json.dumps(payload)
        infos.append(client.publish(topic, body, qos=qos, retain=retain))
    deadline = time.monotonic() + timeout
    for info in infos:
        info.wait_for_publish(max(0.01, deadline - time.monotonic()))
    return len(infos)


CLI_ENV = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parent.parent))


def probe_on_broker(
    b: Broker, argv: list[str], messages: Callable[[], Iterable[tuple[str, Any]]],
    client_id: str = "probe-test-pub",
) -> str:  # fmt: skip
    """`hourwatch probe --broker B --seconds 2 ARGV` in its own process; once it says it
    is subscribed, `messages()` are made and published. Its stdout, first line included."""
    proc = subprocess.Popen(
        [sys.executable, "-m", "daemon.cli", "probe", "--broker", b.address, "--seconds", "2",
         *argv],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=CLI_ENV,
    )  # fmt: skip
    try:
        assert proc.stdout is not None
        first = proc.stdout.readline()  # printed once the broker confirmed the subscription
        assert first.startswith("probe: subscribed"), first
        pub = publisher(b, client_id)
        publish_all(pub, messages())
        out, err = proc.communicate(timeout=20)
        pub.disconnect()
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 0, err
    return first + out


class FakeClock:
    """The service's clock in tests: moves only when told (the engine never reads one)."""

    def __init__(self, t: float) -> None:
        self.t = t

    def __call__(self) -> float:
        return self.t

    def advance(self, seconds: float) -> None:
        self.t += seconds


def service_config(b: Broker, journal: Path, **overrides: Any) -> Any:
    from daemon.config import ServiceConfig

    data: dict[str, Any] = {
        "broker": {"host": b.host, "port": b.port, "client_id": "hourwatch-test",
                   "reconnect_min_s": 1, "reconnect_max_s": 2},
        "journal": {"path": str(journal)},
        "health": {"listen": "127.0.0.1:0"},
        "publish": {"state_interval_s": 0},
    }  # fmt: skip
    for key, value in overrides.items():
        table, _, leaf = key.rpartition("__")
        (data.setdefault(table, {}) if table else data)[leaf] = value
    return ServiceConfig.model_validate(data)


@contextlib.contextmanager
def running_service(
    b: Broker,
    journal: Path,
    watcher: Watcher | None = None,
    clock: Callable[[], float] | None = None,
    **overrides: Any,
) -> Iterator[Any]:
    """An in-process Service, connected and subscribed; stopped cleanly on exit."""
    from daemon.service import Service

    svc = Service(service_config(b, journal, **overrides), clock=clock or time.time)
    seen = len(watcher.messages) if watcher is not None else 0
    svc.start()
    try:
        deadline = time.monotonic() + 10
        while not (svc.connected and svc.link is not None and svc.link.connected.is_set()):
            if time.monotonic() > deadline:
                raise AssertionError("service did not connect within 10 s")
            time.sleep(0.01)
        if watcher is not None:  # its own status shows the subscriptions are in place
            watcher.wait_for(
                lambda w: any(t == "hourwatch/status" for t, _, _ in w.messages[seen:]),
                what="the service's status",
            )
        else:
            time.sleep(0.2)
        yield svc
    finally:
        svc.stop()
