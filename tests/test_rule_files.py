"""The shipped rule files (alert_rules/) and the errors a bad rule file gives.

Every default rule of DESIGN §4 ships as one TOML file named after its id, with a
rationale (IEC 60601-1-8: urgency x potential harm) and a source. A bad file gives
one line naming the file and the key, never a traceback.
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import pytest

from daemon.config import load_config
from daemon.engine.alarms import Kind, Priority
from daemon.engine.escalation import EscalationPolicy
from daemon.engine.rules import DEFAULT_RULE_IDS, RuleDef
from daemon.errors import UserError
from daemon.rule_files import BUNDLED, load_policy, load_rules

# DESIGN §4, written out here so that a renamed or dropped rule is noticed.
DESIGN_RULES: dict[str, tuple[Kind, Priority, bool]] = {
    # id: (kind, priority, latching)
    "pod-hourly": (Kind.PHYSIOLOGICAL, Priority.MEDIUM, True),
    "pod-24h": (Kind.PHYSIOLOGICAL, Priority.MEDIUM, True),
    "oliguria-kdigo-1": (Kind.PHYSIOLOGICAL, Priority.LOW, False),
    "oliguria-kdigo-2": (Kind.PHYSIOLOGICAL, Priority.MEDIUM, False),
    "oliguria-kdigo-3": (Kind.PHYSIOLOGICAL, Priority.HIGH, False),
    "anuria-12h": (Kind.PHYSIOLOGICAL, Priority.HIGH, False),
    "flow-stopped": (Kind.TECHNICAL, Priority.MEDIUM, False),
    "meter-offline": (Kind.TECHNICAL, Priority.LOW, False),
    "data-gap": (Kind.TECHNICAL, Priority.MEDIUM, False),
    "replacement-behind": (Kind.PHYSIOLOGICAL, Priority.MEDIUM, False),
    "replacement-excess": (Kind.ADVISORY, Priority.LOW, False),
    # medium without a haemodynamic sign; the check raises it to high with one
    "hypovolaemia-risk": (Kind.PHYSIOLOGICAL, Priority.MEDIUM, False),
    "sodium-high": (Kind.PHYSIOLOGICAL, Priority.MEDIUM, False),
    "sodium-rise": (Kind.PHYSIOLOGICAL, Priority.HIGH, True),
    "labs-due": (Kind.REMINDER, Priority.LOW, False),
    "catheter-clamp-review": (Kind.ADVISORY, Priority.LOW, False),
    # electrolytes during a diuresis (DESIGN §6; CLINICAL-REFERENCE §5b)
    "sodium-low": (Kind.PHYSIOLOGICAL, Priority.MEDIUM, False),
    "sodium-fall": (Kind.PHYSIOLOGICAL, Priority.HIGH, True),
    "potassium-low": (Kind.PHYSIOLOGICAL, Priority.MEDIUM, False),
    "magnesium-low": (Kind.PHYSIOLOGICAL, Priority.LOW, False),
    "phosphate-low": (Kind.PHYSIOLOGICAL, Priority.LOW, False),
    # high output with no relief on record: the numbers, no cause (DESIGN §4)
    "high-output": (Kind.PHYSIOLOGICAL, Priority.LOW, False),
    "high-output-24h": (Kind.PHYSIOLOGICAL, Priority.LOW, False),
    # empty the bag before readings fail (DESIGN §4)
    "bag-full": (Kind.REMINDER, Priority.LOW, False),
}
NOT_RULES = {"escalation", "advice"}


@pytest.fixture(scope="module")
def shipped() -> dict[str, RuleDef]:
    return {r.id: r for r in load_rules()}


def test_all_design_rules_ship(shipped: dict[str, RuleDef]) -> None:
    assert len(DESIGN_RULES) == 24
    assert set(shipped) == set(DESIGN_RULES) == set(DEFAULT_RULE_IDS)


def test_rule_ids_match_file_names() -> None:
    files = {p.stem for p in BUNDLED.glob("*.toml")} - NOT_RULES
    assert files == set(DESIGN_RULES)
    for path in BUNDLED.glob("*.toml"):
        if path.stem not in NOT_RULES:
            assert re.search(rf'^id = "{re.escape(path.stem)}"$', path.read_text(), re.M), path


@pytest.mark.parametrize("rule_id", sorted(DESIGN_RULES))
def test_kind_priority_and_latching_follow_the_design(
    rule_id: str, shipped: dict[str, RuleDef]
) -> None:
    r = shipped[rule_id]
    assert (r.kind, r.priority, r.latching) == DESIGN_RULES[rule_id]


@pytest.mark.parametrize("rule_id", sorted(DESIGN_RULES))
def test_every_rule_has_a_rationale_and_a_source(rule_id: str, shipped: dict[str, RuleDef]) -> None:
    r = shipped[rule_id]
    assert "IEC 60601-1-8" in r.rationale  # priority argued as urgency x potential harm
    assert len(r.source) >= 10
    # a published source (with a year) or an explicit statement that there is none
    assert re.search(r"\b(19|20)\d\d\b", r.source) or re.search(
        r"common practice|own|local practice|from memory", r.source, re.I
    ), r.source


def test_catheter_clamp_review_ships_disabled(shipped: dict[str, RuleDef]) -> None:
    # no published source supports clamping for high output (CLINICAL-REFERENCE §10)
    assert shipped["catheter-clamp-review"].enabled is False
    assert [rid for rid, r in shipped.items() if not r.enabled] == ["catheter-clamp-review"]


def test_weight_based_and_low_output_rules(shipped: dict[str, RuleDef]) -> None:
    weight = {rid for rid, r in shipped.items() if r.needs_weight}
    # flow-stopped runs without a weight too (mL/h before the stop instead of mL/kg/h)
    assert weight == {"oliguria-kdigo-1", "oliguria-kdigo-2", "oliguria-kdigo-3"}
    low = {rid for rid, r in shipped.items() if r.low_output}
    assert low == {"oliguria-kdigo-1", "oliguria-kdigo-2", "oliguria-kdigo-3", "anuria-12h"}


def test_gated_rules_name_the_high_output_rules(shipped: dict[str, RuleDef]) -> None:
    # replacement follows the hourly criterion (alert_rules/pod-24h.toml says why)
    for rid in ("replacement-behind", "replacement-excess"):
        assert set(shipped[rid].while_active) == {"pod-hourly"}
    assert set(shipped["labs-due"].while_active) == {"pod-hourly", "pod-24h"}
    advising = {rid for rid, r in shipped.items() if r.replacement_advice}
    assert advising == {"pod-hourly"}


def test_kdigo_rules_default_to_the_mean_mode(shipped: dict[str, RuleDef]) -> None:
    # KDIGO 2012 does not say; studies use both (DESIGN §4): the mean is the default
    for rid in ("oliguria-kdigo-1", "oliguria-kdigo-2", "oliguria-kdigo-3"):
        assert shipped[rid].check.mode == "mean"  # type: ignore[union-attr]


def test_the_escalation_policy_loads() -> None:
    policy = load_policy()
    assert isinstance(policy, EscalationPolicy)
    for prio in Priority:
        pol = policy.for_priority(prio)
        assert pol.tiers[0].after_s == 0
        assert pol.tiers[0].roles == ["bedside-nurse"]
    # higher priority escalates sooner (our own defaults, not from a standard)
    high, medium, low = (policy.for_priority(p) for p in (Priority.HIGH, Priority.MEDIUM,
                                                           Priority.LOW))  # fmt: skip
    assert high.tiers[1].after_s < medium.tiers[1].after_s < low.tiers[1].after_s


def test_a_rule_folder_without_a_policy_uses_the_shipped_one(tmp_path: Path) -> None:
    shutil.copy(BUNDLED / "pod-hourly.toml", tmp_path)
    assert [r.id for r in load_rules(tmp_path)] == ["pod-hourly"]
    assert load_policy(tmp_path) == load_policy()


# --- bad rule files -----------------------------------------------------------------


def _variant(tmp_path: Path, name: str, edit: tuple[str, str] | None = None,
             source: str | None = None, drop: str | None = None) -> Path:  # fmt: skip
    """Write a shipped rule file (optionally edited) into tmp_path under `name`."""
    text = (BUNDLED / f"{source or Path(name).stem}.toml").read_text(encoding="utf-8")
    if edit is not None:
        assert edit[0] in text
        text = text.replace(edit[0], edit[1])
    if drop is not None:
        text = "\n".join(line for line in text.splitlines() if not line.startswith(drop))
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def _error(folder: Path) -> str:
    with pytest.raises(UserError) as exc:
        load_rules(folder)
    msg = str(exc.value)
    assert "\n" not in msg  # one line
    return msg


def test_unknown_check_type(tmp_path: Path) -> None:
    path = _variant(tmp_path, "pod-hourly.toml", ('type = "hourly_above"', 'type = "hourly_odd"'))
    msg = _error(tmp_path)
    assert msg.startswith(f"{path}: check")
    assert "hourly_odd" in msg


def test_negative_threshold(tmp_path: Path) -> None:
    path = _variant(tmp_path, "pod-hourly.toml", ("threshold_ml_h = 200", "threshold_ml_h = -200"))
    assert _error(tmp_path).startswith(f"{path}: check.hourly_above.threshold_ml_h: ")


def test_negative_weight_based_threshold(tmp_path: Path) -> None:
    path = _variant(
        tmp_path, "oliguria-kdigo-1.toml", ("threshold_ml_kg_h = 0.5", "threshold_ml_kg_h = -0.5")
    )
    assert _error(tmp_path).startswith(f"{path}: check.rate_below.threshold_ml_kg_h: ")


def test_replacement_rule_without_while_active(tmp_path: Path) -> None:
    path = _variant(tmp_path, "replacement-behind.toml", drop="while_active")
    msg = _error(tmp_path)
    assert msg.startswith(f"{path}: ")
    assert "while_active" in msg


def test_id_that_is_not_the_file_name(tmp_path: Path) -> None:
    path = _variant(tmp_path, "pod-two-hours.toml", source="pod-hourly")
    msg = _error(tmp_path)
    assert msg.startswith(f"{path}: id: ")
    assert "pod-hourly" in msg and "pod-two-hours" in msg


def test_unknown_rule_in_while_active(tmp_path: Path) -> None:
    _variant(tmp_path, "pod-hourly.toml")
    path = _variant(tmp_path, "labs-due.toml", ('"pod-24h"]', '"pod-weekly"]'))
    msg = _error(tmp_path)
    assert msg.startswith(f"{path}: while_active: ")
    assert "pod-weekly" in msg


def test_missing_source(tmp_path: Path) -> None:
    path = _variant(tmp_path, "sodium-high.toml", drop="source =")
    assert _error(tmp_path).startswith(f"{path}: source: ")


def test_unknown_key(tmp_path: Path) -> None:
    path = _variant(
        tmp_path, "data-gap.toml", ("max_gap_s = 10800", "max_gap_s = 10800\nmax_gap_h = 3")
    )
    assert _error(tmp_path).startswith(f"{path}: check.no_usable_data.max_gap_h: ")


def test_not_toml(tmp_path: Path) -> None:
    path = tmp_path / "data-gap.toml"
    path.write_text("id = \n", encoding="utf-8")
    assert _error(tmp_path).startswith(f"{path}: not valid TOML")


def test_empty_and_missing_folders(tmp_path: Path) -> None:
    assert "no rule file" in _error(tmp_path)
    assert "no such rule folder" in _error(tmp_path / "nowhere")


def test_bad_escalation_policy(tmp_path: Path) -> None:
    text = (BUNDLED / "escalation.toml").read_text(encoding="utf-8")
    (tmp_path / "escalation.toml").write_text(
        text.replace("after_s = 300 ", "after_s = -300 ", 1), encoding="utf-8"
    )
    with pytest.raises(UserError) as exc:
        load_policy(tmp_path)
    msg = str(exc.value)
    assert "\n" not in msg
    assert msg.startswith(f"{tmp_path / 'escalation.toml'}: high.tiers.1.after_s: ")


def test_the_old_spelling_of_the_hypovolaemia_rule_is_still_accepted(tmp_path: Path) -> None:
    """One spelling throughout (hypovolaemia); a site's own rule folder, bed contexts and
    annotations that use the old id keep working."""
    from daemon.engine.context import BedContext
    from daemon.engine.rules import canonical_alarm_id

    rules = tmp_path / "rules"
    shutil.copytree(BUNDLED, rules)
    text = (rules / "hypovolaemia-risk.toml").read_text(encoding="utf-8")
    (rules / "hypovolaemia-risk.toml").unlink()
    old = text.replace('"hypovolaemia-risk"', '"hypovolemia-risk"').replace(
        'type = "hypovolaemia"', 'type = "hypovolemia"'
    )
    (rules / "hypovolemia-risk.toml").write_text(old, encoding="utf-8")
    loaded = {r.id: r for r in load_rules(rules)}
    assert "hypovolaemia-risk" in loaded and "hypovolemia-risk" not in loaded
    assert loaded["hypovolaemia-risk"].check.type == "hypovolaemia"
    ctx = BedContext.model_validate(
        {"ward": "w", "device_ids": [], "disabled_rules": ["hypovolemia-risk"]}
    )
    assert ctx.disabled_rules == ["hypovolaemia-risk"]
    assert canonical_alarm_id("b1/hypovolemia-risk/20260314T010000Z") == (
        "b1/hypovolaemia-risk/20260314T010000Z"
    )


def test_files_saved_with_a_byte_order_mark_load(tmp_path: Path) -> None:
    """An editor on a hospital workstation may save 'UTF-8 with BOM'; rule files, the
    escalation policy and the service config read like profiles then (one reader)."""
    folder = tmp_path / "rules"
    shutil.copytree(BUNDLED, folder)
    for name in ("oliguria-kdigo-1.toml", "escalation.toml", "advice.toml"):
        f = folder / name
        f.write_bytes(b"\xef\xbb\xbf" + f.read_bytes())
    assert {r.id for r in load_rules(folder)} == {r.id for r in load_rules()}
    assert load_policy(folder) == load_policy()
    example = (BUNDLED.parent / "examples" / "hourwatch.toml").read_bytes()
    plain, marked = tmp_path / "plain.toml", tmp_path / "marked.toml"  # paths: same folder
    plain.write_bytes(example)
    marked.write_bytes(b"\xef\xbb\xbf" + example)
    assert load_config(marked, env={}) == load_config(plain, env={})


def test_a_file_that_is_not_utf8_is_one_line(tmp_path: Path) -> None:
    folder = tmp_path / "rules"
    shutil.copytree(BUNDLED, folder)
    (folder / "oliguria-kdigo-1.toml").write_bytes(b'id = "caf\xe9"\n')  # Latin-1, not UTF-8
    with pytest.raises(UserError, match=r"oliguria-kdigo-1.toml: not valid TOML"):
        load_rules(folder)
