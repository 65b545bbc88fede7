"""`hourwatch explain SOURCE ALARM_ID`: why one alarm fired, from a replay."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from ..journal_api import target
from ..profile_files import load_profiles
from ..review.explain import explain, text
from ..rule_files import load_advice, load_policy, load_rules
from ..sources import require
from .replay import UNTIL_HELP, until_arg


def add(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    c = sub.add_parser(
        "explain",
        help="why one alarm fired: rule, windows, readings, suppression, lifecycle",
        description="Replay SOURCE to the moment ALARM_ID became active and show the rule, "
        "the windows it evaluated (recomputed, beside the alarm's own evidence), the readings "
        "behind them with their cleaning outcome, suppression, and what happened after.",
    )
    c.add_argument("source", type=target,
                   help="recorded messages (JSON Lines log, journal file or postgresql:// URL)")
    c.add_argument("alarm_id", help="as `hourwatch replay` prints it: BED/RULE/TIMESTAMP")
    c.add_argument("--profiles", type=Path, default=None, help="device profile folder")
    c.add_argument("--rules", type=Path, default=None, help="rule folder (with escalation.toml)")
    c.add_argument("--json", action="store_true", help="one JSON object")
    c.add_argument("--until", default=None, help=UNTIL_HELP)
    c.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    require(args.source)
    profiles = load_profiles(args.profiles)
    rules = load_rules(args.rules)
    policy = load_policy(args.rules)
    d = explain(args.source, args.alarm_id, profiles, rules, policy, progress=sys.stderr,
                advice=load_advice(args.rules), until=until_arg(args.until))  # fmt: skip
    if args.json:
        sys.stdout.write(json.dumps(d, indent=1) + "\n")
    else:
        sys.stdout.write("\n".join(text(d)) + "\n")
    return 0
