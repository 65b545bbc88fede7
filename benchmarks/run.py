"""`make bench`: every benchmark, one after the other (`python -m benchmarks.run`),
then one table of every headline figure beside its baseline and goal.

Benchmarks report throughput beside a baseline measured in the same run; they
assert nothing and are never part of `make test`.
"""

from __future__ import annotations

import platform
import sys
from collections.abc import Sequence

from benchmarks import (
    bench_board,
    bench_fuzz,
    bench_intake,
    bench_journal,
    bench_replay,
    bench_review,
    bench_service,
    bench_snapshot,
    bench_takeover,
    table,
)


def main(argv: Sequence[str] | None = None) -> int:
    args = list(sys.argv[1:] if argv is None else argv)
    print(f"Python {platform.python_version()} on {platform.machine()}, {platform.system()}")
    print()
    rc = bench_intake.main(args)
    print()
    rc = bench_journal.main([]) or rc
    print()
    rc = bench_replay.main(["--no-table"]) or rc
    print()
    rc = bench_review.main([]) or rc
    print()
    rc = bench_service.main([]) or rc
    print()
    rc = bench_snapshot.main([]) or rc
    print()
    rc = bench_fuzz.main([]) or rc
    print()
    rc = bench_board.main([]) or rc
    rc = bench_takeover.main([]) or rc
    print()
    print("Summary: each figure beside its baseline (measured in the same run) and its goal")
    table.print_table()
    return rc


if __name__ == "__main__":
    raise SystemExit(main())
