"""Effects: what the engine asks the shell to do, as plain data."""

from __future__ import annotations

from dataclasses import dataclass

from .outcomes import Outcome


@dataclass(frozen=True, slots=True)
class RejectedInput:
    """Publish on `{prefix}/rejected`: device id and topic only, never patient fields."""

    time: float
    topic: str
    device_id: str | None
    reason: Outcome
    detail: str


Effect = RejectedInput
