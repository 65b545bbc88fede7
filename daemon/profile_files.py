"""Load device profiles from a folder of TOML files (shell side: reads files).

`load_profiles` gives one line for the first problem (every command that needs the
profiles); `check_folder` gives every problem of every file (`hourwatch check-profiles`).
"""

from __future__ import annotations

from pathlib import Path

from pydantic import ValidationError

from .engine.profiles import Calibration, DeviceProfile, DevicesFile, close_key, known_keys
from .errors import UserError, describe_validation, read_toml

# Profiles shipped with the source tree; used when no folder is named.
BUNDLED = Path(__file__).resolve().parent.parent / "device_profiles"


_FIELD_REF = "a dotted JSON path or key name in quotes, or a 0-based column number"


def _key(loc: tuple[str | int, ...]) -> str:
    return ".".join(str(x) for x in loc) or "(top level)"


def problems(exc: ValidationError) -> list[str]:
    """Every problem of a profile as 'key: what to do', the unknown keys with the known
    key they most likely meant, a required key they stand for folded into them."""
    errs = exc.errors()
    out: list[tuple[str, str]] = []
    meant: set[tuple[str | int, ...]] = set()  # required keys an unknown key stands for
    for e in errs:
        loc = tuple(e["loc"])
        if len(loc) == 3 and loc[0] in ("fields", "checksum") and loc[2] in ("str", "int"):
            # a field reference (str | int) fails once per member: one line, its own key
            item = (_key(loc[:-1]), _FIELD_REF)
            if item not in out:
                out.append(item)
            continue
        if e["type"] == "extra_forbidden":
            guess = close_key(str(loc[-1]), known_keys(loc[:-1]))
            msg = "unknown key"
            if guess is not None:
                msg += f"; did you mean {guess}?"
                target = (*loc[:-1], guess)
                if any(tuple(x["loc"]) == target and x["type"] == "missing" for x in errs):
                    meant.add(target)
                    msg += f" ({_key(target)} is required)"
            out.append((_key(loc), msg))
        elif loc[:1] == ("status",) and e["type"] == "string_type":
            section = _key(loc[:2])
            out.append((_key(loc), f"status codes are text: quote them, e.g. "
                                   f'{section.split(".")[-1]} = ["0", "OK"]'))  # fmt: skip
        elif e["type"] == "missing":
            out.append((_key(loc), "required"))
        else:
            out.append((_key(loc), str(e["msg"]).removeprefix("Value error, ")))
    return [f"{key}: {msg}" for key, msg in out if key not in {_key(t) for t in meant}]


def profile_problems(path: Path) -> tuple[DeviceProfile | None, list[str]]:
    """The profile in a file, or every problem it has (each 'FILE: key: what')."""
    try:
        data = read_toml(path)
    except UserError as exc:
        return None, [str(exc)]
    try:
        profile = DeviceProfile.model_validate(data)
    except ValidationError as exc:
        return None, [f"{path}: {p}" for p in problems(exc)]
    if profile.name != path.stem:
        why = f"{path}: name: {profile.name!r} must match the file name {path.stem!r}"
        return None, [why]
    return profile, []


def load_profile(path: Path) -> DeviceProfile:
    profile, found = profile_problems(path)
    if profile is None:
        more = f" (and {len(found) - 1} more: hourwatch check-profiles lists them)"
        raise UserError(found[0] + (more if len(found) > 1 else ""))
    return profile


def _files(folder: Path) -> list[Path]:
    if not folder.is_dir():
        raise UserError(f"{folder}: no such profile folder")
    files = sorted(folder.glob("*.toml"))
    if not files:
        raise UserError(f"{folder}: holds no *.toml device profile")
    return files


def _clashes(folder: Path, profiles: list[DeviceProfile]) -> list[str]:
    """Two families whose topics some topic matches both: a message could go to either."""
    out = []
    for i, a in enumerate(profiles):
        for b in profiles[i + 1 :]:
            if a.subscription == b.subscription:
                out.append(f"{folder}: profiles {a.name!r} and {b.name!r} share topic "
                           f"{a.subscription!r}")  # fmt: skip
            elif a.topic_pattern.overlaps(b.topic_pattern):
                out.append(f"{folder}: the topics of {a.name!r} ({a.topic}) and {b.name!r} "
                           f"({b.topic}) overlap: one topic could match both")  # fmt: skip
    return out


def check_folder(folder: Path | None = None) -> tuple[list[DeviceProfile], list[str]]:
    """Every profile that loads, and every problem of every file and between files."""
    folder = folder or BUNDLED
    profiles: list[DeviceProfile] = []
    found: list[str] = []
    for f in _files(folder):
        profile, errs = profile_problems(f)
        found += errs
        if profile is not None:
            profiles.append(profile)
    return profiles, found + _clashes(folder, profiles)


def load_profiles(folder: Path | None = None) -> list[DeviceProfile]:
    folder = folder or BUNDLED
    profiles = [load_profile(f) for f in _files(folder)]
    clashes = _clashes(folder, profiles)
    if clashes:
        raise UserError(clashes[0])
    return profiles


def check_prefix(profiles: list[DeviceProfile], prefix: str, folder: Path | None) -> None:
    """A family whose topic could lie under the service's own `{prefix}/...` topics: its
    readings would be taken for bed messages (and refused), or it would read the
    service's own pages back. One line naming the file, for `check` and `run`."""
    own = prefix.split("/")
    for p in profiles:
        levels = p.topic_pattern.levels
        head = zip(levels[: len(own)], own, strict=True)
        if len(levels) > len(own) and all(a == b or a.startswith("{") for a, b in head):
            where = (folder or BUNDLED) / f"{p.name}.toml"
            raise UserError(f"{where}: topic: {p.topic} could match the service's own topics "
                            f"under '{prefix}/' (topic_prefix); give the family a first level "
                            "of its own")  # fmt: skip


def load_devices(path: Path | None) -> dict[str, Calibration]:
    """A devices file's per-meter calibration (none without a file)."""
    if path is None:
        return {}
    data = read_toml(path)
    try:
        return dict(DevicesFile.model_validate(data).devices)
    except ValidationError as exc:
        raise UserError(describe_validation(path, exc)) from None
