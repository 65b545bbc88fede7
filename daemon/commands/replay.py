"""`hourwatch replay LOG`: a log through the engine on a virtual clock; with
`--report` an HTML review report, with `--compare`/`--compare-profiles` a what-if
comparison of two rule sets or two device profile sets. `--bind DEVICE[=BED]` replays a
capture that holds no bed context (`hourwatch probe --save`), `--rejects` lists every
rejected line with its reason, detail and payload."""

from __future__ import annotations

import argparse
import json
import re
import sqlite3
import sys
from collections.abc import Iterator
from datetime import tzinfo
from html import escape
from pathlib import Path
from typing import TYPE_CHECKING

from ..caution import CAUTION
from ..config import zone_info
from ..engine.effects import Effect
from ..engine.engine import ID_PATTERN, Engine
from ..engine.timefmt import TimeError, parse_iso
from ..errors import UserError
from ..hourly import hourly_json, hourly_text, quality_text
from ..journal_api import target
from ..profile_files import load_devices, load_profiles
from ..recovery import series_keep_s
from ..replay import Records, RejectLog, bench_beds, replay_file
from ..rule_files import load_advice, load_policy, load_rules
from ..sources import require
from ..timeline import effect_json, effect_text

if TYPE_CHECKING:
    from ..review.plots import BedPicture


def add(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    r = sub.add_parser("replay", help="replay a JSON Lines log through the engine")
    r.add_argument("log", type=target,
                   help="recorded messages: a JSON Lines log, a journal file or a "
                   "postgresql:// journal URL")  # fmt: skip
    r.add_argument("--profiles", type=Path, default=None, help="device profile folder")
    r.add_argument("--rules", type=Path, default=None, help="rule folder (with escalation.toml)")
    r.add_argument("--hourly", action="store_true", help="print completed clock-hour totals")
    r.add_argument("--json", action="store_true", help="one JSON object per line")
    r.add_argument(
        "--until", default=None, help=UNTIL_HELP
    )
    r.add_argument(
        "--report",
        type=Path,
        default=None,
        metavar="OUT.html",
        help="write a self-contained HTML review report",
    )
    r.add_argument(
        "--plots",
        type=Path,
        default=None,
        metavar="DIR",
        help="with --report: also write each bed's plot as DIR/BED.png",
    )
    r.add_argument(
        "--compare",
        type=Path,
        default=None,
        metavar="RULES_B",
        help="what-if: replay again under this rule folder, compare with --rules",
    )
    r.add_argument(
        "--compare-profiles",
        type=Path,
        default=None,
        metavar="PROFILES_B",
        help="what-if: replay again with this device profile folder",
    )
    r.add_argument(
        "--timezone",
        default="UTC",
        metavar="ZONE",
        help="local time zone for the clock times on pages (IANA name; default UTC)",
    )
    r.add_argument(
        "--bind",
        action="append",
        default=[],
        metavar="DEVICE[=BED]",
        help="bind a meter to a temporary bed at the log's start (a capture without a bed "
        "context); repeat for more meters; default beds bench-1, bench-2, ...",
    )
    r.add_argument(
        "--weight",
        type=float,
        default=None,
        metavar="KG",
        help="with --bind: the temporary beds' weight (without one, weight-based rules do not run)",
    )
    r.add_argument(
        "--rejects",
        action="store_true",
        help="list every rejected line with its reason, detail and payload",
    )
    r.add_argument(
        "--devices", type=Path, default=None, metavar="FILE", help="per-meter calibration file"
    )
    r.set_defaults(run=run)


UNTIL_HELP = "run the clock on to this ISO-8601 time after the last line"


def until_arg(text: str | None) -> float | None:
    """--until: an ISO-8601 time with its offset, as epoch seconds."""
    if not text:
        return None
    try:
        return parse_iso(text)
    except TimeError as exc:
        raise UserError(f"--until: {exc}") from None


def _zone(name: str) -> tzinfo:
    try:
        return zone_info(name)
    except ValueError as exc:
        raise UserError(f"--timezone: {exc}") from None


def _where(folder: Path | None) -> str:
    return str(folder) if folder else "shipped defaults"


def binds(specs: list[str]) -> list[tuple[str, str]]:
    """--bind DEVICE[=BED] options as (device, bed); a meter without a bed gets its own."""
    out: list[tuple[str, str]] = []
    pattern = re.compile(ID_PATTERN)
    for k, spec in enumerate(specs, start=1):
        device, _, bed = spec.partition("=")
        bed = bed or f"bench-{k}"
        if not device or len(device) > 128 or "/" in device:
            raise UserError(f"--bind: {spec!r}: a meter id (1-128 characters, no '/') first")
        if not pattern.match(bed):
            raise UserError(f"--bind: {spec!r}: the bed {bed!r} is not an identifier "
                            "(letters, digits, '-', '_', '.')")  # fmt: skip
        if any(device == d for d, _ in out):
            raise UserError(f"--bind: meter {device!r} named twice")
        out.append((device, bed))
    return out


def run(args: argparse.Namespace) -> int:
    require(args.log, "log file")
    if args.plots and not args.report:
        raise UserError("--plots needs --report")
    until = until_arg(args.until)
    if args.weight is not None and not 0 < args.weight <= 400:
        raise UserError("--weight: a body weight in kg, above 0 and at most 400")
    if args.weight is not None and not args.bind:
        raise UserError("--weight is the weight of the beds --bind makes: name a meter")
    bound = binds(args.bind)
    review = args.compare or args.compare_profiles or args.report
    used = [o for o, on in (("--bind", bound), ("--rejects", args.rejects),
                            ("--devices", args.devices)) if on]  # fmt: skip
    if review and used:
        raise UserError(f"{used[0]} works with the timeline and --hourly, not with a report or "
                        "a comparison (add a bed context to the log for those)")  # fmt: skip
    if args.compare or args.compare_profiles:
        return _compare(args, until)
    if args.report:
        return _report(args, until, comparison=None)
    profiles = load_profiles(args.profiles)
    rules = load_rules(args.rules)
    rejects = RejectLog() if args.rejects else None
    engine = Engine(
        profiles,
        rules,
        load_policy(args.rules),
        observe=rejects.observe if rejects else None,
        advice_policy=load_advice(args.rules),
        timezone=_zone(args.timezone),
        calibration=load_devices(args.devices),
        # the timeline needs no old minutes (--hourly lists every hour): kept as the
        # service keeps them, so a year replays in the memory of a day
        series_keep_s=None if args.hourly else series_keep_s(rules),
    )
    bench = bench_beds(bound, args.weight, engine.prefix) if bound else None

    def follow(records: Records) -> Records:
        records = bench(records) if bench else records
        return rejects.records(records) if rejects else records

    wrap = follow if bench or rejects else None  # None: replay need not build records

    out = sys.stdout
    if args.hourly:
        result = replay_file(args.log, engine, until=until, wrap=wrap,
                             on_effects=rejects.on_effects if rejects else None)  # fmt: skip
        lines = hourly_json(result.engine) if args.json else hourly_text(result.engine)
        for line in lines:
            out.write(line + "\n")
    else:
        show = effect_json if args.json else effect_text
        if not args.json and args.timezone != "UTC":
            out.write(f"Times at the left are UTC; clock times inside the messages (pages, "
                      f"lab and sample times) are {args.timezone}.\n")  # fmt: skip

        def emit(effects: list[Effect]) -> None:
            if rejects is not None:
                rejects.on_effects(effects)
            for e in effects:
                line = show(e)
                if line is not None:
                    out.write(line + "\n")

        result = replay_file(args.log, engine, on_effects=emit, until=until, wrap=wrap)
        if not args.json:
            out.write("\n")
            for line in quality_text(result.engine):
                out.write(line + "\n")
    if rejects is not None:
        if args.json:
            for row in rejects.rows:
                out.write(json.dumps(row.to_json()) + "\n")
        else:
            out.write(f"\nRejected lines: {len(rejects.rows)}\n")
            for row in rejects.rows:
                out.write("\n".join(row.text(args.log)) + "\n")
    if not args.json:
        out.write(
            f"\n{result.messages} messages replayed, {len(result.bad_lines)} malformed "
            f"line(s) skipped.\n{CAUTION}\n"
        )
    return 0


def _report(args: argparse.Namespace, until: float | None, comparison: str | None) -> int:
    # imported here: matplotlib is only needed for a report
    from ..review import report as html_report
    from ..review.explain import review
    from ..review.recorder import with_progress

    profiles = load_profiles(args.profiles)
    rules = load_rules(args.rules)
    if args.plots is not None:  # before the replay, which may take a while
        _writable_folder(args.plots)
    rv = review(
        args.log,
        profiles,
        rules,
        load_policy(args.rules),
        advice=load_advice(args.rules),
        until=until,
        progress=sys.stderr,
        warn=sys.stderr,
    )
    inp = html_report.ReportInput(
        rv,
        args.log,
        _where(args.rules),
        _where(args.profiles),
        rv.bad_lines,
        comparison or "",
    )

    def bar(items: list[BedPicture]) -> Iterator[BedPicture]:
        return with_progress(items, len(items), "plots", sys.stderr, every=1)

    try:
        text = html_report.render(inp, progress=bar, plots_dir=args.plots)
    except OSError as exc:  # a plot file that cannot be written
        raise UserError(f"{args.plots}: cannot write a plot: {exc.strerror}") from None
    try:
        html_report.write(args.report, text)
    except OSError as exc:
        raise UserError(f"{args.report}: cannot write: {exc.strerror}") from None
    raised = sum(1 for e in rv.episodes if e.raised)
    assert rv.engine is not None
    print(
        f"{args.report}: report of {rv.messages} messages, {len(rv.engine.beds)} bed(s), "
        f"{raised} alarm(s) raised.\n{CAUTION}"
    )
    return 0


def _writable_folder(folder: Path) -> None:
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise UserError(f"{folder}: cannot make the plots folder: {exc.strerror}") from None


def _compare(args: argparse.Namespace, until: float | None) -> int:
    from ..review import compare as what_if
    from ..review import verdicts
    from ..review.acks import AckCarrier
    from ..review.episodes import episodes
    from ..review.recorder import replay_alarms, warn_about

    prof_a = load_profiles(args.profiles)
    prof_b = load_profiles(args.compare_profiles) if args.compare_profiles else prof_a
    rules_a, pol_a = load_rules(args.rules), load_policy(args.rules)
    rules_b = load_rules(args.compare) if args.compare else rules_a
    pol_b = load_policy(args.compare) if args.compare else pol_a
    label_a = f"rules {_where(args.rules)}; profiles {_where(args.profiles)}"
    label_b = (
        f"rules {_where(args.compare or args.rules)}; "
        f"profiles {_where(args.compare_profiles or args.profiles)}"
    )
    runs = []
    adv_a = load_advice(args.rules)
    adv_b = load_advice(args.compare) if args.compare else adv_a
    sides = (("A", prof_a, rules_a, pol_a, adv_a, label_a),
             ("B", prof_b, rules_b, pol_b, adv_b, label_b))  # fmt: skip
    carriers = {"a": AckCarrier(), "b": AckCarrier()}
    for name, prof, rules, pol, adv, label in sides:
        rec, res = replay_alarms(
            args.log,
            prof,
            rules,
            pol,
            progress=sys.stderr,
            label=f"replay {name}",
            until=until,
            advice=adv,
            acks=carriers[name.lower()],
        )
        warn_about(res, args.log, sys.stderr if name == "A" else None)
        bound = {b: s.bound_at for b, s in res.engine.beds.items()}
        runs.append(what_if.summarize(label, episodes(rec.events), bound, rec.end_time))
    store = verdicts.store_path(args.log)
    try:
        anns = verdicts.load(store)
    except (sqlite3.Error, ValueError, OSError) as exc:  # must not hide the comparison
        print(f"{store}: annotations not read: {exc}", file=sys.stderr)
        anns = []
    c = what_if.compare(runs[0], runs[1], anns)
    c["recorded_acks"] = {k: v.counts() for k, v in carriers.items()}
    lines = what_if.text(c)
    if args.json:
        sys.stdout.write(json.dumps(c) + "\n")
    else:
        sys.stdout.write("\n".join(lines) + f"\n\n{CAUTION}\n")
    if args.report:
        section = (
            '<h2 id="what-if">What-if comparison</h2><pre>' + escape("\n".join(lines)) + "</pre>"
        )
        return _report(args, until, comparison=section)
    return 0
