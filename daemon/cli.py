"""`hourwatch`: the command line. Bad input gives one line and exit status 2."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from pathlib import Path

from .engine.effects import Effect
from .engine.engine import Engine
from .engine.timefmt import TimeError, parse_iso
from .errors import UserError
from .hourly import hourly_json, hourly_text, quality_text
from .profile_files import load_profiles
from .replay import replay_file
from .rule_files import load_policy, load_rules
from .timeline import effect_json, effect_text

CAUTION = (
    "Decision support only: figures and suggestions are for the treating clinician, "
    "to be checked against local protocols and licensed practice."
)


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="hourwatch", description="Urine-output monitoring for intensive care. " + CAUTION
    )
    sub = p.add_subparsers(dest="command", required=True)
    r = sub.add_parser("replay", help="replay a JSON Lines log through the engine")
    r.add_argument("log", type=Path, help="JSON Lines log: {time, topic, payload} per line")
    r.add_argument("--profiles", type=Path, default=None, help="device profile folder")
    r.add_argument("--rules", type=Path, default=None, help="rule folder (with escalation.toml)")
    r.add_argument("--hourly", action="store_true", help="print completed clock-hour totals")
    r.add_argument("--json", action="store_true", help="one JSON object per line")
    r.add_argument(
        "--until", default=None, help="run the clock on to this ISO-8601 time after the last line"
    )
    c = sub.add_parser("check-profiles", help="validate a folder of device profiles")
    c.add_argument("folder", type=Path, nargs="?", default=None)
    return p


def _replay(args: argparse.Namespace) -> int:
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


def _check_profiles(args: argparse.Namespace) -> int:
    for p in load_profiles(args.folder):
        what = f"{p.volume.semantics}, every {p.timing.period_s} s"
        print(f"ok  {p.name:<24} {p.subscription:<32} {what}")
    return 0


def main(argv: Sequence[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    try:
        if args.command == "replay":
            return _replay(args)
        return _check_profiles(args)
    except UserError as exc:
        print(f"hourwatch: {exc}", file=sys.stderr)
        return 2
    except BrokenPipeError:
        return 0


if __name__ == "__main__":
    sys.exit(main())
