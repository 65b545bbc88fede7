"""`hourwatch new-profile NAME --from CLOSEST`: write a commented template for a new meter
family, started from the closest existing profile. Every key is written with its meaning
(from the profile schema, the one source of it); keys the closest family leaves unset are
written commented out. The file is checked before it is written, and never overwrites."""

from __future__ import annotations

import argparse
import itertools
import json
import re
import tomllib
from collections.abc import Sequence
from enum import StrEnum
from pathlib import Path
from typing import Any

from pydantic import BaseModel

from ..engine.profiles import NAME_PATTERN, DeviceProfile, compile_topic
from ..errors import UserError
from ..probe import find_profile
from ..profile_files import BUNDLED, load_profiles

# Top-level sections in the order a reader meets them, with what each is about.
SECTIONS = {
    "payload": "how the message is written",
    "fields": "where each value is in it",
    "time": "how the device time is written",
    "volume": "what the volume means, and its unit",
    "status": 'status codes, as text: ok = ["0"], not [0]',
    "checksum": "a checksum the meter appends (text payloads only)",
    "timing": "how often it reports, and how far its clock may be off",
    "limits": "what is physically possible",
    "bag_change": "how an emptied bag shows",
    "smoothing": "the monotone fit of cumulative readings",
}
# Shown (commented out) for keys that have no default to show.
_EXAMPLES: dict[str, Any] = {
    "field": "cs", "algorithm": "xor8", "separator": ";", "pair_separator": ";",
    "kv_separator": "=", "scale_to_ml": 0.1, "interval_s": 600,
}  # fmt: skip


def add(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser("new-profile", help="write a commented template for a new meter family")
    p.add_argument("name", help="the new family's name (lower case, digits and '-')")
    p.add_argument("--from", dest="closest", required=True, metavar="CLOSEST",
                   help="the existing profile closest to the new family")  # fmt: skip
    p.add_argument("--profiles", type=Path, default=None, metavar="FOLDER",
                   help="profile folder to read CLOSEST from and write into "
                   "(default: the shipped profiles)")  # fmt: skip
    p.add_argument("--out", type=Path, default=None, metavar="FILE",
                   help="write here instead of FOLDER/NAME.toml (a file named "
                   "NAME.toml)")  # fmt: skip
    p.set_defaults(run=run)


def _toml(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int | float):
        return repr(value)
    if isinstance(value, list):
        return "[" + ", ".join(_toml(v) for v in value) + "]"
    return json.dumps(str(value))  # a TOML basic string: the same escapes


def _line(key: str, value: Any, help_text: str | None, commented: bool = False) -> list[str]:
    about = [f"# {help_text}"] if help_text else []
    return [*about, f"{'# ' if commented else ''}{key} = {_toml(value)}"]


def _section(model: type[BaseModel], values: dict[str, Any] | None) -> list[str]:
    """Each key with its meaning above it; a key left at its default is commented out."""
    lines = []
    for key, f in model.model_fields.items():
        name = f.alias or key
        value = values.get(key) if values else None
        default: Any = None if f.is_required() else f.get_default(call_default_factory=True)
        if isinstance(default, StrEnum):
            default = default.value
        if value is None or value == default:
            shown = value if value is not None else default
            if shown is None:
                shown = _EXAMPLES.get(key, "...")
            lines += _line(name, shown, f.description, commented=True)
        else:
            lines += _line(name, value, f.description)
    return lines


def _topic(name: str, closest: str, taken: Sequence[DeviceProfile]) -> str:
    """The closest family's topic under the new family's own first level, one that no
    family of the folder could also match (else the folder would no longer load)."""
    levels = list(compile_topic(closest).levels)
    if not levels or "{" in levels[0]:
        levels.insert(0, name)
    for first in itertools.chain([name], (f"{name}-{n}" for n in itertools.count(2))):
        levels[0] = first
        if not any(compile_topic("/".join(levels)).overlaps(p.topic_pattern) for p in taken):
            break
    return "/".join(levels)


def template(name: str, closest: DeviceProfile, taken: Sequence[DeviceProfile] = ()) -> str:
    data = closest.model_dump(mode="json")
    fields = DeviceProfile.model_fields
    out = [
        f"# {name}: a new meter family, started from {closest.name} (hourwatch new-profile).",
        "# Describe the payload here with an example payload you made up yourself (never a",
        "# vendor's format or names), then check and try the file:",
        "#   hourwatch check-profiles FOLDER",
        f"#   hourwatch probe --broker HOST:PORT --profile {name} --save capture.jsonl",
        "#   hourwatch replay capture.jsonl --profiles FOLDER --bind DEVICE --rejects",
        "# Every key is explained in DEVELOPERS.md section 3. A commented-out key keeps its",
        "# default (or is not used); uncomment it to set it.",
        *_line("schema", 1, fields["schema_version"].description),
        *_line("name", name, fields["name"].description),
        *_line("description", f"CHANGE: one line about {name}", fields["description"].description),
        *_line(
            "topic",
            _topic(name, closest.topic, taken),
            "CHANGE: " + str(fields["topic"].description),
        ),
    ]
    for section, about in SECTIONS.items():
        model = fields[section].annotation
        model = next(a for a in getattr(model, "__args__", (model,)) if isinstance(a, type))
        assert issubclass(model, BaseModel)
        values = data.get(section)
        out += ["", f"[{section}]  # {about}" if values else f"# [{section}]  # {about}"]
        out += _section(model, values)
    return "\n".join(out) + "\n"


def run(args: argparse.Namespace) -> int:
    if not re.match(NAME_PATTERN, args.name):
        raise UserError(f"name: {args.name!r} must be lower case letters, digits and '-' "
                        "(2 to 63 characters)")  # fmt: skip
    folder = args.profiles or BUNDLED
    profiles = load_profiles(args.profiles)
    closest = find_profile(profiles, args.closest, option="--from")
    if any(p.name == args.name for p in profiles):
        raise UserError(f"name: a profile {args.name!r} exists already in {folder}")
    out: Path = args.out or folder / f"{args.name}.toml"
    if out.name != f"{args.name}.toml":  # profiles are read from NAME.toml files only
        raise UserError(f"--out: name the file {args.name}.toml (a profile's name equals "
                        "its file name, and only *.toml files are read)")  # fmt: skip
    if out.exists():
        raise UserError(f"{out}: exists already; new-profile never overwrites a file")
    text = template(args.name, closest, profiles)
    # the template must load as it is: the same family under a topic of its own
    DeviceProfile.model_validate(tomllib.loads(text))
    try:
        out.write_text(text, encoding="utf-8")
    except OSError as exc:
        raise UserError(f"{out}: cannot write: {exc.strerror}") from None
    print(f"wrote {out}: edit every CHANGE line and the keys your meter differs in, then run "
          f"hourwatch check-profiles {out.parent}")  # fmt: skip
    return 0
