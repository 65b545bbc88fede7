"""Replacement advice arithmetic (DESIGN §6; CLINICAL-REFERENCE §1, §5, worked examples E4, E5)."""

from __future__ import annotations

import json
import math

import pytest
from hypothesis import given
from hypothesis import strategies as st

from daemon.engine.advice import (
    CAUTION,
    FLUIDS,
    SUMMARY_MAX,
    Advice,
    ReplacementOrder,
    delta_na_from_infusate,
    delta_na_from_loss,
    replacement_advice,
    total_body_water,
    water_deficit,
)

T0 = 1_767_225_600.0  # 2026-01-01T00:00:00Z, an invented clock hour
HALF_SALINE = FLUIDS["0.45% NaCl"]

fractions = st.floats(min_value=0.0, max_value=1.0, exclude_min=True)
outputs = st.floats(min_value=0.0, max_value=10_000.0)


def e5_urine() -> dict[str, float]:
    # E5 gives urine Na + K = 60 mmol/L; the split 40 + 20 is invented (only the sum counts).
    return {"urine_na": 40.0, "urine_k": 20.0}


# --- fluids -----------------------------------------------------------------------------


def test_fluid_constants():
    assert FLUIDS["0.45% NaCl"].na_mmol_l == 77  # source: CLINICAL-REFERENCE §5, composition
    assert FLUIDS["0.9% NaCl"].na_mmol_l == 154  # source: FPnotebook (CLINICAL-REFERENCE §5)
    assert FLUIDS["Lactated Ringer's"].na_mmol_l == 130  # source: CLINICAL-REFERENCE §5
    assert FLUIDS["Lactated Ringer's"].k_mmol_l == 4  # from memory (usual label composition)
    # source: CLINICAL-REFERENCE §5, 0.45% NaCl is ~50% free water (derived); 0.9% none
    assert HALF_SALINE.free_water_fraction == pytest.approx(0.5)
    assert FLUIDS["0.9% NaCl"].free_water_fraction == 0.0
    for name, fluid in FLUIDS.items():
        assert fluid.name == name


# --- E4: suggested rate -----------------------------------------------------------------


def test_e4_advice_after_230_ml_hour():
    a = replacement_advice(T0, 230.0, ReplacementOrder())
    # source: CLINICAL-REFERENCE E4 (derived); 50-75% of last hour from memory
    # (Halbgewachs & Domes, Can Fam Physician 2015 algorithm)
    assert a.rate_low_ml_h == pytest.approx(115.0)
    assert a.rate_high_ml_h == pytest.approx(172.5)
    assert a.fluid == "0.45% NaCl"  # source: CLINICAL-REFERENCE §1 (0.45% NaCl, from memory)
    # source: CLINICAL-REFERENCE E4, Na 8.9-13.3 mmol/h (derived, Na 77 mmol/L)
    assert a.sodium_mmol_h[0] == pytest.approx(8.9, abs=0.05)
    assert a.sodium_mmol_h[1] == pytest.approx(13.3, abs=0.05)
    # source: CLINICAL-REFERENCE E4, free water ~57.5-86 mL/h (derived)
    assert a.free_water_ml_h[0] == pytest.approx(57.5, abs=0.05)
    assert a.free_water_ml_h[1] == pytest.approx(86.0, abs=0.5)
    assert a.projection is None
    assert a.notes == ()
    assert a.summary.startswith(
        "Suggested replacement 115–173 mL/h of 0.45% NaCl (50–75% of last hour's 230 mL)."
    )


def test_order_defaults_are_the_published_range():
    order = ReplacementOrder()
    # source: CLINICAL-REFERENCE §1, 1/2-3/4 of previous hour (Halbgewachs 2015, from memory)
    assert (order.fraction_low, order.fraction_high) == (0.5, 0.75)
    assert order.fluid == "0.45% NaCl"  # source: CLINICAL-REFERENCE §1 (from memory)


def test_other_fluid_and_single_fraction():
    order = ReplacementOrder(fraction_low=0.6, fraction_high=0.6, fluid="0.9% NaCl")
    a = replacement_advice(T0, 250.0, order)
    assert a.rate_low_ml_h == a.rate_high_ml_h == pytest.approx(150.0)
    # source: FPnotebook, 0.9% NaCl Na 154 mmol/L -> 150 mL/h carries 23.1 mmol/h (derived)
    assert a.sodium_mmol_h == pytest.approx((23.1, 23.1))
    assert a.free_water_ml_h == (0.0, 0.0)
    assert a.summary.startswith("Suggested replacement 150 mL/h of 0.9% NaCl (60% of")


def test_zero_output_suggests_nothing():
    a = replacement_advice(T0, 0.0, ReplacementOrder())
    assert (a.rate_low_ml_h, a.rate_high_ml_h) == (0.0, 0.0)
    assert any("nothing to replace" in n for n in a.notes)
    assert "no replacement" in a.summary


# --- the 100% guard ---------------------------------------------------------------------


@given(fractions, fractions, outputs)
def test_no_order_recommends_more_than_was_lost(f1, f2, out):
    # common practice: never replace 100%+ (over-replacement prolongs the diuresis;
    # King's College London teaching case, CLINICAL-REFERENCE §1)
    low, high = sorted((f1, f2))
    a = replacement_advice(T0, out, ReplacementOrder(fraction_low=low, fraction_high=high))
    assert 0.0 <= a.rate_low_ml_h <= a.rate_high_ml_h <= out


@given(st.floats(min_value=1.0, exclude_min=True, allow_nan=False, allow_infinity=False))
def test_fractions_above_one_are_rejected(f):
    with pytest.raises(ValueError, match=r"above 1\.0 \(100% of output\)"):
        ReplacementOrder(fraction_high=f)
    with pytest.raises(ValueError, match="prolongs the diuresis"):
        ReplacementOrder(fraction_low=f, fraction_high=f)


def test_percent_typed_as_whole_number_is_rejected_clearly():
    with pytest.raises(ValueError, match=r"0\.5 for 50%"):
        ReplacementOrder(fraction_low=50, fraction_high=75)


def test_exactly_one_is_the_ceiling():
    order = ReplacementOrder(fraction_low=1.0, fraction_high=1.0)
    assert replacement_advice(T0, 300.0, order).rate_high_ml_h == 300.0


@pytest.mark.parametrize(
    ("low", "high", "message"),
    [
        (0.0, 0.5, "above 0"),
        (-0.2, 0.5, "above 0"),
        (0.8, 0.5, "fraction_low 0.8 is above fraction_high 0.5"),
        (math.nan, 0.5, "finite"),
        (0.5, math.inf, "finite"),
    ],
)
def test_bad_orders_are_rejected(low, high, message):
    with pytest.raises(ValueError, match=message):
        ReplacementOrder(fraction_low=low, fraction_high=high)


def test_order_rejects_unknown_fluid_and_extra_keys():
    with pytest.raises(ValueError, match="unknown fluid 'D5W'"):
        ReplacementOrder(fluid="D5W")
    with pytest.raises(ValueError, match="extra"):
        ReplacementOrder.model_validate({"fraction_low": 0.5, "ratio": 1.2})


def test_orders_cannot_be_changed_or_smuggled_past_the_cap():
    order = ReplacementOrder()
    with pytest.raises(ValueError):
        order.fraction_high = 1.5  # type: ignore[misc]
    # model_construct skips validation; the advice re-checks the cap itself
    unchecked = ReplacementOrder.model_construct(fraction_low=0.5, fraction_high=1.5)
    with pytest.raises(ValueError, match="0 < low <= high <= 1"):
        replacement_advice(T0, 300.0, unchecked)
    unknown = ReplacementOrder.model_construct(fluid="tap water")
    with pytest.raises(ValueError, match="unknown fluid"):
        replacement_advice(T0, 300.0, unknown)


# --- serum sodium note ------------------------------------------------------------------


def test_tonicity_note_above_145_only():
    # source: Adrogué & Madias, NEJM 2000 (hypernatraemia is serum Na > 145 mmol/L)
    high = replacement_advice(T0, 230.0, ReplacementOrder(), serum_na=146.0)
    assert high.tonicity_review
    assert any("review fluid tonicity with the prescriber" in n for n in high.notes)
    assert "tonicity" in high.summary
    edge = replacement_advice(T0, 230.0, ReplacementOrder(), serum_na=145.0)
    assert not edge.tonicity_review
    assert not any("tonicity" in n for n in edge.notes)
    assert "tonicity" not in edge.summary


def test_missing_projection_inputs_are_named():
    a = replacement_advice(T0, 230.0, ReplacementOrder(), serum_na=140.0, weight_kg=70.0)
    assert a.projection is None
    assert "No sodium projection: missing urine sodium, urine potassium." in a.notes


# --- E5: Adrogué-Madias projection ------------------------------------------------------


def test_e5_per_litre_formulas():
    tbw = total_body_water(70.0, 0.6)
    assert tbw == pytest.approx(42.0)  # source: CLINICAL-REFERENCE E5; TBW 0.6 x weight in men
    # source: Adrogué & Madias, NEJM 2000; CLINICAL-REFERENCE E5: (77 - 150)/43 = -1.70
    assert delta_na_from_infusate(150.0, tbw, HALF_SALINE) == pytest.approx(-1.70, abs=0.005)
    # source: Adrogué & Madias, JASN table (CLINICAL-REFERENCE §5); E5: (150 - 60)/41 = +2.20
    assert delta_na_from_loss(150.0, tbw, **e5_urine()) == pytest.approx(2.20, abs=0.005)


def test_volumes_scale_linearly():
    # The per-litre result times the volume: the usual linear approximation, exact only
    # for 1 L (source: PMC8740981, 2022, linearity caveat; CLINICAL-REFERENCE §5).
    one = delta_na_from_infusate(150.0, 42.0, HALF_SALINE)
    assert delta_na_from_infusate(150.0, 42.0, HALF_SALINE, 0.25) == pytest.approx(one / 4)
    loss = delta_na_from_loss(150.0, 42.0, 40.0, 20.0)
    assert delta_na_from_loss(150.0, 42.0, 40.0, 20.0, 0.5) == pytest.approx(loss / 2)


def test_e5_projection_through_the_advice():
    # 1 L lost and 1 L of 0.45% NaCl given (fraction 1.0), E5 numbers
    order = ReplacementOrder(fraction_low=1.0, fraction_high=1.0)
    a = replacement_advice(T0, 1000.0, order, serum_na=150.0, weight_kg=70.0, **e5_urine())
    p = a.projection
    assert p is not None
    assert p.tbw_l == pytest.approx(42.0)  # source: CLINICAL-REFERENCE E5
    assert p.delta_from_loss == pytest.approx(2.20, abs=0.005)  # source: CLINICAL-REFERENCE E5
    # source: CLINICAL-REFERENCE E5
    assert p.delta_from_replacement_low == pytest.approx(-1.70, abs=0.005)
    # E5: even with 1:1 hypotonic replacement serum Na still rises (+0.50 mmol/L/h, derived)
    assert p.net_low == pytest.approx(0.50, abs=0.01)
    # x 24 h = +11.9 > 10 mmol/L/24 h (source: Adrogué & Madias 2000; Verbalis 2013)
    assert p.per_24h_low == pytest.approx(11.94, abs=0.05)
    assert p.exceeds_daily_limit
    assert any("more than 10 mmol/L in 24 h" in n for n in a.notes)
    assert "Na change >10" in a.summary


def test_e4_hour_with_e5_labs_stays_within_the_limit():
    # E4 output (230 mL) with E5 labs: the loss raises Na by 0.23 x 2.20; the higher end of
    # the suggested 0.45% NaCl lowers it more than the lower end (derived from E4/E5).
    a = replacement_advice(
        T0, 230.0, ReplacementOrder(), serum_na=150.0, weight_kg=70.0, **e5_urine()
    )
    p = a.projection
    assert p is not None
    assert p.delta_from_loss == pytest.approx(0.23 * 90 / 41)  # source: CLINICAL-REFERENCE E5
    assert p.delta_from_replacement_low == pytest.approx(0.115 * -73 / 43)  # source: E5
    assert p.delta_from_replacement_high == pytest.approx(0.1725 * -73 / 43)  # source: E5
    assert 0 < p.net_high < p.net_low
    assert p.per_24h_low < 10  # source: Adrogué & Madias 2000 (10 mmol/L/24 h)
    assert not p.exceeds_daily_limit
    assert a.tonicity_review  # 150 > 145, source: Adrogué & Madias, NEJM 2000


def test_a_fast_fall_is_flagged_too():
    # Urine saltier than plasma (Na + K 200, invented) plus 0.45% NaCl: Na falls ~2.9/h.
    # source: Theisen-Toupal & Mattison (fall <= 10 mmol/L/day in chronic hypernatraemia)
    order = ReplacementOrder(fraction_low=1.0, fraction_high=1.0)
    a = replacement_advice(
        T0, 1000.0, order, serum_na=150.0, urine_na=150.0, urine_k=50.0, weight_kg=70.0
    )
    assert a.projection is not None
    assert a.projection.net_low < 0
    assert a.projection.exceeds_daily_limit


def test_daily_limit_is_a_setting():
    order = ReplacementOrder(fraction_low=1.0, fraction_high=1.0)
    kwargs = {"serum_na": 150.0, "weight_kg": 70.0, **e5_urine()}
    # projected +11.94 mmol/L/24 h (E5, derived): within 12, beyond 11.9
    loose = replacement_advice(T0, 1000.0, order, daily_limit=12.0, **kwargs)
    tight = replacement_advice(T0, 1000.0, order, daily_limit=11.9, **kwargs)
    assert loose.projection is not None and not loose.projection.exceeds_daily_limit
    assert tight.projection is not None and tight.projection.exceeds_daily_limit


def test_tbw_fraction_for_a_woman():
    # source: CLINICAL-REFERENCE §5, TBW fraction 0.5 in women -> 35 L at 70 kg
    a = replacement_advice(
        T0,
        1000.0,
        ReplacementOrder(),
        serum_na=150.0,
        weight_kg=70.0,
        tbw_fraction=0.5,
        **e5_urine(),
    )
    assert a.projection is not None
    assert a.projection.tbw_l == pytest.approx(35.0)
    assert a.projection.delta_from_loss == pytest.approx(90 / 34)


def test_e5_water_deficit():
    # source: CLINICAL-REFERENCE §5, deficit = TBW x (Na/140 - 1); 42 x (150/140 - 1) = 3.0 L
    assert water_deficit(42.0, 150.0) == pytest.approx(3.0)
    assert water_deficit(42.0, 140.0) == 0.0
    assert water_deficit(42.0, 135.0) < 0  # no deficit below 140


# --- input validation -------------------------------------------------------------------


@pytest.mark.parametrize("na", [99.9, 200.1, math.nan, -140.0])
def test_implausible_serum_sodium_is_rejected(na):
    # common practice, no single source: 100-200 mmol/L as a plausibility range (ours)
    with pytest.raises(ValueError, match="serum sodium must be within 100-200 mmol/L"):
        replacement_advice(T0, 230.0, ReplacementOrder(), serum_na=na)
    with pytest.raises(ValueError, match="serum sodium"):
        water_deficit(42.0, na)


@pytest.mark.parametrize("na", [100.0, 200.0])
def test_plausibility_range_is_inclusive(na):
    assert replacement_advice(T0, 230.0, ReplacementOrder(), serum_na=na).caution == CAUTION


@pytest.mark.parametrize("weight", [0.0, -70.0, math.nan, 401.0])
def test_bad_weight_is_rejected(weight):
    with pytest.raises(ValueError, match="weight must be above 0"):
        replacement_advice(
            T0, 230.0, ReplacementOrder(), serum_na=150.0, weight_kg=weight, **e5_urine()
        )


def test_other_bad_inputs_are_rejected():
    order = ReplacementOrder()
    with pytest.raises(ValueError, match="hour output"):
        replacement_advice(T0, -1.0, order)
    with pytest.raises(ValueError, match="hour output"):
        replacement_advice(T0, math.inf, order)
    with pytest.raises(ValueError, match="hour start"):
        replacement_advice(math.nan, 230.0, order)
    with pytest.raises(ValueError, match="urine sodium"):
        replacement_advice(
            T0, 230.0, order, serum_na=150.0, urine_na=-5.0, urine_k=20.0, weight_kg=70.0
        )
    with pytest.raises(ValueError, match="fraction must be between 0 and 1"):
        replacement_advice(
            T0, 230.0, order, serum_na=150.0, weight_kg=70.0, tbw_fraction=1.2, **e5_urine()
        )
    with pytest.raises(ValueError, match="above 1 L"):
        delta_na_from_loss(150.0, 1.0, 40.0, 20.0)
    with pytest.raises(ValueError, match="total body water"):
        water_deficit(0.0, 150.0)


# --- caution, summary and JSON on every advice ------------------------------------------


@given(
    fractions,
    fractions,
    outputs,
    st.sampled_from(sorted(FLUIDS)),
    st.none() | st.floats(100, 200),
    st.none() | st.floats(0, 500),
    st.booleans(),
)
def test_every_advice_carries_the_caution_and_a_short_summary(f1, f2, out, fluid, na, una, wt):
    low, high = sorted((f1, f2))
    order = ReplacementOrder(fraction_low=low, fraction_high=high, fluid=fluid)
    a = replacement_advice(
        T0,
        out,
        order,
        serum_na=na,
        urine_na=una,
        urine_k=una,
        weight_kg=70.0 if wt else None,
        daily_limit=10.0,
    )
    # Decision support only (DESIGN §1): every advice says who decides
    assert "treating clinician" in a.caution and "local protocol" in a.caution
    assert len(a.summary) <= SUMMARY_MAX
    assert "treating clinician" in a.summary and "local protocol" in a.summary
    assert (na is not None and na > 145) == a.tonicity_review
    json.dumps(a.to_json())


def test_to_json_shape():
    a = replacement_advice(
        T0, 230.0, ReplacementOrder(), serum_na=150.0, weight_kg=70.0, **e5_urine()
    )
    doc = json.loads(json.dumps(a.to_json()))
    assert doc["hour_start"] == "2026-01-01T00:00:00Z"
    assert doc["rate_ml_h"] == [115.0, 172.5]
    assert doc["fluid"] == "0.45% NaCl"
    assert doc["caution"] == CAUTION
    assert doc["summary"] == a.summary
    assert doc["projection"]["tbw_l"] == 42.0
    assert doc["projection"]["exceeds_daily_limit"] is False
    assert doc["projection"]["daily_limit_mmol_l"] == 10.0
    assert doc["notes"] == list(a.notes)
    assert replacement_advice(T0, 230.0, ReplacementOrder()).to_json()["projection"] is None


def test_advice_is_immutable():
    a = replacement_advice(T0, 230.0, ReplacementOrder())
    assert isinstance(a, Advice)
    with pytest.raises(AttributeError):
        a.rate_high_ml_h = 999.0  # type: ignore[misc]
