"""Connecting a meter family the shipped profiles do not cover, with a profile file only,
as a biomedical engineer does it: check-profiles, the probe on a REAL Mosquitto, replay.

Two invented families (names, formats and data made up for these tests):
- `flowcell-litre`: JSON, cumulative LITRES with no unit field, epoch milliseconds three
  levels deep, a power block with battery and a state code (one of them: bag emptied);
- `dropcount-interval`: delimited text, the volume of each 5-minute interval as counts of
  0.1 mL, local time with a separate UTC offset column, the meter's own counter, the ward
  in the topic, a CRC-16 checksum.
No patient data.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import pytest

from daemon.engine.profiles import DeviceProfile
from daemon.probe import ProbeTally
from daemon.profile_files import BUNDLED, load_profile
from simulator.encode import encode
from tests.broker import broker, probe_on_broker  # noqa: F401

ROOT = Path(__file__).resolve().parent.parent
ENV = dict(os.environ, PYTHONPATH=str(ROOT))

FLOWCELL = """\
# flowcell-litre (invented family): cumulative litres since the last bag change.
#   {"meta": {"unit_id": "fc-11", "clock": {"ms": 1773453600000}, "count": 5},
#    "meas": {"total_l": 0.4125}, "power": {"battery_pct": 76, "state": "MEAS"}}
schema = 1
name = "flowcell-litre"
description = "Cumulative litres, nested JSON, epoch ms, battery/state block, every 60 s"
topic = "flowcell/{device_id}/data"

[payload]
encoding = "json"

[fields]
time = "meta.clock.ms"
volume = "meas.total_l"
device_id = "meta.unit_id"
seq = "meta.count"
status = "power.state"

[time]
format = "epoch_ms"

[volume]
semantics = "cumulative"
unit = "L"
resolution_ml = 0.1

[status]
ok = ["MEAS", "LOWBAT"]
bag_change = ["EMPTIED"]

[timing]
period_s = 60

[limits]
max_flow_ml_h = 2500
max_ml = 3000
capacity_ml = 2000
"""

DROPCOUNT = """\
# dropcount-interval (invented family): 0.1 mL counts per 5-minute interval.
#   DC1|2207|2026-03-14 03:05:00|+01:00|125|A1B2
schema = 1
name = "dropcount-interval"
description = "0.1 mL counts per 5-minute interval, local time + offset, CRC-16"
topic = "dropcount/{ward}/{device_id}"

[payload]
encoding = "delimited"
separator = "|"

[fields]
seq = 1
time = 2
utc_offset = 3
volume = 4

[checksum]
field = 5
algorithm = "crc16-ccitt"

[volume]
semantics = "interval"
scale_to_ml = 0.1
interval_s = 300
resolution_ml = 0.1

[timing]
period_s = 300
reorder_tolerance_s = 900

[limits]
max_flow_ml_h = 2500
max_ml = 500
"""


@pytest.fixture
def folder(tmp_path: Path) -> Path:
    """The shipped profiles plus the two new families."""
    out = tmp_path / "profiles"
    shutil.copytree(BUNDLED, out)
    (out / "flowcell-litre.toml").write_text(FLOWCELL)
    (out / "dropcount-interval.toml").write_text(DROPCOUNT)
    return out


PUB = f"new-family-pub-{os.getpid()}"


def check_profiles(folder: Path) -> subprocess.CompletedProcess[str]:
    """`hourwatch check-profiles FOLDER` in its own process, as an engineer runs it."""
    return subprocess.run(hourwatch("check-profiles", str(folder)), capture_output=True,
                          text=True, env=ENV, timeout=60)  # fmt: skip


def hourwatch(*argv: str) -> list[str]:
    return [sys.executable, "-m", "daemon.cli", *argv]




def flowcell(profile: DeviceProfile, t: float, ml: float, n: int) -> tuple[str, dict[str, Any]]:
    topic, payload = encode(profile, "fc-11", t, ml, seq=n)
    assert isinstance(payload, dict)
    payload["power"]["battery_pct"] = 76  # a field the profile does not read
    return topic, payload


def test_both_new_families_check(folder: Path) -> None:
    done = check_profiles(folder)
    assert done.returncode == 0, done.stderr
    assert "ok  dropcount-interval       dropcount/+/+" in done.stdout
    assert "interval, every 300 s, keeps ward" in done.stdout
    assert "ok  flowcell-litre           flowcell/+/data" in done.stdout


def test_probe_names_every_distinct_cause_under_one_reason(broker, folder) -> None:  # noqa: F811
    """Two messages refused for the same reason code but for different faults (a status
    block missing, a volume missing) are two things for the engineer to fix: the probe
    shows an example of each with its own key, not only the first."""
    p = load_profile(folder / "flowcell-litre.toml")
    now = time.time()
    msgs: list[tuple[str, object]] = [
        flowcell(p, now - 60 * (3 - i), 100.0 + i, i) for i in range(4)
    ]
    topic, no_status = flowcell(p, now, 104.0, 4)
    del no_status["power"]
    topic, no_volume = flowcell(p, now, 104.0, 5)
    no_volume["meas"] = 5
    topic, text_volume = flowcell(p, now, 104.0, 6)
    text_volume["meas"]["total_l"] = "0.104"  # a JSON string is no number
    topic, half_seq = flowcell(p, now, 104.0, 7)
    half_seq["meta"]["count"] = 7.5
    msgs += [(topic, no_status), (topic, no_volume), (topic, text_volume), (topic, half_seq)]
    out = probe_on_broker(broker, ["--profile", p.name, "--profiles", str(folder)],
                          lambda: msgs, PUB)
    assert "fc-11: 8 messages, 4 decoded, 4 rejected (bad_number 2, missing_field 2)" in out, out
    for what in ("status", "volume"):
        line = f"missing_field: {what} field missing  (1; e.g. the first; check fields.{what})"
        assert line in out, out
    assert "rejected: bad_number: volume is not a finite number: '0.104'" in out, out
    assert "rejected: bad_number: seq is not an integer: 7.5" in out, out


def test_probe_counts_a_reason_s_details_within_bounds(folder: Path) -> None:
    """A meter sending anything must not grow the probe: distinct details of one reason
    are kept up to a bound, the rest counted together."""
    p = load_profile(folder / "flowcell-litre.toml")
    tally = ProbeTally(p)
    t0 = 1773446400.0  # 2026-03-14T00:00:00Z
    for i in range(200):  # invented: every reading a different impossible volume
        topic, payload = flowcell(p, t0 + 60 * i, 5000.0 + i, i)
        tally.observe(topic, json.dumps(payload).encode(), t0 + 60 * i + 1)
    lines = [x for x in tally.report() if "rejected: out_of_range" in x]
    assert len(lines) <= 5, lines
    assert sum(int(x.rsplit("(", 1)[1].split(";")[0]) for x in lines) == 200, lines


def test_probe_applies_the_devices_file_like_the_service(broker, folder, tmp_path) -> None:  # noqa: F811
    """With --devices, the service corrects each reading by the meter's calibration and
    checks the physical range again: the probe must show the corrected mL, and a reading
    the correction takes out of range as rejected (with the key to check), not as decoded
    and then silently missing from the series."""
    p = load_profile(folder / "flowcell-litre.toml")
    devices = tmp_path / "devices.toml"
    # invented bench finding: the meter reads 3 mL high
    devices.write_text("schema = 1\n[devices.fc-11]\nfactor = 1.0\noffset_ml = -3.0\n")
    now = time.time()
    # a bag emptied just before: 0, 1, 2, 3, 4 mL as the meter says; -3..1 mL corrected
    msgs: list[tuple[str, object]] = [
        flowcell(p, now - 60 * (4 - i), float(i), i) for i in range(5)
    ]
    out = probe_on_broker(broker, ["--profile", p.name, "--profiles", str(folder),
                                   "--devices", str(devices)], lambda: msgs, PUB)  # fmt: skip
    assert "fc-11: 5 messages, 2 decoded, 3 rejected (out_of_range 3)" in out, out
    assert "rejected: out_of_range: outside physical range after calibration" in out, out
    assert "check calibration" in out, out
    decoded = [x.strip() for x in out.splitlines() if x.strip().startswith("decoded:")]
    assert decoded[-1].split("  ")[1] == "1.0 mL (cumulative)", out  # 4 mL read, 3 mL high
    assert "cleaning, as the service would: 2 into the series" in out, out


def test_a_utc_offset_field_beside_an_epoch_time_is_refused(folder: Path) -> None:
    """The decoder reads fields.utc_offset only for ISO-8601 times: beside an epoch time
    it was accepted and then ignored, so a meter whose epoch counts local time (and sends
    its offset) would be read an hour or more off with a profile the checker passed."""
    f = folder / "flowcell-litre.toml"
    f.write_text(
        FLOWCELL.replace(
            'status = "power.state"', 'status = "power.state"\nutc_offset = "meta.clock.tz"'
        )
    )
    done = check_profiles(folder)
    assert done.returncode == 2, done.stdout
    line = f'hourwatch: {f}: fields.utc_offset: only read with time.format = "iso8601"'
    assert line in done.stderr, done.stderr
    assert "Traceback" not in done.stderr


@pytest.mark.parametrize(
    ("key", "value", "why"),
    [
        # every reading then fails min_ml <= mL and is refused as out_of_range, 'check
        # volume.unit': a profile that passed the checker and refuses the whole meter
        ("min_ml", "nan", "out_of_range for every reading"),
        # no physical upper bound, and a bag that is never full (the prompt at 90%)
        ("max_ml", "inf", "no range check, no bag-full prompt"),
    ],
)
def test_a_limit_that_is_not_a_finite_number_is_refused(folder, key, value, why) -> None:
    f = folder / "flowcell-litre.toml"
    text = FLOWCELL.replace("[limits]\n", f"[limits]\n{key} = {value}\n")
    text = text.replace("max_ml = 3000\n", "") if key == "max_ml" else text
    f.write_text(text)
    done = check_profiles(folder)
    assert done.returncode == 2, why
    assert f"hourwatch: {f}: limits.{key}: Input should be a finite number" in done.stderr


def test_a_field_that_is_neither_text_nor_a_column_is_one_line(folder: Path) -> None:
    """`volume = 1.5` is one mistake: one line under the key the engineer wrote
    (fields.volume), not two under keys that do not exist (fields.volume.str and
    fields.volume.int) contradicting each other."""
    f = folder / "flowcell-litre.toml"
    f.write_text(FLOWCELL.replace('volume = "meas.total_l"', "volume = 1.5"))
    done = check_profiles(folder)
    assert done.returncode == 2
    lines = [x for x in done.stderr.splitlines() if str(f) in x]
    assert lines == [
        f"hourwatch: {f}: fields.volume: a dotted JSON path or key name in quotes, or a "
        "0-based column number"
    ], done.stderr


def test_an_interval_meter_may_not_accept_negative_volumes(folder: Path) -> None:
    """min_ml below zero suits a scale that reads a little under zero after taring; for
    an interval meter it let a negative interval through, which the series subtracted:
    eleven 5-minute intervals of 6 mL and one of -40 mL made an hour of 26 mL (0.33
    mL/kg/h at 80 kg, invented) instead of refusing the one bad message."""
    f = folder / "dropcount-interval.toml"
    f.write_text(DROPCOUNT.replace("max_ml = 500", "min_ml = -50\nmax_ml = 500"))
    done = check_profiles(folder)
    assert done.returncode == 2
    assert f"hourwatch: {f}: limits.min_ml: an interval's volume cannot be negative" in (
        done.stderr
    ), done.stderr


def _dropcount_line(counts: str, offset: str = "+01:00") -> str:
    from daemon.engine.decode import checksum_text
    from daemon.engine.profiles import ChecksumAlgorithm

    head = f"DC1|2207|2026-03-14 03:05:00|{offset}|{counts}"
    return f"{head}|{checksum_text(ChecksumAlgorithm.CRC16_CCITT, head)}"


def test_out_of_range_names_the_scale_key_the_family_uses(folder: Path) -> None:
    from daemon.engine.decode import Decoder, Rejected

    p = load_profile(folder / "dropcount-interval.toml")
    out = Decoder(p).decode("dc-07", _dropcount_line("99999"))  # 9999.9 mL in 5 minutes
    assert isinstance(out, Rejected) and out.reason == "out_of_range"
    assert out.key == "volume.scale_to_ml"  # the profile has no volume.unit to check


@pytest.mark.parametrize("offset", ["", "CET"])
def test_a_bad_offset_field_names_fields_utc_offset(folder: Path, offset: str) -> None:
    from daemon.engine.decode import Decoder, Rejected

    p = load_profile(folder / "dropcount-interval.toml")
    out = Decoder(p).decode("dc-07", _dropcount_line("125", offset))
    assert isinstance(out, Rejected) and out.reason == "bad_time"
    assert out.key == "fields.utc_offset"  # time.format is right: iso8601 with an offset


def test_a_numeric_device_id_field_is_not_called_another_device(folder: Path) -> None:
    from daemon.engine.decode import Decoder, Rejected

    p = load_profile(folder / "flowcell-litre.toml")
    _, payload = flowcell(p, 1773446460.0, 100.0, 1)
    payload["meta"]["unit_id"] = 1207  # invented: a meter whose serial is a JSON number
    out = Decoder(p).decode("1207", payload)
    assert isinstance(out, Rejected)  # a device id must be text (DEVELOPERS.md section 2)
    assert "another device" not in out.detail, out.detail  # it is the same device


def test_a_profile_saved_with_a_byte_order_mark_loads(folder: Path) -> None:
    """Editors on a hospital workstation may save 'UTF-8 with BOM': the file then failed
    with 'not valid TOML: Invalid statement (at line 1, column 1)', on a first line that
    looks right. The mark carries no meaning in a UTF-8 file."""
    f = folder / "flowcell-litre.toml"
    f.write_bytes(b"\xef\xbb\xbf" + FLOWCELL.replace("\n", "\r\n").encode("utf-8"))
    done = check_profiles(folder)
    assert done.returncode == 0, done.stderr
    assert "ok  flowcell-litre" in done.stdout


def test_a_silent_probe_says_where_to_look(broker, folder) -> None:  # noqa: F811
    """The broker hears nothing on the new family's topic (a meter on another topic, or
    a broker whose ACL does not yet let the meters write and this login read it:
    mosquitto grants the subscription and then delivers nothing). 'No message' alone
    leaves the engineer guessing: it names the topic filter and the ACL."""
    typo = [("flowcel/fc-11/data", {"meta": {}})]  # a typo in the meter's topic
    out = probe_on_broker(broker, ["--profile", "flowcell-litre", "--profiles", str(folder)],
                          lambda: typo, PUB)
    assert "no message on flowcell/+/data from any device" in out, out
    assert "deploy/mosquitto/acl" in out and "flowcell/%u/data" in out, out


def test_an_interval_longer_than_the_reporting_period_is_refused(folder: Path) -> None:
    """A meter sending the last minute's volume every minute, described with the
    template's interval_s = 300 left in place: each message then claims five minutes,
    four in five overlap the one before and are refused (conflicting_duplicate), and
    the hours that remain read 12 mL/h instead of 60 with every minute 'measured', an
    oliguric-looking 0.15 mL/kg/h at 80 kg (invented). Refused by the checker."""
    f = folder / "dropcount-interval.toml"
    f.write_text(DROPCOUNT.replace("period_s = 300", "period_s = 60"))
    done = check_profiles(folder)
    assert done.returncode == 2
    assert f"hourwatch: {f}: volume.interval_s: longer than timing.period_s" in done.stderr, (
        done.stderr
    )


def test_a_gap_limit_not_above_the_reporting_period_is_refused(folder: Path) -> None:
    """A cumulative meter reporting every 40 minutes, with max_interpolation_gap_s left at
    its default of 30 minutes: every gap between two ordinary readings is then 'longer
    than the limit', every minute is estimated, and the low-output rules, which judge only
    windows at least 90% measured, never judge: 15 mL/h at 80 kg (0.19 mL/kg/h, invented)
    for 12 hours raised no alarm. Refused by the checker."""
    f = folder / "flowcell-litre.toml"
    f.write_text(FLOWCELL.replace("period_s = 60", "period_s = 2400"))
    done = check_profiles(folder)
    assert done.returncode == 2
    line = f"hourwatch: {f}: timing.max_interpolation_gap_s: must be longer than timing.period_s"
    assert line in done.stderr, done.stderr


def test_a_store_limit_below_the_live_lateness_is_refused(folder: Path) -> None:
    """store_forward_max_s = 0, written for a meter that keeps no store: every reading,
    being a little older than its receive time, was then refused as too_old (the whole
    meter lost; only a sanity warning after ten readings said why). A reading sent live
    may be up to max(clock_tolerance_s, 2 x period_s) old before it counts as stored, so
    the limit may not be below that."""
    f = folder / "flowcell-litre.toml"
    f.write_text(FLOWCELL.replace("period_s = 60", "period_s = 60\nstore_forward_max_s = 0"))
    done = check_profiles(folder)
    assert done.returncode == 2
    line = f"hourwatch: {f}: timing.store_forward_max_s: must be at least 120 s"
    assert line in done.stderr, done.stderr


def test_the_probe_says_too_old_readings_are_refused_not_stored(folder: Path) -> None:
    """Epoch seconds sent where the profile declares milliseconds date every reading in
    January 1970: the cleaning refuses each as too_old, but the clock line said 'each
    counts as store-and-forward', as if they were kept."""
    p = load_profile(folder / "flowcell-litre.toml")
    tally = ProbeTally(p)
    t0 = 1796300000.0  # invented receive times, 60 s apart
    for i in range(5):
        topic, payload = flowcell(p, t0 + 60 * i, 100.0 + i, i)
        payload["meta"]["clock"]["ms"] = int(t0 + 60 * i)  # seconds where ms are declared
        tally.observe(topic, json.dumps(payload).encode(), t0 + 60 * i + 1)
    text = "\n".join(tally.report())
    assert "too_old 5" in text, text
    clock = next(x for x in text.splitlines() if "clock error" in x)
    assert "store-and-forward" not in clock and "too_old" in clock, clock
    assert "store_forward_max_s" in clock and "time.format" in clock, clock


@pytest.mark.parametrize(
    "topic",
    [
        "hourwatch/beds/{device_id}/uo",  # read as a bed topic: every reading unknown_topic
        "hourwatch/alarms/{ward}/{device_id}",  # the service would read its own pages back
        "{site}/beds/{device_id}/uo",  # a first level that can be anything, the prefix too
    ],
)
def test_a_family_under_the_service_prefix_is_refused_by_check(folder, tmp_path, topic) -> None:
    """check-profiles cannot know the service's topic prefix, and `hourwatch check` did
    not compare them: a family on hourwatch/beds/{device_id}/uo was subscribed, and then
    every reading was refused as 'unknown bed topic' (the bed topics come first)."""
    f = folder / "flowcell-litre.toml"
    f.write_text(FLOWCELL.replace('topic = "flowcell/{device_id}/data"', f'topic = "{topic}"'))
    config = tmp_path / "hourwatch.toml"
    config.write_text(f'schema = 1\nprofiles = "{folder}"\n[journal]\n'
                      f'path = "{tmp_path / "journal.db"}"\n')  # fmt: skip
    done = subprocess.run(hourwatch("check", "--config", str(config)), capture_output=True,
                          text=True, env=ENV, timeout=60)  # fmt: skip
    assert done.returncode == 2, done.stdout
    assert done.stderr.startswith(f"hourwatch: {f}: topic: "), done.stderr
    assert "topic_prefix" in done.stderr and "Traceback" not in done.stderr
    assert len(done.stderr.strip().splitlines()) == 1, done.stderr


def test_a_flagged_reading_is_a_bag_change_whatever_detect_says(folder: Path) -> None:
    """DEVELOPERS.md said a flag counts only with detect = "flag" or "both"; the cleaning
    believes a flag the profile declares whatever `detect` says (detect = "fall" turns
    on the fall rule, it does not turn flags off). Pinned here, as the document now says."""
    from daemon.engine.engine import Engine

    text = FLOWCELL.replace("[limits]", '[bag_change]\ndetect = "fall"\n\n[limits]')
    f = folder / "flowcell-litre.toml"
    f.write_text(text)
    p = load_profile(f)
    engine = Engine([p])
    t0 = 1773446400.0  # 2026-03-14T00:00:00Z; invented readings, 1 mL a minute
    engine.step("hourwatch/beds/bed-21/context", {"ward": "4-West", "device_ids": ["fc-11"]}, t0)
    for i in range(1, 6):
        topic, payload = encode(p, "fc-11", t0 + 60 * i, 300.0 + i, seq=i)
        engine.step(topic, payload, t0 + 60 * i + 1)
    # the bag emptied and the meter says so with its state code; 120 mL left in the bag
    # (a partial drain: not near zero, so no fall rule would take it at once)
    topic, payload = encode(p, "fc-11", t0 + 360, 120.0, seq=6, status="EMPTIED")
    engine.step(topic, payload, t0 + 361)
    outcomes = engine.quality()["fc-11"]["outcomes"]
    assert isinstance(outcomes, dict) and outcomes.get("bag_change") == 1, outcomes
