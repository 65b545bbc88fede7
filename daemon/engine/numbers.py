"""The one way a number is rounded for a person to read.

Python's round() and format() round half to even on the binary value, so 172.5
reads 172 in one place and 173 in another, and 0.285 reads 0.28. Everything a
nurse or an engineer reads goes through `half_up` instead: the shortest decimal
that names the float (its repr), rounded half away from zero.
"""

from __future__ import annotations

import math
from decimal import ROUND_HALF_UP, Decimal

_STEPS = tuple(Decimal(1).scaleb(-d) for d in range(7))
_WHOLE = 2.0**52  # every float this large is an integer


def half_up(value: float, digits: int = 0) -> float:
    """`value` rounded half away from zero to `digits` decimals (0-6)."""
    if not math.isfinite(value) or abs(value) >= _WHOLE:
        return value  # a whole number already (and too long for the decimal context)
    return float(Decimal(repr(value)).quantize(_STEPS[digits], rounding=ROUND_HALF_UP))


def num(value: float, digits: int = 0) -> str:
    """Text of `value` rounded by `half_up`, with exactly `digits` decimals."""
    if not math.isfinite(value):
        return str(value)
    rounded = half_up(value, digits) or 0.0  # no "-0"
    return f"{rounded:.{digits}f}"


def ml(value: float) -> str:
    """A volume for a person: whole millilitres."""
    return f"{num(value)} mL"


def pct(fraction: float, digits: int = 0) -> str:
    """A share for a person: 0.9 -> '90%'."""
    return f"{num(100 * fraction, digits)}%"


def span(low: float, high: float, digits: int = 0) -> str:
    """'115–173', or one number when both ends read the same."""
    a, b = num(low, digits), num(high, digits)
    return a if a == b else f"{a}–{b}"
