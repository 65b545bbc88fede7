"""`hourwatch demo`: broker, service and a simulated ward, end to end."""

from __future__ import annotations

import argparse
from pathlib import Path

from ..errors import UserError


def add(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    d = sub.add_parser(
        "demo",
        help="run a simulated ward through a local broker and the live service",
        description="Starts a local MQTT broker, the service with a temporary journal and a "
        "simulated ward of eight beds (invented patients) on one accelerated clock; prints a "
        "ward view and the alarms as they are published, acknowledges some like a nurse, "
        "serves the ward board (its address and a demo login are printed), and ends with a "
        "summary and the commands to review the night.",
    )
    d.add_argument("--sim-hours", type=float, default=24.0, help="simulated hours (default 24)")
    d.add_argument(
        "--speed", type=float, default=12.0,
        help="simulated minutes per wall-clock second (default 12: a day in 2 minutes)",
    )  # fmt: skip
    d.add_argument("--seed", type=int, default=7)
    d.add_argument("--scenario", type=Path, default=None, help="scenario file (TOML)")
    d.add_argument("--dir", type=Path, default=None, help="folder for the journal and logs")
    d.add_argument("--no-board", action="store_true", help="do not serve the ward board")
    d.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    if not 0 < args.sim_hours <= 24 * 7:
        raise UserError("--sim-hours: give a number of hours between 0 and 168")
    if not 0.1 <= args.speed <= 120:
        raise UserError("--speed: give simulated minutes per second between 0.1 and 120")
    from ..demo import run_demo  # the demo pulls in the service and the simulator

    return run_demo(args.sim_hours, args.speed, args.seed, args.scenario, keep_dir=args.dir,
                    board=not args.no_board)  # fmt: skip
