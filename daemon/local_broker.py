"""A broker on this machine for the demo: Debian's mosquitto on a free loopback
port, or, where it is not installed, the pure-Python amqtt broker from the
optional `embedded-broker` extra (MQTT 3.1.1 only; a demo fallback, never for
production or for tests that claim a real broker).
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import os
import shutil
import signal
import socket
import subprocess
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .errors import UserError

MOSQUITTO_FALLBACK = "/usr/sbin/mosquitto"  # Debian installs it outside a user's PATH
START_TIMEOUT_S = 5.0
STOP_GRACE_S = 5.0


def mosquitto_binary() -> str | None:
    found = shutil.which("mosquitto")
    if found:
        return found
    return MOSQUITTO_FALLBACK if os.access(MOSQUITTO_FALLBACK, os.X_OK) else None


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def wait_port(host: str, port: int, timeout: float, proc: subprocess.Popen[bytes] | None) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if proc is not None and proc.poll() is not None:
            raise RuntimeError(f"mosquitto exited with status {proc.returncode} at start")
        with contextlib.suppress(OSError), socket.create_connection((host, port), timeout=0.2):
            return
        time.sleep(0.01)
    raise RuntimeError(f"the broker did not open {host}:{port} within {timeout:g} s")


def mosquitto_config(port: int, data_dir: Path, listener: str = "") -> str:
    """mosquitto.conf for a loopback listener; `listener` replaces the anonymous
    plaintext settings (e.g. TLS files, allow_anonymous false, password_file)."""
    if listener:
        lines = ["per_listener_settings true", f"listener {port} 127.0.0.1", listener.strip()]
    else:
        lines = [f"listener {port} 127.0.0.1", "allow_anonymous true"]
    lines += [
        "persistence true",
        f"persistence_location {data_dir}/",
        # 1000 by default: an offline persistent session would silently lose the rest
        "max_queued_messages 0",
        "max_queued_bytes 0",
        f"log_dest file {data_dir}/mosquitto.log",
        "log_type error",
        "log_type warning",
        "log_type notice",
    ]
    if os.geteuid() == 0:
        # otherwise it drops to user mosquitto, cannot write the 0700 temp dir, and
        # keeps serving while silently persisting nothing (FIELD-NOTES.md)
        lines.append("user root")
    return "\n".join(lines) + "\n"


@dataclass
class Mosquitto:
    """Debian's mosquitto binary on a free loopback port, in its own session."""

    binary: str
    data_dir: Path
    host: str = "127.0.0.1"
    port: int = field(default_factory=free_port)
    listener_config: str = ""
    proc: subprocess.Popen[bytes] | None = None
    kind: str = "mosquitto"
    protocol: str = "5"

    @property
    def address(self) -> str:
        return f"{self.host}:{self.port}"

    def start(self) -> None:
        conf = self.data_dir / "mosquitto.conf"
        conf.write_text(mosquitto_config(self.port, self.data_dir, self.listener_config))
        self.proc = subprocess.Popen(
            [self.binary, "-c", str(conf)],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
            start_new_session=True,
        )
        try:
            wait_port(self.host, self.port, START_TIMEOUT_S, self.proc)
        except RuntimeError:
            self.stop()
            raise

    def stop(self) -> None:
        proc, self.proc = self.proc, None
        if proc is None or proc.poll() is not None:
            return
        proc.send_signal(signal.SIGTERM)  # lets it write its persistence file
        try:
            proc.wait(STOP_GRACE_S)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(STOP_GRACE_S)


@dataclass
class EmbeddedBroker:
    """amqtt in a thread with its own event loop (FIELD-NOTES: build it inside a
    running loop, always bind the listener, MQTT 3.1.1 only)."""

    host: str = "127.0.0.1"
    port: int = field(default_factory=free_port)
    kind: str = "embedded amqtt"
    protocol: str = "3.1.1"
    _loop: asyncio.AbstractEventLoop | None = None
    _thread: threading.Thread | None = None
    _broker: Any = None

    @property
    def address(self) -> str:
        return f"{self.host}:{self.port}"

    def start(self) -> None:
        from amqtt.broker import Broker  # type: ignore[import-not-found]  # optional extra

        # it logs every probe of its port and every missing optional setting
        logging.getLogger("amqtt").setLevel(logging.CRITICAL)

        config = {
            "listeners": {"default": {"type": "tcp", "bind": f"{self.host}:{self.port}"}},
            "sys_interval": 0,
            "auth": {"allow-anonymous": True},
            "topic-check": {"enabled": False},
        }
        ready = threading.Event()
        failure: list[BaseException] = []

        def serve() -> None:
            loop = asyncio.new_event_loop()
            self._loop = loop
            asyncio.set_event_loop(loop)

            async def boot() -> None:
                self._broker = Broker(config)
                await self._broker.start()

            try:
                loop.run_until_complete(boot())
            except BaseException as exc:  # reported to the starting thread
                failure.append(exc)
                ready.set()
                return
            ready.set()
            loop.run_forever()

        self._thread = threading.Thread(target=serve, name="embedded-broker", daemon=True)
        self._thread.start()
        ready.wait(START_TIMEOUT_S)
        if failure:
            raise RuntimeError(f"embedded broker failed to start: {failure[0]}")
        wait_port(self.host, self.port, START_TIMEOUT_S, None)

    def stop(self) -> None:
        loop, broker = self._loop, self._broker
        if loop is None or broker is None:
            return
        with contextlib.suppress(Exception):
            asyncio.run_coroutine_threadsafe(broker.shutdown(), loop).result(STOP_GRACE_S)
        loop.call_soon_threadsafe(loop.stop)
        if self._thread is not None:
            self._thread.join(STOP_GRACE_S)
        self._loop = self._broker = None


def start_local_broker(data_dir: Path) -> Mosquitto | EmbeddedBroker:
    """Mosquitto if installed, else the embedded broker, else a one-line UserError."""
    binary = mosquitto_binary()
    if binary is not None:
        broker: Mosquitto | EmbeddedBroker = Mosquitto(binary, data_dir)
    else:
        try:
            import amqtt  # type: ignore[import-not-found]  # noqa: F401
        except ImportError:
            raise UserError(
                "no MQTT broker here: install Debian's mosquitto (apt-get install mosquitto) "
                "or the embedded fallback (pip install 'hourwatch[embedded-broker]')"
            ) from None
        broker = EmbeddedBroker()
    try:
        broker.start()
    except RuntimeError as exc:
        raise UserError(f"cannot start a local broker: {exc}") from None
    return broker
