"""One table for `make bench`: every headline figure beside its baseline and goal.

A benchmark adds rows as it measures (`add(Row(...))`); `benchmarks.run` prints them all
at the end with `print_table`. Each field is already text, so a benchmark says its
figure in its own unit; `met` is None where a row has no goal to meet.
"""

from __future__ import annotations

import sys
from collections.abc import Iterable
from dataclasses import dataclass
from typing import TextIO


@dataclass(frozen=True, slots=True)
class Row:
    name: str
    measured: str
    baseline: str
    ratio: str
    goal: str
    met: bool | None


ROWS: list[Row] = []  # the rows added in this process, in order


def add(row: Row) -> Row:
    ROWS.append(row)
    return row


def verdict(met: bool | None) -> str:
    return "-" if met is None else ("met" if met else "NOT met")


def format_table(rows: Iterable[Row]) -> list[str]:
    head = ("figure", "measured", "baseline", "ratio", "goal", "met")
    body = [(r.name, r.measured, r.baseline, r.ratio, r.goal, verdict(r.met)) for r in rows]
    widths = [max(len(line[i]) for line in [head, *body]) for i in range(len(head))]

    def fmt(cells: tuple[str, ...]) -> str:
        return "  ".join(c.ljust(w) for c, w in zip(cells, widths, strict=True)).rstrip()

    rule = "  ".join("-" * w for w in widths)
    return [fmt(head), rule, *(fmt(line) for line in body)]


def print_table(rows: Iterable[Row] | None = None, out: TextIO | None = None) -> None:
    out = out or sys.stdout
    for line in format_table(ROWS if rows is None else rows):
        print(line, file=out)
