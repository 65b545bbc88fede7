"""The tools for connecting a meter family (issue 19): check-profiles with every problem at
once, new-profile's template, the probe's capture, burst and clock verdicts, and replay of
a capture with --bind and --rejects; the probe's capture also on a REAL Mosquitto.

Every family, meter, bed and payload is invented; no patient data.
"""

from __future__ import annotations

import io
import json
import os
import shutil
import subprocess
import sys
import time
import tomllib
from datetime import UTC, datetime
from pathlib import Path

import pytest

from daemon.cli import main
from daemon.engine.decode import checksum_text
from daemon.engine.outcomes import COUNTED_IN_SERIES, DECODE_REJECTIONS, Outcome
from daemon.engine.profiles import ChecksumAlgorithm, DeviceProfile
from daemon.probe import ProbeTally, capture_writer
from daemon.profile_files import BUNDLED, load_profile
from simulator.encode import encode
from simulator.meterlog import MeterFaults, constant, simulate
from tests.broker import broker, probe_on_broker  # noqa: F401
from tests.conftest import PROFILES, T0

ROOT = Path(__file__).resolve().parent.parent
KV = PROFILES["keyvalue-decilitre"]
REF = PROFILES["reference-cumulative"]
ENV = dict(os.environ, PYTHONPATH=str(ROOT))
XOR8 = ChecksumAlgorithm.XOR8


def run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    rc = main(list(argv))
    out, err = capsys.readouterr()
    return rc, out, err


def folder_with(tmp_path: Path, name: str, old: str, new: str) -> Path:
    folder = tmp_path / "profiles"
    shutil.copytree(BUNDLED, folder)
    f = folder / f"{name}.toml"
    text = f.read_text()
    for o, n in zip(old.split("|"), new.split("|"), strict=True):
        assert o in text, o
        text = text.replace(o, n)
    f.write_text(text)
    return folder


# --- check-profiles: every problem at once ----------------------------------------------------


def test_check_profiles_names_every_problem_of_a_file_at_once(tmp_path, capsys) -> None:
    folder = folder_with(
        tmp_path, "keyvalue-decilitre",
        'period_s = 60|ok = ["0"]|topic = "uo/{ward}/{device_id}/m"|unit = "dL"',
        'perod_s = 60|ok = [0]|topic = "uo/{Ward}/{device_id}/m"|unit = "hL"',
    )  # fmt: skip
    (folder / "interval-10min.toml").write_text(
        (folder / "interval-10min.toml").read_text().replace("[limits]", "[limts]")
    )
    rc, out, err = run(capsys, "check-profiles", str(folder))
    assert rc == 2
    lines = err.strip().splitlines()
    kv = [x for x in lines if "keyvalue-decilitre.toml" in x]
    assert len(kv) == 4, err
    assert any("timing.perod_s: unknown key; did you mean period_s?" in x for x in kv)
    assert not any(x.endswith("timing.period_s: required") for x in kv)  # folded into it
    assert any("status.ok.0: status codes are text: quote them" in x for x in kv)
    assert any("topic: level 2 '{Ward}'" in x for x in kv)
    assert any("volume.unit:" in x and "'dL'" in x for x in kv)
    iv = [x for x in lines if "interval-10min.toml" in x]
    assert any("limts: unknown key; did you mean limits?" in x for x in iv), err
    assert lines[-1].startswith("hourwatch: ") and "problem(s) in 2 file(s)" in lines[-1]
    # the families without problems are still listed as ok
    assert "ok  reference-cumulative" in out and "keyvalue-decilitre" not in out


def test_other_commands_stop_at_the_first_problem_in_one_line(tmp_path, capsys) -> None:
    folder = folder_with(tmp_path, "keyvalue-decilitre", 'period_s = 60|ok = ["0"]',
                         'perod_s = 60|ok = [0]')  # fmt: skip
    log = tmp_path / "empty.jsonl"
    log.write_text("")
    rc, _, err = run(capsys, "replay", str(log), "--profiles", str(folder))
    assert rc == 2 and len(err.strip().splitlines()) == 1
    assert "(and 1 more: hourwatch check-profiles lists them)" in err


def test_check_profiles_lists_the_metadata_levels(capsys) -> None:
    rc, out, _ = run(capsys, "check-profiles")
    assert rc == 0
    assert any(x.startswith("ok  keyvalue-decilitre") and "uo/+/+/m" in x and "keeps ward" in x
               for x in out.splitlines())  # fmt: skip


# --- new-profile ----------------------------------------------------------------------------


@pytest.mark.parametrize("closest", sorted(PROFILES))
def test_new_profile_writes_a_commented_template_that_checks(tmp_path, capsys, closest) -> None:
    folder = tmp_path / "profiles"
    shutil.copytree(BUNDLED, folder)
    rc, out, _ = run(capsys, "new-profile", "bench-meter", "--from", closest,
                     "--profiles", str(folder))  # fmt: skip
    assert rc == 0 and "bench-meter.toml" in out
    text = (folder / "bench-meter.toml").read_text()
    made = load_profile(folder / "bench-meter.toml")
    base = PROFILES[closest]
    # the same family under a topic of its own: every key kept, nothing invented
    same = made.model_dump(exclude={"name", "description", "topic"})
    assert same == base.model_dump(exclude={"name", "description", "topic"})
    assert made.topic.startswith("bench-meter/") and "CHANGE" in text
    for key in ("period_s", "max_flow_ml_h", "semantics", "encoding"):
        assert f"\n{key} = " in text or f"\n# {key} = " in text
    assert "status codes" in text and "DEVELOPERS.md" in text
    assert run(capsys, "check-profiles", str(folder))[0] == 0


@pytest.mark.parametrize("closest", sorted(PROFILES))
def test_new_profile_named_after_a_topic_level_keeps_the_folder_valid(tmp_path, capsys,
                                                                      closest) -> None:  # fmt: skip
    """A family named like the first level of an existing topic (a ward's own word for its
    meters: 'bedside', 'meters') got that family's very topic, so the folder it was
    written into no longer loaded: check, run and new-profile itself refused it."""
    folder = tmp_path / "profiles"
    shutil.copytree(BUNDLED, folder)
    taken = {PROFILES[n].topic.split("/")[0] for n in PROFILES}
    for name in sorted(taken):
        rc, _, err = run(capsys, "new-profile", name, "--from", closest,
                           "--profiles", str(folder))  # fmt: skip
        assert rc == 0, err
    rc, _, err = run(capsys, "check-profiles", str(folder))
    assert rc == 0, err


@pytest.mark.parametrize("out", ["meter.toml", "ward-meter.txt"])
def test_new_profile_out_must_be_a_file_the_folder_check_loads(tmp_path, capsys, out) -> None:
    """--out meter.toml wrote a profile named ward-meter that check-profiles refuses (a
    profile's name equals its file name); --out ward-meter.txt one it never reads."""
    rc, _, err = run(capsys, "new-profile", "ward-meter", "--from", "reference-cumulative",
                     "--out", str(tmp_path / out))  # fmt: skip
    assert rc == 2 and "--out" in err and "ward-meter.toml" in err, err
    assert not (tmp_path / out).exists()
    rc, _, err = run(capsys, "new-profile", "ward-meter", "--from", "reference-cumulative",
                     "--out", str(tmp_path / "ward-meter.toml"))  # fmt: skip
    assert rc == 0, err
    assert run(capsys, "check-profiles", str(tmp_path))[0] == 0


def test_new_profile_never_overwrites_and_checks_its_arguments(tmp_path, capsys) -> None:
    folder = tmp_path / "profiles"
    shutil.copytree(BUNDLED, folder)
    argv = ["new-profile", "bench-meter", "--from", "keyvalue-decilitre", "--profiles", str(folder)]
    assert run(capsys, *argv)[0] == 0
    rc, _, err = run(capsys, *argv)
    assert rc == 2 and "exists already" in err
    rc, _, err = run(capsys, "new-profile", "Bench Meter", "--from", "keyvalue-decilitre")
    assert rc == 2 and "name" in err
    rc, _, err = run(capsys, "new-profile", "x-meter", "--from", "nope", "--profiles", str(folder))
    assert rc == 2 and "--from" in err and "keyvalue-decilitre" in err


# --- the probe: what it hears, bursts and clocks ---------------------------------------------


def test_probe_shows_a_sample_levels_status_codes_bag_changes_and_every_reason() -> None:
    tally = ProbeTally(KV)
    t0 = T0
    for i in range(8):  # invented: 60 mL/h, a bag change at the 6th reading
        ml = 100.0 + i if i < 5 else 2.0 + (i - 5)
        topic, payload = encode(KV, "kv-0101", t0 + 60 * i, ml, seq=i + 1, bag_flag=i == 5,
                                levels={"ward": "4-east"})  # fmt: skip
        tally.observe(topic, str(payload).encode(), t0 + 60 * i + 2)
    text = "v=2;id=kv-0101;n=9;ts=1773446400;cum_dl=0.05;st=7"  # a fault code (signed)
    tally.observe("uo/4-east/kv-0101/m", f"{text};cs={checksum_text(XOR8, text)}".encode(),
                  t0 + 500)  # fmt: skip
    tally.observe("uo/4-east/kv-0101/m", f"{text};cs=00".encode(), t0 + 505)  # bad checksum
    tally.observe("uo/4-east/kv-0101/m", b"st=0;ts=1773446400", t0 + 510)  # no checksum
    lines = tally.report()
    report = "\n".join(lines)
    assert "kv-0101: 11 messages, 8 decoded, 3 rejected (bad_checksum 2, device_fault 1)" in report
    assert "topic levels: ward='4-east'" in report
    decoded = [x for x in lines if x.strip().startswith("decoded:")]
    assert len(decoded) == 3 and decoded[-1].strip().startswith("decoded: 2026-03-14T00:07:00Z")
    assert decoded[-1].endswith("4.0 mL (cumulative)  60.0 mL/h")  # implied: 1 mL a minute
    # a payload failing its checksum says nothing, its status code neither
    assert "status codes: '0' 7, '2' 1, '7' 1" in report
    assert "rejected: device_fault: status code is not a measuring one: '7'" in report
    assert "check status.ok" in report
    assert "bag changes: 1" in report
    assert "rejected: bad_checksum: checksum does not match the payload: '00'" in report
    assert "check checksum.algorithm" in report


def test_probe_tells_a_buffered_burst_from_a_clock_error() -> None:
    # invented: 30 readings buffered over an outage arrive within 3 s, then live ones
    tally = ProbeTally(REF)
    back = T0 + 1800
    for i in range(30):
        topic, payload = encode(REF, "rc-1", T0 + 60 * i, 10.0 + i, seq=i + 1)
        tally.observe(topic, json.dumps(payload).encode(), back + 0.1 * i)
    for i in range(30, 36):
        topic, payload = encode(REF, "rc-1", T0 + 60 * i, 10.0 + i, seq=i + 1)
        tally.observe(topic, json.dumps(payload).encode(), T0 + 60 * i + 1.5)
    report = "\n".join(tally.report())
    # all but the newest ones, which were still within the store-and-forward line (120 s)
    assert "buffered upload: 29 readings received within 2.8 s" in report, report
    assert "clock offset: +1.5 s" in report and "clock error:" not in report
    # a meter whose clock is 10 minutes behind, reading after reading, is a clock error
    slow = ProbeTally(REF)
    for i in range(10):
        topic, payload = encode(REF, "rc-2", T0 + 60 * i - 600, 10.0 + i, seq=i + 1)
        slow.observe(topic, json.dumps(payload).encode(), T0 + 60 * i)
    report = "\n".join(slow.report())
    assert "buffered upload" not in report and "clock offset: +600.0 s" in report
    assert "clock error: the device clock runs 600 s behind ours" in report


# --- capture, then replay it without a bed context --------------------------------------------


def _capture(tmp_path: Path) -> tuple[Path, float]:
    """A probe's capture of an invented key=value meter: 3 h at 60 mL/h with faults."""
    faults = MeterFaults(noise_sd_ml=0.2, duplicate_p=0.05, spike_times_s=[5400.0])
    start = datetime.fromtimestamp(T0, UTC)
    sim = simulate(KV, "kv-0101", start, 3.0, constant(60.0), faults, seed=7,
                   levels={"ward": "4-east"})  # fmt: skip
    path = tmp_path / "capture.jsonl"
    fh = io.StringIO()
    tally = ProbeTally(KV, save=capture_writer(fh))
    for recv, topic, payload in sim.records:
        tally.observe(topic, str(payload).encode(), recv)
    tally.observe("uo/4-east/kv-0101/m", b"ts=1773453600;cum_dl=1;st=0;cs=FF", T0 + 3 * 3600)
    path.write_text(fh.getvalue())
    truth = sim.true_between(sim.first_reading_s, sim.last_reading_s)
    return path, truth


def test_probe_save_writes_the_log_format_and_replay_bind_uses_it(tmp_path, capsys) -> None:
    path, truth = _capture(tmp_path)
    records = [json.loads(x) for x in path.read_text().splitlines()]
    assert all(set(r) == {"time", "topic", "payload"} for r in records)
    assert records[0]["payload"].startswith("ts=") and records[0]["topic"] == "uo/4-east/kv-0101/m"
    rc, out, err = run(capsys, "replay", str(path), "--bind", "kv-0101=bed-7", "--weight", "70",
                       "--hourly", "--json")  # fmt: skip
    assert rc == 0, err
    rows = [json.loads(x) for x in out.splitlines()]
    q = next(r["quality"] for r in rows if r.get("device") == "kv-0101")
    assert q["bed"] == "bed-7" and q["topic_levels"] == {"ward": "4-east"}
    assert q["outcomes"]["bad_checksum"] == 1 and q["outcomes"]["duplicate"] >= 1
    total = sum(r["volume_ml"] for r in rows if "hour_start" in r)
    assert total == pytest.approx(truth, abs=3.0)  # the completed hours, from the first reading
    # without --bind the meter is on no bed: nothing counted, said plainly
    rc, out, _ = run(capsys, "replay", str(path), "--hourly")
    assert rc == 0 and "no meter is bound to a bed" in out


def test_replay_rejects_lists_every_rejected_line_with_its_payload(tmp_path, capsys) -> None:
    path, _ = _capture(tmp_path)
    lines = path.read_text().splitlines()
    rc, out, err = run(capsys, "replay", str(path), "--bind", "kv-0101", "--rejects")
    assert rc == 0, err
    block = out.split("Rejected lines: ", 1)[1]
    count = int(block.split("\n", 1)[0])
    heads = [x for x in block.splitlines() if x.startswith(f"  {path}:")]
    assert len(heads) == count >= 2
    numbers = [int(h.split()[0].rsplit(":", 1)[1]) for h in heads]
    reasons = [x.strip().split(":", 1)[0] for x in block.splitlines() if x.startswith("      ")
               and not x.strip().startswith("payload:")]  # fmt: skip
    assert "bad_checksum" in reasons and "artefact_dropped" in reasons
    # each named line is the one it speaks of: the spike is the reading held and dropped,
    # not the reading after it that settled it
    for n, reason in zip(numbers, reasons, strict=True):
        payload = json.loads(lines[n - 1])["payload"]
        assert f"payload: {json.dumps(payload)}" in block
        if reason == "artefact_dropped":
            before = json.loads(lines[n - 2])["payload"]
            vol = float(payload.split("cum_dl=")[1].split(";")[0])
            prev = float(before.split("cum_dl=")[1].split(";")[0])
            assert vol - prev > 2.0  # a jump of more than 200 mL: the spike itself
    rc, out, _ = run(capsys, "replay", str(path), "--bind", "kv-0101", "--rejects", "--json")
    rows = [json.loads(x) for x in out.splitlines() if '"type": "rejected"' in x]
    assert len(rows) == count and {"line", "reason", "detail", "payload"} <= set(rows[0])


@pytest.mark.parametrize(
    ("argv", "words"),
    [
        (["--bind", "kv-0101=bed 7"], "not an identifier"),
        (["--bind", "kv-0101", "--bind", "kv-0101=b2"], "named twice"),
        (["--weight", "70"], "--bind"),
        (["--bind", "kv-0101", "--weight", "700"], "--weight"),
        (["--bind", "kv-0101", "--report", "x.html"], "--bind"),
    ],
)
def test_replay_bind_options_are_checked(tmp_path, capsys, argv, words) -> None:
    path, _ = _capture(tmp_path)
    rc, _, err = run(capsys, "replay", str(path), *argv)
    assert rc == 2 and words in err and len(err.strip().splitlines()) == 1


def test_a_devices_file_calibrates_a_replay(tmp_path, capsys) -> None:
    path, _ = _capture(tmp_path)
    devices = tmp_path / "devices.toml"
    devices.write_text("schema = 1\n[devices.kv-0101]\nfactor = 1.1\n")  # invented bench factor
    assert tomllib.loads(devices.read_text())["devices"]["kv-0101"]["factor"] == 1.1

    def total(*extra: str) -> float:
        rc, out, err = run(capsys, "replay", str(path), "--bind", "kv-0101", "--hourly",
                           "--json", *extra)  # fmt: skip
        assert rc == 0, err
        return sum(json.loads(x)["volume_ml"] for x in out.splitlines() if "hour_start" in x)

    assert total("--devices", str(devices)) == pytest.approx(1.1 * total(), rel=0.01)
    devices.write_text("schema = 1\n[devices.kv-0101]\nfactor = 9\n")
    rc, _, err = run(capsys, "replay", str(path), "--bind", "kv-0101", "--devices", str(devices))
    assert rc == 2 and "factor" in err


# --- the probe's capture on a real broker ------------------------------------------------------


def test_probe_save_on_a_real_broker_then_replay(broker, tmp_path) -> None:  # noqa: F811
    capture = tmp_path / "probe.jsonl"

    def messages() -> list[tuple[str, object]]:  # made once the probe is subscribed
        now = time.time()
        msgs: list[tuple[str, object]] = [
            encode(
                KV,
                "kv-0102",
                now - 240 + 60 * i,
                50.0 + 2 * i,
                seq=i + 1,
                levels={"ward": "4-east"},
            )
            for i in range(5)
        ]
        msgs.append(("uo/4-east/kv-0102/m", b"\xff not text"))
        return msgs

    out = probe_on_broker(broker, ["--profile", KV.name, "--save", str(capture)], messages,
                          "probe-save-pub")  # fmt: skip
    assert out.startswith("probe: subscribed to uo/+/+/m"), out
    assert "kv-0102: 6 messages, 5 decoded, 1 rejected (bad_encoding 1)" in out, out
    assert "topic levels: ward='4-east'" in out and f"capture: {capture}" in out
    lines = capture.read_text().splitlines()
    assert len(lines) == 6
    done = subprocess.run(
        [sys.executable, "-m", "daemon.cli", "replay", str(capture), "--bind", "kv-0102",
         "--hourly", "--json"],
        capture_output=True, text=True, env=ENV, timeout=60,
    )  # fmt: skip
    assert done.returncode == 0, done.stderr
    q = next(json.loads(x)["quality"] for x in done.stdout.splitlines() if '"device"' in x)
    # 5 readings decoded live; replayed, the same 5 reach the series (the older ones as
    # store-and-forward: they were sent at once), the binary one is refused (as a bad
    # payload: the log format keeps it as a marker, journal.log_payload)
    counted = {str(o) for o in COUNTED_IN_SERIES}
    assert q["received"] == 6
    assert sum(n for o, n in q["outcomes"].items() if o in counted) == 5, q
    refused = {o for o in q["outcomes"] if o not in counted}
    assert len(refused) == 1 and Outcome(refused.pop()) in DECODE_REJECTIONS


def test_every_profile_key_is_in_the_developers_table() -> None:
    text = (ROOT / "DEVELOPERS.md").read_text()
    section = text.split("## 3. Adding a device profile", 1)[1].split("\n## 4.", 1)[0]
    for name, field in DeviceProfile.model_fields.items():
        key = field.alias or name
        ann = field.annotation
        models = [a for a in getattr(ann, "__args__", (ann,)) if isinstance(a, type)]
        model = next((a for a in models if hasattr(a, "model_fields")), None)
        if model is None:
            assert f"`{key}`" in section, key
            continue
        for sub in model.model_fields:
            assert f"`{key}.{sub}`" in section, f"{key}.{sub}"
