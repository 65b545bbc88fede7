"""Our computations against plain numpy and against well-known libraries (test-only deps).

- clock-hour totals from MinuteSeries against a numpy reshape/sum of the same minutes;
- the monotone fit against SciPy's isotonic regression (SciPy >= 1.12);
- unit conversions against pint.
"""

from __future__ import annotations

import math

import numpy as np
import pint
import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy.optimize import isotonic_regression

from daemon.engine.cleaning import isotonic_fit
from daemon.engine.decode import Decoder
from daemon.engine.profiles import UNIT_ALIASES, DeviceProfile
from daemon.engine.series import ESTIMATED, MEASURED, UNKNOWN, MinuteSeries
from tests.conftest import PROFILES, T0

UREG = pint.UnitRegistry()
M0 = int(T0 // 60)
SPAN_MIN = 6 * 60  # six clock hours of room for random spreads

spreads = st.lists(
    st.tuples(
        st.floats(0, SPAN_MIN * 60 - 1, allow_nan=False),  # start, seconds from T0
        st.floats(0, 3 * 3600, allow_nan=False),  # length (0 = a point)
        st.floats(-50, 500, allow_nan=False),  # volume (negative: an undo)
        st.sampled_from([ESTIMATED, MEASURED]),
    ),
    min_size=1,
    max_size=25,
)


def reference_minutes(
    items: list[tuple[float, float, float, int]], lo: int, n: int
) -> tuple[np.ndarray, np.ndarray]:
    """Per-minute volume and state by direct overlap arithmetic, minutes [lo, lo + n)."""
    edges = (lo + np.arange(n + 1)) * 60.0
    vol = np.zeros(n)
    state = np.zeros(n, dtype=np.uint8)
    for start, length, v, s in items:
        t0, t1 = T0 + start, T0 + start + length
        if t1 <= t0:
            m = math.floor(t1 / 60) - lo
            touched = np.zeros(n, dtype=bool)
            if 0 <= m < n:
                vol[m] += v
                touched[m] = True
        else:
            overlap = np.clip(np.minimum(edges[1:], t1) - np.maximum(edges[:-1], t0), 0, None)
            vol += v * overlap / (t1 - t0)
            touched = overlap > 0
        state[touched] = np.maximum(state[touched], s)
    return vol, state


@given(spreads, st.floats(0, SPAN_MIN * 60, allow_nan=False))
def test_completed_hours_equal_a_numpy_reshape_sum(items, latest_offset: float) -> None:
    s = MinuteSeries()
    for start, length, v, state in items:
        s.spread(T0 + start, T0 + start + length, v, state)
    latest = T0 + latest_offset
    s.note_reading(latest)

    lo = M0 - 60
    n = SPAN_MIN + 4 * 60 + 120
    vol, state = reference_minutes(items, lo, n)
    got_vol, got_state = s.minutes(lo, lo + n)
    # the series keeps each spread's part of a minute to the nearest nanolitre
    per_minute = 0.5e-6 * len(items) + 1e-9
    np.testing.assert_allclose(got_vol, vol, atol=per_minute)
    np.testing.assert_array_equal(got_state, state)
    assert s.total() == pytest.approx(vol.sum(), abs=n * per_minute)

    # completed clock hours: from the hour of the first touched minute to the hour
    # holding the latest reading (exclusive)
    assert s.first_minute is not None
    first_hour = s.first_minute // 60
    end_hour = math.floor(latest / 3600)
    hours = max(0, end_hour - first_hour)
    a = first_hour * 60 - lo
    block_vol = vol[a : a + hours * 60].reshape(hours, 60)
    block_state = state[a : a + hours * 60].reshape(hours, 60)
    got = list(s.completed_hours())
    assert [h.hour_start_min for h in got] == [(first_hour + i) * 60 for i in range(hours)]
    np.testing.assert_allclose([h.volume_ml for h in got], block_vol.sum(axis=1),
                               atol=60 * per_minute)  # fmt: skip
    np.testing.assert_allclose(
        [h.measured_fraction for h in got], (block_state == MEASURED).mean(axis=1)
    )
    np.testing.assert_allclose(
        [h.estimated_fraction for h in got], (block_state == ESTIMATED).mean(axis=1)
    )
    unknown = [1 - h.measured_fraction - h.estimated_fraction for h in got]
    np.testing.assert_allclose(unknown, (block_state == UNKNOWN).mean(axis=1), atol=1e-12)


values = st.lists(st.floats(-1e4, 1e4, allow_nan=False, allow_infinity=False), max_size=40)


@given(values, st.floats(-1e4, 1e4, allow_nan=False))
def test_isotonic_fit_equals_scipy_clipped_at_the_floor(ys: list[float], floor: float) -> None:
    ours = isotonic_fit(ys, floor)
    if not ys:
        assert ours == []
        return
    theirs = np.maximum(isotonic_regression(ys, increasing=True).x, floor)
    np.testing.assert_allclose(ours, theirs, rtol=1e-9, atol=1e-6)


def test_isotonic_fit_on_a_noisy_cumulative_tail() -> None:
    # invented readings: a dip of 3 mL between rises
    ys = [100.0, 101.0, 104.0, 101.0, 103.0, 106.0]
    ours = isotonic_fit(ys, floor=99.0)
    theirs = isotonic_regression(ys, increasing=True).x
    np.testing.assert_allclose(ours, theirs)
    # 104 and 101 pool to 102.5; 103 already lies above that
    assert ours == pytest.approx([100.0, 101.0, 102.5, 102.5, 103.0, 106.0])


def with_sg(profile: DeviceProfile, sg: float, tare_g: float) -> DeviceProfile:
    data = profile.model_dump(by_alias=True)
    data["volume"] |= {"specific_gravity": sg, "tare_g": tare_g}
    return DeviceProfile.model_validate(data)


@given(st.floats(0, 5, allow_nan=False))
def test_litres_to_millilitres_equals_pint(litres: float) -> None:
    ours = Decoder(PROFILES["nested-telemetry"]).to_ml(litres, "L")
    theirs = UREG.Quantity(litres, "L").to("mL").magnitude
    assert ours == pytest.approx(theirs, rel=1e-12, abs=1e-12)


@given(
    st.floats(0, 4000, allow_nan=False),
    # source: Medscape Reference, "Urine Specific Gravity" (1.005-1.030); the schema
    # admits 1.000-1.050 (extremes ~1.001-1.050: CLINICAL-REFERENCE.md section 6)
    st.floats(1.000, 1.050),
    st.floats(0, 200, allow_nan=False),
)
def test_grams_to_millilitres_equals_pint(grams: float, sg: float, tare: float) -> None:
    ours = Decoder(with_sg(PROFILES["gravimetric-text"], sg, tare)).to_ml(grams, "g")
    # specific gravity relative to water taken as 1 g/mL (the profile's declared convention)
    density = sg * UREG.Quantity(1.0, "g/mL")
    theirs = ((UREG.Quantity(grams, "g") - UREG.Quantity(tare, "g")) / density).to("mL")
    assert ours == pytest.approx(theirs.magnitude, rel=1e-12, abs=1e-9)


@pytest.mark.parametrize("spelling", ["mL", "ml", "cc", "L", "l"])
def test_volume_spellings_mean_what_pint_says(spelling: str) -> None:
    canon = UNIT_ALIASES[spelling]
    ours = Decoder(PROFILES["interval-10min"]).to_ml(1.0, canon)
    assert ours == pytest.approx(UREG.Quantity(1.0, spelling).to("mL").magnitude)


def test_upper_case_spellings_are_ucum_case_insensitive_forms() -> None:
    # UCUM's case-insensitive column writes millilitre as "ML" and gram as "G"; pint reads
    # "ML" as megalitre, so these two are checked against UCUM, not pint
    # (source: UCUM, unitsofmeasure.org, from memory)
    assert UNIT_ALIASES["ML"] == "mL" and UNIT_ALIASES["G"] == "g"
