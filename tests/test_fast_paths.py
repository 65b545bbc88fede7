"""Replay's speed work changes no event (issue 18): the replay of every shipped scenario
gives, to the byte, what the engine gave before it, and the shortcut evaluation gives
the events of checking every rule at every reading on random wards.

ALL DATA HERE IS INVENTED (simulated scenarios, random beds, generated lines).
"""

from __future__ import annotations

import hashlib
import json
import math
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from daemon.cli import main
from daemon.engine.engine import Engine
from daemon.logfile import read_log
from daemon.profile_files import load_profiles
from daemon.replay import drive
from daemon.rule_files import load_policy, load_rules
from simulator.meterlog import MeterFaults, context_record, simulate, write_log
from tests.test_quiet_skip import _no_shortcut

ROOT = Path(__file__).resolve().parent.parent
SCENARIOS = ROOT / "simulator" / "scenarios"
EXAMPLE = ROOT / "examples" / "ward-night.jsonl"
PROFILES = {p.name: p for p in load_profiles()}
START = datetime(2026, 3, 14, tzinfo=UTC)  # invented


# --- the shipped scenarios, to the byte ---------------------------------------------------
# sha256 of `hourwatch replay LOG --json --rejects` and `--json --hourly` on each shipped
# scenario simulated with --seed 1 (and on the example log), as the engine gave them
# before the speed work (main at 8cf6e44). A change that means to change alarms updates
# these with the reason in its commit; a speed change never does. (ward-night: the example
# log lost its last lab line after 8cf6e44; the digest is 8cf6e44's engine on the new log.)
# pod-physiological and ward-night: a resolved labs reminder's words changed from
# "due  (last: )" to "every result is up to date"; nothing else.
# oliguria, pod-pathological, pod-physiological, ward-demo, ward-night and the bench ward:
# the words of pages changed (thresholds read "alarm above/below", a resolved page says
# "no longer met", hypovolaemia's title and signs first, a short pager drops bracketed
# details before clauses); summary, pager and title only, no time, state or number.
# ward-demo: one replacement-behind line read "710 mL = 50% ... (alarm below 50%)" for
# 49.9%; a share now reads finer where whole percent would read as the line; that only.
GOLDEN = {
    "blocked-catheter": ("34390f01a592aad99c92e0b5f297cffbddb7ffa4d051d1b901813180d80a54a3",
                         "3fb2143963954aee57efa7eeadd0a5749acc4c44376c6c8523dce3cc2f0af0e3"),
    "meter-offline": ("ef19870da22278b3c10e40d360c68adf64de2e2fde601742490364769f33e2a6",
                      "0291fbe180ccabe5f7725247e4098250ed4d058e310e226ad4bcfc1fc8aa2698"),
    "normal": ("e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855",
               "c84be4f931d1fcd16e57828ee4f210fe179d162c0a37ee9a8a65249ebea25b28"),
    "oliguria": ("bad86e4dcc26dd829ef98c97493d34c0eabc0b267bff0dabd3b6144585bbb1cc",
                 "fa0f31570e7dac69ace9a7b893c58fb858615053a5043b31721078f1b644526f"),
    "pod-pathological": ("fc4fa1d860cba65e12c3d2fc3ce7ad7f3a7e7722280fd1cb6bbd430957d4a06c",
                         "dfcd68a8959e03744506465d4f50134f57553a7c9d8225b49df56ce0cc0ee1a1"),
    "pod-physiological": ("8cea196dd35ce3fcbb7733c1b5442538b7faabf569c22e7e1bcb94ef4d72968c",
                          "d128112bc8ea45525dd14a0b7e2cee450c4a8f50e2f89789ae97b32e9ea30549"),
    "ward-demo": ("b71fefdedb2c9cb57e3d7c4d2e6afccaef80ee3ed1c50fef598fcef6e8533e68",
                  "3a3047fdf88823e70e6bc096f22ecaa19ca03d5a0af44d8558fbec670c01846f"),
    "ward-night": ("5ba7053f6c1b68f0e68e3e63985f8f025af74f73f7429753d18a0dabbb7024db",
                   "2aa47a5b7891ae0f3e60fc917aa82a236068a16e91b1af90fe15c770058a5de5"),
}  # fmt: skip


def _digest(capsys: pytest.CaptureFixture[str], *argv: str) -> str:
    capsys.readouterr()
    assert main(list(argv)) == 0
    return hashlib.sha256(capsys.readouterr().out.encode()).hexdigest()


@pytest.mark.parametrize("name", sorted(GOLDEN))
def test_every_scenario_replays_as_before_the_speed_work(
    name: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    if name == "ward-night":
        log = EXAMPLE
    else:
        log = tmp_path / f"{name}.jsonl"
        argv = ["simulate", "--scenario", str(SCENARIOS / f"{name}.toml"), "--to-log", str(log)]
        assert main([*argv, "--seed", "1"]) == 0
    events = _digest(capsys, "replay", str(log), "--json", "--rejects")
    hourly = _digest(capsys, "replay", str(log), "--json", "--hourly")
    assert (events, hourly) == GOLDEN[name]


def test_the_golden_list_names_every_shipped_scenario() -> None:
    assert {p.stem for p in SCENARIOS.glob("*.toml")} | {"ward-night"} == set(GOLDEN)


# --- a random ward: the shortcut against every rule at every reading ----------------------
def _ward(beds: int, hours: float, seed: int, base: float, high: int) -> list[Any]:
    records: list[Any] = []
    for b in range(beds):
        dev = f"rc-{b:03d}"
        records.append(context_record(START.timestamp() - 60, f"bed-{b}", "ward-r", [dev],
                                      60.0 + 5 * b))  # fmt: skip

        def flow(m: float, b: int = b) -> float:  # invented
            rate = base + 25 * math.sin(m / 200 + b)
            return max(0.0, rate + (250 if b % high == 0 and m > 200 else 0))

        s = simulate(PROFILES["reference-cumulative"], dev, START, hours, flow,
                     MeterFaults(noise_sd_ml=1.0, duplicate_p=0.03, reorder_p=0.02,
                                 bag_change_every_s=3 * 3600 + 61 * b), seed=seed + b)  # fmt: skip
        records += s.records
    return records


def _replayed(log: Path, engine: Engine) -> list[str]:
    result = drive(engine, read_log(log))
    return [json.dumps(e.to_json()) for e in result.effects if hasattr(e, "to_json")]


@settings(max_examples=6, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(beds=st.integers(2, 5), seed=st.integers(0, 1000), base=st.floats(10, 90),
       high=st.integers(2, 4))  # fmt: skip
def test_a_random_ward_replays_as_checking_every_rule_every_minute(
    tmp_path_factory: pytest.TempPathFactory, beds: int, seed: int, base: float, high: int
) -> None:
    log = tmp_path_factory.mktemp("ward") / "ward.jsonl"
    write_log(log, _ward(beds, 10.0, seed, base, high))

    def make() -> Engine:
        return Engine(list(PROFILES.values()), load_rules(), load_policy())

    assert _replayed(log, make()) == _replayed(log, _no_shortcut(make()))


# --- a ward of the benchmark's kind, to the byte ------------------------------------------
# sha256 of `hourwatch replay LOG --json --rejects` and `--json --hourly` on the random
# ward below (10 beds, 27 h: windows past 24 h, oliguria and high output, redeliveries,
# reorders, bag changes), as main at 27ba89a's engine gave them, then with volumes summed
# exactly in nanolitres (13 hourly totals and 3 alarm lines that lay on a half tenth, e.g.
# exactly 70.05 mL, now round half up as stated instead of as float noise fell). As above,
# a speed change never updates these; the page-words pass (see GOLDEN) changed the words only.
BENCH_WARD = ("1cac86b4ce3847813ee27a59c75a6265531a61b908a36ccd7a2733838138d7e6",
              "633cd1fcf92b534ea3280bf20638897306da395df2473d96d9167b532da7dcf5")  # fmt: skip


def test_a_ward_of_the_benchmarks_kind_replays_as_before_the_speed_work(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    log = tmp_path / "ward.jsonl"
    write_log(log, _ward(10, 27.0, 7, 45.0, 4))
    events = _digest(capsys, "replay", str(log), "--json", "--rejects")
    hourly = _digest(capsys, "replay", str(log), "--json", "--hourly")
    assert (events, hourly) == BENCH_WARD
