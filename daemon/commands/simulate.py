"""`hourwatch simulate`: run a scenario of simulated meters and patients.

    hourwatch simulate --scenario FILE --to-log OUT.jsonl [--beds N] [--seed S]
                       [--hours H] [--start ISO]
    hourwatch simulate --scenario FILE --broker HOST:PORT [--beds N] [--speed X] [--seed S]

All data a scenario produces is invented, for testing and demonstrations only.
"""

from __future__ import annotations

import argparse
import os
import signal
import sys
import threading
from pathlib import Path
from types import FrameType

from simulator import runner
from simulator.scenario import load_scenario

from ..engine.timefmt import TimeError, parse_iso
from ..errors import UserError
from ..profile_files import load_profiles

ENV_PASSWORD = "HOURWATCH_MQTT_PASSWORD"
MAX_SPEED = 10_000.0  # simulated minutes per wall-clock second


def add(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    s = sub.add_parser(
        "simulate",
        help="simulate meters and patients from a scenario file (invented data)",
        description="Simulate a ward of meters and patients from a scenario file, to a JSON "
        "Lines log or live to a broker. All data is invented, for tests and demonstrations.",
    )
    s.add_argument("--scenario", type=Path, required=True, help="scenario file (TOML)")
    out = s.add_mutually_exclusive_group(required=True)
    out.add_argument("--to-log", type=Path, metavar="OUT", help="write a JSON Lines log")
    out.add_argument("--broker", metavar="HOST:PORT", help="publish live to this MQTT broker")
    s.add_argument(
        "--beds", type=int, default=None, help="number of beds (copies beyond the file's)"
    )
    s.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    s.add_argument(
        "--hours", type=float, default=None, help="simulated hours (default: the file's)"
    )
    s.add_argument("--start", default=None, help="log start time, ISO 8601 (log only)")
    s.add_argument(
        "--speed", type=float, default=1.0,
        help="live only: simulated minutes per wall-clock second (default 1)",
    )  # fmt: skip
    s.add_argument("--profiles", type=Path, default=None, help="device profile folder")
    s.add_argument("--prefix", default="hourwatch", help="topic prefix (default hourwatch)")
    s.add_argument("--username", default=None, help="live only: MQTT user name")
    s.add_argument(
        "--password-file", type=Path, default=None,
        help=f"live only: file holding the MQTT password (or set {ENV_PASSWORD})",
    )  # fmt: skip
    s.add_argument("--protocol", choices=["3.1.1", "5"], default="3.1.1", help="MQTT version")
    s.add_argument("--client-id", default="", help="live only: MQTT client id")
    s.set_defaults(run=run)


def _check(args: argparse.Namespace) -> float | None:
    if args.beds is not None and not 1 <= args.beds <= 5000:
        raise UserError(f"--beds: {args.beds} is not between 1 and 5000")
    if args.hours is not None and not 0 < args.hours <= 24 * 14:
        raise UserError(f"--hours: {args.hours:g} is not between 0 and 336")
    if not 0 < args.speed <= MAX_SPEED:
        raise UserError(f"--speed: {args.speed:g} is not between 0 and {MAX_SPEED:g}")
    if args.broker is not None and args.start is not None:
        raise UserError("--start: applies to --to-log only (live runs start now)")
    if args.start is None:
        return None
    try:
        return parse_iso(args.start)
    except TimeError as exc:
        raise UserError(f"--start: {exc}") from None


def _address(text: str) -> tuple[str, int]:
    host, sep, port = text.strip().rpartition(":")
    host = host.strip("[]")
    if not sep or not host or not port.isdigit() or not 1 <= int(port) <= 65535:
        raise UserError(f"--broker: expected HOST:PORT, got {text!r}")
    return host, int(port)


def _password(args: argparse.Namespace) -> str | None:
    if args.password_file is not None:
        try:
            return str(args.password_file.read_text(encoding="utf-8")).rstrip("\r\n")
        except OSError as exc:
            raise UserError(
                f"--password-file: cannot read {args.password_file}: {exc.strerror}"
            ) from None
    return os.environ.get(ENV_PASSWORD) or None


def run(args: argparse.Namespace) -> int:
    start = _check(args)
    profiles = {p.name: p for p in load_profiles(args.profiles)}
    scenario = load_scenario(args.scenario, profiles)
    built = runner.build(
        scenario, profiles, seed=args.seed, beds=args.beds, hours=args.hours, start=start,
        prefix=args.prefix.rstrip("/"),
    )  # fmt: skip
    beds = len(built.beds)
    if args.to_log is not None:
        n = runner.write_log(built, args.to_log)
        print(
            f"{args.to_log}: {n} messages, {beds} beds, {built.hours:g} h of scenario "
            f"{scenario.name!r} (seed {args.seed}; invented data)"
        )
        return 0
    host, port = _address(args.broker)
    client = runner.connect(
        host, port, client_id=args.client_id, username=args.username,
        password=_password(args), protocol=args.protocol,
    )  # fmt: skip
    stop = threading.Event()

    def on_signal(_sig: int, _frame: FrameType | None) -> None:
        stop.set()

    old = signal.signal(signal.SIGTERM, on_signal)
    wall_s = built.hours * 60.0 / args.speed  # simulated minutes / (minutes per second)
    print(
        f"publishing {len(built.messages)} messages for {beds} beds, {built.hours:g} simulated "
        f"h in about {wall_s / 60:.1f} min to {host}:{port} (invented data; payload times are "
        f"the wall clock, so at --speed {args.speed:g} a real-time service sees flows "
        f"{60 * args.speed:g}x the simulated ones)",
        flush=True,
    )

    def progress(hour: int, stats: runner.LiveStats) -> None:
        print(f"  simulated hour {hour}: {stats.published} published", flush=True)

    try:
        stats = runner.publish_live(built, client, speed=args.speed, stop=stop, on_hour=progress)
    except KeyboardInterrupt:
        stop.set()
        print("interrupted", file=sys.stderr)
        return 130
    finally:
        signal.signal(signal.SIGTERM, old)
        client.disconnect()
        client.loop_stop()
    print(f"done: {stats.published} published, {stats.confirmed} confirmed in {stats.wall_s:.1f} s")
    return 0 if stats.confirmed == stats.published else 1
