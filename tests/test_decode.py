"""Decoding each family's hand-written payloads, conversions and every rejection reason.

Payloads, device ids and volumes are invented; times are a made-up night in 2026.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta, timezone
from typing import Any

import numpy as np
import pytest

from daemon.engine.decode import Decoder, Reading, Rejected
from daemon.engine.outcomes import Outcome
from daemon.engine.profiles import DeviceProfile
from tests.conftest import PROFILES

REF = PROFILES["reference-cumulative"]
GRAV = PROFILES["gravimetric-text"]
IVL = PROFILES["interval-10min"]
NEST = PROFILES["nested-telemetry"]

T_0200 = datetime(2026, 3, 14, 2, 0, tzinfo=UTC).timestamp()


def with_sg(profile: DeviceProfile, sg: float, tare_g: float = 0.0) -> DeviceProfile:
    """The same family declared with another urine specific gravity (validated again)."""
    data = profile.model_dump(by_alias=True)
    data["volume"] |= {"specific_gravity": sg, "tare_g": tare_g}
    return DeviceProfile.model_validate(data)


def ok(profile: DeviceProfile, device: str, payload: Any) -> Reading:
    r = Decoder(profile).decode(device, payload)
    assert isinstance(r, Reading), r
    return r


def rejected(profile: DeviceProfile, device: str, payload: Any) -> Rejected:
    r = Decoder(profile).decode(device, payload)
    assert isinstance(r, Rejected), r
    assert r.device_id == device  # counted against the meter the topic names
    return r


def ref_payload(**over: Any) -> dict[str, Any]:
    base: dict[str, Any] = {
        "device_id": "rc-0101",
        "time": "2026-03-14T02:00:00Z",
        "volume_ml": 412.5,
        "seq": 1042,
    }
    base.update(over)
    return {k: v for k, v in base.items() if v is not None}


def nest_payload(
    cum: Any = 0.412,
    unit: Any = "L",
    state: Any = "run",
    swap: Any = False,
    ts_ms: Any = 1773453600000,
    dev: Any = "nt-3",
) -> dict[str, Any]:
    return {
        "hdr": {"dev": dev, "n": 17, "ts_ms": ts_ms},
        "uo": {"cum": cum, "unit": unit},
        "status": {"state": state, "battery_pct": 81, "bag_swap": swap},
    }


def ivl_payload(**over: Any) -> dict[str, Any]:
    base: dict[str, Any] = {
        "meter": "iv-07",
        "local_time": "2026-03-14 03:10:00",
        "utc_offset": "+01:00",
        "volume": 12.5,
        "unit": "mL",
        "n": 42,
    }
    base.update(over)
    return {k: v for k, v in base.items() if v is not None}


# --- each family, a good payload -----------------------------------------------------


@pytest.mark.parametrize("as_bytes", [False, True])
def test_reference_cumulative(as_bytes: bool) -> None:
    text = (
        '{"device_id": "rc-0101", "time": "2026-03-14T02:00:00Z", "volume_ml": 412.5, "seq": 1042}'
    )
    r = ok(REF, "rc-0101", text.encode() if as_bytes else text)
    assert r == Reading("rc-0101", T_0200, 412.5, 1042, False, 412.5)


def test_reference_accepts_a_dict_payload_and_an_explicit_offset() -> None:
    r = ok(REF, "rc-0101", ref_payload(time="2026-03-14T03:30:00+01:30"))
    assert r.device_time == T_0200


def test_gravimetric_text_grams_to_ml_with_the_declared_specific_gravity() -> None:
    r = ok(GRAV, "gs-4", "1042;2026-03-14T02:00:30Z;512.4;OK")
    assert r.device_id == "gs-4"  # the topic names the meter; the line does not
    assert r.device_time == T_0200 + 30
    assert r.seq == 1042 and r.bag_flag is False and r.raw_value == 512.4
    assert r.volume_ml == pytest.approx(512.4 / GRAV.volume.specific_gravity, abs=1e-9)


def test_gravimetric_bag_change_status_sets_the_flag() -> None:
    r = ok(GRAV, "gs-4", "1043;2026-03-14T02:01:00Z;3.0;BC")
    assert r.bag_flag is True


def test_gravimetric_tolerates_spaces_and_a_trailing_newline() -> None:
    r = ok(GRAV, "gs-4", b" 7 ; 2026-03-14T02:00:00Z ; 101.5 ; OK \n")
    assert r.seq == 7 and r.device_time == T_0200 and r.raw_value == 101.5


def test_interval_local_time_plus_offset_field() -> None:
    r = ok(IVL, "iv-07", ivl_payload())
    assert r == Reading("iv-07", T_0200 + 600, 12.5, 42, False, 12.5)


@pytest.mark.parametrize(
    ("local", "offset", "minutes"),
    [
        ("2026-03-13 20:40:00", "-05:30", -330),
        ("2026-03-14 02:10:00", "Z", 0),
        ("2026-03-14 15:55:00", "+1345", 13 * 60 + 45),
    ],
)
def test_interval_other_offsets(local: str, offset: str, minutes: int) -> None:
    r = ok(IVL, "iv-07", ivl_payload(local_time=local, utc_offset=offset))
    want = datetime.fromisoformat(local).replace(tzinfo=timezone(timedelta(minutes=minutes)))
    assert r.device_time == want.timestamp() == T_0200 + 600


@pytest.mark.parametrize(
    ("value", "unit", "ml"),
    [(0.0125, "L", 12.5), (12.5, "ml", 12.5), (12.5, "cc", 12.5), (0.25, "l", 250.0)],
)
def test_interval_unit_conversion(value: float, unit: str, ml: float) -> None:
    r = ok(IVL, "iv-07", ivl_payload(volume=value, unit=unit))
    assert r.volume_ml == pytest.approx(ml)
    assert r.raw_value == value


def test_nested_telemetry_epoch_ms_litres_and_flag() -> None:
    r = ok(NEST, "nt-3", nest_payload())
    assert r.device_time == T_0200
    assert r.volume_ml == pytest.approx(412.0)
    assert (r.seq, r.bag_flag) == (17, False)
    swapped = ok(NEST, "nt-3", nest_payload(cum=4, unit="mL", swap=True))
    assert swapped.bag_flag is True and swapped.volume_ml == 4
    # a second-resolution epoch in ms keeps its milliseconds
    assert ok(NEST, "nt-3", nest_payload(ts_ms=1773453600250)).device_time == T_0200 + 0.25


@pytest.mark.parametrize("state", ["run", "low_battery", "RUN"])
def test_nested_telemetry_ok_states(state: str) -> None:
    assert ok(NEST, "nt-3", nest_payload(state=state)).volume_ml == pytest.approx(412.0)


@pytest.mark.parametrize(("flag", "want"), [("true", True), ("0", False), (1, True), (0, False)])
def test_nested_flag_spellings(flag: Any, want: bool) -> None:
    assert ok(NEST, "nt-3", nest_payload(swap=flag)).bag_flag is want


# --- rejections ----------------------------------------------------------------------


@pytest.mark.parametrize(
    ("profile", "device", "payload", "reason"),
    [
        # not JSON / not an object
        (REF, "rc-0101", '{"device_id": "rc-0101", ', Outcome.BAD_PAYLOAD),
        (REF, "rc-0101", "[1, 2, 3]", Outcome.BAD_PAYLOAD),
        (REF, "rc-0101", [ref_payload()], Outcome.BAD_PAYLOAD),
        (REF, "rc-0101", "", Outcome.BAD_PAYLOAD),
        (GRAV, "gs-4", {"weight": 3}, Outcome.BAD_PAYLOAD),
        # not UTF-8
        (REF, "rc-0101", b'{"device_id": "rc-0101\xff", "time": 1}', Outcome.BAD_ENCODING),
        (GRAV, "gs-4", b"1;2026-03-14T02:00:00Z;\xfe\xff;OK", Outcome.BAD_ENCODING),
        # missing fields
        (REF, "rc-0101", ref_payload(volume_ml=None), Outcome.MISSING_FIELD),
        (REF, "rc-0101", ref_payload(time=None), Outcome.MISSING_FIELD),
        (REF, "rc-0101", ref_payload(device_id=None), Outcome.MISSING_FIELD),
        (GRAV, "gs-4", "1;2026-03-14T02:00:00Z;12.0", Outcome.MISSING_FIELD),
        (IVL, "iv-07", ivl_payload(unit=None), Outcome.MISSING_FIELD),
        (NEST, "nt-3", {"hdr": {"dev": "nt-3", "ts_ms": 1773453600000}}, Outcome.MISSING_FIELD),
        # times that cannot be read unambiguously
        (REF, "rc-0101", ref_payload(time="yesterday"), Outcome.BAD_TIME),
        (REF, "rc-0101", ref_payload(time="2026-03-14T02:00:00"), Outcome.BAD_TIME),
        (REF, "rc-0101", ref_payload(time=1773453600), Outcome.BAD_TIME),
        (GRAV, "gs-4", "1;2026-03-14 02:00:00;12.0;OK", Outcome.BAD_TIME),
        (IVL, "iv-07", ivl_payload(utc_offset=None), Outcome.BAD_TIME),
        (IVL, "iv-07", ivl_payload(utc_offset="+25:00"), Outcome.BAD_TIME),
        (IVL, "iv-07", ivl_payload(utc_offset="CET"), Outcome.BAD_TIME),
        (IVL, "iv-07", ivl_payload(local_time="2026-03-14T03:10:00+01:00"), Outcome.BAD_TIME),
        (NEST, "nt-3", nest_payload(ts_ms="soon"), Outcome.BAD_TIME),
        (NEST, "nt-3", nest_payload(ts_ms=-5), Outcome.BAD_TIME),
        (NEST, "nt-3", nest_payload(ts_ms=True), Outcome.BAD_TIME),
        # numbers that are not finite numbers
        (
            REF,
            "rc-0101",
            '{"device_id": "rc-0101", "time": "2026-03-14T02:00:00Z", "volume_ml": NaN, "seq": 1}',
            Outcome.BAD_NUMBER,
        ),
        (REF, "rc-0101", ref_payload(volume_ml=float("inf")), Outcome.BAD_NUMBER),
        (
            REF,
            "rc-0101",
            '{"device_id": "rc-0101", "time": "2026-03-14T02:00:00Z", '
            '"volume_ml": 1e400, "seq": 1}',
            Outcome.BAD_NUMBER,
        ),
        (REF, "rc-0101", ref_payload(volume_ml="lots"), Outcome.BAD_NUMBER),
        (REF, "rc-0101", ref_payload(volume_ml=True), Outcome.BAD_NUMBER),
        (REF, "rc-0101", ref_payload(volume_ml=[1]), Outcome.BAD_NUMBER),
        (REF, "rc-0101", ref_payload(seq=1.5), Outcome.BAD_NUMBER),
        (GRAV, "gs-4", "1;2026-03-14T02:00:00Z;inf;OK", Outcome.BAD_NUMBER),
        (GRAV, "gs-4", "x;2026-03-14T02:00:00Z;12.0;OK", Outcome.BAD_NUMBER),
        # units
        (IVL, "iv-07", ivl_payload(unit="oz"), Outcome.BAD_UNIT),
        (IVL, "iv-07", ivl_payload(unit="g"), Outcome.BAD_UNIT),
        (NEST, "nt-3", nest_payload(unit="gal"), Outcome.BAD_UNIT),
        # the payload names another meter than the topic
        (REF, "rc-0101", ref_payload(device_id="rc-0102"), Outcome.DEVICE_ID_MISMATCH),
        (IVL, "iv-07", ivl_payload(meter="iv-08"), Outcome.DEVICE_ID_MISMATCH),
        (NEST, "nt-3", nest_payload(dev="nt-4"), Outcome.DEVICE_ID_MISMATCH),
        # the meter says it is not measuring
        (GRAV, "gs-4", "1;2026-03-14T02:00:00Z;12.0;ERR", Outcome.DEVICE_FAULT),
        (GRAV, "gs-4", "1;2026-03-14T02:00:00Z;12.0;MOV", Outcome.DEVICE_FAULT),
        (NEST, "nt-3", nest_payload(state="fault"), Outcome.DEVICE_FAULT),
        # outside the physical range of the meter
        (REF, "rc-0101", ref_payload(volume_ml=-1), Outcome.OUT_OF_RANGE),
        (REF, "rc-0101", ref_payload(volume_ml=4000.5), Outcome.OUT_OF_RANGE),
        (GRAV, "gs-4", "1;2026-03-14T02:00:00Z;-10;OK", Outcome.OUT_OF_RANGE),
        (NEST, "nt-3", nest_payload(cum=3.2, unit="L"), Outcome.OUT_OF_RANGE),
        (IVL, "iv-07", ivl_payload(volume=1.5, unit="L"), Outcome.OUT_OF_RANGE),
    ],
)
def test_rejections(profile: DeviceProfile, device: str, payload: Any, reason: Outcome) -> None:
    r = rejected(profile, device, payload)
    assert r.reason is reason, r
    assert r.detail and len(r.detail) <= 200


def test_physical_range_edges_are_inclusive() -> None:
    assert ok(REF, "rc-0101", ref_payload(volume_ml=0)).volume_ml == 0
    assert ok(REF, "rc-0101", ref_payload(volume_ml=4000)).volume_ml == 4000
    # a re-tared scale reads slightly below zero: allowed down to the declared min_ml
    assert ok(GRAV, "gs-4", "1;2026-03-14T02:00:00Z;-3.0;OK").volume_ml < 0


def test_missing_seq_is_allowed() -> None:
    assert ok(REF, "rc-0101", ref_payload(seq=None)).seq is None


@pytest.mark.parametrize(
    ("profile", "device", "payload"),
    [
        (
            REF,
            "rc-0101",
            '{"device_id": "rc-0101", "time": "2026-03-14T02:00:00Z", '
            '"volume_ml": 1' + "0" * 400 + ', "seq": 1}',
        ),
        (
            REF,
            "rc-0101",
            '{"device_id": "rc-0101", "time": "2026-03-14T02:00:00Z", '
            '"volume_ml": 5, "seq": 1' + "0" * 400 + "}",
        ),
        (
            NEST,
            "nt-3",
            '{"hdr": {"dev": "nt-3", "n": 1, "ts_ms": 1' + "0" * 400 + "}, "
            '"uo": {"cum": 1, "unit": "mL"}, "status": {"state": "run"}}',
        ),
    ],
    ids=["volume", "seq", "epoch"],
)
def test_huge_json_integer_is_a_rejection_not_an_exception(
    profile: DeviceProfile, device: str, payload: str
) -> None:
    r = Decoder(profile).decode(device, payload)
    assert isinstance(r, Rejected)
    assert r.reason in (Outcome.BAD_NUMBER, Outcome.BAD_TIME, Outcome.OUT_OF_RANGE)


# --- gravimetric conversion against the urine specific-gravity range ------------------


def test_e6_250_g_at_sg_1_025_is_243_9_ml() -> None:
    # source: CLINICAL-REFERENCE.md worked example E6 (derived): 250 g at SG 1.025 -> 243.9 mL
    r = ok(with_sg(GRAV, 1.025), "gs-4", "1;2026-03-14T02:00:00Z;250;OK")
    assert r.volume_ml == pytest.approx(243.9, abs=0.05)
    # the same grams read as millilitres would overstate by 6.1 mL, 2.5%
    assert 250 - r.volume_ml == pytest.approx(6.1, abs=0.05)


def test_e6_boundary_flip_at_the_kdigo_line() -> None:
    # source: CLINICAL-REFERENCE.md E6 (derived): 35.5 g/h at SG 1.030 is 34.5 mL/h, under
    # the 35 mL/h line (0.5 mL/kg/h for 70 kg; source: KDIGO 2012 AKI guideline, Table 2)
    r = ok(with_sg(GRAV, 1.030), "gs-4", "1;2026-03-14T02:00:00Z;35.5;OK")
    assert r.volume_ml == pytest.approx(34.5, abs=0.05)
    assert r.volume_ml < 0.5 * 70 < 35.5


@pytest.mark.parametrize(("sg", "overstated"), [(1.005, 0.005), (1.030, 0.030)])
def test_reading_1_g_as_1_ml_overstates_by_sg_minus_1(sg: float, overstated: float) -> None:
    # source: Medscape Reference, "Urine Specific Gravity" (range 1.005-1.030); the error
    # arithmetic (0.5% at 1.005, 3% at 1.030) is derived (CLINICAL-REFERENCE.md section 6)
    line = "1;2026-03-14T02:00:00Z;800;OK"
    naive = ok(with_sg(GRAV, 1.000), "gs-4", line).volume_ml
    true = ok(with_sg(GRAV, sg), "gs-4", line).volume_ml
    assert naive / true - 1 == pytest.approx(overstated, abs=1e-12)


def test_default_sg_error_stays_within_the_stated_bound_over_the_reference_range() -> None:
    default = GRAV.volume.specific_gravity
    # source: DESIGN §3: default SG 1.015
    assert default == 1.015
    mass_g = 640.0
    reported = ok(GRAV, "gs-4", f"1;2026-03-14T02:00:00Z;{mass_g};OK").volume_ml
    # source: Medscape Reference, "Urine Specific Gravity": reference range 1.005-1.030
    for true_sg in np.linspace(1.005, 1.030, 26):
        true_ml = mass_g / true_sg
        # source: DESIGN §3, stated error about +-1.5% over the reference range (derived)
        assert abs(reported / true_ml - 1) <= 0.015
    # source: CLINICAL-REFERENCE.md section 6, physiologic extremes ~1.001-1.035 [P];
    # DESIGN §3 worst case +-3%
    for true_sg in (1.001, 1.035):
        assert abs(reported / (mass_g / true_sg) - 1) <= 0.03


def test_tare_is_subtracted_before_the_density_conversion() -> None:
    r = ok(with_sg(GRAV, 1.020, tare_g=50.0), "gs-4", "1;2026-03-14T02:00:00Z;152;OK")
    assert r.volume_ml == pytest.approx(100.0)


def test_specific_gravity_outside_what_urine_can_be_is_refused_by_the_schema() -> None:
    with pytest.raises(ValueError, match="specific_gravity"):
        with_sg(GRAV, 1.2)


# --- strict JSON numbers (issue 14) --------------------------------------------------
# A JSON payload says what is a number: a string that looks like one is a mistake in the
# sender (or a hostile one), never read as a number. Text payloads are text by nature.


@pytest.mark.parametrize(
    ("profile", "device", "payload", "reason"),
    [
        (REF, "rc-0101", ref_payload(volume_ml="12"), Outcome.BAD_NUMBER),
        (REF, "rc-0101", ref_payload(volume_ml="0"), Outcome.BAD_NUMBER),
        (REF, "rc-0101", ref_payload(volume_ml=" 412.5 "), Outcome.BAD_NUMBER),
        (REF, "rc-0101", ref_payload(seq="1042"), Outcome.BAD_NUMBER),
        (IVL, "iv-07", ivl_payload(volume="12.5"), Outcome.BAD_NUMBER),
        (IVL, "iv-07", ivl_payload(n="42"), Outcome.BAD_NUMBER),
        (NEST, "nt-3", nest_payload(cum="0.412"), Outcome.BAD_NUMBER),
        (NEST, "nt-3", nest_payload(ts_ms="1773453600000"), Outcome.BAD_TIME),
        (REF, "101", ref_payload(device_id=101), Outcome.DEVICE_ID_MISMATCH),
    ],
)
def test_a_string_where_json_needs_a_number_is_rejected(
    profile: DeviceProfile, device: str, payload: Any, reason: Outcome
) -> None:
    r = rejected(profile, device, payload)
    assert r.reason is reason, r


def test_text_payloads_still_read_their_numbers() -> None:
    r = ok(GRAV, "gs-4", "1042;2026-03-14T02:00:30Z;512.4;OK")
    assert r.seq == 1042 and r.raw_value == pytest.approx(512.4)
