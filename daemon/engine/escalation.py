"""Escalation policy: who is paged for an unacknowledged alarm, and when.

Validated here, read by the shell: the engine only ever sees parsed text.
"""

from __future__ import annotations

import tomllib
from typing import Annotated, Literal

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    ValidationError,
    field_validator,
    model_validator,
)

from .alarms import Priority

Role = Annotated[str, Field(pattern=r"^[a-z][a-z0-9-]{0,62}$")]
DAY_S = 86400


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class Tier(_Strict):
    roles: Annotated[list[Role], Field(min_length=1, max_length=16)]
    # seconds after activation (or re-activation) at which this tier is paged
    after_s: Annotated[int, Field(ge=0, le=DAY_S)]

    @field_validator("roles")
    @classmethod
    def _unique(cls, roles: list[str]) -> list[str]:
        if len(set(roles)) != len(roles):
            raise ValueError("a role is listed twice")
        return roles


class PriorityPolicy(_Strict):
    tiers: Annotated[list[Tier], Field(min_length=1, max_length=8)]
    # after the last tier, page everyone reached so far again at this interval;
    # absent = no re-notification
    renotify_s: Annotated[int, Field(gt=0, le=DAY_S)] | None = None
    # each re-notification waits twice as long as the one before, up to this (absent:
    # always renotify_s): urgent at first, never silent, bounded over hours
    renotify_max_s: Annotated[int, Field(gt=0, le=DAY_S)] | None = None

    @field_validator("tiers")
    @classmethod
    def _ordered(cls, tiers: list[Tier]) -> list[Tier]:
        if tiers[0].after_s != 0:
            raise ValueError("tiers.0.after_s must be 0: the first tier is paged on activation")
        for n in range(1, len(tiers)):
            if tiers[n].after_s <= tiers[n - 1].after_s:
                raise ValueError(f"tiers.{n}.after_s must be later than tiers.{n - 1}.after_s")
        return tiers

    @model_validator(mode="after")
    def _backoff(self) -> PriorityPolicy:
        if self.renotify_max_s is not None:
            if self.renotify_s is None:
                raise ValueError("renotify_max_s needs renotify_s")
            if self.renotify_max_s < self.renotify_s:
                raise ValueError("renotify_max_s must not be below renotify_s")
        return self

    def renotify_after(self, repeats: int) -> float | None:
        """The wait before the next re-notification, after `repeats` of them."""
        if self.renotify_s is None:
            return None
        if self.renotify_max_s is None:
            return float(self.renotify_s)
        return float(min(self.renotify_s * 2 ** min(repeats, 16), self.renotify_max_s))

    def roles_up_to(self, tier: int) -> tuple[str, ...]:
        """Everyone paged so far: an escalation adds people, it does not drop the
        bedside nurse, who is still the one nearest the patient."""
        out: list[str] = []
        for t in self.tiers[: tier + 1]:
            out.extend(r for r in t.roles if r not in out)
        return tuple(out)


class EscalationPolicy(_Strict):
    schema_version: Literal[1] = Field(1, alias="schema")
    # the longest a technical alarm may hold back a low-output alarm before that one
    # pages in its own right (DESIGN §4)
    suppression_max_s: Annotated[int, Field(ge=60, le=DAY_S)] = 1800
    high: PriorityPolicy
    medium: PriorityPolicy
    low: PriorityPolicy
    info: PriorityPolicy

    def for_priority(self, priority: Priority) -> PriorityPolicy:
        policy: PriorityPolicy = getattr(self, str(priority))
        return policy


def load_policy_text(text: str, source: str) -> EscalationPolicy:
    """Parse and validate a policy file's text; errors read 'source: key: message'."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ValueError(f"{source}: not valid TOML: {exc}") from None
    try:
        return EscalationPolicy.model_validate(data)
    except ValidationError as exc:
        errs = exc.errors()
        first = errs[0]
        key = ".".join(str(x) for x in first["loc"]) or "(top level)"
        msg = first["msg"].removeprefix("Value error, ")
        more = f" (and {len(errs) - 1} more)" if len(errs) > 1 else ""
        raise ValueError(f"{source}: {key}: {msg}{more}") from None
