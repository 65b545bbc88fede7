"""Connecting a meter family with one profile file and no code (issue 19): key=value text,
any volume unit, named topic levels, checksums, per-meter calibration, and the shipped
key=value family in decilitres round-tripped through the simulator and replay against a
plain numpy truth.

Every family, meter, ward, bed and payload here is invented; no patient data.
"""

from __future__ import annotations

import functools
import json
import math
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pint
import pytest

from daemon.cli import main
from daemon.engine.decode import Decoder, Reading, Rejected, checksum_text
from daemon.engine.engine import REFUSED_LEVEL, Engine, ReadingTrace
from daemon.engine.outcomes import Outcome
from daemon.engine.profiles import (
    UNIT_ALIASES,
    ChecksumAlgorithm,
    DeviceProfile,
    compile_topic,
    topic_problems,
)
from daemon.errors import UserError
from daemon.profile_files import load_profiles
from simulator.encode import encode
from simulator.meterlog import MeterFaults, constant, context_record, simulate, write_log
from tests.conftest import PROFILES, T0

KV = PROFILES["keyvalue-decilitre"]
UREG = pint.UnitRegistry()
T_0200 = datetime(2026, 3, 14, 2, 0, tzinfo=UTC).timestamp()


def variant(profile: DeviceProfile, **sections: dict[str, Any]) -> DeviceProfile:
    """The same family declared otherwise (validated again); None removes a key."""
    data = profile.model_dump(by_alias=True, exclude_none=True)
    for section, keys in sections.items():
        if isinstance(keys, dict):
            merged = {**data.get(section, {}), **keys}
            data[section] = {k: v for k, v in merged.items() if v is not None}
        else:
            data[section] = keys
    return DeviceProfile.model_validate(data)


def xor8(text: str) -> str:
    """The XOR checksum, computed here independently of the decoder."""
    return f"{functools.reduce(lambda a, b: a ^ b, text.encode(), 0):02X}"


def kv_line(**pairs: Any) -> str:
    base: dict[str, Any] = {"v": 2, "id": "kv-0101", "n": 1042, "ts": 1773453600,
                            "cum_dl": 4.25, "st": 0}  # fmt: skip
    base.update(pairs)
    text = ";".join(f"{k}={v}" for k, v in base.items() if v is not None)
    return f"{text};cs={xor8(text)}"


def decode(profile: DeviceProfile, payload: Any, device: str = "kv-0101") -> Reading | Rejected:
    return Decoder(profile).decode(device, payload)


# --- key=value payloads ---------------------------------------------------------------------


def test_the_issue_example_decodes_by_key_name_in_decilitres() -> None:
    r = decode(KV, kv_line())
    assert isinstance(r, Reading), r
    assert r.device_time == T_0200 and r.seq == 1042 and r.bag_flag is False
    assert r.raw_value == 4.25  # as sent, for duplicate detection
    assert r.volume_ml == pytest.approx(UREG.Quantity(4.25, "dL").to("mL").magnitude)


def test_pairs_in_any_order_with_blanks_and_unknown_keys() -> None:
    text = "st = 0 ;  fw=3.1.7 ; cum_dl=4.25;ts =1773453600; n=1042 ;id= kv-0101 ;battery=81"
    # the checksum covers the text as sent, inside the blanks around the whole payload
    r = decode(KV, f"  {text};cs={xor8(text)}\r\n".encode())
    assert isinstance(r, Reading), r
    assert (r.device_time, r.volume_ml, r.seq) == (T_0200, pytest.approx(425.0), 1042)


def test_a_bag_change_status_and_a_fault_status() -> None:
    changed = decode(KV, kv_line(st=2, cum_dl=0.03))
    assert isinstance(changed, Reading) and changed.bag_flag is True
    fault = decode(KV, kv_line(st=7))
    assert isinstance(fault, Rejected) and fault.reason is Outcome.DEVICE_FAULT
    assert fault.key == "status.ok"


@pytest.mark.parametrize(
    ("payload", "reason"),
    [
        ("v=2;id=kv-0101;ts=1773453600;cum_dl;st=0", Outcome.BAD_PAYLOAD),  # a pair without '='
        ("v=2;id=kv-0101;ts=1773453600;ts=1773453660;cum_dl=4;st=0", Outcome.BAD_PAYLOAD),
        ("v=2;id=kv-0101;ts=1773453600;st=0", Outcome.MISSING_FIELD),  # no volume
        ("v=2;id=kv-0101;ts=1773453600;cum_dl=four;st=0", Outcome.BAD_NUMBER),
        ("v=2;id=kv-0101;ts=1773453600;cum_dl=1_000;st=0", Outcome.BAD_NUMBER),
        ("v=2;id=kv-0101;ts=yesterday;cum_dl=4;st=0", Outcome.BAD_TIME),
        ("v=2;id=kv-0199;ts=1773453600;cum_dl=4;st=0", Outcome.DEVICE_ID_MISMATCH),
        ("v=2;id=kv-0101;ts=1773453600;cum_dl=400;st=0", Outcome.OUT_OF_RANGE),  # 40 L
    ],
)
def test_key_value_rejections(payload: str, reason: Outcome) -> None:
    r = decode(KV, f"{payload};cs={xor8(payload)}")
    assert isinstance(r, Rejected) and r.reason is reason, r
    assert payload not in r.detail  # a detail never quotes the payload


def test_key_value_numbers_are_text_while_json_numbers_stay_strict() -> None:
    # key=value and delimited payloads are text: "12" is twelve there...
    assert isinstance(decode(KV, kv_line(cum_dl="0.12")), Reading)
    # ...but a JSON number sent as a string is refused, as issue 14 decided
    ref = PROFILES["reference-cumulative"]
    r = decode(ref, {"device_id": "rc-1", "time": "2026-03-14T02:00:00Z", "volume_ml": "12"},
               "rc-1")  # fmt: skip
    assert isinstance(r, Rejected) and r.reason is Outcome.BAD_NUMBER


def test_other_separators_and_a_json_payload_on_a_text_family() -> None:
    amp = variant(KV, payload={"pair_separator": "&", "kv_separator": ":"}, checksum=None)
    r = decode(amp, "id:kv-0101&n:7&ts:1773453600&cum_dl:1.5&st:0")
    assert isinstance(r, Reading) and r.volume_ml == pytest.approx(150.0)
    as_json = decode(amp, {"id": "kv-0101", "ts": 1773453600, "cum_dl": 1.5, "st": "0"})
    assert isinstance(as_json, Rejected) and as_json.reason is Outcome.BAD_PAYLOAD


def test_separators_belong_to_their_encoding() -> None:
    with pytest.raises(ValueError, match="separator"):
        variant(KV, payload={"separator": ";"})
    with pytest.raises(ValueError, match="kv_separator"):
        variant(KV, payload={"pair_separator": "=", "kv_separator": "="})
    with pytest.raises(ValueError, match="pair_separator"):
        variant(PROFILES["reference-cumulative"], payload={"pair_separator": ";"})


def test_key_value_fields_are_key_names() -> None:
    with pytest.raises(ValueError, match="keyvalue payloads need a key name"):
        variant(KV, fields={"volume": 3})


# --- checksums ------------------------------------------------------------------------------


def test_a_wrong_or_misplaced_checksum_is_bad_checksum() -> None:
    text = "v=2;id=kv-0101;n=1042;ts=1773453600;cum_dl=4.25;st=0"
    wrong = f"{text};cs={int(xor8(text), 16) ^ 0x01:02X}"
    for payload in (wrong, f"cs={xor8(text)};{text}", text, f"{text};cs=ZZ"):
        r = decode(KV, payload)
        assert isinstance(r, Rejected) and r.reason is Outcome.BAD_CHECKSUM, (payload, r)
    one_digit_changed = f"{text.replace('4.25', '4.26')};cs={xor8(text)}"
    r = decode(KV, one_digit_changed)
    assert isinstance(r, Rejected) and r.reason is Outcome.BAD_CHECKSUM
    assert isinstance(decode(KV, f"{text};cs={xor8(text).lower()}"), Reading)


@pytest.mark.parametrize(
    ("algorithm", "check"),
    [
        # the standard check values over the text "123456789" (source: the catalogue of
        # parametrised CRC algorithms, CRC-16/CCITT-FALSE = 0x29B1 and CRC-32 = 0xCBF43926;
        # from memory)
        (ChecksumAlgorithm.CRC16_CCITT, "29B1"),
        (ChecksumAlgorithm.CRC32, "CBF43926"),
        (ChecksumAlgorithm.XOR8, xor8("123456789")),
    ],
)
def test_checksum_algorithms_give_their_check_values(algorithm: ChecksumAlgorithm,
                                                     check: str) -> None:  # fmt: skip
    assert checksum_text(algorithm, "123456789") == check


def test_a_delimited_family_with_a_crc_in_its_last_column() -> None:
    grav = variant(PROFILES["gravimetric-text"], checksum={"field": 4, "algorithm": "crc16-ccitt"})
    text = "1042;2026-03-14T02:00:30Z;512.4;OK"
    crc = checksum_text(ChecksumAlgorithm.CRC16_CCITT, text)
    assert isinstance(decode(grav, f"{text};{crc}", "gs-4"), Reading)
    bad = decode(grav, f"{text.replace('512.4', '612.4')};{crc}", "gs-4")
    assert isinstance(bad, Rejected) and bad.reason is Outcome.BAD_CHECKSUM
    _, payload = encode(grav, "gs-4", T_0200, 300.0, seq=5)
    assert isinstance(decode(grav, payload, "gs-4"), Reading)  # the simulator signs it too
    with pytest.raises(ValueError, match="carries data"):
        variant(PROFILES["gravimetric-text"], checksum={"field": 2, "algorithm": "xor8"})
    with pytest.raises(ValueError, match="text payloads"):
        variant(PROFILES["reference-cumulative"], checksum={"field": "cs", "algorithm": "xor8"})


# --- volume units by scale ------------------------------------------------------------------


@pytest.mark.parametrize("unit", ["mL", "cL", "dL", "L"])
def test_every_declared_unit_converts_as_pint_says(unit: str) -> None:
    p = variant(KV, volume={"unit": unit})
    r = decode(p, kv_line(cum_dl=3.7))
    assert isinstance(r, Reading)
    assert r.volume_ml == pytest.approx(UREG.Quantity(3.7, unit).to("mL").magnitude, rel=1e-12)


@pytest.mark.parametrize("spelling", ["ml", "mL", "cc", "cl", "cL", "dl", "dL", "l", "L"])
def test_per_message_units_map_through_the_same_table(spelling: str) -> None:
    ivl = PROFILES["interval-10min"]
    payload = {"meter": "iv-07", "local_time": "2026-03-14 03:10:00", "utc_offset": "+01:00",
               "volume": 0.25, "unit": spelling, "n": 42}  # fmt: skip
    r = decode(ivl, payload, "iv-07")
    assert isinstance(r, Reading), r
    assert r.volume_ml == pytest.approx(UREG.Quantity(0.25, spelling).to("mL").magnitude)
    assert UNIT_ALIASES["DL"] == "dL" and UNIT_ALIASES["CL"] == "cL"  # UCUM's upper-case forms


def test_a_scale_the_unit_names_do_not_cover() -> None:
    tenths = variant(KV, volume={"unit": None, "scale_to_ml": 0.1})  # counts of 0.1 mL
    r = decode(tenths, kv_line(cum_dl=4125))
    assert isinstance(r, Reading) and r.volume_ml == pytest.approx(412.5)
    with pytest.raises(ValueError, match="unit or scale_to_ml"):
        variant(KV, volume={"scale_to_ml": 0.1})  # unit = "dL" stays: both given
    with pytest.raises(ValueError, match="specific_gravity"):
        variant(PROFILES["gravimetric-text"], volume={"scale_to_ml": 2.0})
    _, payload = encode(tenths, "kv-0101", T_0200, 412.5, seq=1)
    r2 = decode(tenths, payload)
    assert isinstance(r2, Reading) and r2.volume_ml == pytest.approx(412.5)


# --- named topic levels ---------------------------------------------------------------------


def test_a_named_level_matches_one_level_and_is_kept() -> None:
    pattern = compile_topic(KV.topic)
    assert KV.subscription == "uo/+/+/m"
    m = KV.topic_regex().match("uo/4-east/kv-0101/m")
    assert m is not None and m.groupdict() == {"ward": "4-east", "device_id": "kv-0101"}
    for other in ("uo/4-east/x/kv-0101/m", "uo/kv-0101/m", "uo//kv-0101/m/extra"):
        assert KV.topic_regex().match(other) is None
    assert pattern.fill({"ward": "w", "device_id": "d"}) == "uo/w/d/m"


@pytest.mark.parametrize(
    ("topic", "words"),
    [
        ("uo/{ward}/{device_id}/m", None),
        ("uo/{site}/{ward}/{device_id}", None),
        ("uo/{Ward}/{device_id}", "a placeholder is a whole level"),
        ("uo/w{ward}/{device_id}", "a placeholder is a whole level"),
        ("uo/{ward/{device_id}", "a placeholder is a whole level"),
        ("uo/{}/{device_id}", "a placeholder is a whole level"),
        ("uo/{ward}/{ward}/{device_id}", "appears twice"),
        ("uo/{deviceid}/{device_id}", "did you mean {device_id}"),
        ("uo/{ward}/{devce_id}", "did you mean {device_id}"),
        ("uo/{ward}/m", "exactly one {device_id}"),
        ("uo/+/{device_id}", "wildcards"),
    ],
)
def test_placeholders_well_formed_or_named_as_errors(topic: str, words: str | None) -> None:
    found = topic_problems(topic)
    if words is None:
        assert found == []
    else:
        assert any(words in p for p in found), found


def test_the_engine_keeps_the_level_with_each_reading_and_refuses_none() -> None:
    traces: list[ReadingTrace] = []
    engine = Engine([KV], observe=traces.append)
    engine.step("hourwatch/beds/b1/context", {"ward": "4-east", "device_ids": ["kv-0101"]}, T0)
    for i, ward in enumerate(["4-east", "a patient name"]):
        topic, payload = encode(KV, "kv-0101", T0 + 60 * (i + 1), 100.0 + i, seq=i + 1,
                                levels={"ward": ward})  # fmt: skip
        engine.step(topic, payload, T0 + 60 * (i + 1) + 1)
    assert [t.labels for t in traces] == [(("ward", "4-east"),), (("ward", REFUSED_LEVEL),)]
    assert all(t.outcomes[-1] is Outcome.ACCEPTED for t in traces)  # metadata, not a check
    assert engine.quality()["kv-0101"]["topic_levels"] == {"ward": REFUSED_LEVEL}


def test_overlapping_family_topics_are_refused(tmp_path: Path) -> None:
    shipped = Path(__file__).parent.parent / "device_profiles" / "keyvalue-decilitre.toml"
    text = shipped.read_text()
    (tmp_path / "keyvalue-decilitre.toml").write_text(text)
    other = text.replace('name = "keyvalue-decilitre"', 'name = "keyvalue-other"')
    other = other.replace('"uo/{ward}/{device_id}/m"', '"uo/east/{device_id}/{kind}"')
    (tmp_path / "keyvalue-other.toml").write_text(other)
    with pytest.raises(UserError, match="overlap"):
        load_profiles(tmp_path)


# --- an epoch in the wrong unit says so -------------------------------------------------------


def test_epoch_milliseconds_sent_to_a_seconds_profile_say_so() -> None:
    r = decode(KV, kv_line(ts=1773453600000))
    assert isinstance(r, Rejected) and r.reason is Outcome.BAD_TIME
    assert "as epoch_ms it would be a date" in r.detail and r.key == "time.format"


# --- per-meter calibration --------------------------------------------------------------------


def _calibrated(ctx_extra: dict[str, Any], devices: dict[str, Any] | None = None) -> float:
    from daemon.engine.profiles import Calibration

    cal = {k: Calibration.model_validate(v) for k, v in (devices or {}).items()}
    engine = Engine([KV], calibration=cal)
    ctx = {"ward": "4-east", "device_ids": ["kv-0101"], **ctx_extra}
    assert engine.step("hourwatch/beds/b1/context", ctx, T0) == []
    for i, ml in enumerate([100.0, 160.0]):  # invented: 60 mL in one hour
        topic, payload = encode(KV, "kv-0101", T0 + 3600 * i + 60, ml, seq=i + 1)
        engine.step(topic, payload, T0 + 3600 * i + 61)
    return engine.beds["b1"].series.total()


def test_calibration_from_a_devices_file_and_from_the_context_which_wins() -> None:
    assert _calibrated({}) == pytest.approx(60.0)
    # a factor scales what the meter counts; an offset moves its zero (no change in a rise)
    assert _calibrated({}, {"kv-0101": {"factor": 1.05}}) == pytest.approx(63.0)
    assert _calibrated({}, {"kv-0101": {"offset_ml": -3.0}}) == pytest.approx(60.0)
    ctx = {"calibration": {"kv-0101": {"factor": 0.9}}}
    assert _calibrated(ctx, {"kv-0101": {"factor": 1.05}}) == pytest.approx(54.0)


def test_calibration_is_checked() -> None:
    engine = Engine([KV])
    bad = {"ward": "4-east", "device_ids": ["kv-0101"], "calibration": {"kv-0199": {}}}
    (e,) = engine.step("hourwatch/beds/b1/context", bad, T0)
    assert e.reason == Outcome.BAD_CONTEXT and "calibration" in e.detail
    for wild in ({"factor": 3.0}, {"offset_ml": -900}, {"factor": "1.1"}):
        ctx = {"ward": "4-east", "device_ids": ["kv-0101"], "calibration": {"kv-0101": wild}}
        (e,) = engine.step("hourwatch/beds/b1/context", ctx, T0)
        assert e.reason == Outcome.BAD_CONTEXT
    ok = {"ward": "4-east", "device_ids": ["kv-0101"],
          "calibration": {"kv-0101": {"offset_ml": -200.0}}}  # fmt: skip
    assert engine.step("hourwatch/beds/b1/context", ok, T0) == []
    topic, payload = encode(KV, "kv-0101", T0 + 60, 50.0, seq=1)
    (e,) = engine.step(topic, payload, T0 + 61)
    assert e.reason == Outcome.OUT_OF_RANGE and "calibration" in e.detail


# --- the shipped key=value family, round-tripped against numpy -----------------------------


# An invented night: output swinging between about 40 and 160 mL/h (simulation only).
def _flow(minute: float) -> float:
    return 100.0 + 60.0 * math.sin(2 * math.pi * minute / 300.0)


def test_simulator_and_replay_give_the_true_hourly_volumes(tmp_path: Path,
                                                           capsys: pytest.CaptureFixture[str]
                                                           ) -> None:  # fmt: skip
    start = datetime.fromtimestamp(T0, UTC)
    faults = MeterFaults(noise_sd_ml=0.3, duplicate_p=0.03, reorder_p=0.03,
                         bag_change_every_s=2.5 * 3600)  # fmt: skip
    sim = simulate(KV, "kv-0101", start, 8.0, _flow, faults, seed=19, levels={"ward": "4-east"})
    assert all(topic == "uo/4-east/kv-0101/m" for _, topic, _ in sim.records)
    assert all("cum_dl=" in p and ";cs=" in p for _, _, p in sim.records)  # its own wire format
    log = tmp_path / "kv-night.jsonl"
    write_log(log, [context_record(T0 - 60, "bed-19", "4-east", ["kv-0101"]), *sim.records])
    assert main(["replay", str(log), "--hourly", "--json"]) == 0
    rows = [json.loads(x) for x in capsys.readouterr().out.splitlines()]
    hours = [r for r in rows if "hour_start" in r]
    quality = next(r["quality"] for r in rows if r.get("device") == "kv-0101")
    assert quality["topic_levels"] == {"ward": "4-east"}
    assert "warnings" not in quality  # a right profile raises no sanity warning
    assert quality["outcomes"].get("bag_change", 0) == 3  # at 2.5, 5 and 7.5 h, flagged
    # the truth, minute by minute, summed per clock hour with plain numpy
    per_hour = sim.truth_per_min.reshape(-1, 60).sum(axis=1)
    first_full = math.ceil(sim.first_reading_s / 3600.0)  # before the first reading: baseline
    checked = 0
    for r in hours:
        k = round((datetime.fromisoformat(r["hour_start"]).timestamp() - T0) / 3600)
        if k < first_full or k >= len(per_hour):
            continue
        # payload rounding (0.1 mL) and the meter's 1 mL resolution at each hour's two ends
        tol = 2 * KV.volume.resolution_ml
        assert abs(r["volume_ml"] - per_hour[k]) <= tol, (r, per_hour[k])
        checked += 1
    assert checked >= 6
    total = sum(r["volume_ml"] for r in hours if r["hour_start"] >= iso_hour(first_full))
    assert total == pytest.approx(float(np.sum(per_hour[first_full : len(hours)])), abs=3.0)


def iso_hour(k: int) -> str:
    return datetime.fromtimestamp(T0 + 3600 * k, UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def test_explain_shows_each_reading_s_topic_level(tmp_path: Path,
                                                  capsys: pytest.CaptureFixture[str]
                                                  ) -> None:  # fmt: skip
    """An alarm on a key=value meter: explain lists its readings with their ward level."""
    start = datetime.fromtimestamp(T0, UTC)
    # invented: 300 mL/h for 3 h after a relieved obstruction (over the post-obstructive
    # line of > 200 mL/h for 2 h: Halbgewachs & Domes, Can Fam Physician 2015)
    sim = simulate(KV, "kv-0101", start, 3.0, constant(300.0), levels={"ward": "4-east"})
    log = tmp_path / "pod.jsonl"
    ctx = context_record(T0 - 60, "bed-19", "4-east", ["kv-0101"], relieved_at=T0 - 120)
    write_log(log, [ctx, *sim.records])
    assert main(["replay", str(log), "--json"]) == 0
    events = [json.loads(x) for x in capsys.readouterr().out.splitlines()]
    alarm = next(e for e in events if e.get("type") == "alarm" and e["rule"] == "pod-hourly")
    assert main(["explain", str(log), alarm["alarm_id"], "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["readings"] and all(r["topic_levels"] == {"ward": "4-east"} for r in d["readings"])
    assert main(["explain", str(log), alarm["alarm_id"]]) == 0
    assert "[ward=4-east]" in capsys.readouterr().out
