"""Clinical inputs besides meters: fluid intake, vital signs, laboratory results,
and acknowledgements. Each arrives on its own bed topic as JSON."""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import AwareDatetime, BaseModel, ConfigDict, Field, model_validator


class _Message(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)
    schema_version: Literal[1] = Field(1, alias="schema")


class IntakeMessage(_Message):
    """`{prefix}/beds/{bed}/intake`: fluid given to the patient."""

    time: AwareDatetime
    volume_ml: Annotated[float, Field(gt=0, le=5000)]
    fluid: Annotated[str, Field(min_length=1, max_length=64)]
    route: Literal["iv", "oral", "enteral", "other"] = "iv"


class VitalsMessage(_Message):
    """`{prefix}/beds/{bed}/vitals`: heart rate and blood pressure."""

    time: AwareDatetime
    heart_rate_bpm: Annotated[float, Field(ge=20, le=300)] | None = None
    systolic_mmhg: Annotated[float, Field(ge=30, le=300)] | None = None
    diastolic_mmhg: Annotated[float, Field(ge=10, le=250)] | None = None
    mean_mmhg: Annotated[float, Field(ge=15, le=250)] | None = None

    @model_validator(mode="after")
    def _something(self) -> VitalsMessage:
        if all(
            v is None
            for v in (self.heart_rate_bpm, self.systolic_mmhg, self.diastolic_mmhg, self.mean_mmhg)
        ):
            raise ValueError("vitals need at least one value")
        if (
            self.systolic_mmhg is not None
            and self.diastolic_mmhg is not None
            and self.diastolic_mmhg >= self.systolic_mmhg
        ):
            raise ValueError("diastolic_mmhg must be below systolic_mmhg")
        return self


class LabsMessage(_Message):
    """`{prefix}/beds/{bed}/labs`: electrolytes in mmol/L, creatinine in umol/L (UCUM
    `umol/L`). Each result counts for its own analyte only."""

    time: AwareDatetime
    serum_na_mmol_l: Annotated[float, Field(ge=100, le=200)] | None = None
    serum_k_mmol_l: Annotated[float, Field(ge=1, le=10)] | None = None
    serum_mg_mmol_l: Annotated[float, Field(ge=0.1, le=5)] | None = None
    serum_phosphate_mmol_l: Annotated[float, Field(ge=0.1, le=5)] | None = None
    serum_creatinine_umol_l: Annotated[float, Field(ge=10, le=3000)] | None = None
    urine_na_mmol_l: Annotated[float, Field(ge=0, le=300)] | None = None
    urine_k_mmol_l: Annotated[float, Field(ge=0, le=300)] | None = None

    @model_validator(mode="after")
    def _something(self) -> LabsMessage:
        if all(getattr(self, name) is None for name in ANALYTES):
            raise ValueError("labs need at least one result")
        return self


# Every result a labs message can carry, by its field name.
ANALYTES = (
    "serum_na_mmol_l", "serum_k_mmol_l", "serum_mg_mmol_l", "serum_phosphate_mmol_l",
    "serum_creatinine_umol_l", "urine_na_mmol_l", "urine_k_mmol_l",
)  # fmt: skip


class AckMessage(_Message):
    """`{prefix}/ack/{user}`: a person acknowledges one alarm. `by` is the topic's user
    (the broker's ACL lets a client publish only under its own name); on the shared
    `{prefix}/ack` of a broker without authentication, the payload must name it."""

    alarm_id: Annotated[str, Field(min_length=1, max_length=200)]
    by: Annotated[str, Field(min_length=1, max_length=64)] | None = None
    role: Annotated[str, Field(min_length=1, max_length=64)]
    time: AwareDatetime | None = None
