"""Bed context: which meters belong to a bed, and what the rules need to know."""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import AwareDatetime, BaseModel, ConfigDict, Field

from .advice import ReplacementOrder

DeviceId = Annotated[str, Field(min_length=1, max_length=128)]
ProfileName = Annotated[str, Field(min_length=1, max_length=64)]
WeightBasis = Literal["actual", "ideal", "adjusted"]


class Episode(BaseModel):
    """A clinical marker, e.g. when an obstruction was relieved."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    kind: Literal["catheter_inserted", "obstruction_relieved", "catheter_changed"]
    at: AwareDatetime


class BedContext(BaseModel):
    """Retained on `{prefix}/beds/{bed}/context`; a newer one replaces the older."""

    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)

    schema_version: Literal[1] = Field(1, alias="schema")
    ward: Annotated[str, Field(min_length=1, max_length=64)]
    device_ids: Annotated[list[DeviceId], Field(max_length=8)]
    weight_kg: Annotated[float, Field(gt=0, le=400)] | None = None
    weight_basis: WeightBasis | None = None
    # per-bed overrides, by clinician order
    disabled_rules: list[Annotated[str, Field(max_length=64)]] = Field(default_factory=list)
    replacement: ReplacementOrder = ReplacementOrder()
    tbw_fraction: Annotated[float, Field(ge=0.3, le=0.7)] = 0.6  # total body water / weight
    episodes: list[Episode] = Field(default_factory=list)
    # a meter's family (device profile name), fixed from the binding on (optional)
    device_profiles: Annotated[dict[DeviceId, ProfileName], Field(max_length=8)] = Field(
        default_factory=dict
    )
    # meters this bed takes over from another bed's binding (moved with a notice)
    replaces: Annotated[list[DeviceId], Field(max_length=8)] = Field(default_factory=list)
