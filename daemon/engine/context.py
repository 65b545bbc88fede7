"""Bed context: which meters belong to a bed, and what the rules need to know."""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import AwareDatetime, BaseModel, ConfigDict, Field, field_validator, model_validator

from .advice import ReplacementOrder
from .profiles import Calibration
from .rules import canonical_rule_id

DeviceId = Annotated[str, Field(min_length=1, max_length=128)]
ProfileName = Annotated[str, Field(min_length=1, max_length=64)]
WeightBasis = Literal["actual", "ideal", "adjusted"]
EpisodeKind = Literal["catheter_inserted", "obstruction_relieved", "catheter_changed"]

# The retained bladder content drains over the first half hour to hour after relief
# (common practice, no single source): minutes counted as residual, not output.
RESIDUAL_DRAIN_MIN = 60
# Episodes after which what first drains is the bladder's retained content.
DRAINS_RESIDUAL = frozenset({"catheter_inserted", "obstruction_relieved"})


class Episode(BaseModel):
    """A clinical marker, e.g. when an obstruction was relieved."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    kind: EpisodeKind
    at: AwareDatetime
    # why a catheter was inserted: "retention" arms the post-obstructive rules
    reason: Literal["retention", "monitoring", "other"] | None = None
    # how long after `at` what drains is the retained content, not output
    residual_drain_min: Annotated[int, Field(ge=0, le=240)] = RESIDUAL_DRAIN_MIN

    @model_validator(mode="after")
    def _reason(self) -> Episode:
        if self.reason is not None and self.kind != "catheter_inserted":
            raise ValueError("reason is for catheter_inserted episodes")
        return self

    @property
    def marker(self) -> str:
        """The name a rule file's `episode.markers` uses for this episode."""
        if self.kind == "catheter_inserted" and self.reason == "retention":
            return "catheter_inserted_for_retention"
        return self.kind


class BedContext(BaseModel):
    """Retained on `{prefix}/beds/{bed}/context`; a newer one replaces the older."""

    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)

    schema_version: Literal[1] = Field(1, alias="schema")
    ward: Annotated[str, Field(min_length=1, max_length=64)]
    device_ids: Annotated[list[DeviceId], Field(max_length=8)]
    weight_kg: Annotated[float, Field(gt=0, le=400)] | None = None
    weight_basis: WeightBasis | None = None
    # per-bed overrides, by clinician order (an old rule id reads as its current one)
    disabled_rules: list[Annotated[str, Field(max_length=64)]] = Field(default_factory=list)
    # the clinician's replacement order; without one no fluid or rate is suggested
    replacement: ReplacementOrder | None = None
    tbw_fraction: Annotated[float, Field(ge=0.3, le=0.7)] = 0.6  # total body water / weight
    episodes: Annotated[list[Episode], Field(max_length=32)] = Field(default_factory=list)
    # a meter's family (device profile name), fixed from the binding on (optional)
    device_profiles: Annotated[dict[DeviceId, ProfileName], Field(max_length=8)] = Field(
        default_factory=dict
    )
    # meters this bed takes over from another bed's binding (moved with a notice)
    replaces: Annotated[list[DeviceId], Field(max_length=8)] = Field(default_factory=list)
    # per-meter calibration found on the bench (wins over a devices file's)
    calibration: Annotated[dict[DeviceId, Calibration], Field(max_length=8)] = Field(
        default_factory=dict
    )

    @field_validator("disabled_rules")
    @classmethod
    def _current_ids(cls, ids: list[str]) -> list[str]:
        return [canonical_rule_id(x) for x in ids]
