"""`hourwatch check-profiles [FOLDER]`: validate device profiles, reporting every problem
of every file at once (one line each, naming the file and the key), exit status 2 if any."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from ..engine.profiles import DEVICE_LEVEL, DeviceProfile
from ..profile_files import check_folder


def add(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    c = sub.add_parser("check-profiles", help="validate a folder of device profiles")
    c.add_argument("folder", type=Path, nargs="?", default=None)
    c.set_defaults(run=run)


def summary(p: DeviceProfile) -> str:
    what = f"{p.volume.semantics}, every {p.timing.period_s} s"
    levels = [n for n in p.topic_pattern.names if n != DEVICE_LEVEL]
    if levels:
        what += f", keeps {', '.join(levels)}"
    return f"ok  {p.name:<24} {p.subscription:<32} {what}"


def run(args: argparse.Namespace) -> int:
    profiles, problems = check_folder(args.folder)
    for p in profiles:
        print(summary(p))
    for line in problems:
        print(f"hourwatch: {line}", file=sys.stderr)
    if problems:
        files = {line.split(": ", 1)[0] for line in problems}
        print(f"hourwatch: {len(problems)} problem(s) in {len(files)} file(s); every key is "
              "explained in DEVELOPERS.md section 3", file=sys.stderr)  # fmt: skip
        return 2
    return 0
