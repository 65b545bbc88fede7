"""`hourwatch run`: the live service on an MQTT broker, until SIGTERM or SIGINT."""

from __future__ import annotations

import argparse
import signal
import threading
from pathlib import Path
from types import FrameType

from ..config import load_config
from ..service import Service, configure_logging


def add(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    r = sub.add_parser("run", help="run the live service on an MQTT broker")
    r.add_argument("--config", type=Path, default=None, help="service config (TOML)")
    r.add_argument("--broker", default=None, metavar="HOST:PORT", help="overrides broker.host/port")
    r.add_argument("--journal", default=None, metavar="FILE|URL",
                   help="overrides journal.path (or journal.url, for a postgresql:// URL)")
    r.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    cfg = load_config(args.config, broker=args.broker, journal=args.journal)  # UserError: exit 2
    configure_logging(cfg.log_level)
    service = Service(cfg)  # loads profiles and rules: a bad file is a UserError too
    stop = threading.Event()
    why: list[str] = []

    def on_signal(signum: int, frame: FrameType | None) -> None:
        why.append(signal.Signals(signum).name)
        stop.set()

    signal.signal(signal.SIGTERM, on_signal)
    signal.signal(signal.SIGINT, on_signal)
    if cfg.journal.url is not None:  # a PostgreSQL journal: one of an active/standby group
        from ..ha import HaRunner

        return HaRunner(cfg, service.log).run(stop)
    service.start()
    # Wake now and then: signal handlers run only when the main thread gets control.
    while not stop.wait(0.5):
        if service.done.is_set():
            break  # the worker died; say so and let the supervisor restart us
    service.stop(f"signal {why[0]}" if why else f"worker failed: {service.failed}")
    return 1 if service.failed else 0
