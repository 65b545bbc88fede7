"""The bed page's chart, drawn on the server as SVG: rolling hourly output over the last
24 h against the rule thresholds, with minutes without data, bag changes and alarm spans.

Plain SVG with classes styled by board.css (the palette's colours), a title and a
description for screen readers, and no script. Alarm spans sit in one lane per priority,
so the lane says the priority whatever the colour looks like.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from html import escape

import numpy as np
import numpy.typing as npt

from ..engine.numbers import num
from ..engine.series import UNKNOWN

WIDTH, HEIGHT = 960, 330
LEFT, RIGHT, TOP, BOTTOM = 64, 150, 64, 40  # margins: lanes on top, threshold labels right
LANES = ("high", "medium", "low")
LANE_H = 14


@dataclass(frozen=True)
class Threshold:
    ml_h: float
    label: str  # e.g. "200 mL/h: pod-hourly, high-output"


@dataclass(frozen=True)
class Span:
    start: float
    end: float
    priority: str  # "high", "medium", "low" (info is not drawn)
    label: str


def rolling_hourly(vol: npt.NDArray[np.float64], lead: int = 59) -> npt.NDArray[np.float64]:
    """Volume of the 60 minutes ending at each minute; `vol` starts `lead` minutes early."""
    cum = np.concatenate([[0.0], np.cumsum(vol)])
    hi = np.arange(lead + 1, vol.size + 1)
    out: npt.NDArray[np.float64] = cum[hi] - cum[np.maximum(hi - 60, 0)]
    return out


def _nice_step(top: float) -> float:
    raw = top / 5
    mag = 10 ** math.floor(math.log10(raw)) if raw > 0 else 1.0
    return next(m * mag for m in (1, 2, 2.5, 5, 10) if m * mag >= raw)


def _runs(mask: npt.NDArray[np.bool_]) -> list[tuple[int, int]]:
    if not mask.any():
        return []
    d = np.diff(np.concatenate([[0], mask.astype(np.int8), [0]]))
    return list(zip(np.flatnonzero(d == 1).tolist(), np.flatnonzero(d == -1).tolist(),
                    strict=True))  # fmt: skip


def render(
    t0: float,
    vol: npt.NDArray[np.float64],
    states: npt.NDArray[np.uint8],
    latest_minute: int | None,
    thresholds: Sequence[Threshold],
    bag_changes: Sequence[float],
    spans: Sequence[Span],
    clock: Callable[[float], str],
    title: str,
) -> str:
    """`vol`/`states`: one entry per minute from t0 - 59 min (the first window's lead) to
    t0 + 24 h; minutes after `latest_minute` are not drawn (not known yet)."""
    minutes = vol.size - 59
    t1 = t0 + minutes * 60.0
    hourly = rolling_hourly(vol)
    st = states[59:]
    # the window ending at minute t0/60 + i is known once the latest reading covers it
    t0_min = int(t0 // 60)
    known_to = 0 if latest_minute is None else max(0, min(minutes, latest_minute - t0_min + 1))
    shown = hourly[:known_to]
    top = max([*(float(x) for x in shown[-minutes:]), *(t.ml_h for t in thresholds), 50.0])
    step = _nice_step(top * 1.1)
    ymax = step * math.ceil(top * 1.1 / step)
    pw, ph = WIDTH - LEFT - RIGHT, HEIGHT - TOP - BOTTOM

    def x(t: float) -> float:
        return LEFT + (t - t0) / (t1 - t0) * pw

    def y(v: float) -> float:
        return TOP + ph - v / ymax * ph

    out: list[str] = []
    desc = _describe(t0, shown, thresholds, bag_changes, spans, clock)
    out.append(f'<svg class="chart" viewBox="0 0 {WIDTH} {HEIGHT}" role="img" '
               f'aria-labelledby="chart-title chart-desc" xmlns="http://www.w3.org/2000/svg">')
    out.append(f'<title id="chart-title">{escape(title)}</title>')
    out.append(f'<desc id="chart-desc">{escape(desc)}</desc>')
    out.append(f'<rect class="plot" x="{LEFT}" y="{TOP}" width="{pw}" height="{ph}"/>')
    # minutes without data (unknown), as bands
    for a, b in _runs(st[:minutes] == UNKNOWN):
        xa, xb = x(t0 + a * 60.0), x(t0 + b * 60.0)
        out.append(f'<rect class="unknown" x="{xa:.1f}" y="{TOP}" width="{max(xb - xa, 0.5):.1f}" '
                   f'height="{ph}"/>')  # fmt: skip
    # y grid and labels
    v = 0.0
    while v <= ymax + 1e-9:
        out.append(f'<line class="grid" x1="{LEFT}" x2="{LEFT + pw}" y1="{y(v):.1f}" '
                   f'y2="{y(v):.1f}"/>')  # fmt: skip
        out.append(f'<text class="tick" x="{LEFT - 6}" y="{y(v) + 4:.1f}" '
                   f'text-anchor="end">{num(v)}</text>')  # fmt: skip
        v += step
    out.append(f'<text class="axis" x="14" y="{TOP + ph / 2:.0f}" '
               f'transform="rotate(-90 14 {TOP + ph / 2:.0f})" text-anchor="middle">'
               "mL in the last 60 min</text>")  # fmt: skip
    # x ticks every 3 h on the clock
    first = math.ceil(t0 / 10800.0) * 10800.0
    t = first
    while t <= t1:
        out.append(f'<line class="grid" x1="{x(t):.1f}" x2="{x(t):.1f}" y1="{TOP}" '
                   f'y2="{TOP + ph}"/>')  # fmt: skip
        out.append(f'<text class="tick" x="{x(t):.1f}" y="{TOP + ph + 16}" '
                   f'text-anchor="middle">{escape(clock(t))}</text>')  # fmt: skip
        t += 10800.0
    # thresholds, labelled at the right
    placed: list[float] = []
    for th in sorted(thresholds, key=lambda t: -t.ml_h):
        yy = y(th.ml_h)
        ly = yy + 4
        while any(abs(ly - p) < 13 for p in placed):
            ly += 13
        placed.append(ly)
        out.append(f'<line class="threshold" x1="{LEFT}" x2="{LEFT + pw}" y1="{yy:.1f}" '
                   f'y2="{yy:.1f}"/>')  # fmt: skip
        out.append(f'<text class="threshold-label" x="{LEFT + pw + 6}" y="{ly:.1f}">'
                   f"{escape(th.label)}</text>")  # fmt: skip
    # the rolling hourly output
    if known_to > 0:
        pts = " ".join(f"{x(t0 + (i + 1) * 60.0):.1f},{y(float(val)):.1f}"
                       for i, val in enumerate(shown) if i % 2 == 0 or i == known_to - 1)
        out.append(f'<polyline class="output" points="{pts}"/>')
    # bag changes: a mark on the time axis
    for tb in bag_changes:
        if t0 <= tb <= t1:
            xb = x(tb)
            out.append(f'<line class="bag" x1="{xb:.1f}" x2="{xb:.1f}" y1="{TOP}" '
                       f'y2="{TOP + ph}"/>')  # fmt: skip
            out.append(f'<path class="bag-mark" d="M{xb - 5:.1f},{TOP + ph + 1} '
                       f'L{xb + 5:.1f},{TOP + ph + 1} L{xb:.1f},{TOP + ph - 8} Z"/>')
    # alarm spans, one lane per priority above the plot
    for i, lane in enumerate(LANES):
        ly = 6 + i * (LANE_H + 4)
        out.append(f'<text class="lane-label" x="{LEFT - 6}" y="{ly + 11}" '
                   f'text-anchor="end">{lane}</text>')  # fmt: skip
        out.append(f'<rect class="lane" x="{LEFT}" y="{ly}" width="{pw}" height="{LANE_H}"/>')
        for s in spans:
            if s.priority != lane or s.end <= t0 or s.start >= t1:
                continue
            xa, xb = x(max(s.start, t0)), x(min(s.end, t1))
            out.append(f'<rect class="span span-{lane}" x="{xa:.1f}" y="{ly}" '
                       f'width="{max(xb - xa, 2):.1f}" height="{LANE_H}">'
                       f"<title>{escape(s.label)}</title></rect>")  # fmt: skip
    out.append("</svg>")
    return "\n".join(out)


def _describe(t0: float, shown: npt.NDArray[np.float64], thresholds: Sequence[Threshold],
              bags: Sequence[float], spans: Sequence[Span],
              clock: Callable[[float], str]) -> str:  # fmt: skip
    parts = ["Rolling 60-minute urine output over the last 24 hours."]
    if shown.size:
        i = int(np.argmax(shown))
        parts.append(f"Highest {num(float(shown[i]))} mL at {clock(t0 + (i + 1) * 60.0)}; "
                     f"latest {num(float(shown[-1]))} mL.")  # fmt: skip
    else:
        parts.append("No reading in this time.")
    if thresholds:
        parts.append("Lines: " + "; ".join(t.label for t in thresholds) + ".")
    parts.append(f"{len([b for b in bags if b >= t0])} bag change(s).")
    if spans:
        parts.append("Alarms: " + "; ".join(s.label for s in spans) + ".")
    return " ".join(parts)
