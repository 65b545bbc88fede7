"""`hourwatch annotate SOURCE ALARM_ID --actionable yes|no`: a reviewer's verdict."""

from __future__ import annotations

import argparse
import sqlite3
import sys
from pathlib import Path

from ..engine.rules import canonical_alarm_id
from ..errors import UserError
from ..journal_api import target
from ..profile_files import load_profiles
from ..review import verdicts
from ..review.episodes import episodes
from ..review.explain import after_the_end, parse_alarm_id
from ..review.recorder import replay_alarms
from ..rule_files import load_advice, load_policy, load_rules
from ..sources import require
from .replay import UNTIL_HELP, until_arg


def add(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    c = sub.add_parser(
        "annotate",
        help="store a reviewer's verdict on one alarm (SOURCE.annotations.sqlite)",
        description="Record whether an alarm was actionable. The verdict is kept in "
        "SOURCE.annotations.sqlite beside the source (in the journal's own database for a "
        "postgresql:// URL); a later verdict on the same alarm replaces the earlier one. "
        "`replay --compare` counts them per rule set.",
    )
    c.add_argument("source", type=target,
                   help="recorded messages (JSON Lines log, journal file or postgresql:// URL)")
    c.add_argument("alarm_id", help="as `hourwatch replay` prints it: BED/RULE/TIMESTAMP")
    c.add_argument(
        "--actionable",
        required=True,
        choices=["yes", "no"],
        help="did the alarm call for a clinical action?",
    )
    c.add_argument("--note", default=None, help="free text (no patient identifiers)")
    c.add_argument("--profiles", type=Path, default=None, help="device profile folder")
    c.add_argument(
        "--rules", type=Path, default=None, help="rule folder the alarm was raised under"
    )
    c.add_argument("--until", default=None, help=UNTIL_HELP)
    c.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    require(args.source)
    parse_alarm_id(args.alarm_id)
    args.alarm_id = canonical_alarm_id(args.alarm_id)  # an old rule id names the same alarm
    if args.note is not None and len(args.note) > 2000:
        raise UserError("--note: at most 2000 characters")
    rules = load_rules(args.rules)
    until = until_arg(args.until)
    rec, _ = replay_alarms(
        args.source,
        load_profiles(args.profiles),
        rules,
        load_policy(args.rules),
        progress=sys.stderr,
        advice=load_advice(args.rules),
        label="annotate",
        until=until,
    )
    ep = next((e for e in episodes(rec.events) if e.alarm_id == args.alarm_id), None)
    if ep is None:
        hint = after_the_end(args.alarm_id, rec, until)
        raise UserError(f"no alarm {args.alarm_id!r} in {args.source} under these rules{hint}")
    start, end = (ep.activated if ep.activated is not None else ep.onset), ep.ended
    path = verdicts.store_path(args.source)
    ann = verdicts.Annotation(
        ep.alarm_id,
        ep.bed,
        ep.rule,
        start,
        end,
        args.actionable == "yes",
        args.note,
        verdicts.now_iso(),
    )
    try:
        before = verdicts.put(path, ann)
        total = len(verdicts.load(path))
    except (sqlite3.Error, ValueError, OSError) as exc:
        raise UserError(f"{path}: cannot store the annotation: {exc}") from None
    verdict = "actionable" if ann.actionable else "not actionable"
    print(f"{ep.alarm_id}: {verdict} (stored in {path}; {total} annotation(s) in all)")
    if before is not None:
        was = "actionable" if before.actionable else "not actionable"
        print(f"  replaced the earlier verdict of {before.annotated_at}: {was}")
    return 0
