"""One picture per bed: rolling hourly and 24-h output with the rule thresholds,
bag changes, gaps, artefacts, alarm spans by priority, acknowledgements, and
documented intake beside suggested replacement where there is any.

Drawn with matplotlib's object API on the Agg canvas (no pyplot, no display). The
palette is our own: one violet hue whose depth rises with alarm priority, greys for
data quality, and a single blue for the output itself.
"""

from __future__ import annotations

import io
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from itertools import pairwise
from typing import Any

import numpy as np
import numpy.typing as npt
from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import FixedLocator, FuncFormatter

from ..engine import rules as r
from ..engine.alarms import URGENCY, Priority
from ..engine.effects import AdviceIssued
from ..engine.numbers import half_up
from ..engine.outcomes import Outcome
from ..engine.series import ESTIMATED, UNKNOWN, MinuteSeries
from .episodes import Episode
from .recorder import Intake

PRIORITY_COLOUR: dict[Priority, str] = {
    Priority.HIGH: "#4a2377",
    Priority.MEDIUM: "#8c62b3",
    Priority.LOW: "#c3afd9",
    Priority.INFO: "#e4dced",
}
OUTPUT = "#2b5d8a"
DAY = "#5e7f5a"
THRESHOLD = "#3a3a3a"
UNKNOWN_GREY = "#d9d9d9"
ESTIMATED_EDGE = "#b0b0b0"
BAG = "#6b6b6b"
ARTEFACT = "#b35c00"
INTAKE = "#6f8f6a"
ADVICE = "#2b5d8a"
MAX_POINTS = 6000  # longer series are drawn at a stride (the numbers stay exact)


@dataclass
class BedPicture:
    """What one bed's plot shows (all times epoch seconds UTC)."""

    bed: str
    series: MinuteSeries
    rules: Sequence[r.RuleDef]
    weight_kg: float | None
    episodes: list[Episode] = field(default_factory=list)
    end: float = 0.0  # end of the replay: open alarms are drawn up to here
    bag_changes: list[float] = field(default_factory=list)
    artefacts: list[tuple[float, Outcome]] = field(default_factory=list)
    intake: list[Intake] = field(default_factory=list)
    advice: list[AdviceIssued] = field(default_factory=list)


def rolling(vol: npt.NDArray[np.float64], length: int) -> npt.NDArray[np.float64]:
    """Sum over the `length` minutes ending at each minute (fewer at the start)."""
    cum = np.concatenate([[0.0], np.cumsum(vol)])
    hi = np.arange(1, vol.size + 1)
    out: npt.NDArray[np.float64] = cum[hi] - cum[np.maximum(hi - length, 0)]
    return out


def _dt(t: npt.ArrayLike) -> npt.NDArray[np.float64]:
    """Epoch seconds as matplotlib date numbers (days since 1970-01-01 UTC).

    Plain floats with fixed ticks draw several times faster than datetimes with the
    automatic date locator, which matters for a month of beds."""
    out: npt.NDArray[np.float64] = np.asarray(t, dtype=np.float64) / 86400.0
    return out


TICK_HOURS = (1, 2, 3, 6, 12, 24, 48, 72, 168, 336)


def _time_axis(ax: Axes, t0: float, t1: float) -> None:
    """Ticks on whole UTC hours or days, at most ~10 of them."""
    span_h = max((t1 - t0) / 3600.0, 1.0)
    step = next((h for h in TICK_HOURS if span_h / h <= 10), TICK_HOURS[-1])
    first = math.ceil(t0 / (step * 3600.0)) * step * 3600.0
    ticks = np.arange(first, t1 + 1.0, step * 3600.0)
    ax.xaxis.set_major_locator(FixedLocator(_dt(ticks).tolist()))
    fmt = "%m-%d %H:%M" if step < 24 else "%Y-%m-%d"

    def label(x: float, _pos: int | None = None) -> str:
        return datetime.fromtimestamp(x * 86400.0, UTC).strftime(fmt)

    ax.xaxis.set_major_formatter(FuncFormatter(label))
    pad = 0.012 * (t1 - t0)  # room for the first and last tick labels
    ax.set_xlim(*_dt([t0 - pad, t1 + pad]))


def _runs(mask: npt.NDArray[np.bool_]) -> list[tuple[int, int]]:
    """[start, end) index pairs of the True runs."""
    if not mask.any():
        return []
    d = np.diff(np.concatenate([[0], mask.astype(np.int8), [0]]))
    return list(zip(np.flatnonzero(d == 1).tolist(), np.flatnonzero(d == -1).tolist(), strict=True))


def _bands(ax: Axes, spans: list[tuple[float, float]], label: str | None, **style: Any) -> None:
    """Full-height bands over time spans (epoch s), drawn as one collection: a month
    has hundreds of them, and one artist each is what made plots slow."""
    if not spans:
        return
    days = [(a / 86400.0, (b - a) / 86400.0) for a, b in spans]
    ax.broken_barh(days, (0.0, 1.0), transform=ax.get_xaxis_transform(), label=label, **style)


def _most_urgent(
    spans: list[tuple[float, float, Priority]],
) -> list[tuple[float, float, Priority]]:
    """Cut overlapping spans into pieces, each with the most urgent priority open."""
    edges = sorted({t for a, b, _ in spans for t in (a, b)})
    out: list[tuple[float, float, Priority]] = []
    for a, b in pairwise(edges):
        open_ = [p for s, e, p in spans if s <= a and e >= b]
        if not open_:
            continue
        prio = max(open_, key=lambda p: URGENCY[p])
        if out and out[-1][1] == a and out[-1][2] is prio:
            out[-1] = (out[-1][0], b, prio)
        else:
            out.append((a, b, prio))
    return out


def _thresholds(pic: BedPicture) -> tuple[list[tuple[float, str]], list[tuple[float, str]]]:
    """(hourly panel lines, 24-h panel lines) as (value, label), same values merged."""
    hourly: dict[float, list[str]] = {}
    day: dict[float, list[str]] = {}
    kg = pic.weight_kg
    for rule in pic.rules:
        c = rule.check
        if isinstance(c, r.HourlyAbove):
            hourly.setdefault(c.threshold_ml_h, []).append(rule.id)
        elif isinstance(c, r.Hypovolaemia):
            hourly.setdefault(c.hourly_above_ml, []).append(rule.id)
        elif isinstance(c, r.VolumeAbove) and c.window_h == 24:
            day.setdefault(c.threshold_ml, []).append(rule.id)
        elif isinstance(c, r.RateBelow) and kg is not None:
            if c.window_h == 24:
                day.setdefault(half_up(c.threshold_ml_kg_h * kg * 24, 1), []).append(rule.id)
            else:
                hourly.setdefault(half_up(c.threshold_ml_kg_h * kg, 1), []).append(
                    f"{rule.id} ({c.threshold_ml_kg_h:g} mL/kg/h, {c.mode} of {c.window_h} h)"
                )
    return (
        sorted((v, ", ".join(ids)) for v, ids in hourly.items()),
        sorted((v, ", ".join(ids)) for v, ids in day.items()),
    )


def draw(pic: BedPicture, dpi: int = 96) -> Figure:
    series = pic.series
    first, last = series.first_minute, series.latest_minute()
    has_fluids = bool(pic.intake or pic.advice)
    lanes = sorted({e.rule for e in pic.episodes if e.raised})
    heights = (
        [3.0, 1.8] + ([0.35 + 0.22 * len(lanes)] if lanes else []) + ([1.2] if has_fluids else [])
    )
    total = 1.0 + sum(heights)
    fig = Figure(figsize=(11.0, total), dpi=dpi)
    FigureCanvasAgg(fig)
    axes = fig.subplots(len(heights), 1, sharex=True, gridspec_kw={"height_ratios": heights})
    # fixed margins: the constrained layout engine costs a draw of its own per figure
    fig.subplots_adjust(
        left=0.105, right=0.985, top=1 - 0.62 / total, bottom=0.5 / total, hspace=0.18
    )
    ax_h, ax_d = axes[0], axes[1]
    fig.suptitle(f"Bed {pic.bed}: urine output", fontsize=11, x=0.01, ha="left")
    if first is None or last is None:
        ax_h.text(0.5, 0.5, "no accepted reading", transform=ax_h.transAxes, ha="center")
        return fig
    vol, st = series.minutes(first, last + 1)
    n = vol.size
    step = max(1, math.ceil(n / MAX_POINTS))
    x = _dt((first + np.arange(n)[::step]) * 60.0 + 60.0)  # a window ends with its minute
    hourly, daily = rolling(vol, 60), rolling(vol, 1440)
    ax_h.plot(x, hourly[::step], color=OUTPUT, lw=1.1, label="rolling 60-min output")
    ax_d.plot(x, daily[::step], color=DAY, lw=1.1, label="rolling 24-h output")
    hourly_thr, day_thr = _thresholds(pic)
    for ax, lines in ((ax_h, hourly_thr), (ax_d, day_thr)):
        for value, label in lines:
            ax.axhline(value, color=THRESHOLD, lw=0.8, ls=(0, (4, 3)))
            ax.annotate(
                f"{value:g}: {label}",
                (1.0, value),
                xycoords=("axes fraction", "data"),
                xytext=(-4, 2),
                textcoords="offset points",
                ha="right",
                va="bottom",
                fontsize=7,
                color=THRESHOLD,
                bbox={"facecolor": "white", "alpha": 0.75, "lw": 0, "pad": 0.8},
            )
    # data quality: minutes with no data (solid) and estimated minutes (hatched)
    for state, name in ((UNKNOWN, "no data"), (ESTIMATED, "estimated")):
        style: dict[str, Any] = (
            {"color": UNKNOWN_GREY, "lw": 0}
            if state == UNKNOWN
            else {"facecolor": "none", "edgecolor": ESTIMATED_EDGE, "hatch": "////", "lw": 0}
        )
        runs = [((first + i0) * 60.0, (first + i1) * 60.0) for i0, i1 in _runs(st == state)]
        for ax in (ax_h, ax_d):
            _bands(ax, runs, name if ax is ax_h else None, zorder=0, **style)
    # alarm spans on the hourly panel: at each moment the most urgent alarm open, so
    # overlapping alarms neither darken nor hide one another's colour
    pieces = _most_urgent([(*ep.span(pic.end), ep.priority) for ep in pic.episodes if ep.raised])
    for prio in (Priority.HIGH, Priority.MEDIUM, Priority.LOW, Priority.INFO):
        spans = [(a, max(b, a + 60.0)) for a, b, p in pieces if p is prio]
        _bands(ax_h, spans, f"alarm active ({prio})", color=PRIORITY_COLOUR[prio], alpha=0.45,
               lw=0, zorder=0.5)  # fmt: skip
    tr = ax_h.get_xaxis_transform()
    if pic.bag_changes:
        ax_h.plot(
            _dt(pic.bag_changes),
            [0.02] * len(pic.bag_changes),
            transform=tr,
            ls="none",
            marker="^",
            ms=5,
            color=BAG,
            label="bag change",
        )
    if pic.artefacts:
        ax_h.plot(
            _dt([t for t, _ in pic.artefacts]),
            [0.95] * len(pic.artefacts),
            transform=tr,
            ls="none",
            marker="x",
            ms=6,
            color=ARTEFACT,
            label="artefact / held jump",
        )
    ax_h.set_ylabel("mL in 60 min")
    ax_d.set_ylabel("mL in 24 h")
    for ax, values, lines in ((ax_h, hourly, hourly_thr), (ax_d, daily, day_thr)):
        top = max([float(values.max()) if values.size else 0.0] + [v for v, _ in lines])
        ax.set_ylim(0, max(top, 1.0) * 1.12)
    # above the panel, so it hides no data
    ax_h.legend(loc="lower left", bbox_to_anchor=(0.0, 1.0), fontsize=7, ncols=7, frameon=False)
    k = 2
    if lanes:
        _lanes(axes[k], pic, lanes)
        k += 1
    if has_fluids:
        _fluids(axes[k], pic)
    for ax in axes:
        ax.grid(True, color="#e6e6e6", lw=0.6)
        ax.set_axisbelow(True)
    _time_axis(axes[-1], first * 60.0, max((last + 1) * 60.0, pic.end))
    axes[-1].set_xlabel("time (UTC)")
    return fig


def _lanes(ax: Axes, pic: BedPicture, lanes: list[str]) -> None:
    """One row per rule, a bar per alarm episode: one collection per row and
    priority, and one marker series for all acknowledgements (a month of a bed
    has hundreds of episodes, and an artist each is slow to draw)."""
    row = {rule: i for i, rule in enumerate(lanes)}
    bars: dict[tuple[int, Priority], list[tuple[float, float]]] = {}
    ack_t: list[float] = []
    ack_y: list[int] = []
    for ep in pic.episodes:
        if not ep.raised:
            continue
        a, b = ep.span(pic.end)
        y = row[ep.rule]
        left = float(_dt([a])[0])
        bars.setdefault((y, ep.priority), []).append((left, (max(b, a + 60.0) - a) / 86400.0))
        ack_t += [k.time for k in ep.acks]
        ack_y += [y] * len(ep.acks)
    for (y, prio), spans in bars.items():
        ax.broken_barh(spans, (y - 0.3, 0.6), facecolors=PRIORITY_COLOUR[prio],
                       edgecolors="#555555", linewidths=0.4)  # fmt: skip
    acked = bool(ack_t)
    if acked:
        ax.plot(_dt(ack_t), ack_y, ls="none", marker="v", ms=5, color="#111111",
                label="acknowledged")  # fmt: skip
    ax.set_yticks(range(len(lanes)), lanes, fontsize=7)
    ax.set_ylim(-0.6, len(lanes) - 0.4)
    ax.invert_yaxis()
    if acked:
        ax.legend(loc="upper left", fontsize=7, framealpha=0.85)


def _fluids(ax: Axes, pic: BedPicture) -> None:
    if pic.intake:
        ax.bar(
            _dt([i.time for i in pic.intake]),
            [i.volume_ml for i in pic.intake],
            width=10 / 1440,
            color=INTAKE,
            label="documented intake (mL)",
        )
    if pic.advice:
        t = _dt([a.time for a in pic.advice])
        lo = np.array([a.advice.rate_low_ml_h for a in pic.advice])
        hi = np.array([a.advice.rate_high_ml_h for a in pic.advice])
        ax.vlines(t, lo, hi, color=ADVICE, lw=2.2, label="suggested replacement (mL/h)")
    ax.set_ylabel("fluids (mL, mL/h)")
    ax.set_ylim(bottom=0)
    ax.legend(loc="upper left", fontsize=7, ncols=2, framealpha=0.85)


def png(fig: Figure) -> bytes:
    buf = io.BytesIO()
    # no "Software" text chunk: it carries a web address, and the report holds none
    fig.savefig(buf, format="png", metadata={"Software": None})
    return buf.getvalue()
