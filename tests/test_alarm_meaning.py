"""Alarms that mean what they say (DESIGN §3-§5): thresholds compared at the meter's
resolution, so equal is never above; pages whose numbers agree with their thresholds.

All beds, meters and volumes here are invented.
"""

from __future__ import annotations

import re
from datetime import UTC, datetime

import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from daemon.engine.windows import above, below, tenths
from simulator.encode import encode
from tests.ruletools import PROFILES, T0, WARD, Bed, Ward, iso


def started(weight_kg: float = 70.0) -> Bed:
    bed = Bed(Ward(), weight_kg=weight_kg)
    bed.bind()
    bed.start()
    return bed


@pytest.mark.parametrize("offset_s", [0.0, 1.0, 17.0, 30.0, 59.0])
def test_exactly_200_ml_every_hour_is_never_above_200(offset_s: float) -> None:
    """A steady 200 mL/h: every rolling hour holds 200 mL, which does not meet "> 200 mL/h
    for 2 consecutive hours" (Halbgewachs & Domes, Can Fam Physician 2015), whatever
    second the meter reads at and however the minutes add up in floating point."""
    bed = Bed(Ward())
    bed.bind()
    bed.start(T0 + offset_s)
    bed.minutes([200.0 / 60] * 300)
    assert "pod-hourly" not in bed.ward.fired()


@settings(max_examples=15, deadline=None)
@given(st.integers(1, 50))
def test_an_even_flow_a_few_tenths_either_side(delta_tenths: int) -> None:
    """200 mL/h plus k tenths of a mL meets "> 200"; minus k tenths does not."""
    for sign, met in ((1, True), (-1, False)):
        bed = Bed(Ward())
        bed.bind()
        bed.start()
        bed.minutes([(200.0 + sign * delta_tenths / 10) / 60] * 180)
        assert ("pod-hourly" in bed.ward.fired()) is met


@settings(max_examples=40, deadline=None)
@given(st.lists(st.integers(250, 420), min_size=5, max_size=5))
def test_uneven_ten_minute_volumes_making_200_ml_every_hour(tenths_ml: list[int]) -> None:
    """An interval meter whose six 10-minute volumes (one decimal, as the meter sends them)
    repeat every hour and make exactly 200 mL: every rolling hour holds 200 mL, so "> 200"
    (Halbgewachs & Domes 2015) is never met. Before volumes were compared to the tenth,
    float noise in the rolling sums raised it in about half of such cases."""
    last = 2000 - sum(tenths_ml)
    assume(100 <= last <= 600)
    volumes = [t / 10 for t in [*tenths_ml, last]]
    w = Ward()
    w.send("hourwatch/beds/b01/context", {
        "ward": WARD, "device_ids": ["iv-0101"], "weight_kg": 70, "weight_basis": "actual",
        "episodes": [{"kind": "obstruction_relieved", "at": iso(T0 - 7200)}],
    }, T0 - 30)  # fmt: skip
    for k in range(36):
        t = T0 + (k + 1) * 600
        topic, payload = encode(PROFILES["interval-10min"], "iv-0101", t, volumes[k % 6], seq=k)
        w.send(topic, payload, t)
    assert "pod-hourly" not in w.fired()


def test_a_tenth_above_200_is_above_and_the_page_says_so() -> None:
    """200.1 mL in every hour meets "> 200" (Halbgewachs & Domes 2015), and the page shows
    numbers above its own threshold, not "200, 200"."""
    bed = started()
    bed.minutes([200.1 / 60] * 180)
    ev = bed.ward.first("pod-hourly")
    assert ev is not None
    shown = re.search(r"last 2 h: ([\d.]+), ([\d.]+) mL", ev.summary)
    assert shown is not None, ev.summary
    assert all(float(x) > 200 for x in shown.groups()), ev.summary


def test_comparisons_are_made_to_the_tenth() -> None:
    assert tenths(199.99999999999997) == tenths(200.00000000000003) == 2000
    assert not above(200.00000000000003, 200.0)
    assert above(200.05, 200.0) and not above(200.04, 200.0)
    assert below(9.94, 10.0) and not below(9.96, 10.0)
    assert above(200.0, 200.0, strictly=False)


def test_pages_show_local_clock_time_in_the_configured_zone() -> None:
    """Pages say HH:MM in the ward's zone (Europe/Berlin is UTC+1 on 2026-03-14), never a
    raw ISO stamp; data stays UTC."""
    from zoneinfo import ZoneInfo

    from daemon.engine.engine import Engine
    from tests.ruletools import POLICY, PROFILES, RULES

    w = Ward()
    w.engine = Engine(PROFILES.values(), RULES, POLICY, timezone=ZoneInfo("Europe/Berlin"))
    bed = Bed(w)
    bed.bind()
    bed.start()
    bed.hours([300.0] * 3)
    ev = w.first("pod-hourly")
    assert ev is not None
    utc = datetime.fromtimestamp(ev.time, UTC)
    local = f"{(utc.hour + 1) % 24:02d}:{utc.minute:02d}"
    assert ev.pager().startswith(f"{local} b01 ALARM medium: ")
    assert "T0" not in ev.pager() and "Z " not in ev.pager()
    assert ev.to_json()["time"].endswith("Z")


def test_reminders_carry_no_advice() -> None:
    bed = started()
    bed.labs(T0 + 30, serum_na_mmol_l=140.0)  # in range (Adrogue & Madias, NEJM 2000)
    bed.hours([300.0] * 8)  # a diuresis long enough for the 4-h labs reminder
    reminders = bed.ward.alarms("labs-due")
    assert reminders and all(e.advice is None for e in reminders)
    assert all("mL/h" not in e.pager() for e in reminders)


def test_a_bad_time_zone_is_one_line() -> None:
    from daemon.config import ServiceConfig

    with pytest.raises(ValueError, match="unknown time zone 'Mars/Olympus'"):
        ServiceConfig.model_validate({"timezone": "Mars/Olympus"})
