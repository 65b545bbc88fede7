"""Replacement advice while a post-obstructive diuresis criterion is met (DESIGN §6).

Advice follows a clinician's replacement order on file; there is no default order.
At each completed clock hour, and whenever what it may say changes, the engine asks
`advise` what to tell the nurse:

- no order on file: the hour's output, and that no order is on file (no fluid, no rate);
- signs of hypovolaemia: no rate at all (resuscitation is the clinician's call);
- a hypotonic fluid ordered while serum sodium is unknown, stale or below range: no
  hypotonic rate; the physician is asked to review the order;
- otherwise the ordered fraction (never above 100%) of that hour's output, capped at
  the order's maximum rate, with its sodium and free-water content and, with the labs
  and a weight, the projected change in serum sodium (Adrogué-Madias).

When the criterion is no longer met, one last message says so (`ended_advice`).
Pure arithmetic; implausible inputs raise ValueError, which the engine turns into an
outcome. Every Advice carries CAUTION: a suggestion for the treating clinician.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from enum import StrEnum
from typing import Annotated, Literal

from pydantic import AwareDatetime, BaseModel, ConfigDict, Field, field_validator, model_validator

from .numbers import half_up, ml, num, span
from .timefmt import hhmm_utc, iso

CAUTION = (
    "Decision support only: a suggestion for the treating clinician, to be checked "
    "against local protocol and licensed practice before anything is given."
)
SHORT_CAUTION = "Suggestion for the treating clinician; check local protocol."
TINY_CAUTION = "For treating clinician; check local protocol."
SUMMARY_MAX = 160  # one pager line

# Isotonic reference for "free water": 0.9% NaCl (Na 154) counts as 0% free water,
# so 0.45% NaCl (Na 77) is 50% free water, as on the reference sheet (derived).
ISOTONIC_NA_K = 154.0

# Plausibility bounds (ours): outside them a value is a unit or typing error.
SERUM_NA_RANGE = (100.0, 200.0)  # mmol/L
URINE_ELECTROLYTE_MAX = 500.0  # mmol/L, for urine Na and for urine K
WEIGHT_MAX_KG = 400.0  # same bound as the bed context
# No kidney makes more urine than it filters: a normal GFR of ~125 mL/min is
# ~7.5 L/h (from memory), so 10 L in one hour can only be a data error.
HOUR_OUTPUT_MAX_ML = 10_000.0
RATE_MAX_ML_H = 2000.0  # an ordered maximum above this is a typing error (ours)


class AdvicePolicy(BaseModel):
    """`alert_rules/advice.toml`: the limits the advice applies (every number sourced
    in that file)."""

    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)

    schema_version: Literal[1] = Field(1, alias="schema")
    # a serum sodium older than this is stale: no hypotonic rate on it
    sodium_max_age_s: Annotated[int, Field(ge=3600, le=7 * 86400)] = 12 * 3600
    sodium_low_below: Annotated[float, Field(ge=110, le=145)] = 135.0
    sodium_high_above: Annotated[float, Field(ge=135, le=170)] = 145.0
    daily_na_change_limit: Annotated[float, Field(gt=0, le=30)] = 10.0
    # a fluid whose Na + K is below this is hypotonic (resuscitation crystalloids: 130-154)
    hypotonic_below_na_k: Annotated[float, Field(ge=50, le=154)] = 130.0
    # a criterion counts as ended (advice and the replacement rules stop) once it has
    # stayed unmet this long
    criterion_end_hold_s: Annotated[int, Field(ge=0, le=6 * 3600)] = 3600

    @model_validator(mode="after")
    def _range(self) -> AdvicePolicy:
        if self.sodium_low_below >= self.sodium_high_above:
            raise ValueError("sodium_low_below must be below sodium_high_above")
        return self


DEFAULT_POLICY = AdvicePolicy()


@dataclass(frozen=True)
class Fluid:
    name: str
    na_mmol_l: float
    k_mmol_l: float = 0.0

    def __post_init__(self) -> None:
        if not (0 <= self.na_mmol_l <= 1000 and 0 <= self.k_mmol_l <= 1000):
            raise ValueError(f"fluid {self.name!r}: electrolyte content out of range")

    @property
    def free_water_fraction(self) -> float:
        """Share of each litre that is electrolyte-free water, relative to 0.9% NaCl."""
        return max(0.0, 1.0 - (self.na_mmol_l + self.k_mmol_l) / ISOTONIC_NA_K)

    def hypotonic(self, policy: AdvicePolicy = DEFAULT_POLICY) -> bool:
        return self.na_mmol_l + self.k_mmol_l < policy.hypotonic_below_na_k


FLUIDS: dict[str, Fluid] = {
    # Na 77 mmol/L: composition of half-normal saline (CLINICAL-REFERENCE §5)
    "0.45% NaCl": Fluid("0.45% NaCl", 77.0),
    # Na 154 mmol/L: FPnotebook; calculator tables (CLINICAL-REFERENCE §5)
    "0.9% NaCl": Fluid("0.9% NaCl", 154.0),
    # Na 130 mmol/L (CLINICAL-REFERENCE §5); K 4 mmol/L from memory (usual label composition)
    "Lactated Ringer's": Fluid("Lactated Ringer's", 130.0, 4.0),
}


class ReplacementOrder(BaseModel):
    """A clinician's replacement order for one bed, carried in the bed context."""

    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)

    fraction_low: Annotated[float, Field(description="lowest share of output, 0-1")]
    fraction_high: Annotated[float, Field(description="highest share of output, 0-1")]
    fluid: str
    max_rate_ml_h: Annotated[float, Field(gt=0, le=RATE_MAX_ML_H)] | None = None
    ordered_by: Annotated[str, Field(min_length=1, max_length=64)]
    ordered_at: AwareDatetime

    @field_validator("fraction_low", "fraction_high")
    @classmethod
    def _fraction(cls, value: float) -> float:
        if value > 1.0:
            raise ValueError(
                f"replacement fraction {value:g} is above 1.0 (100% of output); replacing "
                "more than is lost prolongs the diuresis. Give fractions as 0-1, e.g. 0.5 for 50%"
            )
        if value <= 0.0:
            raise ValueError(f"replacement fraction must be above 0, got {value:g}")
        return value

    @field_validator("fluid")
    @classmethod
    def _known_fluid(cls, value: str) -> str:
        if value not in FLUIDS:
            raise ValueError(f"unknown fluid {value!r}; known: {', '.join(sorted(FLUIDS))}")
        return value

    @model_validator(mode="after")
    def _ordered(self) -> ReplacementOrder:
        if self.fraction_low > self.fraction_high:
            raise ValueError(
                f"fraction_low {self.fraction_low:g} is above fraction_high {self.fraction_high:g}"
            )
        return self

    def to_json(self) -> dict[str, object]:
        return {
            "fraction": [self.fraction_low, self.fraction_high],
            "fluid": self.fluid,
            "max_rate_ml_h": self.max_rate_ml_h,
            "ordered_by": self.ordered_by,
            "ordered_at": iso(self.ordered_at.timestamp()),
        }


class AdviceKind(StrEnum):
    RATE = "rate"  # a suggested rate of the ordered fluid
    NO_ORDER = "no_order"  # the numbers only: no replacement order on file
    HELD_CIRCULATION = "held_circulation"  # signs of hypovolaemia: no rate at all
    HELD_SODIUM = "held_sodium"  # hypotonic fluid ordered, sodium low, unknown or stale
    ENDED = "ended"  # the criterion is no longer met: prompts end, review the order


# Kinds after which the engine keeps prompting every completed hour.
PROMPTING = frozenset(AdviceKind) - {AdviceKind.ENDED}


@dataclass(frozen=True)
class SodiumProjection:
    """Projected change in serum Na (mmol/L) over the next hour, if the next hour
    loses the same urine and the suggested replacement (low / high end) is given."""

    tbw_l: float
    delta_from_loss: float
    delta_from_replacement_low: float
    delta_from_replacement_high: float
    net_low: float
    net_high: float
    exceeds_daily_limit: bool
    daily_limit: float = 10.0

    @property
    def per_24h_low(self) -> float:
        return self.net_low * 24.0

    @property
    def per_24h_high(self) -> float:
        return self.net_high * 24.0

    def to_json(self) -> dict[str, object]:
        return {
            "tbw_l": _r(self.tbw_l),
            "delta_from_loss_mmol_l": _r(self.delta_from_loss),
            "delta_from_replacement_mmol_l": [
                _r(self.delta_from_replacement_low),
                _r(self.delta_from_replacement_high),
            ],
            "net_per_hour_mmol_l": [_r(self.net_low), _r(self.net_high)],
            "net_per_24h_mmol_l": [_r(self.per_24h_low), _r(self.per_24h_high)],
            "daily_limit_mmol_l": self.daily_limit,
            "exceeds_daily_limit": self.exceeds_daily_limit,
        }


@dataclass(frozen=True)
class Sodium:
    """A serum sodium result: value (mmol/L) and the time it was taken (epoch s)."""

    value: float
    time: float


@dataclass(frozen=True)
class Advice:
    kind: AdviceKind
    hour_start: float  # epoch seconds UTC of the completed clock hour's start
    hour_output_ml: float  # without any residual bladder volume drained in it
    notes: tuple[str, ...]
    caution: str
    rate_low_ml_h: float | None = None  # None: no rate suggested
    rate_high_ml_h: float | None = None
    fluid: str | None = None  # named only with a rate, under an order
    sodium_mmol_h: tuple[float, float] | None = None
    free_water_ml_h: tuple[float, float] | None = None
    projection: SodiumProjection | None = None
    tonicity_review: bool = False  # serum Na above range: review fluid tonicity
    order: ReplacementOrder | None = None
    serum_na: Sodium | None = None  # the result the advice used, if any
    capped: bool = False  # the rate was cut to the order's maximum
    residual_ml: float = 0.0  # retained bladder volume drained in the hour, not counted
    reason: str = ""  # short words for the kinds without a rate

    @property
    def share(self) -> tuple[float, float] | None:
        if self.rate_low_ml_h is None or self.rate_high_ml_h is None or self.hour_output_ml <= 0:
            return None
        return (100 * self.rate_low_ml_h / self.hour_output_ml,
                100 * self.rate_high_ml_h / self.hour_output_ml)  # fmt: skip

    @property
    def summary(self) -> str:
        """One plain line, at most SUMMARY_MAX characters: the first of a verbose and
        compact wordings that fits. The caution is never the part dropped."""
        out = ml(self.hour_output_ml)
        k = self.kind
        if k is AdviceKind.NO_ORDER:
            candidates = [
                f"Last hour {out}. No replacement order on file: no fluid or rate suggested; "
                f"physician to decide. {SHORT_CAUTION}",
                f"Last hour {out}. No replacement order on file. {TINY_CAUTION}",
            ]
        elif k is AdviceKind.HELD_CIRCULATION:
            candidates = [
                f"Last hour {out} with signs of hypovolaemia: no replacement rate suggested; "
                f"assess volume status, resuscitation per clinician. {TINY_CAUTION}",
                f"Signs of hypovolaemia: no replacement rate; assess volume status. {TINY_CAUTION}",
            ]
        elif k is AdviceKind.HELD_SODIUM:
            candidates = [
                f"Last hour {out}. {self.reason}: no hypotonic replacement suggested; "
                f"physician to review the order. {TINY_CAUTION}",
                f"{self.reason}: no hypotonic replacement; review the order. {TINY_CAUTION}",
                f"No hypotonic replacement: review the order. {TINY_CAUTION}",
            ]
        elif k is AdviceKind.ENDED:
            candidates = [
                f"Output back under the criterion (last hour {out}): no further replacement "
                f"prompts; review the replacement order. {TINY_CAUTION}",
                f"Output back under the criterion: review the replacement order. {TINY_CAUTION}",
            ]
        else:
            candidates = self._rate_candidates(out)
        return next((t for t in candidates if len(t) <= SUMMARY_MAX), candidates[-1])

    def _rate_candidates(self, out: str) -> list[str]:
        assert self.rate_low_ml_h is not None and self.rate_high_ml_h is not None
        p = self.projection
        exceeds = p is not None and p.exceeds_daily_limit
        limit = num(p.daily_limit) if p is not None else ""
        long_flags = (" Na above range: review tonicity with prescriber."
                      if self.tonicity_review else "") + (
            f" Projected Na change >{limit} mmol/L/24 h." if exceeds else "")  # fmt: skip
        short_flags = (" Review tonicity." if self.tonicity_review else "") + (
            f" Na change >{limit}/24h." if exceeds else ""
        )
        if self.rate_high_ml_h <= 0:
            return [
                f"No urine in last hour ({out}): nothing to replace.{long_flags} {SHORT_CAUTION}",
                f"No urine last hour: nothing to replace.{short_flags} {TINY_CAUTION}",
            ]
        rate = span(self.rate_low_ml_h, self.rate_high_ml_h)
        share = self.share
        pct = f"{span(*share)}%" if share is not None else ""
        cap, short_cap = ("; the order's maximum", ", its max") if self.capped else ("", "")
        return [
            f"Suggested replacement {rate} mL/h of {self.fluid} ({pct} of last hour's "
            f"{out}, per order on file{cap}).{long_flags} {SHORT_CAUTION}",
            f"Suggest {rate} mL/h {self.fluid} ({pct} of {out} last h, per order{short_cap})."
            f"{short_flags} {TINY_CAUTION}",
            f"Suggest {rate} mL/h {self.fluid} per order.{short_flags} {TINY_CAUTION}",
            # flags dropped before the caution ever is; fluid names are short, known ones
            f"Suggest {rate} mL/h {self.fluid} per order. {TINY_CAUTION}",
        ]

    @property
    def pager_tail(self) -> str:
        """The few words an alarm page carries about the advice (no caution: the page
        ends with its own)."""
        k = self.kind
        if k is AdviceKind.RATE:
            if self.rate_high_ml_h is None or self.rate_high_ml_h <= 0:
                return "Nothing to replace."
            assert self.rate_low_ml_h is not None
            return f"Suggest {span(self.rate_low_ml_h, self.rate_high_ml_h)} mL/h " \
                   f"{self.fluid} per order."  # fmt: skip
        if k is AdviceKind.NO_ORDER:
            return "No replacement order on file."
        if k is AdviceKind.HELD_CIRCULATION:
            return "No replacement rate: signs of hypovolaemia."
        if k is AdviceKind.HELD_SODIUM:
            return "No hypotonic replacement: review order."
        return ""

    def to_json(self) -> dict[str, object]:
        rate = None
        if self.rate_low_ml_h is not None and self.rate_high_ml_h is not None:
            rate = (self.rate_low_ml_h, self.rate_high_ml_h)
        na = self.serum_na
        return {
            "kind": str(self.kind),
            "hour_start": iso(self.hour_start),
            "hour_output_ml": _r(self.hour_output_ml),
            "residual_ml": _r(self.residual_ml),
            "rate_ml_h": _pair(rate),
            "fluid": self.fluid,
            "capped": self.capped,
            "sodium_mmol_h": _pair(self.sodium_mmol_h),
            "free_water_ml_h": _pair(self.free_water_ml_h),
            "tonicity_review": self.tonicity_review,
            "order": None if self.order is None else self.order.to_json(),
            "serum_na": None if na is None else {"value": na.value, "time": iso(na.time)},
            "notes": list(self.notes),
            "projection": None if self.projection is None else self.projection.to_json(),
            "summary": self.summary,
            "pager": self.pager_tail,
            "caution": self.caution,
        }


def _r(value: float) -> float:
    return half_up(value, 2)


def _pair(values: tuple[float, float] | None) -> list[float] | None:
    return None if values is None else [_r(values[0]), _r(values[1])]


def _finite(name: str, value: float, low: float, high: float, unit: str) -> None:
    if not (math.isfinite(value) and low <= value <= high):
        raise ValueError(f"{name} must be within {low:g}-{high:g} {unit}, got {value!r}")


def _serum_na(value: float) -> None:
    _finite("serum sodium", value, *SERUM_NA_RANGE, "mmol/L")


def total_body_water(weight_kg: float, tbw_fraction: float = 0.6) -> float:
    """Litres; fraction 0.6 men, 0.5 women and elderly men, 0.45 elderly women."""
    if not (math.isfinite(weight_kg) and 0 < weight_kg <= WEIGHT_MAX_KG):
        raise ValueError(
            f"weight must be above 0 and at most {WEIGHT_MAX_KG:g} kg, got {weight_kg!r}"
        )
    if not (math.isfinite(tbw_fraction) and 0 < tbw_fraction < 1):
        raise ValueError(f"total-body-water fraction must be between 0 and 1, got {tbw_fraction!r}")
    return weight_kg * tbw_fraction


def delta_na_from_infusate(
    serum_na: float, tbw_l: float, fluid: Fluid, volume_l: float = 1.0
) -> float:
    """Adrogué-Madias: change in serum Na per litre infused = (Na_inf + K_inf - Na_s)/(TBW + 1).

    Other volumes scale the per-litre result linearly: the usual approximation,
    exact only for 1 L (the true effect is not linear in volume).
    """
    _serum_na(serum_na)
    if not (math.isfinite(tbw_l) and tbw_l > 0):
        raise ValueError(f"total body water must be above 0 L, got {tbw_l!r}")
    per_litre = (fluid.na_mmol_l + fluid.k_mmol_l - serum_na) / (tbw_l + 1.0)
    return per_litre * volume_l


def delta_na_from_loss(
    serum_na: float, tbw_l: float, urine_na: float, urine_k: float, volume_l: float = 1.0
) -> float:
    """Adrogué-Madias: change in serum Na per litre of urine lost = (Na_s - (Na_u + K_u))/(TBW - 1).

    Scaled linearly with the volume, as for the infusate (exact only for 1 L).
    """
    _serum_na(serum_na)
    _finite("urine sodium", urine_na, 0.0, URINE_ELECTROLYTE_MAX, "mmol/L")
    _finite("urine potassium", urine_k, 0.0, URINE_ELECTROLYTE_MAX, "mmol/L")
    if not (math.isfinite(tbw_l) and tbw_l > 1.0):
        # the formula divides by TBW - 1
        raise ValueError(f"total body water must be above 1 L for the loss formula, got {tbw_l!r}")
    per_litre = (serum_na - (urine_na + urine_k)) / (tbw_l - 1.0)
    return per_litre * volume_l


def water_deficit(tbw_l: float, serum_na: float) -> float:
    """Free-water deficit in litres, TBW x (Na/140 - 1); negative means no deficit."""
    if not (math.isfinite(tbw_l) and tbw_l > 0):
        raise ValueError(f"total body water must be above 0 L, got {tbw_l!r}")
    _serum_na(serum_na)
    return tbw_l * (serum_na / 140.0 - 1.0)


def replacement_advice(
    hour_start: float,
    hour_output_ml: float,
    order: ReplacementOrder,
    *,
    serum_na: float | None = None,
    urine_na: float | None = None,
    urine_k: float | None = None,
    weight_kg: float | None = None,
    tbw_fraction: float = 0.6,
    policy: AdvicePolicy = DEFAULT_POLICY,
    daily_limit: float | None = None,
) -> Advice:
    """The rate arithmetic under an order, from the last completed clock hour's output.
    `serum_na` is a recent result: `advise` decides whether a rate may be given at all."""
    if not math.isfinite(hour_start):
        raise ValueError(f"hour start must be a finite epoch time, got {hour_start!r}")
    _finite("hour output", hour_output_ml, 0.0, HOUR_OUTPUT_MAX_ML, "mL")
    # Re-check the order: a model built without validation must not slip past the cap.
    low_f, high_f = order.fraction_low, order.fraction_high
    if not (0.0 < low_f <= high_f <= 1.0):
        raise ValueError(
            f"replacement fractions must satisfy 0 < low <= high <= 1, got {low_f!r}, {high_f!r}"
        )
    if order.fluid not in FLUIDS:
        raise ValueError(f"unknown fluid {order.fluid!r}")
    limit = policy.daily_na_change_limit if daily_limit is None else daily_limit
    if not (math.isfinite(limit) and limit > 0):
        raise ValueError(f"daily sodium-change limit must be above 0, got {limit!r}")
    fluid = FLUIDS[order.fluid]

    rate_low, rate_high = low_f * hour_output_ml, high_f * hour_output_ml
    notes: list[str] = []
    capped = order.max_rate_ml_h is not None and rate_high > order.max_rate_ml_h
    if order.max_rate_ml_h is not None and capped:
        rate_low, rate_high = min(rate_low, order.max_rate_ml_h), order.max_rate_ml_h
        notes.append(f"Rate cut to the order's maximum of {num(order.max_rate_ml_h)} mL/h.")
    if rate_high <= 0:
        notes.append("No urine output in the last clock hour: nothing to replace.")

    tonicity = False
    if serum_na is not None:
        _serum_na(serum_na)
        if serum_na > policy.sodium_high_above:
            tonicity = True
            notes.append(
                f"Serum sodium {serum_na:g} mmol/L is above {policy.sodium_high_above:g}: "
                "review fluid tonicity with the prescriber."
            )

    projection: SodiumProjection | None = None
    missing = [
        name
        for name, value in (
            ("serum sodium", serum_na),
            ("urine sodium", urine_na),
            ("urine potassium", urine_k),
            ("body weight", weight_kg),
        )
        if value is None
    ]
    if serum_na is not None and urine_na is not None and urine_k is not None \
            and weight_kg is not None:  # fmt: skip
        tbw = total_body_water(weight_kg, tbw_fraction)
        loss = delta_na_from_loss(serum_na, tbw, urine_na, urine_k, hour_output_ml / 1000.0)
        rep_low = delta_na_from_infusate(serum_na, tbw, fluid, rate_low / 1000.0)
        rep_high = delta_na_from_infusate(serum_na, tbw, fluid, rate_high / 1000.0)
        net_low, net_high = loss + rep_low, loss + rep_high
        # Either direction counts: too fast a rise or too fast a fall of serum Na.
        worst = max(abs(net_low), abs(net_high)) * 24.0
        projection = SodiumProjection(
            tbw_l=tbw,
            delta_from_loss=loss,
            delta_from_replacement_low=rep_low,
            delta_from_replacement_high=rep_high,
            net_low=net_low,
            net_high=net_high,
            exceeds_daily_limit=worst > limit,
            daily_limit=limit,
        )
        notes.append(
            f"Projected serum sodium change next hour {_signed(net_low)} to "
            f"{_signed(net_high)} mmol/L (Adrogué-Madias, linear estimate)."
        )
        if projection.exceeds_daily_limit:
            notes.append(
                f"At this rate serum sodium would change by more than {limit:g} mmol/L "
                "in 24 h: review the replacement plan with the prescriber."
            )
    elif serum_na is not None or urine_na is not None or urine_k is not None:
        notes.append(f"No sodium projection: missing {', '.join(missing)}.")

    return Advice(
        kind=AdviceKind.RATE,
        hour_start=hour_start,
        hour_output_ml=hour_output_ml,
        rate_low_ml_h=rate_low,
        rate_high_ml_h=rate_high,
        fluid=fluid.name,
        sodium_mmol_h=(rate_low * fluid.na_mmol_l / 1000.0, rate_high * fluid.na_mmol_l / 1000.0),
        free_water_ml_h=(
            rate_low * fluid.free_water_fraction,
            rate_high * fluid.free_water_fraction,
        ),
        notes=tuple(notes),
        projection=projection,
        caution=CAUTION,
        tonicity_review=tonicity,
        order=order,
        capped=capped,
    )


def _signed(value: float) -> str:
    text = num(value, 2)
    return text if text.startswith("-") else f"+{text}"


def advise(
    hour_start: float,
    hour_output_ml: float,
    order: ReplacementOrder | None,
    now: float,
    *,
    sodium: Sodium | None = None,
    urine_na: float | None = None,
    urine_k: float | None = None,
    weight_kg: float | None = None,
    tbw_fraction: float = 0.6,
    hypovolaemia: str | None = None,
    residual_ml: float = 0.0,
    policy: AdvicePolicy = DEFAULT_POLICY,
    clock: Callable[[float], str] = hhmm_utc,
) -> Advice:
    """What to tell the nurse for the completed hour starting at `hour_start`, at `now`.

    `sodium` is the latest serum sodium result taken at or before `now`;
    `hypovolaemia` names the signs while the hypovolaemia condition holds (else None).
    """
    _finite("hour output", hour_output_ml, 0.0, HOUR_OUTPUT_MAX_ML, "mL")
    notes: list[str] = []
    if residual_ml > 0:
        notes.append(
            f"Residual drained: {ml(residual_ml)} of retained bladder content in this hour, "
            "not counted as output."
        )
    fresh = sodium is not None and now - sodium.time <= policy.sodium_max_age_s
    used = sodium if fresh else None

    def without_rate(kind: AdviceKind, reason: str, why: str) -> Advice:
        return Advice(kind, hour_start, hour_output_ml, (*notes, why), CAUTION, order=order,
                      serum_na=used, residual_ml=residual_ml, reason=reason)  # fmt: skip

    if order is None:
        return without_rate(AdviceKind.NO_ORDER, "No replacement order on file",
                            "No replacement order on file: no fluid or rate is suggested; the "
                            "physician decides whether and how to replace.")  # fmt: skip
    if order.ordered_at.timestamp() > now:
        starts = clock(order.ordered_at.timestamp())
        return without_rate(AdviceKind.NO_ORDER, "Replacement order not yet in effect",
                            f"The replacement order on file starts at {starts}: no rate "
                            "before then.")  # fmt: skip
    if hypovolaemia is not None:
        return without_rate(AdviceKind.HELD_CIRCULATION, "Signs of hypovolaemia",
                            f"Signs of hypovolaemia ({hypovolaemia}): no replacement rate is "
                            "suggested; assess volume status, resuscitation is the treating "
                            "clinician's decision.")  # fmt: skip
    fluid = FLUIDS[order.fluid]
    hours = policy.sodium_max_age_s / 3600
    if sodium is None:
        state, reason = "there is no serum sodium on file", "No serum sodium on file"
    elif not fresh:
        age = (now - sodium.time) / 3600
        state = (f"the latest serum sodium ({sodium.value:g} mmol/L) is {num(age, 1)} h old, "
                 f"older than {hours:g} h")  # fmt: skip
        reason = f"Serum sodium {num(age)} h old"
    elif sodium.value < policy.sodium_low_below:
        state = (f"serum sodium {sodium.value:g} mmol/L is below "
                 f"{policy.sodium_low_below:g}")  # fmt: skip
        reason = f"Serum sodium {sodium.value:g} mmol/L"
    else:
        state = reason = ""
    if state and fluid.hypotonic(policy):
        return without_rate(AdviceKind.HELD_SODIUM, reason,
                            f"A hypotonic fluid is ordered and {state}: no hypotonic "
                            "replacement is suggested; check serum sodium and ask the "
                            "physician to review the order.")  # fmt: skip
    advice = replacement_advice(
        hour_start, hour_output_ml, order, serum_na=used.value if used else None,
        urine_na=urine_na if used else None, urine_k=urine_k if used else None,
        weight_kg=weight_kg, tbw_fraction=tbw_fraction, policy=policy,
    )  # fmt: skip
    extra = [f"Note: {state}; the physician should review the order."] if state else []
    return Advice(
        advice.kind, hour_start, hour_output_ml, (*notes, *extra, *advice.notes), CAUTION,
        advice.rate_low_ml_h, advice.rate_high_ml_h, advice.fluid, advice.sodium_mmol_h,
        advice.free_water_ml_h, advice.projection, advice.tonicity_review, order, used,
        advice.capped, residual_ml,
    )  # fmt: skip


def ended_advice(
    hour_start: float, hour_output_ml: float, order: ReplacementOrder | None,
    residual_ml: float = 0.0,
) -> Advice:  # fmt: skip
    """The one message after the criterion stops being met: prompts end here."""
    return Advice(
        AdviceKind.ENDED, hour_start, hour_output_ml,
        ("Output is back under the criterion: no further replacement prompts. Review the "
         "replacement order with the prescriber.",), CAUTION, order=order,
        residual_ml=residual_ml,
    )  # fmt: skip
