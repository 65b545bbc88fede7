"""Scenario files and the simulator: schema errors, the clinical picture each
shipped scenario claims (written to a log and replayed through the engine),
reproducibility, and the simulator's payloads against each profile's decoder.

All beds, meters and patients are invented; no patient data.
"""

from __future__ import annotations

import copy
import math
from collections import Counter
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from daemon.engine.alarms import AlarmEvent, State
from daemon.engine.clinical import IntakeMessage, LabsMessage, VitalsMessage
from daemon.engine.context import BedContext
from daemon.engine.decode import Decoder, Reading, Rejected
from daemon.engine.effects import Effect
from daemon.engine.engine import Engine
from daemon.engine.outcomes import Outcome
from daemon.engine.profiles import Semantics
from daemon.engine.windows import measure
from daemon.errors import UserError
from daemon.logfile import read_log
from daemon.profile_files import load_profiles
from daemon.replay import drive
from daemon.rule_files import load_policy, load_rules
from simulator import runner
from simulator.meters import simulate_meter
from simulator.scenario import BUNDLED, Meter, load_scenario, parse_scenario

PROFILES = {p.name: p for p in load_profiles()}
SCENARIOS = sorted(BUNDLED.glob("*.toml"))
HOUR = 3600.0


@dataclass
class Replayed:
    built: runner.Built
    engine: Engine
    effects: list[Effect]

    def alarms(self, bed: str | None = None) -> list[AlarmEvent]:
        return [
            e for e in self.effects
            if isinstance(e, AlarmEvent) and (bed is None or e.bed == bed)
        ]  # fmt: skip

    def first(self, rule: str, state: State = State.ACTIVE, bed: str | None = None) -> float:
        """Hours from the start at which `rule` first entered `state` (inf if never)."""
        times = [a.time for a in self.alarms(bed) if a.rule == rule and a.state is state]
        return (min(times) - self.built.start) / HOUR if times else math.inf

    def rules_raised(self, bed: str | None = None) -> set[str]:
        return {a.rule for a in self.alarms(bed) if a.state is State.ACTIVE}

    def hourly_at_end(self, bed: str) -> float:
        series = self.engine.beds[bed].series
        end = series.latest_minute()
        assert end is not None
        return measure(series, end, 60).volume_ml


_cache: dict[str, Replayed] = {}


def replayed(name: str, tmp_path_factory: pytest.TempPathFactory, seed: int = 3) -> Replayed:
    """The scenario written to a JSON Lines log and replayed through the engine."""
    key = f"{name}:{seed}"
    if key not in _cache:
        sc = load_scenario(BUNDLED / f"{name}.toml", PROFILES)
        built = runner.build(sc, PROFILES, seed=seed)
        log = tmp_path_factory.mktemp("logs") / f"{name}.jsonl"
        runner.write_log(built, log)
        engine = Engine(load_profiles(), load_rules(), load_policy())
        result = drive(engine, read_log(log), until=built.end)
        assert not result.bad_lines
        _cache[key] = Replayed(built, engine, result.effects)
    return _cache[key]


# --- every shipped file --------------------------------------------------------------


def test_the_shipped_scenarios_are_there() -> None:
    names = {p.stem for p in SCENARIOS}
    wanted = {"ward-demo", "normal", "pod-physiological", "pod-pathological", "oliguria",
              "blocked-catheter", "meter-offline"}  # fmt: skip
    assert wanted <= names


@pytest.mark.parametrize("path", SCENARIOS, ids=lambda p: p.stem)
def test_every_scenario_validates_and_says_its_data_is_invented(path: Path) -> None:
    sc = load_scenario(path, PROFILES)
    assert sc.name == path.stem
    header = path.read_text(encoding="utf-8").split("\nschema")[0]
    assert "INVENTED" in header


@pytest.mark.parametrize("path", SCENARIOS, ids=lambda p: p.stem)
def test_every_message_is_one_the_engine_accepts_as_well_formed(path: Path) -> None:
    """Context, intake, vitals and labs validate against the engine's own models."""
    sc = load_scenario(path, PROFILES)
    built = runner.build(sc, PROFILES, seed=1, hours=min(sc.hours, 8))
    models = {"intake": IntakeMessage, "vitals": VitalsMessage, "labs": LabsMessage,
              "context": BedContext}  # fmt: skip
    seen: Counter[str] = Counter()
    for m in built.messages:
        parts = m.topic.split("/")
        if parts[:2] == ["hourwatch", "beds"]:
            models[parts[3]].model_validate(m.payload())
            seen[parts[3]] += 1
    assert seen["context"] >= len(sc.beds)


def test_the_demo_ward_covers_every_profile_and_behaviour() -> None:
    sc = load_scenario(BUNDLED / "ward-demo.toml", PROFILES)
    assert len(sc.beds) == 10
    assert {m.profile for b in sc.beds for m in b.meters} == set(PROFILES)
    assert any(b.context.order for b in sc.beds) and any(not b.context.order for b in sc.beds)
    kinds = {e.kind for b in sc.beds for e in b.timeline}
    assert {"pod", "oliguria", "blocked"} <= kinds
    variants = {e.variant for b in sc.beds for e in b.timeline if e.kind == "pod"}
    assert variants == {"physiological", "pathological"}
    meters = [m for b in sc.beds for m in b.meters]
    assert any(m.offline for m in meters) and any(m.outages for m in meters)
    assert any(m.faults for m in meters) and any(m.clock_drift_s_per_h for m in meters)
    assert any(b.vitals for b in sc.beds) and any(b.labs for b in sc.beds)
    assert any(b.intake for b in sc.beds)


# --- schema errors: one line naming the file and the key ----------------------------------

_GOOD: dict[str, Any] = {
    "schema": 1,
    "name": "t",
    "beds": [{"bed": "b1", "weight_kg": 70,
              "meters": [{"device_id": "m1", "profile": "reference-cumulative"}]}],
}  # fmt: skip


def _with(path: str, value: Any) -> dict[str, Any]:
    data: Any = copy.deepcopy(_GOOD)
    *parents, last = path.split(".")
    node = data
    for p in parents:
        node = node[int(p)] if p.isdigit() else node[p]
    if value is _DELETE:
        del node[last]
    else:
        node[last] = value
    return dict(data)


_DELETE = object()
_POD = {"kind": "pod", "at_h": 1, "variant": "pathological", "peak_ml_h": 900}

BAD = [
    ("unknown-key", "beds.0.colour", "red", "beds.0.colour"),
    ("no-beds", "beds", [], "beds"),
    ("no-weight", "beds.0.weight_kg", _DELETE, "beds.0.weight_kg"),
    ("bad-bed-id", "beds.0.bed", "bed/1", "beds.0.bed"),
    ("negative-hours", "hours", -1, "hours"),
    ("unknown-kind", "beds.0.timeline", [{"kind": "flood", "at_h": 1}], "beds.0.timeline.0"),
    ("pod-no-plateau", "beds.0.timeline", [_POD], "beds.0.timeline.0.pod"),
    ("pod-too-low", "beds.0.timeline",
     [{"kind": "pod", "at_h": 1, "variant": "physiological", "peak_ml_h": 150}],
     "beds.0.timeline.0.pod.peak_ml_h"),
    ("oliguria-not-low", "beds.0.timeline",
     [{"kind": "oliguria", "at_h": 1, "ml_kg_h": 0.7}], "beds.0.timeline.0.oliguria.ml_kg_h"),
    ("timeline-order", "beds.0.timeline",
     [{"kind": "normal", "at_h": 5}, {"kind": "normal", "at_h": 1}], "beds.0"),
    ("unknown-profile", "beds.0.meters.0.profile", "no-such-meter", "beds.0.meters.0.profile"),
    ("fault-without-status", "beds.0.meters.0.faults", [{"at_h": 1, "for_h": 1, "status": "E"}],
     "beds.0.meters.0.faults"),
    ("bad-probability", "beds.0.meters.0.duplicate_p", 2, "beds.0.meters.0.duplicate_p"),
    ("bad-fluid", "beds.0.intake", {"fluid": "lemonade"}, "beds.0.intake"),
    ("replacement-above-100", "beds.0.context", {"order": {"fraction_high": 1.5}},
     "beds.0.context.order"),
]  # fmt: skip


@pytest.mark.parametrize(("case", "path", "value", "key"), BAD, ids=[b[0] for b in BAD])
def test_a_bad_scenario_is_one_line_naming_file_and_key(
    case: str, path: str, value: Any, key: str
) -> None:
    where = Path(f"/scenarios/{case}.toml")
    with pytest.raises(UserError) as err:
        parse_scenario(_with(path, value), where, PROFILES)
    text = str(err.value)
    assert "\n" not in text
    assert text.startswith(f"{where}: {key}"), text


def test_the_minimal_scenario_used_above_is_valid() -> None:
    sc = parse_scenario(_with("name", "t"), Path("x.toml"), PROFILES)
    assert sc.beds[0].meters[0].profile == "reference-cumulative"


def test_cross_checks_against_the_profiles(tmp_path: Path) -> None:
    def error(data: dict[str, Any]) -> str:
        with pytest.raises(UserError) as err:
            parse_scenario(data, tmp_path / "s.toml", PROFILES)
        return str(err.value)

    two = _with("beds", _GOOD["beds"] * 2)
    assert "beds.1.bed: 'b1' appears twice" in error(two)
    gs = _with("beds.0.meters.0.profile", "gravimetric-text")
    gs["beds"][0]["meters"][0]["faults"] = [{"at_h": 1, "for_h": 1, "status": "OK"}]
    assert "beds.0.meters.0.faults.0.status: 'OK' is a normal status" in error(gs)
    iv = _with("beds.0.meters.0.profile", "interval-10min")
    iv["beds"][0]["meters"][0]["bag_change_h"] = [2, 4]
    assert "interval meters have no bag" in error(iv)
    both = _with(
        "beds.0.meters",
        [
            {"device_id": "m1", "profile": "reference-cumulative"},
            {"device_id": "m2", "profile": "reference-cumulative"},
        ],
    )
    assert "on the bed at the same time" in error(both)


def test_unreadable_files(tmp_path: Path) -> None:
    with pytest.raises(UserError, match="no such scenario file"):
        load_scenario(tmp_path / "missing.toml", PROFILES)
    bad = tmp_path / "bad.toml"
    bad.write_text("schema = 1\nname = \n")
    with pytest.raises(UserError, match=r"bad\.toml: not valid TOML"):
        load_scenario(bad, PROFILES)


# --- the clinical picture each scenario claims, through the engine --------------------------


def test_normal_output_raises_no_alarm(tmp_path_factory: pytest.TempPathFactory) -> None:
    r = replayed("normal", tmp_path_factory)
    assert r.alarms() == []
    for bed in ("bed-n1", "bed-n2"):
        w = r.engine.beds[bed].context.weight_kg
        assert w is not None
        day = measure(r.engine.beds[bed].series, r.engine.beds[bed].series.latest_minute() or 0,
                      1440).volume_ml  # fmt: skip
        # source: CLINICAL-REFERENCE §3: normal 24-h urine 800-2,000 mL (MedlinePlus)
        assert 800 <= day <= 2000
        # source: >= 0.5 mL/kg/h is adequate (FPnotebook, CLINICAL-REFERENCE §3)
        assert day / w / 24 >= 0.5


def test_the_engine_counts_the_volume_the_patient_made(
    tmp_path_factory: pytest.TempPathFactory,
) -> None:
    """Through noise, duplicates, reordering and bag changes the engine's total stays
    within a few percent of the simulated truth (our tolerance, no published source)."""
    r = replayed("normal", tmp_path_factory)
    for run in r.built.beds:
        engine_total = r.engine.beds[run.bed.bed].series.total()
        true_total = float(run.plan.to_bag_ml_min.sum())
        assert engine_total == pytest.approx(true_total, rel=0.04)


def test_physiological_pod(tmp_path_factory: pytest.TempPathFactory) -> None:
    r = replayed("pod-physiological", tmp_path_factory)
    # source: POD = > 200 mL/h for 2 consecutive h or > 3 L in 24 h (Halbgewachs & Domes,
    # Can Fam Physician 2015)
    assert r.first("pod-hourly") < 3.0  # rises within the hour of decompression at 0.5 h
    assert r.first("pod-24h") < 24.0
    # self-limiting: the hourly output is back under 200 mL/h by the end
    # source: physiological POD usually settles within ~24 h (LITFL; Halbgewachs 2015)
    assert r.hourly_at_end("bed-p1") < 200
    # replacement follows the advice (65% of output, 50-75% practice), so once it runs
    # it does not stay behind
    behind = [a for a in r.alarms() if a.rule == "replacement-behind"]
    assert not behind or behind[-1].state is State.RESOLVED
    assert "hypovolaemia-risk" not in r.rules_raised()
    advice = [e for e in r.effects if type(e).__name__ == "AdviceIssued"]
    assert len(advice) >= 10  # one per completed clock hour while POD is open


def test_pathological_pod(tmp_path_factory: pytest.TempPathFactory) -> None:
    r = replayed("pod-pathological", tmp_path_factory)
    raised = r.rules_raised()
    # source: Halbgewachs & Domes 2015 (both POD criteria)
    assert {"pod-hourly", "pod-24h"} <= raised
    # persisting: still above 200 mL/h after more than a day
    # source: a pathological POD persists after euvolaemia (LITFL; Halbgewachs 2015)
    assert r.hourly_at_end("bed-q1") > 200
    # replacement capped at 150 mL/h: under the 50% line of the rule
    # source: 50-75% replacement practice (Halbgewachs 2015, from memory)
    assert "replacement-behind" in raised
    # shock index >= 1.0 is "moderate" (Mutschler et al., Crit Care 2013)
    hypo = [a for a in r.alarms() if a.rule == "hypovolaemia-risk" and a.state is State.ACTIVE]
    assert hypo and hypo[0].priority == "high"
    # source: hypernatraemia > 145 mmol/L (Adrogué & Madias, NEJM 2000)
    assert "sodium-high" in raised


def test_oliguria_goes_through_the_kdigo_stages_in_order(
    tmp_path_factory: pytest.TempPathFactory,
) -> None:
    r = replayed("oliguria", tmp_path_factory)
    # source: KDIGO 2012 AKI guideline, Table 2: stage 1 < 0.5 mL/kg/h 6 h, stage 2
    # < 0.5 mL/kg/h 12 h, stage 3 < 0.3 mL/kg/h 24 h
    s1, s2, s3 = (r.first(f"oliguria-kdigo-{n}") for n in (1, 2, 3))
    assert s1 < s2 < s3 < r.built.hours
    # output first fell below 0.5 mL/kg/h around hour 3: no stage before 6 h of low output
    assert s1 > 6.0
    assert not r.rules_raised() & {"pod-hourly", "pod-24h", "flow-stopped"}


def test_a_blocked_catheter_stops_flow_and_resolves_after_the_bolus(
    tmp_path_factory: pytest.TempPathFactory,
) -> None:
    r = replayed("blocked-catheter", tmp_path_factory)
    sc = r.built.scenario
    block = sc.beds[0].timeline[0]
    assert block.kind == "blocked"
    blocked_at, cleared_at = block.at_h, block.at_h + block.for_h
    # common practice, no single source: 0 mL for 60 min after >= 0.5 mL/kg/h
    # (CLINICAL-REFERENCE §3, sudden cessation: check the catheter first)
    # (minute bins: the quiet run may start in the minute the block began)
    assert blocked_at + 58 / 60 <= r.first("flow-stopped") < blocked_at + 1.1
    resolved = r.first("flow-stopped", State.RESOLVED)
    assert cleared_at < resolved < cleared_at + 0.25
    assert r.rules_raised() == {"flow-stopped"}
    # the bolus brings back what was held: the day's total is the urine made
    total = r.engine.beds["bed-b1"].series.total()
    made = float(r.built.beds[0].plan.kidney_ml_min.sum())
    assert total == pytest.approx(made, rel=0.03)


def test_an_offline_meter_and_a_store_and_forward_burst(
    tmp_path_factory: pytest.TempPathFactory,
) -> None:
    r = replayed("meter-offline", tmp_path_factory)
    silent = r.built.scenario.beds[0].meters[0].offline[0]
    assert silent.at_h < r.first("meter-offline", bed="bed-f1") < silent.at_h + 0.2
    # from memory: intensive UO monitoring = no gap > 3 h (Jin et al., Chest 2017)
    gap = r.first("data-gap", bed="bed-f1")
    # counted from the last reading, up to one 120-s period before the silence
    assert silent.at_h + 3.0 - 130 / HOUR <= gap < silent.at_h + 3.2
    assert silent.for_h is not None
    back = silent.at_h + silent.for_h
    assert back <= r.first("data-gap", State.RESOLVED, bed="bed-f1") < back + 0.1
    # the outage on bed-f2 is 40 min: offline, never a data gap, and the buffered
    # readings arrive as store-and-forward
    assert "meter-offline" in r.rules_raised("bed-f2")
    assert "data-gap" not in r.rules_raised("bed-f2")
    outcomes = r.engine.quality()["rc-f201"]["outcomes"]
    assert isinstance(outcomes, dict) and outcomes.get("store_forward", 0) >= 30
    # no oliguria is claimed from the missing data
    assert not {a for a in r.rules_raised() if a.startswith("oliguria")}


def test_the_demo_ward_shows_every_picture(tmp_path_factory: pytest.TempPathFactory) -> None:
    r = replayed("ward-demo", tmp_path_factory)
    expect = {
        "bed-02": {"pod-hourly"},
        "bed-03": {"pod-hourly", "pod-24h", "replacement-behind", "hypovolaemia-risk",
                   "sodium-high"},
        "bed-04": {"oliguria-kdigo-1", "oliguria-kdigo-2", "oliguria-kdigo-3"},
        "bed-05": {"flow-stopped"},
        "bed-06": {"meter-offline", "data-gap"},
        "bed-08": {"pod-hourly", "replacement-excess"},
        "bed-09": {"high-output"},  # after a diuretic: no relief on record, no cause named
        "bed-10": {"pod-hourly", "sodium-low", "sodium-fall"},
    }  # fmt: skip
    for bed, rules in expect.items():
        assert rules <= r.rules_raised(bed), bed
    assert r.rules_raised("bed-01") == set()
    assert not {"pod-hourly", "pod-24h"} & r.rules_raised("bed-09")
    assert "labs-due" not in r.rules_raised("bed-02")  # labs every 3.5 h, each analyte
    q = r.engine.quality()
    assert q["gs-0701"]["outcomes"]["device_fault"] > 0  # type: ignore[index]
    assert q["gs-0701"]["outcomes"]["clock_skew"] > 0  # type: ignore[index]
    assert q["nt-0601"]["outcomes"]["store_forward"] > 0  # type: ignore[index]


# --- reproducibility and bed counts -----------------------------------------------------------


def test_same_seed_gives_identical_log_bytes(tmp_path: Path) -> None:
    sc = load_scenario(BUNDLED / "ward-demo.toml", PROFILES)
    logs = []
    for name, seed in (("a", 7), ("b", 7), ("c", 8)):
        path = tmp_path / f"{name}.jsonl"
        runner.write_log(runner.build(sc, PROFILES, seed=seed, hours=6), path)
        logs.append(path.read_bytes())
    assert logs[0] == logs[1]
    assert logs[0] != logs[2]


def test_more_beds_than_the_file_has_are_copies_with_their_own_ids() -> None:
    sc = load_scenario(BUNDLED / "normal.toml", PROFILES)
    built = runner.build(sc, PROFILES, seed=1, beds=5, hours=1)
    ids = [b.bed.bed for b in built.beds]
    assert ids == ["bed-n1", "bed-n2", "bed-n1-1", "bed-n2-1", "bed-n1-2"]
    devices = [m.device_id for b in built.beds for m in b.bed.meters]
    assert len(set(devices)) == 5
    topics = {m.topic for m in built.messages}
    assert "meters/rc-n101-2/volume" in topics
    fewer = runner.build(sc, PROFILES, seed=1, beds=1, hours=1)
    assert [b.bed.bed for b in fewer.beds] == ["bed-n1"]


def test_messages_are_in_receive_order_and_within_the_run() -> None:
    sc = load_scenario(BUNDLED / "ward-demo.toml", PROFILES)
    built = runner.build(sc, PROFILES, seed=2, hours=3)
    times = [m.recv for m in built.messages]
    assert times == sorted(times)
    assert times[-1] <= built.end
    assert times[0] < built.start  # the context comes before any meter speaks


# --- the simulator's payloads against each profile's decoder ------------------------------------


@pytest.mark.parametrize("name", sorted(PROFILES))
def test_meter_payloads_round_trip_through_the_profile_decoder(name: str) -> None:
    profile = PROFILES[name]
    has_status = profile.fields.status is not None
    spec = Meter.model_validate({
        "device_id": "rt-01", "profile": name, "noise_ml": 1.0, "jitter_s": 3,
        "clock_drift_s_per_h": 7.0,
        "bag_change_h": None if profile.volume.semantics is Semantics.INTERVAL else [1, 2],
        "faults": [{"at_h": 2, "for_h": 0.5, "status": "SIMFAULT"}] if has_status else [],
        "unit": "L" if profile.fields.unit is not None
        and profile.volume.semantics is Semantics.CUMULATIVE else "mL",
    })  # fmt: skip
    flow = np.full(6 * 60, 120.0 / 60)  # 120 mL/h for 6 h
    run = simulate_meter(profile, spec, flow, 1.7734e9, 6.0, np.random.default_rng(5))
    decoder = Decoder(profile)
    time_step = 0.001 if profile.time.format == "epoch_ms" else 1.0
    # values go out rounded to 0.1 mL (0.1 g for bag weights, 0.0001 L in litres)
    value_step = 0.05 + 1e-9
    if profile.volume.semantics is Semantics.BAG_WEIGHT:
        value_step /= profile.volume.specific_gravity
    flags = 0
    faults = 0
    assert len(run.messages) == len(run.readings)  # no duplicates, reordering or outages
    for m, truth in zip(run.messages, run.readings, strict=True):
        out = decoder.decode("rt-01", m.payload())
        if truth.status is not None:
            assert isinstance(out, Rejected) and out.reason is Outcome.DEVICE_FAULT
            faults += 1
            continue
        assert isinstance(out, Reading), out
        assert out.seq == truth.seq
        assert out.device_time == pytest.approx(truth.taken + truth.clock_offset_s, abs=time_step)
        assert out.volume_ml == pytest.approx(truth.value_ml, abs=value_step)
        flags += out.bag_flag
        if profile.fields.bag_change_flag is not None or profile.status.bag_change:
            assert out.bag_flag == truth.bag_flag
    assert faults == (sum(1 for r in run.readings if r.status) if has_status else 0)
    if has_status:
        assert faults > 0
    if profile.fields.bag_change_flag is not None or profile.status.bag_change:
        assert flags >= 2  # bag changes every 1-2 h over 6 h
