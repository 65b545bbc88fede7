"""The cumulative cleaner on random streams: every reading ends in exactly one outcome,
never an exception (DESIGN §3: bad input is an outcome with a reason code).

Streams mix rises, noise falls, large falls, emptyings, spikes, returns to an earlier
level, bag flags, readings at or below zero, reorders and gaps, with steps at the exact
edges of each family's timing limits. ALL DATA HERE IS INVENTED (generated streams).
"""

from __future__ import annotations

import math

from hypothesis import given, settings
from hypothesis import strategies as st

from daemon.engine.cleaning import CumulativeCleaner
from daemon.engine.decode import Reading
from daemon.engine.outcomes import Outcome
from daemon.engine.series import MinuteSeries
from tests.conftest import CUMULATIVE, PROFILES, T0

KINDS = ["rise", "same", "noise", "fall", "empty", "spike", "back", "flag", "zero",
         "below-zero"]  # fmt: skip


def _volume(kind: str, last: float, size: float, start: float) -> float:
    return {
        "rise": last + size,
        "same": last,
        "noise": last - size / 6,  # within or just beyond every family's noise allowance
        "fall": last - 40 * size - 30,
        "empty": size / 4,
        "spike": last + 40 + 100 * size,
        "back": start,  # back on the level the stream began at
        "flag": size,
        "zero": 0.0,
        "below-zero": -size / 3,  # a tared scale may read a little below zero
    }[kind]


@settings(max_examples=500, deadline=None)
@given(name=st.sampled_from(CUMULATIVE), start=st.floats(0.0, 2000.0), data=st.data())
def test_every_reading_ends_in_one_outcome_and_none_raises(
    name: str, start: float, data: st.DataObject
) -> None:
    p = PROFILES[name]
    timing = p.timing
    edges = [float(timing.reorder_tolerance_s), float(timing.max_interpolation_gap_s),
             float(timing.period_s)]  # fmt: skip
    cadence = float(timing.period_s)
    other = st.one_of(st.sampled_from([0.0, *edges, edges[0] - 0.5, edges[1] + 0.5]),
                      st.floats(-400.0, -0.5), st.floats(0.0, 900.0))  # fmt: skip
    # mostly the cadence and a rise, so tails fill and jumps become provisional
    dts = st.tuples(st.integers(0, 9), other).map(lambda x: cadence if x[0] < 6 else x[1])
    kinds = st.tuples(st.integers(0, 9), st.sampled_from(KINDS)).map(
        lambda x: "rise" if x[0] < 5 else x[1]
    )
    sizes = st.one_of(st.integers(0, 12).map(float), st.floats(0.0, 50.0))
    stream = data.draw(st.lists(st.tuples(dts, kinds, sizes), min_size=1, max_size=80))
    c = CumulativeCleaner(p, MinuteSeries())
    t, v, finals = T0, start, 0
    for dt, kind, size in [(0.0, "same", 0.0), *stream]:
        t += dt
        v = _volume(kind, v, size, start)
        pending = c.pending()
        out = c.feed(t, Reading("m-1", t, v, None, kind == "flag", v))
        assert 1 <= len(out) <= 1 + pending, out  # a held reading is settled by a later one
        assert Outcome.SPIKE_HELD not in out[:-1]
        finals += sum(o is not Outcome.SPIKE_HELD for o in out)
        c.take_revised()
    assert finals + c.pending() == len(stream) + 1  # one final outcome each, or held
    assert math.isfinite(c.series.total())
