"""Device profiles: the shipped families load; a bad file gives one line naming it and the key."""

from __future__ import annotations

from pathlib import Path

import pytest

from daemon.engine.profiles import DeviceProfile, Encoding, Semantics
from daemon.errors import UserError
from daemon.profile_files import BUNDLED, load_profile, load_profiles

SHIPPED = sorted(BUNDLED.glob("*.toml"))
REF_TEXT = (BUNDLED / "reference-cumulative.toml").read_text(encoding="utf-8")
GRAV_TEXT = (BUNDLED / "gravimetric-text.toml").read_text(encoding="utf-8")


def _edited(text: str, old: str, new: str) -> str:
    assert old in text, f"the shipped profile no longer contains {old!r}; update this test"
    return text.replace(old, new)


def _load_bad(tmp_path: Path, name: str, text: str, file_stem: str | None = None) -> str:
    path = tmp_path / f"{file_stem or name}.toml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(UserError) as err:
        load_profile(path)
    message = str(err.value)
    assert "\n" not in message, "the error must be one line"
    assert str(path) in message, "the error must name the file"
    return message


# --- the shipped families ----------------------------------------------------------


@pytest.mark.parametrize("path", SHIPPED, ids=lambda p: p.stem)
def test_every_shipped_profile_loads(path: Path) -> None:
    profile = load_profile(path)
    assert profile.name == path.stem
    # one '+' per placeholder: the device id, and any metadata level
    assert profile.subscription.count("+") == profile.topic.count("{")
    m = profile.topic_regex().match(profile.topic_for("dev-9"))
    assert m is not None and m.group("device_id") == "dev-9"


def test_at_least_four_families_covering_every_semantics_and_encoding() -> None:
    profiles = load_profiles()
    assert len(profiles) >= 4
    assert {p.volume.semantics for p in profiles} == set(Semantics)
    assert {p.payload.encoding for p in profiles} == set(Encoding)
    assert len({p.subscription for p in profiles}) == len(profiles)


def test_reference_family_is_as_the_issue_specifies() -> None:
    p = load_profile(BUNDLED / "reference-cumulative.toml")
    assert p.topic == "meters/{device_id}/volume"
    assert p.payload.encoding is Encoding.JSON
    assert p.volume.semantics is Semantics.CUMULATIVE
    assert p.timing.period_s == 60
    assert p.fields.time == "time" and p.fields.volume == "volume_ml"
    assert p.fields.device_id == "device_id" and p.fields.seq == "seq"


def test_gravimetric_family_declares_a_urine_specific_gravity_in_the_reference_range() -> None:
    p = load_profile(BUNDLED / "gravimetric-text.toml")
    assert p.volume.semantics is Semantics.BAG_WEIGHT and p.volume.unit == "g"
    assert p.payload.encoding is Encoding.DELIMITED
    assert p.fields.status is not None
    # source: Medscape Reference, "Urine Specific Gravity" (reference range 1.005-1.030)
    assert 1.005 <= p.volume.specific_gravity <= 1.030


@pytest.mark.parametrize("path", SHIPPED, ids=lambda p: p.stem)
def test_maximum_plausible_flow_leaves_room_for_post_obstructive_diuresis(path: Path) -> None:
    """A limit below a real diuresis would drop the very output the rules must see."""
    p = load_profile(path)
    # source: Halbgewachs & Domes, Can Fam Physician 2015 (POD = >200 mL/h); a margin of
    # 5x that threshold is common practice, no single source
    assert p.limits.max_flow_ml_h >= 5 * 200


def test_interval_family_reports_local_time_with_an_offset_and_a_unit() -> None:
    p = load_profile(BUNDLED / "interval-10min.toml")
    assert p.volume.semantics is Semantics.INTERVAL
    assert p.volume.interval_s == 600
    assert p.fields.unit is not None and p.fields.utc_offset is not None


# --- bad profiles ------------------------------------------------------------------


def test_missing_period_names_timing_period_s(tmp_path: Path) -> None:
    text = _edited(REF_TEXT, "period_s = 60\n", "")
    msg = _load_bad(tmp_path, "reference-cumulative", text)
    assert "timing.period_s" in msg


def test_integer_field_for_a_json_profile_names_the_field(tmp_path: Path) -> None:
    text = _edited(REF_TEXT, 'time = "time"', "time = 1")
    msg = _load_bad(tmp_path, "reference-cumulative", text)
    assert "fields.time" in msg


def test_string_field_for_a_delimited_profile_names_the_field(tmp_path: Path) -> None:
    text = _edited(GRAV_TEXT, "volume = 2", 'volume = "weight"')
    msg = _load_bad(tmp_path, "gravimetric-text", text)
    assert "fields.volume" in msg


def test_delimited_without_separator_names_the_separator(tmp_path: Path) -> None:
    text = _edited(GRAV_TEXT, 'separator = ";"\n', "")
    msg = _load_bad(tmp_path, "gravimetric-text", text)
    assert "payload" in msg and "separator" in msg


@pytest.mark.parametrize("sg", ["0.95", "1.5"])
def test_specific_gravity_out_of_range_names_the_key(tmp_path: Path, sg: str) -> None:
    text = _edited(GRAV_TEXT, "specific_gravity = 1.015", f"specific_gravity = {sg}")
    msg = _load_bad(tmp_path, "gravimetric-text", text)
    assert "volume.specific_gravity" in msg


def test_typo_of_an_optional_key_names_the_unknown_key(tmp_path: Path) -> None:
    text = _edited(REF_TEXT, "reorder_tolerance_s", "reorder_tolerence_s")
    msg = _load_bad(tmp_path, "reference-cumulative", text)
    assert "timing.reorder_tolerence_s" in msg


def test_typo_of_a_required_key_names_the_key_that_is_missing(tmp_path: Path) -> None:
    text = _edited(REF_TEXT, "period_s = 60", "perod_s = 60")
    msg = _load_bad(tmp_path, "reference-cumulative", text)
    assert "timing.period_s" in msg


def test_unknown_top_level_table_is_refused(tmp_path: Path) -> None:
    msg = _load_bad(tmp_path, "reference-cumulative", REF_TEXT + "\n[smothing]\npoints = 3\n")
    assert "smothing" in msg


@pytest.mark.parametrize(
    ("old", "new", "key"),
    [
        ('topic = "meters/{device_id}/volume"', 'topic = "meters/+/volume"', "topic"),
        ('topic = "meters/{device_id}/volume"', 'topic = "meters/volume"', "topic"),
        ('detect = "fall"', 'detect = "flag"', "bag_change"),
        ("max_flow_ml_h = 2500", "max_flow_ml_h = -1", "limits.max_flow_ml_h"),
        ("min_ml = 0\n", "min_ml = 5000\n", "min_ml"),
        ('semantics = "cumulative"', 'semantics = "interval"', "interval_s"),
        ('unit = "mL"', 'unit = "g"', "unit"),
        ('encoding = "json"', 'encoding = "xml"', "payload.encoding"),
        ("schema = 1", "schema = 2", "schema"),
    ],
)
def test_inconsistent_declarations_name_the_key(
    tmp_path: Path, old: str, new: str, key: str
) -> None:
    msg = _load_bad(tmp_path, "reference-cumulative", _edited(REF_TEXT, old, new))
    assert key in msg


def test_not_toml_is_one_line_naming_the_file(tmp_path: Path) -> None:
    text = _edited(REF_TEXT, "[limits]", "[limits\n")
    msg = _load_bad(tmp_path, "reference-cumulative", text)
    assert "TOML" in msg


def test_name_must_match_the_file_name(tmp_path: Path) -> None:
    msg = _load_bad(tmp_path, "reference-cumulative", REF_TEXT, file_stem="ref-meter")
    assert "name" in msg and "ref-meter" in msg


def test_two_profiles_sharing_a_topic_are_refused(tmp_path: Path) -> None:
    (tmp_path / "reference-cumulative.toml").write_text(REF_TEXT, encoding="utf-8")
    twin = _edited(REF_TEXT, 'name = "reference-cumulative"', 'name = "reference-twin"')
    (tmp_path / "reference-twin.toml").write_text(twin, encoding="utf-8")
    with pytest.raises(UserError) as err:
        load_profiles(tmp_path)
    msg = str(err.value)
    assert "\n" not in msg
    assert "reference-cumulative" in msg and "reference-twin" in msg
    assert "meters/+/volume" in msg


def test_distinct_topics_in_one_folder_load(tmp_path: Path) -> None:
    (tmp_path / "reference-cumulative.toml").write_text(REF_TEXT, encoding="utf-8")
    other = _edited(REF_TEXT, 'name = "reference-cumulative"', 'name = "reference-b"')
    other = _edited(other, "meters/{device_id}/volume", "meters-b/{device_id}/volume")
    (tmp_path / "reference-b.toml").write_text(other, encoding="utf-8")
    assert [p.name for p in load_profiles(tmp_path)] == ["reference-b", "reference-cumulative"]


def test_missing_or_empty_folder_is_a_user_error(tmp_path: Path) -> None:
    with pytest.raises(UserError, match="no such profile folder"):
        load_profiles(tmp_path / "nowhere")
    with pytest.raises(UserError, match=r"\*\.toml"):
        load_profiles(tmp_path)


def test_profile_model_is_frozen_and_strict() -> None:
    p = load_profile(BUNDLED / "reference-cumulative.toml")
    with pytest.raises(ValueError):
        p.timing.period_s = 5  # type: ignore[misc]
    data = p.model_dump(by_alias=True)
    assert DeviceProfile.model_validate(data) == p
