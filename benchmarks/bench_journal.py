"""Journal throughput: durable appends, reads for recovery/export, pruning.

Measures, in one run, on the same simulated ~120-byte JSON meter messages:

- journal x16:  `SqliteJournal.append_messages` in batches of 16 (one transaction, WAL fsynced:
                synchronous=FULL), the service's flush size (FIELD-NOTES);
- baseline x16: the same bytes appended to a plain file with one `os.fdatasync` per 16
                messages (the call SQLite makes on Linux). The journal can beat it: after a
                checkpoint the WAL is overwritten in place, so its sync flushes no file size;
- journal x1:   one message per transaction, for reference;
- read:         `SqliteJournal.messages_between` (what recovery reads) and `journal_records`
                (log records, what replay and export read) over everything written;
- prune:        `SqliteJournal.prune` of old rows in batches of 2,000, and the longest single
                batch, i.e. the longest a prune holds the write lock.

Throughput figures are the best of N runs (time.perf_counter); batch latencies are over all
runs. Benchmarks are not tests: nothing here asserts a time. All data is simulated.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import tempfile
import time
from collections.abc import Callable, Sequence
from pathlib import Path

from benchmarks.table import Row, add
from daemon.journal import DAY_S, SqliteJournal, journal_records

T0 = 1_773_446_400.0  # 2026-03-14T00:00:00Z, an invented night
Rows = list[tuple[float, str, bytes, int]]


def make_rows(n: int, t0: float = T0) -> Rows:
    rows = []
    for i in range(n):
        dev = f"rc-{i % 100:04d}"
        body = {"time": "2026-03-14T00:00:00Z", "volume_ml": 100.0 + i % 997 / 10,
                "unit": "mL", "device_id": dev, "seq": i // 100, "status": "ok"}  # fmt: skip
        rows.append((t0 + i * 0.01, f"meters/{dev}/volume", json.dumps(body).encode(), 1))
    return rows


def _journal_append(path: Path, rows: Rows, size: int) -> list[float]:
    """Seconds per batch."""
    lat = []
    with SqliteJournal(path) as j:
        for k in range(0, len(rows), size):
            t = time.perf_counter()
            j.append_messages(rows[k : k + size])
            lat.append(time.perf_counter() - t)
    return lat


def _file_append(path: Path, rows: Rows, size: int) -> list[float]:
    lat = []
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o600)
    try:
        for k in range(0, len(rows), size):
            t = time.perf_counter()
            batch = rows[k : k + size]
            chunk = b"".join(f"{r[0]}\t{r[1]}\t".encode() + r[2] + b"\n" for r in batch)
            os.write(fd, chunk)
            os.fdatasync(fd)  # what SQLite calls on Linux
            lat.append(time.perf_counter() - t)
    finally:
        os.close(fd)
    return lat


def _best_rate(n: int, runs: list[list[float]]) -> float:
    return n / min(sum(r) for r in runs)


def _ms(values: list[float], q: float) -> float:
    return statistics.quantiles(values, n=100)[int(q) - 1] * 1000 if len(values) > 1 else 0.0


def measure(n: int, repeats: int, folder: Path) -> list[str]:
    rows = make_rows(n)
    out = [f"SqliteJournal: {n} messages of ~{len(rows[0][2])} bytes, best of {repeats} runs"]
    out.append(f"{'path':<34}{'msg/s':>10}{'batch p50 ms':>14}{'batch p99 ms':>14}")
    paths = (
        ("journal, batches of 16 (fsync)", _journal_append, 16, n),
        ("baseline: file + fdatasync per 16", _file_append, 16, n),
        ("journal, 1 per transaction", _journal_append, 1, n // 8),
    )
    runs: dict[str, list[list[float]]] = {name: [] for name, *_ in paths}
    for r in range(repeats):  # interleaved, so machine noise falls on every path alike
        for name, fn, size, count in paths:
            runs[name].append(fn(folder / f"{size}-{fn.__name__}-{r}", rows[:count], size))
    results = {}
    for name, _, _, count in paths:
        lat = [x for run in runs[name] for x in run]
        results[name] = _best_rate(count, runs[name])
        out.append(f"{name:<34}{results[name]:>10,.0f}{_ms(lat, 50):>14.2f}{_ms(lat, 99):>14.2f}")
    ratio = results[paths[0][0]] / results[paths[1][0]]
    out.append(f"journal x16 / baseline: {ratio:.2f}")
    add(Row("journal append, batches of 16 (fsync)", f"{results[paths[0][0]]:,.0f} msg/s",
            f"{results[paths[1][0]]:,.0f} msg/s file + fdatasync", f"{ratio:.2f} x",
            "no goal set", None))  # fmt: skip

    # reads, over one journal holding every message
    path = folder / "read.db"
    _journal_append(path, rows, 16)
    with SqliteJournal(path) as j:
        best = min(_timed(lambda: sum(1 for _ in j.messages_between(None, None)))
                   for _ in range(repeats))  # fmt: skip
    out.append(f"{'read: messages_between (bytes)':<34}{n / best:>10,.0f}")
    best = min(_timed(lambda: sum(1 for _ in journal_records(path))) for _ in range(repeats))
    out.append(f"{'read: journal_records (log records)':<34}{n / best:>10,.0f}")

    # prune: everything is older than the retention
    with _TimedPrune(path, retention_days=1) as j:
        t = time.perf_counter()
        deleted = j.prune(T0 + 10 * DAY_S, batch=2000)
        total = time.perf_counter() - t
        lat = j.batch_s
    out.append(
        f"prune: {deleted} rows in {len(lat)} transactions of <=2000 rows, "
        f"{deleted / total:,.0f} rows/s; write lock held per batch: median "
        f"{statistics.median(lat) * 1000:.1f} ms, longest {max(lat) * 1000:.1f} ms"
    )
    return out


class _TimedPrune(SqliteJournal):
    """Times each prune transaction: the longest a prune keeps another writer waiting."""

    def __init__(self, path: Path, *, retention_days: float) -> None:
        super().__init__(path, retention_days=retention_days)
        self.batch_s: list[float] = []

    def _delete_batch(self, table: str, col: str, cutoff: float, batch: int) -> int:
        t = time.perf_counter()
        n = super()._delete_batch(table, col, cutoff, batch)
        self.batch_s.append(time.perf_counter() - t)
        return n


def _timed(fn: Callable[[], object]) -> float:
    t = time.perf_counter()
    fn()
    return time.perf_counter() - t


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="journal append/read/prune throughput")
    ap.add_argument("--messages", type=int, default=16_000)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--dir", type=Path, default=None, help="where to write (default: a temp dir)")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory(dir=args.dir) as tmp:
        print("\n".join(measure(args.messages, args.repeats, Path(tmp))))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
