"""`hourwatch replay LOG`: a log through the engine on a virtual clock."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from ..caution import CAUTION
from ..engine.effects import Effect
from ..engine.engine import Engine
from ..engine.timefmt import TimeError, parse_iso
from ..errors import UserError
from ..hourly import hourly_json, hourly_text, quality_text
from ..profile_files import load_profiles
from ..replay import replay_file
from ..rule_files import load_policy, load_rules
from ..timeline import effect_json, effect_text


def add(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    r = sub.add_parser("replay", help="replay a JSON Lines log through the engine")
    r.add_argument("log", type=Path, help="JSON Lines log: {time, topic, payload} per line")
    r.add_argument("--profiles", type=Path, default=None, help="device profile folder")
    r.add_argument("--rules", type=Path, default=None, help="rule folder (with escalation.toml)")
    r.add_argument("--hourly", action="store_true", help="print completed clock-hour totals")
    r.add_argument("--json", action="store_true", help="one JSON object per line")
    r.add_argument(
        "--until", default=None, help="run the clock on to this ISO-8601 time after the last line"
    )
    r.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    if not args.log.is_file():
        raise UserError(f"{args.log}: no such log file")
    profiles = load_profiles(args.profiles)
    until = None
    if args.until:
        try:
            until = parse_iso(args.until)
        except TimeError as exc:
            raise UserError(f"--until: {exc}") from None
    engine = Engine(profiles, load_rules(args.rules), load_policy(args.rules))
    out = sys.stdout
    if args.hourly:
        result = replay_file(args.log, engine, until=until)
        lines = hourly_json(result.engine) if args.json else hourly_text(result.engine)
        for line in lines:
            out.write(line + "\n")
    else:
        show = effect_json if args.json else effect_text

        def emit(effects: list[Effect]) -> None:
            for e in effects:
                line = show(e)
                if line is not None:
                    out.write(line + "\n")

        result = replay_file(args.log, engine, on_effects=emit, until=until)
        if not args.json:
            out.write("\n")
            for line in quality_text(result.engine):
                out.write(line + "\n")
    if not args.json:
        out.write(
            f"\n{result.messages} messages replayed, {len(result.bad_lines)} malformed "
            f"line(s) skipped.\n{CAUTION}\n"
        )
    return 0
