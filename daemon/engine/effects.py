"""Effects: what the engine asks the shell to do, as plain data."""

from __future__ import annotations

from dataclasses import dataclass

from .advice import Advice
from .alarms import AlarmEvent
from .evaluator import Notice
from .timefmt import iso


@dataclass(frozen=True, slots=True)
class RejectedInput:
    """Publish on `{prefix}/rejected`: device id and topic only, never patient fields."""

    time: float
    topic: str
    device_id: str | None
    reason: str
    detail: str

    def to_json(self) -> dict[str, object]:
        return {"time": iso(self.time), "topic": self.topic, "device_id": self.device_id,
                "reason": str(self.reason), "detail": self.detail}  # fmt: skip


@dataclass(frozen=True, slots=True)
class AdviceIssued:
    """Publish on `{prefix}/advice/{ward}/{bed}`."""

    time: float
    bed: str
    ward: str
    advice: Advice
    because_of: tuple[str, ...]  # ids of the open high-output alarms

    def to_json(self) -> dict[str, object]:
        return {"time": iso(self.time), "bed": self.bed, "ward": self.ward,
                "because_of": list(self.because_of)} | self.advice.to_json()  # fmt: skip


Effect = RejectedInput | AlarmEvent | AdviceIssued | Notice
