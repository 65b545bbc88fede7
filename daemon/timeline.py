"""Alarm events, advice and notices as a readable timeline or JSON lines."""

from __future__ import annotations

import json

from .engine.alarms import STATE_WORDS, AlarmEvent
from .engine.effects import AdviceIssued, Effect, RejectedInput
from .engine.evaluator import Notice
from .engine.timefmt import iso


def effect_json(e: Effect) -> str | None:
    """One JSON line per alarm event, advice or notice; rejected input is not shown."""
    if isinstance(e, AlarmEvent):
        return json.dumps({"type": "alarm"} | e.to_json())
    if isinstance(e, AdviceIssued):
        return json.dumps({"type": "advice"} | e.to_json())
    if isinstance(e, Notice):
        return json.dumps({"type": "notice", "time": iso(e.time), "bed": e.bed,
                           "ward": e.ward, "code": e.code, "text": e.text})  # fmt: skip
    return None


def effect_text(e: Effect) -> str | None:
    when = iso(e.time)[:19].replace("T", " ")
    if isinstance(e, AlarmEvent):
        who = f" by {e.by} ({e.role})" if e.by else ""
        page = f" -> page {', '.join(e.notify)}" if e.notify else ""
        supp = f" [suppressed by {e.suppressed_by}]" if e.suppressed_by else ""
        return (
            f"{when}  {e.ward}/{e.bed:<8} {STATE_WORDS[e.state]:<12} {e.priority:<6} {e.rule:<18} "
            f"{e.reason}{who}{supp}: {e.summary}{page}  [{e.alarm_id}]"
        )
    if isinstance(e, AdviceIssued):
        return f"{when}  {e.ward}/{e.bed:<8} ADVICE       {e.advice.summary}"
    if isinstance(e, Notice):
        return f"{when}  {e.ward}/{e.bed:<8} NOTICE       {e.text}"
    if isinstance(e, RejectedInput):
        return None
    return None
