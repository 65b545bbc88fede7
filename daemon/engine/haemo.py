"""Haemodynamic helpers for the hypovolaemia-risk rule: shock index and cuff MAP.

Pure arithmetic. Implausible inputs raise ValueError with a message; the engine
turns that into an outcome with a reason instead of letting it escape.
"""

from __future__ import annotations

import math
from typing import Literal

ShockClass = Literal["none", "mild", "moderate", "severe"]

# Shock-index class lower bounds (Mutschler M et al., Crit Care 2013;17:R172):
# <0.6 none, 0.6-<1.0 mild, 1.0-<1.4 moderate, >=1.4 severe. Rady 1994 calls
# 0.5-0.7 normal, so "mild" here overlaps what some texts call normal.
SI_MILD = 0.6
SI_MODERATE = 1.0
SI_SEVERE = 1.4

# Initial MAP target in septic shock (Surviving Sepsis Campaign 2021): below it is hypotension.
MAP_TARGET_MMHG = 65.0

# Plausibility bounds for a charted value (ours): outside them the number is a
# typing or device error, not physiology to reason about.
HR_MAX_PER_MIN = 300.0
BP_MAX_MMHG = 300.0


def _check(name: str, value: float, upper: float, unit: str) -> None:
    if not math.isfinite(value) or value <= 0 or value > upper:
        raise ValueError(f"{name} must be above 0 and at most {upper:g} {unit}, got {value!r}")


def shock_index(hr: float, sbp: float) -> float:
    """Heart rate (/min) divided by systolic pressure (mmHg)."""
    _check("heart rate", hr, HR_MAX_PER_MIN, "/min")
    _check("systolic pressure", sbp, BP_MAX_MMHG, "mmHg")
    return hr / sbp


def shock_index_class(si: float) -> ShockClass:
    """Mutschler 2013 class; each boundary belongs to the higher class."""
    if not math.isfinite(si) or si < 0:
        raise ValueError(f"shock index must be a finite number >= 0, got {si!r}")
    if si >= SI_SEVERE:
        return "severe"
    if si >= SI_MODERATE:
        return "moderate"
    if si >= SI_MILD:
        return "mild"
    return "none"


def mean_arterial_pressure(sbp: float, dbp: float) -> float:
    """Cuff estimate DBP + (SBP - DBP)/3, for when the monitor sends no mean."""
    _check("systolic pressure", sbp, BP_MAX_MMHG, "mmHg")
    _check("diastolic pressure", dbp, BP_MAX_MMHG, "mmHg")
    if dbp > sbp:
        raise ValueError(f"diastolic pressure {dbp:g} is above systolic {sbp:g} mmHg")
    return dbp + (sbp - dbp) / 3.0


def map_below_target(map_mmhg: float, target: float = MAP_TARGET_MMHG) -> bool:
    """True when the mean pressure is under the target (strictly: 65 itself meets it)."""
    if not math.isfinite(map_mmhg) or map_mmhg <= 0:
        raise ValueError(
            f"mean arterial pressure must be a finite number above 0, got {map_mmhg!r}"
        )
    return map_mmhg < target
