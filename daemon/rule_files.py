"""Load rule files and the escalation policy from a folder (shell side)."""

from __future__ import annotations

import tomllib
from pathlib import Path

from pydantic import ValidationError

from .engine.escalation import EscalationPolicy, load_policy_text
from .engine.rules import RuleDef
from .errors import UserError, describe_validation

BUNDLED = Path(__file__).resolve().parent.parent / "alert_rules"
POLICY_FILE = "escalation.toml"


def _toml(path: Path) -> dict[str, object]:
    try:
        return tomllib.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise UserError(f"{path}: cannot read: {exc.strerror}") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise UserError(f"{path}: not valid TOML: {exc}") from None


def load_rule(path: Path) -> RuleDef:
    try:
        rule = RuleDef.model_validate(_toml(path))
    except ValidationError as exc:
        raise UserError(describe_validation(path, exc)) from None
    if rule.id != path.stem:
        raise UserError(f"{path}: id: {rule.id!r} must match the file name {path.stem!r}")
    return rule


def load_rules(folder: Path | None = None) -> list[RuleDef]:
    folder = folder or BUNDLED
    if not folder.is_dir():
        raise UserError(f"{folder}: no such rule folder")
    rules = [load_rule(f) for f in sorted(folder.glob("*.toml")) if f.name != POLICY_FILE]
    if not rules:
        raise UserError(f"{folder}: holds no rule file")
    ids = {r.id for r in rules}
    for rule in rules:
        missing = [g for g in rule.while_active if g not in ids]
        if missing:
            raise UserError(
                f"{folder / (rule.id + '.toml')}: while_active: unknown rule {missing[0]!r}"
            )
    return rules


def load_policy(folder: Path | None = None) -> EscalationPolicy:
    path = (folder or BUNDLED) / POLICY_FILE
    if not path.is_file():
        path = BUNDLED / POLICY_FILE  # a rule folder without a policy uses the shipped one
    try:
        return load_policy_text(path.read_text(encoding="utf-8"), str(path))
    except OSError as exc:
        raise UserError(f"{path}: cannot read: {exc.strerror}") from None
    except ValueError as exc:
        raise UserError(str(exc).splitlines()[0]) from None
