"""Load rule files and the escalation policy from a folder (shell side)."""

from __future__ import annotations

from pathlib import Path

from pydantic import ValidationError

from .engine.advice import AdvicePolicy
from .engine.escalation import EscalationPolicy, load_policy_text
from .engine.rules import RuleDef, canonical_rule_id
from .errors import UserError, describe_validation, read_text, read_toml

BUNDLED = Path(__file__).resolve().parent.parent / "alert_rules"
POLICY_FILE = "escalation.toml"
ADVICE_FILE = "advice.toml"
NOT_RULES = (POLICY_FILE, ADVICE_FILE)


def load_rule(path: Path) -> RuleDef:
    try:
        rule = RuleDef.model_validate(read_toml(path))
    except ValidationError as exc:
        raise UserError(describe_validation(path, exc)) from None
    if rule.id != canonical_rule_id(path.stem):
        raise UserError(f"{path}: id: {rule.id!r} must match the file name {path.stem!r}")
    return rule


def load_rules(folder: Path | None = None) -> list[RuleDef]:
    folder = folder or BUNDLED
    if not folder.is_dir():
        raise UserError(f"{folder}: no such rule folder")
    rules = [load_rule(f) for f in sorted(folder.glob("*.toml")) if f.name not in NOT_RULES]
    if not rules:
        raise UserError(f"{folder}: holds no rule file")
    ids = {r.id for r in rules}
    roles = _policy_roles(load_policy(folder))
    for rule in rules:
        where = folder / (rule.id + ".toml")
        missing = [g for g in rule.while_active if g not in ids]
        if missing:
            raise UserError(f"{where}: while_active: unknown rule {missing[0]!r}")
        unknown = [r for r in rule.also_notify if r not in roles]
        if unknown:
            raise UserError(
                f"{where}: also_notify: role {unknown[0]!r} is not in the escalation policy "
                f"(roles: {', '.join(sorted(roles))})"
            )
    return rules


def _policy_roles(policy: EscalationPolicy) -> set[str]:
    return {role for p in (policy.high, policy.medium, policy.low, policy.info)
            for tier in p.tiers for role in tier.roles}  # fmt: skip


def load_advice(folder: Path | None = None) -> AdvicePolicy:
    """The advice limits of a rule folder; a folder without the file uses the shipped one."""
    path = (folder or BUNDLED) / ADVICE_FILE
    if not path.is_file():
        path = BUNDLED / ADVICE_FILE
    try:
        return AdvicePolicy.model_validate(read_toml(path))
    except ValidationError as exc:
        raise UserError(describe_validation(path, exc)) from None


def load_policy(folder: Path | None = None) -> EscalationPolicy:
    path = (folder or BUNDLED) / POLICY_FILE
    if not path.is_file():
        path = BUNDLED / POLICY_FILE  # a rule folder without a policy uses the shipped one
    try:
        return load_policy_text(read_text(path), str(path))
    except ValueError as exc:
        raise UserError(str(exc).splitlines()[0]) from None
