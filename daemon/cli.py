"""`hourwatch`: the command line. Bad input gives one line and exit status 2."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence

from .caution import CAUTION
from .commands import (
    annotate,
    check,
    check_profiles,
    demo,
    explain,
    export,
    new_profile,
    notify_test,
    probe,
    replay,
    run,
    simulate,
    user,
)
from .errors import UserError

# Each command module adds its own parser; add new commands to this list.
COMMANDS = [
    replay, check_profiles, new_profile, export, run, check, probe, simulate, demo, explain,
    annotate, notify_test, user,
]  # fmt: skip


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="hourwatch", description="Urine-output monitoring for intensive care. " + CAUTION
    )
    sub = p.add_subparsers(dest="command", required=True)
    for command in COMMANDS:
        command.add(sub)
    return p


def main(argv: Sequence[str] | None = None) -> int:
    try:
        # inside: an argument's type (a postgresql:// URL) may refuse it with a UserError
        args = _parser().parse_args(argv)
        code: int = args.run(args)
        return code
    except UserError as exc:
        print(f"hourwatch: {exc}", file=sys.stderr)
        return 2
    except BrokenPipeError:
        return 0


if __name__ == "__main__":
    sys.exit(main())
