"""Validate an inbound message as JSON means it: numbers are JSON numbers, strings are
JSON strings. A string that looks like a number ("150") is refused, never converted.

pydantic's strict mode on JSON input does exactly this (and still reads ISO-8601 text
as a time), so every message model is validated through its JSON form. The models stay
the single source of truth; strictness is how they are applied to the wire.
"""

from __future__ import annotations

import json
from typing import Any, TypeVar

from pydantic import BaseModel, ValidationError

M = TypeVar("M", bound=BaseModel)


class NotJson(ValueError):
    """The payload is not JSON (or not text)."""


def validate(model: type[M], payload: bytes | str | dict[str, Any] | list[Any]) -> M:
    """The model from a JSON payload, strictly. Raises ValidationError or NotJson."""
    if isinstance(payload, bytes | str):
        text: bytes | str = payload
    else:  # a log record's payload, already parsed: write it back as JSON
        try:
            text = json.dumps(payload, allow_nan=False)
        except (ValueError, TypeError, RecursionError) as exc:
            raise NotJson(str(exc)) from None
    try:
        return model.model_validate_json(text, strict=True)
    except ValidationError as exc:
        if exc.errors()[0]["type"] == "json_invalid":
            raise NotJson("payload is not JSON") from None
        raise


def first_error(exc: ValidationError) -> str:
    """The first problem as 'field: message', never quoting the input: a refused
    message may carry fields that must not reach a log (an unexpected field's name is
    not repeated either, since a name can be content too)."""
    err = exc.errors(include_url=False, include_input=False)[0]
    if err["type"] == "extra_forbidden":
        return "unexpected field (not shown)"
    where = ".".join(str(x) for x in err["loc"]) or "payload"
    return f"{where}: {err['msg']}"[:200]
