"""User-facing errors: one clear line, never a traceback."""

from __future__ import annotations

from pathlib import Path

from pydantic import ValidationError


class UserError(Exception):
    """Bad input from the user (a file, an option). The CLI prints it and exits 2."""


def describe_validation(path: Path, exc: ValidationError) -> str:
    """'FILE: key.sub: message' for the first problem, and how many more there are."""
    errs = exc.errors()
    first = errs[0]
    key = ".".join(str(x) for x in first["loc"]) or "(top level)"
    msg = first["msg"].removeprefix("Value error, ")
    more = f" (and {len(errs) - 1} more)" if len(errs) > 1 else ""
    return f"{path}: {key}: {msg}{more}"
