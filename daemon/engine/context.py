"""Bed context: which meters belong to a bed, and what the rules need to know."""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import BaseModel, ConfigDict, Field

DeviceId = Annotated[str, Field(min_length=1, max_length=128)]
WeightBasis = Literal["actual", "ideal", "adjusted"]


class BedContext(BaseModel):
    """Retained on `{prefix}/beds/{bed}/context`; a newer one replaces the older."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    schema_version: Literal[1] = Field(1, alias="schema")
    ward: Annotated[str, Field(min_length=1, max_length=64)]
    device_ids: Annotated[
        list[Annotated[str, Field(min_length=1, max_length=128)]], Field(max_length=8)
    ]
    weight_kg: Annotated[float, Field(gt=0, le=400)] | None = None
    weight_basis: WeightBasis | None = None
