"""Shock index, its classes, and cuff MAP (CLINICAL-REFERENCE §4, worked example E7)."""

from __future__ import annotations

import math

import pytest
from hypothesis import given
from hypothesis import strategies as st

from daemon.engine.haemo import (
    MAP_TARGET_MMHG,
    map_below_target,
    mean_arterial_pressure,
    shock_index,
    shock_index_class,
)

CLASS_ORDER = ["none", "mild", "moderate", "severe"]


def test_e7_tachycardic_patient_is_moderate():
    si = shock_index(110, 100)
    assert si == pytest.approx(1.10)  # source: CLINICAL-REFERENCE E7 (derived, HR/SBP)
    assert shock_index_class(si) == "moderate"  # source: Mutschler et al., Crit Care 2013
    assert si > 0.9  # source: Rady et al., Ann Emerg Med 1994 (>0.9 linked to critical illness)


def test_e7_second_patient_is_mild_by_mutschler_classes():
    si = shock_index(88, 130)
    assert round(si, 2) == 0.68  # source: CLINICAL-REFERENCE E7 (derived, 88/130)
    # The sheet calls 0.68 normal (Rady 1994: 0.5-0.7); Mutschler's classes start
    # "mild" at 0.6, and the rule engine uses Mutschler's classes.
    assert shock_index_class(si) == "mild"  # source: Mutschler et al., Crit Care 2013
    assert 0.5 <= si <= 0.7  # source: Rady et al., Ann Emerg Med 1994 (normal range)


@pytest.mark.parametrize(
    ("boundary", "at", "below"),
    [
        (0.6, "mild", "none"),  # source: Mutschler et al., Crit Care 2013
        (1.0, "moderate", "mild"),  # source: Mutschler et al., Crit Care 2013
        (1.4, "severe", "moderate"),  # source: Mutschler et al., Crit Care 2013
    ],
)
def test_class_boundaries_belong_to_the_higher_class(boundary, at, below):
    assert shock_index_class(boundary) == at
    assert shock_index_class(math.nextafter(boundary, 0.0)) == below


@pytest.mark.parametrize(
    ("hr", "sbp", "expected"),
    [
        (60, 100, "mild"),  # 0.6 exactly; source: Mutschler et al., Crit Care 2013
        (100, 100, "moderate"),  # 1.0 exactly; source: Mutschler et al., Crit Care 2013
        (140, 100, "severe"),  # 1.4 exactly; source: Mutschler et al., Crit Care 2013
        (59, 100, "none"),  # 0.59; source: Mutschler et al., Crit Care 2013
        (84, 140, "mild"),  # 0.6 from another pair; source: Mutschler et al., Crit Care 2013
    ],
)
def test_computed_indices_on_the_boundaries(hr, sbp, expected):
    assert shock_index_class(shock_index(hr, sbp)) == expected


def test_e7_map_from_cuff_is_below_target():
    m = mean_arterial_pressure(90, 50)
    assert m == pytest.approx(63.33, abs=0.01)  # source: CLINICAL-REFERENCE E7 (derived)
    assert MAP_TARGET_MMHG == 65.0  # source: Evans et al., Surviving Sepsis Campaign 2021
    assert map_below_target(m)


def test_map_formula_and_target_boundary():
    # common practice, no single source: MAP ~ DBP + (SBP - DBP)/3
    assert mean_arterial_pressure(120, 80) == pytest.approx(93.33, abs=0.01)
    assert mean_arterial_pressure(100, 100) == 100.0
    # source: Surviving Sepsis Campaign 2021, target MAP >= 65: 65 meets it
    assert not map_below_target(65.0)
    assert map_below_target(math.nextafter(65.0, 0.0))


@pytest.mark.parametrize(
    ("hr", "sbp"),
    [(0, 100), (-80, 100), (80, 0), (80, -120), (math.nan, 100), (80, math.inf), (400, 100)],
)
def test_shock_index_rejects_implausible_inputs(hr, sbp):
    with pytest.raises(ValueError, match="must be above 0"):
        shock_index(hr, sbp)


def test_map_rejects_implausible_inputs():
    with pytest.raises(ValueError, match="diastolic pressure 90 is above systolic 80"):
        mean_arterial_pressure(80, 90)
    with pytest.raises(ValueError, match="diastolic"):
        mean_arterial_pressure(120, 0)
    with pytest.raises(ValueError, match="systolic"):
        mean_arterial_pressure(math.nan, 60)
    with pytest.raises(ValueError):
        map_below_target(math.nan)


@pytest.mark.parametrize("si", [-0.1, math.nan, math.inf])
def test_class_rejects_bad_index(si):
    with pytest.raises(ValueError, match="shock index"):
        shock_index_class(si)


@given(st.floats(0, 5), st.floats(0, 5))
def test_class_never_falls_as_the_index_rises(a, b):
    lo, hi = sorted((a, b))
    assert CLASS_ORDER.index(shock_index_class(lo)) <= CLASS_ORDER.index(shock_index_class(hi))


@given(st.floats(1, 300), st.floats(1, 300))
def test_map_lies_between_diastolic_and_systolic(x, y):
    dbp, sbp = sorted((x, y))
    m = mean_arterial_pressure(sbp, dbp)
    assert dbp <= m <= sbp
    # closer to the diastolic: the heart spends about two thirds of the cycle in diastole
    assert m - dbp <= sbp - m + 1e-9
