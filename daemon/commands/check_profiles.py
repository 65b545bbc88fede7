"""`hourwatch check-profiles [FOLDER]`: validate device profiles."""

from __future__ import annotations

import argparse
from pathlib import Path

from ..profile_files import load_profiles


def add(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    c = sub.add_parser("check-profiles", help="validate a folder of device profiles")
    c.add_argument("folder", type=Path, nargs="?", default=None)
    c.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    for p in load_profiles(args.folder):
        what = f"{p.volume.semantics}, every {p.timing.period_s} s"
        print(f"ok  {p.name:<24} {p.subscription:<32} {what}")
    return 0
