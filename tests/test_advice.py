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
    AdviceKind,
    AdvicePolicy,
    Fluid,
    ReplacementOrder,
    Sodium,
    advise,
    delta_na_from_infusate,
    delta_na_from_loss,
    ended_advice,
    replacement_advice,
    total_body_water,
    water_deficit,
)

T0 = 1_767_225_600.0  # 2026-01-01T00:00:00Z, an invented clock hour
HALF_SALINE = FLUIDS["0.45% NaCl"]
ORDERED_AT = "2025-12-31T20:00:00Z"  # an invented order time, before T0


def an_order(**kw) -> ReplacementOrder:
    """An invented clinician's order: 50-75% as 0.45% NaCl unless told otherwise (the
    range commonly used, CLINICAL-REFERENCE §1, from memory)."""
    fields = {
        "fraction_low": 0.5,
        "fraction_high": 0.75,
        "fluid": "0.45% NaCl",
        "ordered_by": "icu-physician-1 (invented)",
        "ordered_at": ORDERED_AT,
    }
    return ReplacementOrder.model_validate(fields | kw)


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
    a = replacement_advice(T0, 230.0, an_order())
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
    # 172.5 reads 173: one rounding (half up) for every number a person reads
    assert a.summary.startswith(
        "Suggested replacement 115–173 mL/h of 0.45% NaCl (50–75% of last hour's 230 mL, "
        "per order on file)."
    )
    assert a.pager_tail == "Suggest 115–173 mL/h 0.45% NaCl per order."


def test_there_is_no_default_order():
    """An order is the clinician's: fractions, fluid, who ordered it and when (DESIGN §6)."""
    with pytest.raises(ValueError) as err:
        ReplacementOrder.model_validate({})
    missing = {e["loc"][0] for e in err.value.errors()}  # type: ignore[attr-defined]
    assert missing == {"fraction_low", "fraction_high", "fluid", "ordered_by", "ordered_at"}


def test_other_fluid_and_single_fraction():
    order = an_order(fraction_low=0.6, fraction_high=0.6, fluid="0.9% NaCl")
    a = replacement_advice(T0, 250.0, order)
    assert a.rate_low_ml_h == a.rate_high_ml_h == pytest.approx(150.0)
    # source: FPnotebook, 0.9% NaCl Na 154 mmol/L -> 150 mL/h carries 23.1 mmol/h (derived)
    assert a.sodium_mmol_h == pytest.approx((23.1, 23.1))
    assert a.free_water_ml_h == (0.0, 0.0)
    assert a.summary.startswith("Suggested replacement 150 mL/h of 0.9% NaCl (60% of")


def test_zero_output_suggests_nothing():
    a = replacement_advice(T0, 0.0, an_order())
    assert (a.rate_low_ml_h, a.rate_high_ml_h) == (0.0, 0.0)
    assert any("nothing to replace" in n for n in a.notes)
    assert "nothing to replace" in a.summary


# --- the 100% guard ---------------------------------------------------------------------


@given(fractions, fractions, outputs)
def test_no_order_recommends_more_than_was_lost(f1, f2, out):
    # common practice: never replace 100%+ (over-replacement prolongs the diuresis;
    # King's College London teaching case, CLINICAL-REFERENCE §1)
    low, high = sorted((f1, f2))
    a = replacement_advice(T0, out, an_order(fraction_low=low, fraction_high=high))
    assert 0.0 <= a.rate_low_ml_h <= a.rate_high_ml_h <= out


@given(st.floats(min_value=1.0, exclude_min=True, allow_nan=False, allow_infinity=False))
def test_fractions_above_one_are_rejected(f):
    with pytest.raises(ValueError, match=r"above 1\.0 \(100% of output\)"):
        an_order(fraction_high=f)
    with pytest.raises(ValueError, match="prolongs the diuresis"):
        an_order(fraction_low=f, fraction_high=f)


def test_percent_typed_as_whole_number_is_rejected_clearly():
    with pytest.raises(ValueError, match=r"0\.5 for 50%"):
        an_order(fraction_low=50, fraction_high=75)


def test_exactly_one_is_the_ceiling():
    order = an_order(fraction_low=1.0, fraction_high=1.0)
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
        an_order(fraction_low=low, fraction_high=high)


def test_order_rejects_unknown_fluid_and_extra_keys():
    with pytest.raises(ValueError, match="unknown fluid 'D5W'"):
        an_order(fluid="D5W")
    with pytest.raises(ValueError, match="extra"):
        an_order(ratio=1.2)


def test_orders_cannot_be_changed_or_smuggled_past_the_cap():
    order = an_order()
    with pytest.raises(ValueError):
        order.fraction_high = 1.5  # type: ignore[misc]
    # model_construct skips validation; the advice re-checks the cap itself
    unchecked = ReplacementOrder.model_construct(fraction_low=0.5, fraction_high=1.5,
                                                 fluid="0.45% NaCl")  # fmt: skip
    with pytest.raises(ValueError, match="0 < low <= high <= 1"):
        replacement_advice(T0, 300.0, unchecked)
    unknown = ReplacementOrder.model_construct(fraction_low=0.5, fraction_high=0.75,
                                               fluid="tap water")  # fmt: skip
    with pytest.raises(ValueError, match="unknown fluid"):
        replacement_advice(T0, 300.0, unknown)


# --- serum sodium note ------------------------------------------------------------------


def test_tonicity_note_above_145_only():
    # source: Adrogué & Madias, NEJM 2000 (hypernatraemia is serum Na > 145 mmol/L)
    high = replacement_advice(T0, 230.0, an_order(), serum_na=146.0)
    assert high.tonicity_review
    assert any("review fluid tonicity with the prescriber" in n for n in high.notes)
    assert "tonicity" in high.summary
    edge = replacement_advice(T0, 230.0, an_order(), serum_na=145.0)
    assert not edge.tonicity_review
    assert not any("tonicity" in n for n in edge.notes)
    assert "tonicity" not in edge.summary


def test_missing_projection_inputs_are_named():
    a = replacement_advice(T0, 230.0, an_order(), serum_na=140.0, weight_kg=70.0)
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
    order = an_order(fraction_low=1.0, fraction_high=1.0)
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
    a = replacement_advice(T0, 230.0, an_order(), serum_na=150.0, weight_kg=70.0, **e5_urine())
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
    order = an_order(fraction_low=1.0, fraction_high=1.0)
    a = replacement_advice(
        T0, 1000.0, order, serum_na=150.0, urine_na=150.0, urine_k=50.0, weight_kg=70.0
    )
    assert a.projection is not None
    assert a.projection.net_low < 0
    assert a.projection.exceeds_daily_limit


def test_daily_limit_is_a_setting():
    order = an_order(fraction_low=1.0, fraction_high=1.0)
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
        an_order(),
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
        replacement_advice(T0, 230.0, an_order(), serum_na=na)
    with pytest.raises(ValueError, match="serum sodium"):
        water_deficit(42.0, na)


@pytest.mark.parametrize("na", [100.0, 200.0])
def test_plausibility_range_is_inclusive(na):
    assert replacement_advice(T0, 230.0, an_order(), serum_na=na).caution == CAUTION


@pytest.mark.parametrize("weight", [0.0, -70.0, math.nan, 401.0])
def test_bad_weight_is_rejected(weight):
    with pytest.raises(ValueError, match="weight must be above 0"):
        replacement_advice(T0, 230.0, an_order(), serum_na=150.0, weight_kg=weight, **e5_urine())


def test_other_bad_inputs_are_rejected():
    order = an_order()
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
    order = an_order(fraction_low=low, fraction_high=high, fluid=fluid)
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
    a = replacement_advice(T0, 230.0, an_order(), serum_na=150.0, weight_kg=70.0, **e5_urine())
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
    assert replacement_advice(T0, 230.0, an_order()).to_json()["projection"] is None


def test_advice_is_immutable():
    a = replacement_advice(T0, 230.0, an_order())
    assert isinstance(a, Advice)
    with pytest.raises(AttributeError):
        a.rate_high_ml_h = 999.0  # type: ignore[misc]


# --- what the advice may say at all (DESIGN §6) -----------------------------------------

NA_OK = Sodium(140.0, T0 - 3600.0)  # in range (135-145 mmol/L; Adrogue & Madias, NEJM 2000)
NOW = T0 + 3600.0 + 60.0  # one minute after the hour being advised on
POLICY = AdvicePolicy()


def test_advice_policy_defaults_and_their_sources():
    p = AdvicePolicy()
    # common practice, no single source: electrolytes every 4-12 h during a diuresis
    # (CLINICAL-REFERENCE §1); older than the longest usual interval is stale
    assert p.sodium_max_age_s == 12 * 3600
    assert p.sodium_low_below == 135  # source: Spasovski G et al., Eur J Endocrinol 2014
    assert p.sodium_high_above == 145  # source: Adrogue & Madias, NEJM 2000 (hypernatraemia)
    # source: NICE CG174 (2013): resuscitation crystalloids carry Na 130-154 mmol/L
    assert p.hypotonic_below_na_k == 130
    assert HALF_SALINE.hypotonic(p)
    assert not FLUIDS["0.9% NaCl"].hypotonic(p)
    assert not FLUIDS["Lactated Ringer's"].hypotonic(p)  # Na 130 + K 4 (CLINICAL-REF §5)


def test_the_shipped_advice_file_is_the_default():
    from daemon.rule_files import load_advice

    assert load_advice() == AdvicePolicy()


def test_without_an_order_no_fluid_and_no_rate():
    a = advise(T0, 620.0, None, NOW, sodium=NA_OK, weight_kg=70.0)
    assert a.kind is AdviceKind.NO_ORDER
    assert a.rate_low_ml_h is None and a.rate_high_ml_h is None and a.fluid is None
    assert "No replacement order on file" in a.summary and "620 mL" in a.summary
    assert not any(name in a.summary for name in FLUIDS)
    assert not any(name in n for n in a.notes for name in FLUIDS)
    assert a.pager_tail == "No replacement order on file."
    doc = a.to_json()
    assert doc["rate_ml_h"] is None and doc["fluid"] is None and doc["order"] is None


def test_an_order_not_yet_in_effect_gives_no_rate():
    order = an_order(ordered_at="2026-01-01T03:00:00Z")  # after NOW
    a = advise(T0, 620.0, order, NOW, sodium=NA_OK)
    assert a.kind is AdviceKind.NO_ORDER and a.rate_high_ml_h is None
    assert any("starts at 03:00" in n for n in a.notes)  # local clock time (UTC by default)


def test_signs_of_hypovolaemia_hold_every_rate():
    """SI >= 1.4 with MAP 60: no hypotonic (or any) replacement rate; resuscitation is the
    clinician's (Mutschler 2013 SI classes; Surviving Sepsis Campaign 2021 MAP >= 65)."""
    signs = "shock index 1.45, MAP 60 mmHg"
    for fluid in sorted(FLUIDS):
        a = advise(T0, 620.0, an_order(fluid=fluid), NOW, sodium=NA_OK,
                   hypovolaemia=signs)  # fmt: skip
        assert a.kind is AdviceKind.HELD_CIRCULATION
        assert a.rate_low_ml_h is None and a.fluid is None
        assert "assess volume status" in a.summary
        assert not any(name in a.summary for name in FLUIDS)
        assert any(signs in n for n in a.notes)


@pytest.mark.parametrize(
    ("sodium", "why"),
    [
        (None, "No serum sodium on file"),
        (Sodium(140.0, NOW - 12 * 3600 - 1), "Serum sodium 12 h old"),  # stale by 1 s
        # source: Spasovski 2014 / Adrogue & Madias 2000: hyponatraemia < 135 mmol/L
        (Sodium(134.0, NOW - 3600), "Serum sodium 134 mmol/L"),
    ],
)
def test_no_hypotonic_rate_on_a_low_unknown_or_stale_sodium(sodium, why):
    a = advise(T0, 620.0, an_order(), NOW, sodium=sodium, weight_kg=70.0)
    assert a.kind is AdviceKind.HELD_SODIUM
    assert a.rate_low_ml_h is None and a.fluid is None
    assert why in a.summary and "review the order" in a.summary
    assert "0.45% NaCl" not in a.summary and not any("0.45% NaCl" in n for n in a.notes)
    assert a.serum_na is None or a.serum_na.value < 135  # a stale result is never quoted


def test_a_recent_sodium_in_range_allows_the_ordered_rate():
    edge = Sodium(135.0, NOW - 12 * 3600)  # 135 is in range; exactly 12 h is still recent
    a = advise(T0, 230.0, an_order(), NOW, sodium=edge)
    assert a.kind is AdviceKind.RATE
    assert (a.rate_low_ml_h, a.rate_high_ml_h) == pytest.approx((115.0, 172.5))  # E4
    assert a.serum_na == edge


def test_an_isotonic_order_keeps_its_rate_with_a_note():
    """0.9% NaCl (Na 154) does not lower serum sodium; the note asks for a review."""
    order = an_order(fluid="0.9% NaCl")
    a = advise(T0, 230.0, order, NOW, sodium=None)
    assert a.kind is AdviceKind.RATE and a.fluid == "0.9% NaCl"
    assert any("no serum sodium on file" in n for n in a.notes)


def test_the_orders_maximum_rate_caps_the_suggestion():
    order = an_order(max_rate_ml_h=300.0)
    a = advise(T0, 620.0, order, NOW, sodium=NA_OK)
    assert (a.rate_low_ml_h, a.rate_high_ml_h) == (300.0, 300.0)  # 310-465 cut to 300
    assert a.capped and "max" in a.summary
    assert any("maximum of 300 mL/h" in n for n in a.notes)


def test_a_residual_drain_is_reported_not_counted():
    a = advise(T0, 180.0, an_order(), NOW, sodium=NA_OK, residual_ml=900.0)
    assert a.hour_output_ml == 180.0 and a.rate_high_ml_h == pytest.approx(135.0)
    assert any("Residual drained: 900 mL" in n for n in a.notes)
    assert a.to_json()["residual_ml"] == 900.0


def test_the_end_of_the_criterion_is_said_once_with_no_rate():
    a = ended_advice(T0, 150.0, an_order())
    assert a.kind is AdviceKind.ENDED and a.rate_high_ml_h is None and a.fluid is None
    assert "back under the criterion" in a.summary and "review the replacement order" in a.summary
    assert a.pager_tail == ""


def test_adrogue_madias_hypernatraemia_worked_example():
    """76-year-old woman, 60 kg, serum Na 168 mmol/L; TBW 0.45 x 60 = 27 L; 1 L of 5%
    dextrose lowers serum Na by (0 - 168)/(27 + 1) = -6.0 mmol/L, so about 1.7 L lowers it
    by 10. (source: Adrogue HJ, Madias NE. Hypernatremia. N Engl J Med 2000;342:1493-9,
    worked example, from memory)"""
    tbw = total_body_water(60.0, 0.45)
    assert tbw == pytest.approx(27.0)
    d5w = Fluid("5% dextrose in water", 0.0)  # no sodium (from memory)
    per_litre = delta_na_from_infusate(168.0, tbw, d5w)
    assert per_litre == pytest.approx(-6.0)
    assert 10.0 / -per_litre == pytest.approx(1.7, abs=0.05)


@given(
    st.none() | st.floats(100, 200),
    st.floats(0, 48 * 3600),
    st.sampled_from(sorted(FLUIDS)),
    st.booleans(),
    st.booleans(),
    outputs,
)
def test_no_advice_breaks_the_safety_rules(na, age_s, fluid, ordered, shocked, out):
    """Whatever the inputs: no fluid without an order, no hypotonic fluid while sodium is
    low, unknown or stale, no rate while signs of hypovolaemia hold (DESIGN §6)."""
    sodium = None if na is None else Sodium(na, NOW - age_s)
    order = an_order(fluid=fluid) if ordered else None
    a = advise(T0, out, order, NOW, sodium=sodium, weight_kg=70.0,
               hypovolaemia="shock index 1.5" if shocked else None)  # fmt: skip
    words = " ".join([a.summary, a.pager_tail, *a.notes])
    named = {f for f in FLUIDS if f in words} | ({a.fluid} if a.fluid else set())
    if not ordered:
        assert not named and a.rate_high_ml_h is None
    if shocked:
        assert a.rate_high_ml_h is None and not named
    sodium_ok = sodium is not None and age_s <= POLICY.sodium_max_age_s and na >= 135
    if not sodium_ok:
        assert not {f for f in named if FLUIDS[f].hypotonic(POLICY)}
    assert "treating clinician" in a.summary and len(a.summary) <= SUMMARY_MAX
