"""Window metrics over a bed's minute series (DESIGN §3).

Every window is half-open, (end − length, end], in whole minutes, ending at the
bed's latest accepted minute. `window_bounds` is the one definition; nothing
else derives window edges.
"""

from __future__ import annotations

from dataclasses import dataclass

from .numbers import half_up
from .series import NL_PER_ML, MinuteSeries, nanolitres
from .timefmt import iso

COVERED_FRACTION = 0.9  # a window is covered when >= 90% of its minutes are measured
_TENTH_NL = NL_PER_ML // 10
_HALF_TENTH_NL = _TENTH_NL // 2


def tenths(ml: float) -> int:
    """A volume in whole tenths of a millilitre (half up). Volumes are compared with
    thresholds at this resolution (DESIGN §3), so float noise in a rolling sum can never
    turn "equal to the threshold" into "above it". Decided on the volume in whole
    nanolitres, as the series counts it: 200.05 mL is 2001 tenths, however the float
    that carries it happens to round."""
    return (nanolitres(ml) + _HALF_TENTH_NL) // _TENTH_NL


def above(ml: float, threshold: float, strictly: bool = True) -> bool:
    a, b = tenths(ml), tenths(threshold)
    return a > b if strictly else a >= b


def below(ml: float, threshold: float) -> bool:
    return tenths(ml) < tenths(threshold)


def window_bounds(end_minute: int, length_min: int) -> tuple[int, int]:
    """Minutes (end − length, end] as the index range [lo, hi)."""
    return end_minute - length_min + 1, end_minute + 1


@dataclass(slots=True)  # not frozen: built many times a minute, and frozen init is slow
class Window:
    end_minute: int  # last minute inside the window
    length_min: int
    volume_ml: float
    measured_min: int
    estimated_min: int
    residual_ml: float = 0.0  # retained bladder content drained inside, left out of volume_ml

    @property
    def start_minute(self) -> int:
        return window_bounds(self.end_minute, self.length_min)[0]

    @property
    def coverage(self) -> float:
        """Fraction of the window's minutes that are measured."""
        return self.measured_min / self.length_min

    @property
    def covered(self) -> bool:
        return self.coverage >= COVERED_FRACTION

    @property
    def known_min(self) -> int:
        return self.measured_min + self.estimated_min

    def rate_ml_kg_h(self, weight_kg: float) -> float:
        """Rate over the minutes with data: a covered window may still lack up to
        10% of its minutes, and those must not count as no urine."""
        return self.volume_ml / weight_kg / (max(self.known_min, 1) / 60.0)

    def volume_over_length(self) -> float:
        """The volume scaled from the minutes with data to the whole window."""
        return self.volume_ml * self.length_min / max(self.known_min, 1)

    def to_json(self) -> dict[str, object]:
        lo, hi = window_bounds(self.end_minute, self.length_min)
        return {
            "from": iso(lo * 60.0),  # window (from, to]: minutes lo .. hi-1
            "to": iso(hi * 60.0),
            "length_min": self.length_min,
            "volume_ml": half_up(self.volume_ml, 1),
            "coverage": half_up(self.coverage, 3),
            "estimated_fraction": half_up(self.estimated_min / self.length_min, 3),
        } | ({"residual_ml": half_up(self.residual_ml, 1)} if self.residual_ml else {})


Spans = tuple[tuple[int, int], ...]


def measure(series: MinuteSeries, end_minute: int, length_min: int, residual: Spans = ()) -> Window:
    """The window's sums; volume drained in the `residual` minute ranges [lo, hi) (the
    bladder's retained content after relief) is left out of the volume and reported."""
    lo, hi = window_bounds(end_minute, length_min)
    vol, meas, est = series.sums(lo, hi)
    if not residual:
        return Window(end_minute, length_min, vol, meas, est)
    held = 0.0
    for a, b in residual:
        a, b = max(a, lo), min(b, hi)
        if a < b:
            held += series.sums(a, b).volume_ml
    return Window(end_minute, length_min, max(0.0, vol - held), meas, est, held)


def hours_ending(
    series: MinuteSeries, end_minute: int, hours: int, residual: Spans = ()
) -> list[Window]:
    """The last `hours` consecutive 60-minute windows, oldest first."""
    return [measure(series, end_minute - 60 * k, 60, residual) for k in range(hours - 1, -1, -1)]
