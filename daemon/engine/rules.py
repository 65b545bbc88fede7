"""Rule file schema: each default rule of DESIGN §4 is one declarative TOML file.

A rule names one of a fixed set of checks and gives its parameters; the checks
themselves live in `checks.py`. Nothing in a rule file is evaluated as code.
"""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, model_validator

from .alarms import Kind, Priority, RuleSpec
from .escalation import Role

RULE_ID = r"^[a-z0-9][a-z0-9-]{1,62}$"

# Rule ids and check types renamed to one spelling (British, as everywhere else), old
# name -> new: still accepted in rule files, bed contexts and annotations.
RULE_ALIASES: dict[str, str] = {"hypovolemia-risk": "hypovolaemia-risk"}
CHECK_ALIASES: dict[str, str] = {"hypovolemia": "hypovolaemia"}


def canonical_rule_id(rule_id: str) -> str:
    return RULE_ALIASES.get(rule_id, rule_id)


def canonical_alarm_id(alarm_id: str) -> str:
    """BED/RULE/STAMP with the rule's current id (an annotation may name an old one)."""
    parts = alarm_id.split("/")
    if len(parts) == 3 and parts[1] in RULE_ALIASES:
        parts[1] = RULE_ALIASES[parts[1]]
    return "/".join(parts)


# Serum results a rule can read (fields of the labs message).
Analyte = Literal[
    "serum_na_mmol_l", "serum_k_mmol_l", "serum_mg_mmol_l", "serum_phosphate_mmol_l",
    "serum_creatinine_umol_l",
]  # fmt: skip
# Episode markers a rule can be armed by (see context.Episode.marker).
Marker = Literal["obstruction_relieved", "catheter_inserted_for_retention", "catheter_inserted",
                 "catheter_changed"]  # fmt: skip


class _Check(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class HourlyAbove(_Check):
    """Rolling 60-min output above a threshold in N consecutive windows."""

    type: Literal["hourly_above"]
    threshold_ml_h: Annotated[float, Field(gt=0)]
    consecutive_hours: Annotated[int, Field(ge=1, le=12)] = 2
    # The published definition says "more than"; some references use "at least".
    comparator: Literal["gt", "ge"] = "gt"


class VolumeAbove(_Check):
    """Volume over a window above a threshold (high output: any coverage)."""

    type: Literal["volume_above"]
    window_h: Annotated[int, Field(ge=1, le=72)]
    threshold_ml: Annotated[float, Field(gt=0)]
    since_start_if_shorter: bool = True


class RateBelow(_Check):
    """Weight-based output below a threshold over a window (low output: covered only)."""

    type: Literal["rate_below"]
    window_h: Annotated[int, Field(ge=1, le=72)]
    threshold_ml_kg_h: Annotated[float, Field(gt=0, le=5)]
    # KDIGO does not say which; studies use both and they differ a lot.
    mode: Literal["mean", "every_hour"] = "mean"


class VolumeBelow(_Check):
    type: Literal["volume_below"]
    window_h: Annotated[int, Field(ge=1, le=72)]
    threshold_ml: Annotated[float, Field(ge=0)]


class FlowStopped(_Check):
    """No flow for a while after steady flow: suspect the catheter first."""

    type: Literal["flow_stopped"]
    stopped_min: Annotated[int, Field(ge=10, le=360)] = 60
    # at most this much counts as no flow (meter resolution and smoothing)
    max_ml: Annotated[float, Field(ge=0, le=20)] = 2.0
    before_min: Annotated[int, Field(ge=30, le=720)] = 120
    before_min_ml_kg_h: Annotated[float, Field(gt=0, le=5)] = 0.5
    # on a bed without a weight, the flow before the stop in mL/h
    before_min_ml_h: Annotated[float, Field(gt=0, le=500)] = 30.0


class MeterSilent(_Check):
    """A bound meter sent no usable reading for max(min_silence_s, periods × its period):
    silent, or sending only what fails (a blind meter)."""

    type: Literal["meter_silent"]
    min_silence_s: Annotated[int, Field(ge=60, le=86400)] = 300
    periods: Annotated[int, Field(ge=1, le=100)] = 5


class BagFull(_Check):
    """A meter's bag holds at least this share of its declared capacity: empty it before
    readings start failing as out of range."""

    type: Literal["bag_full"]
    fill_fraction: Annotated[float, Field(gt=0.5, le=1.0)] = 0.9


class NoUsableData(_Check):
    """No accepted reading on the bed for longer than a limit."""

    type: Literal["no_usable_data"]
    max_gap_s: Annotated[int, Field(ge=600, le=86400)] = 10800


class ReplacementRatio(_Check):
    """While a high-output alarm is on: documented intake vs output over a window."""

    type: Literal["replacement_ratio"]
    window_h: Annotated[int, Field(ge=1, le=24)]
    direction: Literal["below", "above"]
    ratio: Annotated[float, Field(gt=0, le=3)]
    min_output_ml: Annotated[float, Field(ge=0)] = 50.0


class Hypovolaemia(_Check):
    type: Literal["hypovolaemia"]
    hourly_above_ml: Annotated[float, Field(gt=0)] = 200.0
    shock_index_at_least: Annotated[float, Field(gt=0)] = 1.0
    map_below_mmhg: Annotated[float, Field(gt=0)] = 65.0
    heart_rate_above: Annotated[float, Field(gt=0)] = 100.0
    balance_window_h: Annotated[int, Field(ge=1, le=24)] = 6
    balance_below_ml_kg: Annotated[float, Field(lt=0)] = -15.0
    vitals_max_age_s: Annotated[int, Field(ge=60, le=86400)] = 3600
    # priority with a haemodynamic sign; `priority` of the rule applies without one
    priority_with_sign: Priority = Priority.HIGH


class LabAbove(_Check):
    """The latest result, while recent, above a threshold."""

    type: Literal["lab_above"]
    analyte: Analyte
    threshold: float
    max_age_s: Annotated[int, Field(ge=600, le=7 * 86400)] = 86400


class LabBelow(_Check):
    """The latest result, while recent, below a threshold."""

    type: Literal["lab_below"]
    analyte: Analyte
    threshold: float
    max_age_s: Annotated[int, Field(ge=600, le=7 * 86400)] = 86400
    # name a hypotonic replacement order on file in the page (its review is the point)
    review_hypotonic_order: bool = False


class LabRise(_Check):
    """The latest result above the lowest earlier one in the window by more than a limit."""

    type: Literal["lab_rise"]
    analyte: Analyte
    rise_above: Annotated[float, Field(gt=0)]
    window_h: Annotated[int, Field(ge=1, le=72)] = 24


class LabFall(_Check):
    """The latest result below the highest earlier one in the window by more than a limit."""

    type: Literal["lab_fall"]
    analyte: Analyte
    fall_above: Annotated[float, Field(gt=0)]
    window_h: Annotated[int, Field(ge=1, le=72)] = 24


class Reminder(_Check):
    """While a high-output condition holds: each analyte due every interval (a result of
    one analyte does not satisfy another)."""

    type: Literal["reminder"]
    every_s: Annotated[int, Field(ge=600, le=86400)]
    task: Annotated[str, Field(min_length=1, max_length=200)]
    analytes: Annotated[list[Analyte], Field(min_length=1)]


Check = Annotated[
    HourlyAbove
    | VolumeAbove
    | RateBelow
    | VolumeBelow
    | FlowStopped
    | MeterSilent
    | BagFull
    | NoUsableData
    | ReplacementRatio
    | Hypovolaemia
    | LabAbove
    | LabBelow
    | LabRise
    | LabFall
    | Reminder,
    Field(discriminator="type"),
]

WEIGHT_CHECKS = (RateBelow,)
LOW_OUTPUT_CHECKS = (RateBelow, VolumeBelow)


class EpisodeGate(BaseModel):
    """When a rule runs, by the bed's episode markers: only within `within_h` after one
    (post-obstructive rules), or only without one in that span (generic high output)."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    armed: Literal["with_marker", "without_marker"]
    markers: Annotated[list[Marker], Field(min_length=1)]
    within_h: Annotated[int, Field(ge=1, le=14 * 24)] = 72


class RuleDef(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)

    schema_version: Literal[1] = Field(1, alias="schema")
    id: Annotated[str, Field(pattern=RULE_ID)]
    title: Annotated[str, Field(min_length=3, max_length=120)]
    kind: Kind
    priority: Priority
    rationale: Annotated[str, Field(min_length=10)]  # IEC 60601-1-8: urgency × potential harm
    source: Annotated[str, Field(min_length=3)]
    latching: bool
    condition_delay_s: Annotated[int, Field(ge=0, le=86400)] = 0
    clear_hold_s: Annotated[int, Field(ge=0, le=86400)] = 0
    enabled: bool = True
    # rules that only run while the condition of one of these rules holds on the bed
    while_active: list[str] = Field(default_factory=list)
    # armed by the bed's episode markers (e.g. an obstruction relieved), or always
    episode: EpisodeGate | None = None
    # roles paged with every page of this rule's alarm, besides the escalation policy's
    also_notify: list[Role] = Field(default_factory=list)
    # while this rule's condition holds, the bed gets replacement advice every hour
    replacement_advice: bool = False
    # how long an acknowledgement holds before a persisting condition re-activates the
    # alarm; absent: the service's (60 min). Longer for conditions that change slowly.
    ack_valid_s: Annotated[int, Field(ge=300, le=86400)] | None = None
    check: Check

    @model_validator(mode="before")
    @classmethod
    def _old_names(cls, data: Any) -> Any:
        """Old spellings in a rule file (see RULE_ALIASES) read as the current ones."""
        if not isinstance(data, dict):
            return data
        data = dict(data)
        if isinstance(data.get("id"), str):
            data["id"] = canonical_rule_id(data["id"])
        if isinstance(data.get("while_active"), list):
            data["while_active"] = [canonical_rule_id(x) if isinstance(x, str) else x
                                    for x in data["while_active"]]  # fmt: skip
        check = data.get("check")
        if isinstance(check, dict) and check.get("type") in CHECK_ALIASES:
            data["check"] = check | {"type": CHECK_ALIASES[check["type"]]}
        return data

    @model_validator(mode="after")
    def _consistent(self) -> RuleDef:
        if isinstance(self.check, ReplacementRatio | Reminder) and not self.while_active:
            raise ValueError(f"check '{self.check.type}' needs 'while_active'")
        return self

    @property
    def needs_weight(self) -> bool:
        return isinstance(self.check, WEIGHT_CHECKS)

    @property
    def low_output(self) -> bool:
        return isinstance(self.check, LOW_OUTPUT_CHECKS)

    def spec(self) -> RuleSpec:
        return RuleSpec(
            rule_id=self.id,
            title=self.title,
            kind=self.kind,
            priority=self.priority,
            latching=self.latching,
            condition_delay_s=self.condition_delay_s,
            clear_hold_s=self.clear_hold_s,
            low_output=self.low_output,
            also_notify=tuple(self.also_notify),
            ack_valid_s=self.ack_valid_s,
        )


DEFAULT_RULE_IDS = (
    "pod-hourly",
    "pod-24h",
    "oliguria-kdigo-1",
    "oliguria-kdigo-2",
    "oliguria-kdigo-3",
    "anuria-12h",
    "flow-stopped",
    "meter-offline",
    "data-gap",
    "bag-full",
    "replacement-behind",
    "replacement-excess",
    "hypovolaemia-risk",
    "sodium-high",
    "sodium-rise",
    "sodium-low",
    "sodium-fall",
    "potassium-low",
    "magnesium-low",
    "phosphate-low",
    "labs-due",
    "high-output",
    "high-output-24h",
    "catheter-clamp-review",
)
