"""The per-bed minute series: spreading volume over minutes, states, clock hours."""

from __future__ import annotations

import random

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as hs

from daemon.engine.series import (
    ESTIMATED,
    MEASURED,
    NL_PER_ML,
    UNKNOWN,
    MinuteSeries,
    nanolitres,
)
from tests.conftest import T0

M0 = int(T0 // 60)  # minute index of the invented start (a clock hour)
H = 60  # minutes per hour


def series_with(*spreads: tuple[float, float, float, int], latest: float | None = None):
    s = MinuteSeries()
    for t0, t1, v, st in spreads:
        s.spread(t0, t1, v, st)
    if latest is not None:
        s.note_reading(latest)
    return s


def test_empty_series() -> None:
    s = MinuteSeries()
    assert s.total() == 0
    assert list(s.completed_hours()) == []
    assert s.latest_minute() is None and s.first_minute is None
    vol, st = s.minutes(M0, M0 + 10)
    assert (vol == 0).all() and (st == UNKNOWN).all()


def test_spread_inside_one_minute() -> None:
    s = series_with((T0 + 10, T0 + 50, 3.0, MEASURED))
    vol, st = s.minutes(M0 - 1, M0 + 2)
    assert vol.tolist() == [0.0, 3.0, 0.0]
    assert st.tolist() == [UNKNOWN, MEASURED, UNKNOWN]
    assert s.first_minute == M0


def test_spread_is_even_over_partial_and_whole_minutes() -> None:
    # 10 mL over 150 s starting 30 s into a minute: 2 + 4 + 4 mL... rate 1/15 mL/s
    s = series_with((T0 + 30, T0 + 180, 10.0, MEASURED))
    vol, st = s.minutes(M0, M0 + 4)
    np.testing.assert_allclose(vol, [2.0, 4.0, 4.0, 0.0])
    assert st.tolist() == [MEASURED, MEASURED, MEASURED, UNKNOWN]
    assert s.total() == pytest.approx(10.0)


def test_span_ending_on_a_minute_boundary_does_not_touch_the_next_minute() -> None:
    s = series_with((T0, T0 + 120, 6.0, MEASURED))
    vol, st = s.minutes(M0, M0 + 3)
    np.testing.assert_allclose(vol, [3.0, 3.0, 0.0])
    assert st[2] == UNKNOWN


def test_zero_length_span_lands_in_the_minute_of_its_end() -> None:
    s = series_with((T0 + 75, T0 + 75, 5.0, ESTIMATED))
    vol, st = s.minutes(M0, M0 + 3)
    assert vol.tolist() == [0.0, 5.0, 0.0]
    assert st.tolist() == [UNKNOWN, ESTIMATED, UNKNOWN]


def test_state_only_upgrades() -> None:
    s = series_with(
        (T0, T0 + 180, 3.0, MEASURED),
        (T0 + 60, T0 + 240, 3.0, ESTIMATED),  # overlaps measured minutes 1-2, adds minute 3
    )
    _, st = s.minutes(M0, M0 + 4)
    assert st.tolist() == [MEASURED, MEASURED, MEASURED, ESTIMATED]
    s.spread(T0 + 180, T0 + 240, 0.0, MEASURED)  # no flow is a measurement too
    _, st = s.minutes(M0, M0 + 4)
    assert st.tolist() == [MEASURED] * 4


def test_negative_spread_undoes_volume_but_not_state() -> None:
    s = series_with((T0, T0 + 300, 10.0, MEASURED), (T0, T0 + 300, -10.0, MEASURED))
    vol, st = s.minutes(M0, M0 + 5)
    np.testing.assert_allclose(vol, 0.0, atol=1e-12)
    assert (st == MEASURED).all()


def test_long_spread_across_days_and_growing_at_the_front() -> None:
    three_days = 3 * 86400.0
    s = series_with((T0, T0 + three_days, 3 * 1440.0, ESTIMATED))
    s.spread(T0 - 2 * 86400, T0 - 2 * 86400 + 60, 1.0, MEASURED)  # before all data
    assert s.first_minute == M0 - 2 * 1440
    vol, st = s.minutes(M0, M0 + 3 * 1440)
    np.testing.assert_allclose(vol, 1.0)
    assert (st == ESTIMATED).all()
    assert s.total() == pytest.approx(3 * 1440 + 1)
    vol, st = s.minutes(M0 - 2 * 1440, M0 - 2 * 1440 + 2)
    assert vol.tolist() == [1.0, 0.0] and st.tolist() == [MEASURED, UNKNOWN]


def test_minutes_window_partly_outside_the_data() -> None:
    s = series_with((T0, T0 + 120, 2.0, MEASURED))
    vol, st = s.minutes(M0 - 2, M0 + 4)
    assert vol.tolist() == [0.0, 0.0, 1.0, 1.0, 0.0, 0.0]
    assert st.tolist() == [UNKNOWN, UNKNOWN, MEASURED, MEASURED, UNKNOWN, UNKNOWN]
    assert s.minutes(M0 + 5, M0 + 5)[0].size == 0


def test_latest_reading_never_moves_back() -> None:
    s = MinuteSeries()
    s.note_reading(T0 + 600)
    s.note_reading(T0 + 300)
    assert s.latest_time == T0 + 600
    # a reading on a minute boundary measures up to it: it completes the minute before
    assert s.latest_minute() == M0 + 9
    s.note_reading(T0 + 630)  # half of minute M0 + 10 observed: not yet a whole minute
    assert s.latest_minute() == M0 + 9
    s.note_reading(T0 + 660)
    assert s.latest_minute() == M0 + 10


def test_completed_hours_stop_before_the_hour_of_the_latest_reading() -> None:
    # 2.5 h of 1 mL/min, measured; the latest reading is 2 h 30 min in
    s = series_with((T0, T0 + 9000, 150.0, MEASURED), latest=T0 + 9000)
    hours = list(s.completed_hours())
    assert [h.hour_start_min for h in hours] == [M0, M0 + H]
    for h in hours:
        assert h.volume_ml == pytest.approx(60.0)
        assert (h.measured_fraction, h.estimated_fraction) == (1.0, 0.0)
    # at exactly the top of an hour that hour has just completed
    s.note_reading(T0 + 3 * 3600)
    assert len(list(s.completed_hours())) == 3


def test_completed_hours_start_at_the_clock_hour_of_the_first_data() -> None:
    s = series_with((T0 + 1800, T0 + 5400, 60.0, MEASURED), latest=T0 + 7200)
    hours = list(s.completed_hours())
    assert [h.hour_start_min for h in hours] == [M0, M0 + H]
    assert [h.volume_ml for h in hours] == pytest.approx([30.0, 30.0])
    assert [h.measured_fraction for h in hours] == pytest.approx([0.5, 0.5])


def test_hour_fractions_count_estimated_and_unknown_minutes() -> None:
    s = series_with(
        (T0, T0 + 1200, 20.0, MEASURED),  # 20 min measured
        (T0 + 1200, T0 + 2400, 10.0, ESTIMATED),  # 20 min estimated, 20 unknown
        latest=T0 + 3600,
    )
    (h,) = list(s.completed_hours())
    assert h.volume_ml == pytest.approx(30.0)
    assert h.measured_fraction == pytest.approx(1 / 3)
    assert h.estimated_fraction == pytest.approx(1 / 3)


def test_an_hour_without_data_is_reported_with_no_measured_minutes() -> None:
    s = series_with(
        (T0, T0 + 3600, 60.0, MEASURED),
        (T0 + 7200, T0 + 10800, 60.0, MEASURED),
        latest=T0 + 10800,
    )
    hours = list(s.completed_hours())
    assert [h.measured_fraction for h in hours] == [1.0, 0.0, 1.0]
    assert hours[1].volume_ml == 0.0


def test_forget_before_drops_old_minutes_only() -> None:
    s = series_with((T0, T0 + 3 * 86400, 3 * 1440.0, MEASURED), latest=T0 + 3 * 86400)
    s.forget_before(M0 + 2 * 1440)
    vol, st = s.minutes(M0, M0 + 1440)
    assert (st == UNKNOWN).all() and (vol == 0).all()
    vol, st = s.minutes(M0 + 2 * 1440, M0 + 3 * 1440)
    np.testing.assert_allclose(vol, 1.0)
    assert (st == MEASURED).all()
    assert s.total() == pytest.approx(1440.0)


def test_window_sums_do_not_depend_on_when_they_were_asked() -> None:
    """Prefix sums are refreshed lazily in chunks of any size; a window's sum must be
    the same whichever pattern of queries came before (explain replays to a moment and
    must reproduce the alarm's evidence exactly)."""
    import random

    from daemon.engine.series import MEASURED, MinuteSeries

    rng = random.Random(7)
    asked, quiet = MinuteSeries(), MinuteSeries()
    t = 1.8e9
    for _ in range(2000):
        t0 = t + rng.random() * 3000
        t1 = t0 + rng.random() * rng.choice([30, 600, 5000])
        v = rng.random() * 50
        asked.spread(t0, t1, v, MEASURED)
        quiet.spread(t0, t1, v, MEASURED)
        if rng.random() < 0.4:
            asked.sums(int(t0 // 60) - rng.randint(0, 90), int(t1 // 60) + 1)
    lo, hi = int(t // 60) - 5, int((t + 9000) // 60)
    for a in range(lo, hi, 11):
        for b in range(a, hi, 17):
            assert asked.sums(a, b) == quiet.sums(a, b)


def test_a_kept_series_forgets_old_minutes_and_keeps_its_windows() -> None:
    """With keep_min (the live service), minutes older than that before the newest are
    forgotten: the buffer stays bounded, the windows within it keep their volumes, and
    `first_minute` still says when monitoring began. Invented flow: 1 mL/min for 3 days."""
    from daemon.engine.series import GROW

    keep = 25 * H
    kept, full = MinuteSeries(keep), MinuteSeries()
    t = T0
    for _ in range(3 * 1440):
        for s in (kept, full):
            s.spread(t, t + 60.0, 1.0, MEASURED)
            s.note_reading(t + 60.0)
        t += 60.0
        assert len(kept._vol_nl) <= keep + 3 * GROW
    end = kept.latest_minute()
    assert end is not None and kept.first_minute == full.first_minute == M0
    for length in (60, 6 * H, 24 * H):
        lo = end + 1 - length
        assert kept.sums(lo, end + 1).volume_ml == pytest.approx(float(length))
        assert kept.sums(lo, end + 1).measured_min == full.sums(lo, end + 1).measured_min
    vol, st = kept.minutes(M0, M0 + 60)  # forgotten: unknown now
    assert (st == UNKNOWN).all() and (vol == 0).all()
    assert len(list(kept.completed_hours())) <= 27


def test_where_a_kept_series_starts_depends_on_the_data_only() -> None:
    """Two services fed the same stream, one started a day earlier: once both have
    forgotten their start, every window sums to the same float (the buffers start on
    the same grid minute, so the prefix sums round alike)."""
    import random

    rng = random.Random(3)
    keep = 25 * H
    early, late = MinuteSeries(keep), MinuteSeries(keep)
    t = T0
    for i in range(4 * 1440):
        v = rng.random() * 3
        early.spread(t, t + 60.0, v, MEASURED)
        if i >= 1440:
            late.spread(t, t + 60.0, v, MEASURED)
        t += 60.0
    assert early._base == late._base
    end = int(t // 60)
    for length in (60, 120, 6 * H, 24 * H):
        assert early.sums(end - length, end) == late.sums(end - length, end)


# --- exact sums: a window's volume does not depend on how the buffer came to be -------------
# Invented spreads (random times and volumes, some taken back); no clinical values.
_spreads = hs.lists(
    hs.tuples(
        hs.floats(0, 3 * 1440 * 60),  # start, seconds after T0
        hs.floats(0, 6 * 3600),  # length, seconds
        hs.floats(-40, 400, allow_nan=False),  # volume, mL (negative: a take-back)
        hs.sampled_from([ESTIMATED, MEASURED]),
    ),
    min_size=1,
    max_size=60,
)


@settings(max_examples=200, deadline=None)
@given(spreads=_spreads, order=hs.randoms(use_true_random=False))
def test_every_window_sums_exactly_whatever_the_order_of_writes(
    spreads: list[tuple[float, float, float, int]], order: random.Random
) -> None:
    """Volumes are kept on a grid fine enough for no urine meter (QUANTUM mL), so
    every sum of them is exact: a window's volume is the exact sum of its minutes,
    the same whichever order the writes came in, and never depends on where the
    buffer started or how its prefix sums were refreshed (live, which forgets old
    minutes, and replay, which keeps them all, must page alike)."""
    a, b = MinuteSeries(), MinuteSeries()
    for t0, dt, v, state in spreads:
        a.spread(T0 + t0, T0 + t0 + dt, v, state)
        a.sums(M0, M0 + 4 * 1440)  # refreshes in between: other chunks
    shuffled = list(spreads)
    order.shuffle(shuffled)
    for t0, dt, v, state in shuffled:
        b.spread(T0 + t0, T0 + t0 + dt, v, state)
    vol, _ = a.minutes(M0 - 1, M0 + 4 * 1440)
    assert (vol == b.minutes(M0 - 1, M0 + 4 * 1440)[0]).all()
    for lo in range(M0 - 1, M0 + 4 * 1440, 97):
        for length in (60, 360, 1440):
            s = a.sums(lo, lo + length)
            assert s == b.sums(lo, lo + length)
            part = vol[lo - M0 + 1 : lo - M0 + 1 + length]
            assert s.volume_ml == sum(nanolitres(x) for x in part) / NL_PER_ML  # exact


@settings(max_examples=100, deadline=None)
@given(spreads=_spreads)
def test_a_spread_taken_back_leaves_every_minute_as_it_was(
    spreads: list[tuple[float, float, float, int]],
) -> None:
    s = MinuteSeries()
    for t0, dt, v, state in spreads[1:]:
        s.spread(T0 + t0, T0 + t0 + dt, v, state)
    before = s.minutes(M0 - 1, M0 + 4 * 1440)[0].copy()
    t0, dt, v, _ = spreads[0]
    s.spread(T0 + t0, T0 + t0 + dt, v, MEASURED)
    s.spread(T0 + t0, T0 + t0 + dt, -v, MEASURED)
    assert (s.minutes(M0 - 1, M0 + 4 * 1440)[0] == before).all()


def test_a_kept_series_and_a_full_one_sum_every_window_alike() -> None:
    """The live service's series (keep_min) and replay's (every minute) after three
    days of an uneven invented flow: every window within the kept minutes sums to the
    same float, to the last bit."""
    rng = random.Random(11)
    kept, full = MinuteSeries(25 * H), MinuteSeries()
    t = T0
    for _ in range(3 * 1440):
        v, dt = rng.random() * 3, 30 + rng.random() * 60
        for s in (kept, full):
            s.spread(t, t + dt, v, MEASURED)
        t += dt
    end = int(t // 60)
    for length in (60, 120, 360, 6 * H, 12 * H, 24 * H):
        for back in range(0, 60, 7):
            lo, hi = end - back - length, end - back
            assert kept.sums(lo, hi) == full.sums(lo, hi)
    assert kept._base != full._base  # it did forget, so the sums did start elsewhere
