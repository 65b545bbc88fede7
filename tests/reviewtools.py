"""A small invented night for the review tests (explain, report, compare, annotate).

ALL DATA HERE IS INVENTED: ward "review-test", its beds and meters do not exist, and
the patients have no names. Three beds on 60-s reference-cumulative meters:

- bed-sev:  a severe post-obstructive diuresis, a steady 600 mL/h; one spike artefact
            and one redelivered (duplicate) message inside the first two hours;
- bed-bord: a borderline output, a steady 220 mL/h: above the 200 mL/h pod-hourly
            threshold, below 250 mL/h;
- bed-norm: a normal output, 60 mL/h (0.75 mL/kg/h at 80 kg).

The diuresis beds carry an obstruction relieved two hours before the night starts (so
the post-obstructive rules are armed); bed-sev has a replacement order (50-75% as 0.45%
NaCl) and a serum sodium in range. The bedside nurse acknowledges bed-sev's pod-hourly
alarm 20 minutes after it fires.

Volumes are exact (no noise), so the expected windows follow from the flows.
"""

from __future__ import annotations

import json
import shutil
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from daemon.engine.alarms import AlarmEvent
from daemon.engine.effects import Effect
from daemon.engine.engine import Engine
from daemon.profile_files import load_profiles
from daemon.replay import replay_file
from daemon.rule_files import BUNDLED as BUNDLED_RULES
from daemon.rule_files import load_policy, load_rules
from simulator.meterlog import MeterFaults, constant, context_record, simulate, write_log

T0 = datetime(2026, 3, 14, 0, 0, tzinfo=UTC)  # invented
HOURS = 3.5
WARD = "review-test"

# Flows of the invented beds, mL/h. The pod-hourly rule alarms above 200 mL/h in each
# of two consecutive hours (source: Halbgewachs & Domes, Can Fam Physician 2015);
# 220 mL/h is built to sit between that threshold and a raised what-if one of 250.
SEVERE_ML_H = 600.0  # invented
BORDERLINE_ML_H = 220.0  # invented
NORMAL_ML_H = 60.0  # invented
SPIKE_AT_S = 50 * 60.0  # offset of the spike reading on bed-sev (invented)
ACK_AFTER_S = 20 * 60.0  # invented
ACK_BY = "nurse-17"  # invented


def write_night(path: Path) -> Path:
    """Write the invented night as a JSON Lines log; return its path."""
    prof = next(p for p in load_profiles() if p.name == "reference-cumulative")
    t0 = T0.timestamp()
    recs: list[tuple[float, str, dict[str, Any] | str]] = []
    beds = [
        ("bed-sev", "rc-9001", SEVERE_ML_H, MeterFaults(spike_times_s=[SPIKE_AT_S], spike_ml=300)),
        ("bed-bord", "rc-9002", BORDERLINE_ML_H, MeterFaults()),
        ("bed-norm", "rc-9003", NORMAL_ML_H, MeterFaults()),
    ]
    relieved = datetime.fromtimestamp(t0 - 2 * 3600.0, UTC).isoformat()
    for i, (bed, dev, flow, faults) in enumerate(beds):
        ctx = context_record(t0 - 60.0 + i, bed, WARD, [dev], weight_kg=80.0)
        if bed != "bed-norm":
            ctx[2]["episodes"] = [{"kind": "obstruction_relieved", "at": relieved}]
        if bed == "bed-sev":
            ctx[2]["replacement"] = {
                "fraction_low": 0.5, "fraction_high": 0.75, "fluid": "0.45% NaCl",
                "ordered_by": "icu-physician-3 (invented)", "ordered_at": relieved,
            }  # fmt: skip
            # in range: 135-145 mmol/L (Adrogue & Madias, NEJM 2000)
            labs = {"time": datetime.fromtimestamp(t0 - 1800.0, UTC).isoformat(),
                    "serum_na_mmol_l": 140.0}  # fmt: skip
            recs += [ctx, (t0 - 30.0, f"hourwatch/beds/{bed}/labs", labs)]
        else:
            recs.append(ctx)
        s = simulate(prof, dev, T0, HOURS, constant(flow), faults, seed=11 + i)
        recs += s.records
        if bed == "bed-sev":  # the broker redelivers one message 5 s later
            t, topic, payload = next(r for r in s.records if r[0] > t0 + 70 * 60.0)
            recs.append((t + 5.0, topic, payload))
    write_log(path, recs)
    # the alarm id is known once the night has been replayed: acknowledge it then
    pod = first_active(alarm_events(path), "bed-sev", "pod-hourly")
    ack = {"alarm_id": pod.alarm_id, "by": ACK_BY, "role": "bedside-nurse"}
    recs.append((pod.time + ACK_AFTER_S, "hourwatch/ack", ack))
    write_log(path, recs)
    return path


def alarm_events(path: Path, rules_dir: Path | None = None) -> list[AlarmEvent]:
    """The alarm events of a plain replay (no review code involved)."""
    events: list[AlarmEvent] = []

    def keep(effects: list[Effect]) -> None:
        events.extend(e for e in effects if isinstance(e, AlarmEvent))

    engine = Engine(load_profiles(), load_rules(rules_dir), load_policy(rules_dir))
    replay_file(path, engine, warn=None, on_effects=keep)
    return events


def first_active(events: list[AlarmEvent], bed: str, rule: str) -> AlarmEvent:
    return next(e for e in events if e.bed == bed and e.rule == rule and e.state == "active")


def edited_rules(tmp: Path, name: str, rule_id: str, old: str, new: str) -> Path:
    """A copy of the shipped rules with one line of one rule file changed."""
    out = tmp / name
    shutil.copytree(BUNDLED_RULES, out)
    f = out / f"{rule_id}.toml"
    text = f.read_text(encoding="utf-8")
    assert old in text
    f.write_text(text.replace(old, new))
    return out


def raised_pod_threshold(tmp: Path, threshold_ml_h: int) -> Path:
    """A copy of the shipped rules with pod-hourly's threshold changed (a what-if)."""
    return edited_rules(tmp, f"rules-pod-{threshold_ml_h}", "pod-hourly",
                        "threshold_ml_h = 200", f"threshold_ml_h = {threshold_ml_h}")  # fmt: skip


def json_out(text: str) -> Any:
    return json.loads(text)
