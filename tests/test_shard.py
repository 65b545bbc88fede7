"""Sharding by ward (daemon/shard.py), without a broker: what a group owning some wards
admits. Beds, wards and meters are invented."""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Any

from daemon.profile_files import load_profiles
from daemon.shard import WardShard

PROFILES = load_profiles()
METER = {p.name: p for p in PROFILES}["reference-cumulative"]


@dataclass
class Msg:
    topic: str
    payload: bytes


class Log:
    def __init__(self) -> None:
        self.lines: list[tuple[str, dict[str, Any]]] = []

    def info(self, event: str, **kw: Any) -> None:
        self.lines.append((event, kw))


def ctx(bed: str, ward: str, devices: list[str]) -> Msg:
    body = {"ward": ward, "device_ids": devices, "weight_kg": 80, "weight_basis": "actual"}
    return Msg(f"hourwatch/beds/{bed}/context", json.dumps(body).encode())


def reading(device: str) -> Msg:
    return Msg(METER.topic.replace("{device_id}", device), b'{"volume_ml": 10}')


def test_another_wards_bed_its_inputs_acks_and_meters_are_left_out_logged_once():
    log = Log()
    shard = WardShard(["icu-east"], "hourwatch", PROFILES, log)
    batch = [
        ctx("b01", "icu-east", ["rc-1"]),
        ctx("b09", "icu-west", ["rc-9"]),
        reading("rc-1"),
        reading("rc-9"),
        reading("rc-9"),
        Msg("hourwatch/beds/b09/intake", b"{}"),
        Msg("hourwatch/beds/b01/intake", b"{}"),
        Msg("hourwatch/ack/n1", b'{"alarm_id": "b09/pod-hourly/x"}'),
        Msg("hourwatch/ack/n1", b'{"alarm_id": "b01/pod-hourly/x"}'),
        reading("rc-unbound"),  # no context placed it: ours, the engine counts it unbound
        Msg("hourwatch/beds/b09/context", b"not json"),  # the engine refuses it with a reason
    ]
    assert shard.admit(batch) == [True, False, True, False, False, False, True, False, True,
                                  True, True]  # fmt: skip
    assert shard.ignored == 5
    events = [e for e, _ in log.lines]
    assert events == ["shard_context_ignored", "shard_reading_ignored"]  # once each
    assert log.lines[0][1]["ward"] == "icu-west"


def test_a_bed_moving_into_an_owned_ward_is_ours_from_that_context_on():
    shard = WardShard(["icu-east"], "hourwatch", PROFILES, Log())
    assert shard.admit([ctx("b09", "icu-west", ["rc-9"]), reading("rc-9")]) == [False, False]
    assert shard.admit([ctx("b09", "icu-east", ["rc-9"]), reading("rc-9")]) == [True, True]
    # and a meter moved from a foreign bed onto one of ours
    assert shard.admit([ctx("b08", "icu-west", ["rc-8"]), ctx("b02", "icu-east", ["rc-8"]),
                        reading("rc-8")]) == [False, True, True]  # fmt: skip


def test_without_wards_every_message_is_admitted():
    shard = WardShard([], "hourwatch", PROFILES, Log())
    assert shard.admit([ctx("b09", "icu-west", ["rc-9"]), reading("rc-9")]) == [True, True]
    assert shard.ignored == 0
