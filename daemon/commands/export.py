"""`hourwatch export JOURNAL --from ISO --to ISO [--bed BED] [--out FILE] [--config FILE]`.

JOURNAL is a journal file or a PostgreSQL journal's postgresql:// URL. Writes the journal's
messages received in [--from, --to) in the JSON Lines log format
(`{"time", "topic", "payload"}` per line, as daemon/logfile.py reads), so `hourwatch replay`
gives the same output for the export as for the journal itself. Times go out to the
microsecond the journal holds. Never writes to the journal (read-only connection).

Refused content is redacted: a message the engine refuses for its content alone (a
context with a field it does not know, a bed id that is not an identifier, a payload
that does not decode) is journaled as received, but exported with its payload replaced
by the withheld marker and its reason, and any non-identifier topic level replaced, so
nothing a site should never have sent leaves in an export; a replay of the export still
refuses it for the same reason.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import TextIO

from ..config import load_config
from ..engine.engine import ID_PATTERN, Engine
from ..engine.outcomes import withheld
from ..engine.timefmt import TimeError, iso, parse_iso
from ..errors import UserError
from ..journal import journal_items
from ..journal_api import PgUrl, target
from ..logfile import BadLine, LogRecord
from ..profile_files import load_profiles
from ..sources import require


def add(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    e = sub.add_parser("export", help="write a journal's messages as a JSON Lines log")
    e.add_argument("journal", type=target,
                   help="journal of `hourwatch run`: its file or its postgresql:// URL")
    e.add_argument(
        "--from", dest="t_from", required=True, help="ISO-8601 receive time with offset (kept)"
    )
    e.add_argument("--to", dest="t_to", required=True, help="ISO-8601 receive time (excluded)")
    e.add_argument("--bed", default=None, help="only this bed's messages (topics, meters, acks)")
    e.add_argument("--prefix", default=None, help="topic prefix of bed and ack topics")
    e.add_argument("--out", type=Path, default=None, help="write here instead of stdout")
    e.add_argument(
        "--config",
        type=Path,
        default=None,
        help="the service's config: its topic prefix, device profiles and identifier "
        "pattern decide what is redacted",
    )
    e.set_defaults(run=run)


def _time(option: str, text: str) -> float:
    try:
        return parse_iso(text)
    except TimeError as exc:
        raise UserError(f"{option}: {exc}") from None


def log_line(rec: LogRecord) -> str:
    return json.dumps({"time": iso(rec.time.timestamp()), "topic": rec.topic,
                       "payload": rec.payload})  # fmt: skip


class Redactor:
    """Refused content out, reason in (see the module's docstring)."""

    def __init__(self, engine: Engine) -> None:
        self.engine = engine
        self.redacted = 0

    def __call__(self, rec: LogRecord) -> LogRecord:
        refused = self.engine.screen(rec.topic, rec.payload)
        if refused is None:
            return rec
        self.redacted += 1
        return LogRecord.model_construct(
            time=rec.time, topic=self.engine.echo_topic(rec.topic), payload=withheld(refused[0])
        )


def _write(
    items: Iterator[tuple[int, LogRecord] | BadLine], out: TextIO, name: str, redact: Redactor
) -> int:
    n = 0
    for item in items:
        if isinstance(item, BadLine):
            print(f"{name}: message {item.line_no} not exported: {item.reason}", file=sys.stderr)
            continue
        out.write(log_line(redact(item[1])) + "\n")
        n += 1
    return n


def _redactor(args: argparse.Namespace) -> tuple[Redactor, str]:
    prefix, profiles, pattern = "hourwatch", None, ID_PATTERN
    if args.config is not None:
        cfg = load_config(args.config)
        prefix, profiles, pattern = cfg.topic_prefix, cfg.profiles, cfg.identifiers.pattern
    if args.prefix is not None:
        prefix = args.prefix
    return Redactor(
        Engine(load_profiles(profiles), topic_prefix=prefix, id_pattern=pattern)
    ), prefix


def run(args: argparse.Namespace) -> int:
    t0 = _time("--from", args.t_from)
    t1 = _time("--to", args.t_to)
    if t1 <= t0:
        raise UserError(f"--to ({args.t_to}) must be later than --from ({args.t_from})")
    require(args.journal, "journal file")
    redact, prefix = _redactor(args)
    if isinstance(args.journal, PgUrl):
        from ..journal_pg import journal_items as pg_items

        items = pg_items(args.journal, t0, t1, args.bed, prefix=prefix)
    else:
        items = journal_items(args.journal, t0, t1, args.bed, prefix=prefix)
    if args.out is None:
        n = _write(items, sys.stdout, str(args.journal), redact)
        sys.stdout.flush()
    else:
        n = _write_file(items, args.out, str(args.journal), redact)
    what = f" for bed {args.bed}" if args.bed else ""
    held = f", {redact.redacted} refused one(s) redacted" if redact.redacted else ""
    print(f"{n} message(s){what} exported from {args.journal}{held}", file=sys.stderr)
    return 0


def _write_file(
    items: Iterator[tuple[int, LogRecord] | BadLine], out: Path, name: str, redact: Redactor
) -> int:
    """All or nothing: a temporary file beside --out, renamed over it when complete."""
    folder = out.parent if str(out.parent) else Path(".")
    try:
        fd, tmp = tempfile.mkstemp(dir=folder, prefix=f".{out.name}.", suffix=".part")
    except OSError as exc:
        raise UserError(f"{out}: cannot write: {exc.strerror}") from None
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            n = _write(items, fh, name, redact)
        os.replace(tmp, out)
    except OSError as exc:
        Path(tmp).unlink(missing_ok=True)
        raise UserError(f"{out}: cannot write: {exc.strerror}") from None
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return n
