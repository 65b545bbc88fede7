"""Replacement advice for a high-output (post-obstructive diuresis) bed.

At each completed clock hour: a suggested replacement rate that is a fraction of
that hour's output (50-75% by default, never above 100%: over-replacement keeps
the diuresis going), its sodium and free-water content, and, with the labs and a
weight, the projected change in serum sodium over the next hour (Adrogué-Madias).

Pure arithmetic. Implausible inputs raise ValueError with a message; the engine
turns that into an outcome with a reason. Every Advice carries CAUTION: it is a
suggestion for the treating clinician, never an order.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Annotated

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from .timefmt import iso

CAUTION = (
    "Decision support only: a suggestion for the treating clinician, to be checked "
    "against local protocol and licensed practice before anything is given."
)
_SHORT_CAUTION = "Suggestion for the treating clinician; check local protocol."
_TINY_CAUTION = "For treating clinician; check local protocol."
SUMMARY_MAX = 160  # one pager line

# Isotonic reference for "free water": 0.9% NaCl (Na 154) counts as 0% free water,
# so 0.45% NaCl (Na 77) is 50% free water, as on the reference sheet (derived).
ISOTONIC_NA_K = 154.0

HYPERNATRAEMIA_ABOVE = 145.0  # serum Na > 145 mmol/L (Adrogué & Madias, NEJM 2000)
DAILY_NA_CHANGE_LIMIT = 10.0  # mmol/L per 24 h (Adrogué & Madias 2000; Verbalis 2013)

# Plausibility bounds (ours): outside them a value is a unit or typing error.
SERUM_NA_RANGE = (100.0, 200.0)  # mmol/L
URINE_ELECTROLYTE_MAX = 500.0  # mmol/L, for urine Na and for urine K
WEIGHT_MAX_KG = 400.0  # same bound as the bed context
# No kidney makes more urine than it filters: a normal GFR of ~125 mL/min is
# ~7.5 L/h (from memory), so 10 L in one hour can only be a data error.
HOUR_OUTPUT_MAX_ML = 10_000.0


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


FLUIDS: dict[str, Fluid] = {
    # Na 77 mmol/L: composition of half-normal saline (CLINICAL-REFERENCE §5)
    "0.45% NaCl": Fluid("0.45% NaCl", 77.0),
    # Na 154 mmol/L: FPnotebook; calculator tables (CLINICAL-REFERENCE §5)
    "0.9% NaCl": Fluid("0.9% NaCl", 154.0),
    # Na 130 mmol/L (CLINICAL-REFERENCE §5); K 4 mmol/L from memory (usual label composition)
    "Lactated Ringer's": Fluid("Lactated Ringer's", 130.0, 4.0),
}
DEFAULT_FLUID = "0.45% NaCl"


class ReplacementOrder(BaseModel):
    """The clinician's order for one bed: fraction range of last hour's output, and fluid."""

    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)

    fraction_low: Annotated[float, Field(description="lowest share of output, 0-1")] = 0.5
    fraction_high: Annotated[float, Field(description="highest share of output, 0-1")] = 0.75
    fluid: str = DEFAULT_FLUID

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
    daily_limit: float = DAILY_NA_CHANGE_LIMIT

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
class Advice:
    hour_start: float  # epoch seconds UTC of the completed clock hour's start
    hour_output_ml: float
    rate_low_ml_h: float
    rate_high_ml_h: float
    fluid: str
    sodium_mmol_h: tuple[float, float]
    free_water_ml_h: tuple[float, float]
    notes: tuple[str, ...]
    projection: SodiumProjection | None
    caution: str
    tonicity_review: bool = False  # serum Na above 145: review fluid tonicity

    @property
    def summary(self) -> str:
        """One plain line for a pager, at most SUMMARY_MAX characters: the first of
        a verbose and two compact wordings that fits."""
        out = _whole(self.hour_output_ml)
        exceeds = self.projection is not None and self.projection.exceeds_daily_limit
        limit = f"{self.projection.daily_limit:g}" if self.projection is not None else ""
        long_flags = (
            " Na >145: review tonicity with prescriber." if self.tonicity_review else ""
        ) + (f" Projected Na change >{limit} mmol/L/24 h." if exceeds else "")
        short_flags = (" Na>145: review tonicity." if self.tonicity_review else "") + (
            f" Na change >{limit}/24h." if exceeds else ""
        )
        if self.rate_high_ml_h <= 0:
            candidates = [
                f"No urine in last hour ({out} mL): no replacement suggested."
                f"{long_flags} {_SHORT_CAUTION}",
                f"No urine last hour: no replacement.{short_flags} {_TINY_CAUTION}",
            ]
        else:
            low, high = _whole(self.rate_low_ml_h), _whole(self.rate_high_ml_h)
            rate = f"{low}" if low == high else f"{low}–{high}"
            p_low = _whole(100 * self.rate_low_ml_h / self.hour_output_ml)
            p_high = _whole(100 * self.rate_high_ml_h / self.hour_output_ml)
            share = f"{p_low}%" if p_low == p_high else f"{p_low}–{p_high}%"
            candidates = [
                f"Suggested replacement {rate} mL/h of {self.fluid} "
                f"({share} of last hour's {out} mL).{long_flags} {_SHORT_CAUTION}",
                f"Replace {rate} mL/h {self.fluid} ({share} of {out} mL last h)."
                f"{short_flags} {_TINY_CAUTION}",
                f"Replace {rate} mL/h {self.fluid}.{short_flags} {_TINY_CAUTION}",
                # flags dropped before the caution ever is; fluid names are short, known ones
                f"Replace {rate} mL/h {self.fluid}. {_TINY_CAUTION}",
            ]
        return next((t for t in candidates if len(t) <= SUMMARY_MAX), candidates[-1])

    def to_json(self) -> dict[str, object]:
        return {
            "hour_start": iso(self.hour_start),
            "hour_output_ml": _r(self.hour_output_ml),
            "rate_ml_h": [_r(self.rate_low_ml_h), _r(self.rate_high_ml_h)],
            "fluid": self.fluid,
            "sodium_mmol_h": [_r(v) for v in self.sodium_mmol_h],
            "free_water_ml_h": [_r(v) for v in self.free_water_ml_h],
            "tonicity_review": self.tonicity_review,
            "notes": list(self.notes),
            "projection": None if self.projection is None else self.projection.to_json(),
            "summary": self.summary,
            "caution": self.caution,
        }


def _r(value: float) -> float:
    return round(value, 2)


def _whole(value: float) -> int:
    """Round half up for display (115.5 -> 116), unlike round()'s half-to-even."""
    return math.floor(value + 0.5)


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
    daily_limit: float = DAILY_NA_CHANGE_LIMIT,
) -> Advice:
    """Advice for the next hour from the last completed clock hour's output."""
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
    if not (math.isfinite(daily_limit) and daily_limit > 0):
        raise ValueError(f"daily sodium-change limit must be above 0, got {daily_limit!r}")
    fluid = FLUIDS[order.fluid]

    rate_low = low_f * hour_output_ml
    rate_high = high_f * hour_output_ml
    notes: list[str] = []
    if rate_high <= 0:
        notes.append("No urine output in the last clock hour: nothing to replace.")

    tonicity = False
    if serum_na is not None:
        _serum_na(serum_na)
        if serum_na > HYPERNATRAEMIA_ABOVE:
            tonicity = True
            notes.append(
                f"Serum sodium {serum_na:g} mmol/L is above {HYPERNATRAEMIA_ABOVE:g}: "
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
    if (
        serum_na is not None
        and urine_na is not None
        and urine_k is not None
        and weight_kg is not None
    ):
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
            exceeds_daily_limit=worst > daily_limit,
            daily_limit=daily_limit,
        )
        notes.append(
            f"Projected serum sodium change next hour {net_low:+.2f} to {net_high:+.2f} mmol/L "
            "(Adrogué-Madias, linear estimate)."
        )
        if projection.exceeds_daily_limit:
            notes.append(
                f"At this rate serum sodium would change by more than {daily_limit:g} mmol/L "
                "in 24 h: review the replacement plan with the prescriber."
            )
    elif serum_na is not None or urine_na is not None or urine_k is not None:
        notes.append(f"No sodium projection: missing {', '.join(missing)}.")

    return Advice(
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
    )
