"""`make bench`: every benchmark, one after the other (`python -m benchmarks.run`).

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
    bench_takeover,
)


def main(argv: Sequence[str] | None = None) -> int:
    args = list(sys.argv[1:] if argv is None else argv)
    print(f"Python {platform.python_version()} on {platform.machine()}, {platform.system()}")
    print()
    rc = bench_intake.main(args)
    print()
    rc = bench_journal.main([]) or rc
    print()
    rc = bench_replay.main([]) or rc
    print()
    rc = bench_review.main([]) or rc
    print()
    rc = bench_service.main([]) or rc
    print()
    rc = bench_fuzz.main([]) or rc
    print()
    rc = bench_board.main([]) or rc
    rc = bench_takeover.main([]) or rc
    return rc


if __name__ == "__main__":
    raise SystemExit(main())
