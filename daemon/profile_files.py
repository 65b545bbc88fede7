"""Load device profiles from a folder of TOML files (shell side: reads files)."""

from __future__ import annotations

import tomllib
from pathlib import Path

from pydantic import ValidationError

from .engine.profiles import DeviceProfile
from .errors import UserError, describe_validation

# Profiles shipped with the source tree; used when no folder is named.
BUNDLED = Path(__file__).resolve().parent.parent / "device_profiles"


def load_profile(path: Path) -> DeviceProfile:
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise UserError(f"{path}: cannot read: {exc.strerror}") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise UserError(f"{path}: not valid TOML: {exc}") from None
    try:
        profile = DeviceProfile.model_validate(data)
    except ValidationError as exc:
        raise UserError(describe_validation(path, exc)) from None
    if profile.name != path.stem:
        raise UserError(f"{path}: name: {profile.name!r} must match the file name {path.stem!r}")
    return profile


def load_profiles(folder: Path | None = None) -> list[DeviceProfile]:
    folder = folder or BUNDLED
    if not folder.is_dir():
        raise UserError(f"{folder}: no such profile folder")
    files = sorted(folder.glob("*.toml"))
    if not files:
        raise UserError(f"{folder}: holds no *.toml device profile")
    profiles = [load_profile(f) for f in files]
    seen: dict[str, str] = {}
    for p in profiles:
        sub = p.subscription
        if sub in seen:
            raise UserError(f"{folder}: profiles {seen[sub]!r} and {p.name!r} share topic {sub!r}")
        seen[sub] = p.name
    return profiles
