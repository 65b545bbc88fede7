"""Issue 3, done-when: `hourwatch replay LOG --json` on logs like those of the intake
issue gives each rule's first "active" event within one reading period of the minute at
which the rule's criterion is first met on the TRUE production, and no event for the
rules whose criterion is never met.

The logs are simulated (simulator/meterlog.py): one invented bed, a reference-cumulative
meter reporting every 60 s, with the intake issue's faults: reading noise (SD 1 mL on
each cumulative value), ~5% duplicated and some reordered messages, the bag emptied
every 4 h, and two single-reading spike artefacts. ALL DATA HERE IS INVENTED.

The truth is computed here with numpy from the simulator's per-minute production, with
the engine's window definition (DESIGN §3): whole minutes, half-open (end - length, end],
a low-output window judged only when >= 90% of its minutes are measured. Minute m is
known once it has ended, so the criterion "first met at minute m" is due at
start + (m + 1) * 60 s; a reading sent then shows it. Minute 0 is in the bag when the
first reading (the baseline) is taken, so no system can count it.

Each scenario is a flow made of steps, with the steps chosen so that every crossing is
clear: the truth window is several mL past the threshold at the crossing minute and
several mL short of it the minute before (asserted below), so reading noise does not
move the crossing by a whole minute.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import numpy.typing as npt
import pytest

from daemon.cli import main
from daemon.engine.rules import DEFAULT_RULE_IDS
from simulator.meterlog import MeterFaults, SimStream, context_record, simulate, write_log
from tests.ruletools import PERIOD, REFERENCE, RULES_BY_ID, rolling

START = datetime(2026, 3, 14, 6, 0, tzinfo=UTC)  # invented
T_START = START.timestamp()
BED, WARD, DEVICE = "b07", "icu-east", "rc-0707"  # invented

# --- the criteria, with their sources (pinned against the shipped rule files below) ---
POD_HOURLY_ML = 200.0  # > 200 mL/h, 2 consecutive h: Halbgewachs & Domes, Can Fam Physician 2015
POD_24H_ML = 3000.0  # > 3 L in 24 h: Halbgewachs & Domes, Can Fam Physician 2015
KDIGO = {  # rule id: (window h, mL/kg/h); source: KDIGO 2012 AKI guideline, Table 2
    "oliguria-kdigo-1": (6, 0.5),
    "oliguria-kdigo-2": (12, 0.5),
    "oliguria-kdigo-3": (24, 0.3),
}
# < 50 mL in 12 h: anuria < 100 mL/day (Klahr & Miller, NEJM 1998, from memory); KDIGO 2012:
# anuria for >= 12 h is stage 3
ANURIA_ML_12H = 50.0
COVERED = 0.9  # low-output windows judged only when >= 90% measured: DESIGN §3
FLOW_STOPPED = (60, 2.0)  # <= 2 mL in 60 min: common practice, no single source
REPLACEMENT_MIN_OUTPUT_ML = 100.0  # replacement judged from 100 mL in 2 h: Hourwatch's own
LABS_EVERY_S = 4 * 3600  # electrolytes every 4 h: common practice (4-12 h), no single source
OFFLINE_S = 300  # max(5 min, 5 x 60-s period): Hourwatch's own


def test_criteria_match_the_shipped_rule_files() -> None:
    """The truth below uses the same numbers as alert_rules/ (a change there is noticed)."""
    c = RULES_BY_ID["pod-hourly"].check
    assert (c.threshold_ml_h, c.consecutive_hours, c.comparator) == (POD_HOURLY_ML, 2, "gt")
    c24 = RULES_BY_ID["pod-24h"].check
    assert (c24.threshold_ml, c24.window_h, c24.since_start_if_shorter) == (POD_24H_ML, 24, True)
    for rid, (hours, rate) in KDIGO.items():
        ck = RULES_BY_ID[rid].check
        assert (ck.window_h, ck.threshold_ml_kg_h, ck.mode) == (hours, rate, "mean")
    ca = RULES_BY_ID["anuria-12h"].check
    assert (ca.window_h, ca.threshold_ml) == (12, ANURIA_ML_12H)
    cf = RULES_BY_ID["flow-stopped"].check
    assert (cf.stopped_min, cf.max_ml) == FLOW_STOPPED
    rb = RULES_BY_ID["replacement-behind"].check
    assert (rb.window_h, rb.min_output_ml) == (2, REPLACEMENT_MIN_OUTPUT_ML)
    assert RULES_BY_ID["labs-due"].check.every_s == LABS_EVERY_S
    assert RULES_BY_ID["meter-offline"].check.min_silence_s == OFFLINE_S


@dataclass(frozen=True)
class Scenario:
    """Invented: a bed's true flow as steps of (until minute, mL/h)."""

    name: str
    weight_kg: float
    hours: float
    steps: tuple[tuple[int, float], ...]
    spikes_s: tuple[float, float]
    margin_ml: float  # each truth crossing is at least this clear (module docstring)
    relieved_min: int | None = None  # an obstruction relieved at this minute (context)

    def flow(self, minute: float) -> float:
        return next((ml_h for until, ml_h in self.steps if minute < until), self.steps[-1][1])


# Post-obstructive diuresis (invented): 40 mL/h while obstructed, then after relief
# 660 mL/h for 8 h, settling to 150 mL/h. pod-hourly, pod-24h, replacement-behind (no
# replacement documented) and labs-due (no labs sent) must fire; no low-output rule may.
# The truth window moves 10.3 mL per minute through each threshold: margins >= 5 mL.
POD = Scenario(
    "post-obstructive-diuresis", 80.0, 12.0, ((120, 40.0), (600, 660.0), (10**9, 150.0)),
    spikes_s=(45 * 60.0, 9 * 3600.0 + 20 * 60), margin_ml=4.0, relieved_min=120,
)  # fmt: skip
# Oliguria (invented), 80 kg: 60 mL/h (0.75 mL/kg/h) for 6 h, then 6 mL/h (0.075 mL/kg/h)
# broken by two brisk 20-minute responses to diuretic boluses (900 mL/h, 300 mL each,
# 3 h apart). KDIGO stage 1 is met when the second response leaves the 6-h window and
# stage 2 when the first leaves the 12-h window, both on fully measured windows, with
# the window falling 15 mL a minute. Stage 3 (24 h), anuria (6 mL/h is not < 50 mL in
# 12 h), flow-stopped (6 mL in any hour is flow) and both POD criteria (a 20-minute
# response fills only one rolling hour past 200 mL; 1 L in all) are never met.
OLIGURIA = Scenario(
    "oliguria", 80.0, 20.0,
    ((360, 60.0), (380, 900.0), (540, 6.0), (560, 900.0), (10**9, 6.0)),
    spikes_s=(50 * 60.0, 14 * 3600.0 + 10 * 60), margin_ml=4.0,
)  # fmt: skip


def faults(scn: Scenario, noise_sd_ml: float = 1.0) -> MeterFaults:
    """The intake issue's log faults (issue 2, done-when)."""
    return MeterFaults(
        noise_sd_ml=noise_sd_ml,
        duplicate_p=0.05,
        reorder_p=0.03,
        bag_change_every_s=4 * 3600.0,
        spike_times_s=list(scn.spikes_s),
        spike_ml=300.0,
    )


# --- truth ------------------------------------------------------------------------


@dataclass(frozen=True)
class Crossing:
    minute: int  # first minute (from the start) at whose end the criterion holds
    margin_ml: float  # how far past the threshold at that minute, and short of it before
    after_s: float = 0.0  # time-driven rules: due this long after that minute

    @property
    def data_due(self) -> float:
        """When the minute has ended: a reading taken then shows it."""
        return T_START + (self.minute + 1) * 60.0

    @property
    def due(self) -> float:
        return self.data_due + self.after_s


def delay_min(rule_id: str) -> int:
    """The rule's alarm-condition delay (a setting in its file, not a clinical value)."""
    return RULES_BY_ID[rule_id].condition_delay_s // 60


def _first(
    value: npt.NDArray[np.float64],
    ok: npt.NDArray[np.bool_],
    thr: float,
    above: bool,
    rule_id: str,
) -> Crossing | None:
    """First minute where `ok` and value crosses `thr` and stays across for the rule's
    alarm-condition delay; margin on the crossing value and, where the minute before
    was judged, on that one too."""
    hit = ok & (value > thr if above else value < thr)
    hold = delay_min(rule_id)
    if hold:  # the condition must persist through the delay
        runs = rolling(np.concatenate([hit.astype(float), np.zeros(hold)]), hold + 1)[hold:]
        hit = runs >= hold + 1
    idx = np.flatnonzero(hit)
    if not idx.size:
        return None
    m = int(idx[0])
    margin = abs(float(value[m]) - thr)
    if m > 0 and ok[m - 1]:
        margin = min(margin, abs(float(value[m - 1]) - thr))
    return Crossing(m, margin, after_s=hold * 60.0)


def truth_crossings(
    sim: SimStream, weight_kg: float, log: Sequence[tuple[float, str, object]]
) -> dict[str, Crossing | None]:
    """Each default rule's first crossing on the true production (None: never met)."""
    vol = sim.truth_per_min.astype(float).copy()
    known = np.ones(vol.size, dtype=bool)
    vol[0], known[0] = 0.0, False  # in the bag at the baseline reading
    n = vol.size

    def win(length: int) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.float64]]:
        pad = np.zeros(length)
        v = rolling(np.concatenate([pad, vol]), length)[length:]
        k = rolling(np.concatenate([pad, known.astype(float)]), length)[length:]
        return v, k

    out: dict[str, Crossing | None] = dict.fromkeys(DEFAULT_RULE_IDS)
    w60, _ = win(60)
    before = np.concatenate([np.zeros(60), w60[:-60]])
    both = np.minimum(w60, before)  # both consecutive hours above <=> the smaller is
    out["pod-hourly"] = _first(both, np.ones(n, bool), POD_HOURLY_ML, True, "pod-hourly")
    w24, _ = win(1440)  # since the start when shorter: minutes before it count nothing
    out["pod-24h"] = _first(w24, np.ones(n, bool), POD_24H_ML, True, "pod-24h")
    # a duration criterion ("for 6 h") is judged only once its whole window lies after the
    # first reading (DESIGN §3): minute 0 is the baseline's, so from minute `length` on
    for rid, (hours, rate) in KDIGO.items():
        v, k = win(hours * 60)
        ok = (k >= COVERED * hours * 60) & (np.arange(n) >= hours * 60)
        limit = rate * weight_kg * hours  # mL in the window
        out[rid] = _first(v, ok, limit, False, rid)
    v12, k12 = win(720)
    ok12 = (k12 >= COVERED * 720) & (np.arange(n) >= 720)
    out["anuria-12h"] = _first(v12, ok12, ANURIA_ML_12H, False, "anuria-12h")
    # flow-stopped: our scenarios never have a quiet hour, so it is never met
    v60, k60 = win(FLOW_STOPPED[0])
    assert not np.any((k60 == FLOW_STOPPED[0]) & (v60 <= FLOW_STOPPED[1])), "not modelled"
    # rules gated on an open high-output alarm: no intake and no labs are in the log
    gates = [c for c in (out["pod-hourly"], out["pod-24h"]) if c is not None]
    if gates:
        gate = min(gates, key=lambda c: c.due)  # the first high-output alarm to open
        opened = gate.minute + int(gate.after_s // 60)
        v120, _ = win(120)
        ok = np.arange(n) >= opened
        out["replacement-behind"] = _first(
            v120, ok, REPLACEMENT_MIN_OUTPUT_ML - 1e-9, True, "replacement-behind"
        )
        labs_after = gate.after_s + LABS_EVERY_S + delay_min("labs-due") * 60.0
        out["labs-due"] = Crossing(gate.minute, gate.margin_ml, after_s=labs_after)
    # the meter never falls silent: offline and data-gap are never met
    times = [t for t, topic, _ in log if topic.startswith("meters/")]
    assert max(np.diff(times)) < OFFLINE_S
    return out


# --- the run ----------------------------------------------------------------------


def replay_json(log: Path, capsys: pytest.CaptureFixture[str]) -> list[dict[str, object]]:
    capsys.readouterr()
    assert main(["replay", str(log), "--json"]) == 0
    return [json.loads(line) for line in capsys.readouterr().out.splitlines()]


def _epoch(text: object) -> float:
    assert isinstance(text, str)
    return datetime.fromisoformat(text.replace("Z", "+00:00")).timestamp()


def check_scenario(
    scn: Scenario,
    seed: int,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    noise_sd_ml: float = 1.0,
) -> None:
    sim = simulate(REFERENCE, DEVICE, START, scn.hours, scn.flow, faults(scn, noise_sd_ml), seed)
    ctx = context_record(T_START - 30.0, BED, WARD, [DEVICE], weight_kg=scn.weight_kg)
    contexts = [ctx]
    if scn.relieved_min is not None:  # the relief marker that arms the POD rules (DESIGN §4)
        relieved = T_START + scn.relieved_min * 60.0
        marked = context_record(relieved, BED, WARD, [DEVICE], weight_kg=scn.weight_kg)
        # nothing retained drains in this flow: the whole 660 mL/h is diuresis
        at = datetime.fromtimestamp(relieved, UTC).isoformat()
        marked[2]["episodes"] = [
            {"kind": "obstruction_relieved", "residual_drain_min": 0, "at": at}
        ]
        contexts.append(marked)
    log = tmp_path / f"{scn.name}-{seed}.jsonl"
    records = [*contexts, *sim.records]
    write_log(log, records)
    truth = truth_crossings(sim, scn.weight_kg, records)
    for rid, c in truth.items():  # the scenario itself must be clear-cut
        assert c is None or c.margin_ml >= scn.margin_ml, (rid, c)

    # A reordered message cannot be seen before it arrives: the earliest the engine can
    # know of a minute is the first receive time of a reading taken after it.
    seen = sorted((_epoch(p["time"]), t) for t, _, p in sim.records if isinstance(p, dict))

    def arrival(c: Crossing) -> float:
        return min(t for dev_t, t in seen if dev_t >= c.data_due) + c.after_s

    events = [e for e in replay_json(log, capsys) if e["type"] == "alarm"]
    first_active: dict[str, float] = {}
    for e in events:
        rid = str(e["rule"])
        if e["state"] == "active" and rid not in first_active:
            first_active[rid] = _epoch(e["time"])
    expected = {rid for rid, c in truth.items() if c is not None}
    report = {
        rid: (
            None if truth[rid] is None else round(truth[rid].due - T_START),  # type: ignore[union-attr]
            None if rid not in first_active else round(first_active[rid] - T_START, 1),
        )
        for rid in DEFAULT_RULE_IDS
        if truth[rid] is not None or rid in first_active
    }  # (truth due, first active), seconds from the start
    assert {str(e["rule"]) for e in events} == expected, report
    for rid in expected:
        c = truth[rid]
        assert c is not None
        # within one reading period of the truth minute (counted from the data's arrival)
        assert c.due - PERIOD <= first_active[rid] <= arrival(c) + PERIOD, (rid, report)


def test_pod_scenario_is_what_it_says() -> None:
    """Guard: the invented diuresis meets both POD criteria and no low-output one."""
    sim = simulate(REFERENCE, DEVICE, START, POD.hours, POD.flow, MeterFaults(), 0)
    truth = truth_crossings(sim, POD.weight_kg, sim.records)
    met = {rid for rid, c in truth.items() if c is not None}
    assert met == {"pod-hourly", "pod-24h", "replacement-behind", "labs-due"}


def test_oliguria_scenario_is_what_it_says() -> None:
    sim = simulate(REFERENCE, DEVICE, START, OLIGURIA.hours, OLIGURIA.flow, MeterFaults(), 0)
    truth = truth_crossings(sim, OLIGURIA.weight_kg, sim.records)
    met = {rid for rid, c in truth.items() if c is not None}
    assert met == {"oliguria-kdigo-1", "oliguria-kdigo-2"}


@pytest.mark.parametrize("seed", [11, 12])
def test_post_obstructive_diuresis_log(
    seed: int, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    check_scenario(POD, seed, tmp_path, capsys)


@pytest.mark.parametrize("seed", [21, 22])
def test_oliguria_log_without_reading_noise(
    seed: int, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The same faults except reading noise: duplicates, reordering, bag changes, spikes."""
    check_scenario(OLIGURIA, seed, tmp_path, capsys, noise_sd_ml=0.0)


@pytest.mark.parametrize("seed", [21, 22])
def test_oliguria_log(seed: int, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """With 1-mL reading noise at 6 mL/h, most readings are small noise falls; their
    minutes must still count as measured, or no low-output window is ever covered."""
    check_scenario(OLIGURIA, seed, tmp_path, capsys)
