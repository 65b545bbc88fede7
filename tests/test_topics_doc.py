"""docs/topics.md, where the README points for the published topics, stays true: every
example message validates against the model the code uses for it, the example advice and
alarm are what the engine publishes for the bundled example night, and every topic the
service publishes or reads is listed.

The examples are invented (a simulated ward); no patient data.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest
from pydantic import BaseModel

from daemon import messages
from daemon.caution import CAUTION
from daemon.engine import clinical, context
from daemon.engine.alarms import AlarmEvent
from daemon.engine.decode import Decoder, Reading
from daemon.engine.effects import AdviceIssued
from daemon.engine.engine import Engine
from daemon.engine.strictjson import validate
from daemon.profile_files import load_profiles
from daemon.replay import replay_file
from daemon.rule_files import load_advice, load_policy, load_rules
from tests.conftest import PROFILES

ROOT = Path(__file__).resolve().parent.parent
DOC = (ROOT / "docs" / "topics.md").read_text(encoding="utf-8")
INBOUND: dict[str, type[BaseModel]] = {
    "BedContext": context.BedContext,
    "IntakeMessage": clinical.IntakeMessage,
    "VitalsMessage": clinical.VitalsMessage,
    "LabsMessage": clinical.LabsMessage,
    "AckMessage": clinical.AckMessage,
}
OUTBOUND: dict[str, type[BaseModel]] = {
    name: getattr(messages, name)
    for name in (
        "AlarmMessage",
        "AdviceMessage",
        "StateMessage",
        "RejectedMessage",
        "StatusMessage",
    )
}
WORDING = {"summary", "pager", "title", "notes", "caution"}  # sentences a person reads
EXAMPLES = re.findall(r"<!-- model: (\w+) -->\n```json\n(.*?)\n```", DOC, re.S)


def test_every_model_has_an_example() -> None:
    assert sorted(name for name, _ in EXAMPLES) == sorted([*INBOUND, *OUTBOUND])


@pytest.mark.parametrize(("name", "text"), EXAMPLES, ids=[n for n, _ in EXAMPLES])
def test_each_example_validates_against_its_model(name: str, text: str) -> None:
    if name in INBOUND:  # as the engine reads it: strictly, through its JSON form
        validate(INBOUND[name], text)
    else:
        msg = OUTBOUND[name].model_validate(json.loads(text))
        assert json.loads(msg.model_dump_json(by_alias=True))["schema"] == 1


def test_the_published_topics_are_all_listed() -> None:
    for kind in ("alarms/{ward}/{bed}", "state/{ward}/{bed}", "advice/{ward}/{bed}",
                 "rejected", "status", "ack/{user}", "ack", "beds/{bed}/context",
                 "beds/{bed}/intake", "beds/{bed}/vitals", "beds/{bed}/labs"):  # fmt: skip
        assert f"`{{prefix}}/{kind}`" in DOC, kind
    assert CAUTION in DOC  # the state and status examples carry the real caution


def test_the_meter_example_is_the_key_value_family_s_own() -> None:
    line = re.search(r"```\n(v=2;.*)\n```", DOC)
    assert line is not None
    r = Decoder(PROFILES["keyvalue-decilitre"]).decode("kv-0101", line.group(1))
    assert isinstance(r, Reading) and r.volume_ml == pytest.approx(425.0)


def test_the_alarm_and_advice_examples_are_what_the_engine_publishes() -> None:
    """The example night's first post-obstructive alarm and advice, through the models
    the service publishes with (no field missing, none extra)."""
    engine = Engine(load_profiles(), load_rules(), load_policy(), advice_policy=load_advice(),
                    ack_topic="hourwatch/ack/{user}")  # fmt: skip
    found: dict[str, dict[str, object]] = {}

    def keep(effects: list) -> None:
        for e in effects:
            if isinstance(e, AlarmEvent) and e.rule == "pod-hourly":
                found.setdefault("AlarmMessage", json.loads(messages.AlarmMessage.of(e).to_bytes()))
            if isinstance(e, AdviceIssued):
                msg = json.loads(messages.AdviceMessage.of(e).to_bytes())  # every kind fits
                if e.advice.kind.value == "rate":
                    found.setdefault("AdviceMessage", msg)

    replay_file(ROOT / "examples" / "ward-night.jsonl", engine, warn=None, on_effects=keep)
    shown = {name: json.loads(text) for name, text in EXAMPLES}
    alarm = dict(found["AlarmMessage"], advice=None)  # the doc leaves the advice out
    for name, real in (("AdviceMessage", found["AdviceMessage"]), ("AlarmMessage", alarm)):
        doc = shown[name]
        assert set(doc) == set(real), name  # every field, none extra
        # the numbers, ids, states and evidence as published; the sentences people read
        # may be reworded without this page going wrong
        for key in set(real) - WORDING:
            assert doc[key] == real[key], (name, key)
        assert all(isinstance(doc[k], str | list) and doc[k] for k in WORDING & set(real)), name
