"""User-facing errors: one clear line, never a traceback."""

from __future__ import annotations

import tomllib
from pathlib import Path
from typing import Any

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


def read_text(path: Path) -> str:
    """A UTF-8 file we read (a profile, a rule, the config); a byte-order mark, which an
    editor on a hospital workstation may add, means nothing and is skipped."""
    try:
        return path.read_text(encoding="utf-8-sig")
    except OSError as exc:
        raise UserError(f"{path}: cannot read: {exc.strerror}") from None
    except UnicodeDecodeError as exc:
        raise UserError(f"{path}: not valid TOML: {exc}") from None


def read_toml(path: Path) -> dict[str, Any]:
    """A TOML file as a table, or one line naming the file and what is wrong."""
    try:
        return tomllib.loads(read_text(path))
    except tomllib.TOMLDecodeError as exc:
        raise UserError(f"{path}: not valid TOML: {exc}") from None
