"""Write a reading in a device profile's own payload format and topic.

Driven by the profile declaration, so every shipped family (and any new one)
can be simulated without code of its own.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from datetime import UTC, datetime, timedelta, timezone
from typing import Any

from daemon.engine.decode import checksum_text
from daemon.engine.profiles import VOLUME_UNITS, DeviceProfile, Encoding, Semantics, TimeFormat


def _set_path(obj: dict[str, Any], path: str, value: Any) -> None:
    *parents, last = path.split(".")
    for key in parents:
        obj = obj.setdefault(key, {})
    obj[last] = value


def encode(
    profile: DeviceProfile,
    device_id: str,
    t: float,
    volume_ml: float,
    *,
    seq: int | None = None,
    bag_flag: bool = False,
    status: str | None = None,
    unit: str = "mL",
    utc_offset_min: int = 60,
    decimals: int = 1,
    levels: Mapping[str, str] | None = None,
) -> tuple[str, dict[str, Any] | str]:
    """Return (topic, payload): a dict for JSON families, a line of text otherwise.

    `unit` is the per-message unit for families with a unit field; without one the
    volume is written in the profile's unit or scale. `decimals` is the precision in
    mL (0.1 mL by default), kept whatever the unit. `levels` fills the topic's metadata
    placeholders ({ward}, ...; each defaults to "<name>-1")."""
    f = profile.fields
    values: dict[str, Any] = {}
    if profile.volume.semantics is Semantics.BAG_WEIGHT:
        amount = volume_ml * profile.volume.specific_gravity + profile.volume.tare_g
    else:
        scale = VOLUME_UNITS[unit] if f.unit is not None else profile.volume.ml_per_unit
        amount = volume_ml / scale
        decimals = max(0, decimals + round(math.log10(scale)))
    values["volume"] = round(amount, decimals)
    if f.unit is not None:
        values["unit"] = "g" if profile.volume.semantics is Semantics.BAG_WEIGHT else unit
    fmt = profile.time.format
    if fmt is TimeFormat.EPOCH_MS:
        values["time"] = round(t * 1000)
    elif fmt is TimeFormat.EPOCH_S:
        values["time"] = round(t, 3)
    elif f.utc_offset is not None:
        tz = timezone(timedelta(minutes=utc_offset_min))
        values["time"] = datetime.fromtimestamp(t, tz).strftime("%Y-%m-%d %H:%M:%S")
        sign = "+" if utc_offset_min >= 0 else "-"
        hh, mm = divmod(abs(utc_offset_min), 60)
        values["utc_offset"] = f"{sign}{hh:02d}:{mm:02d}"
    else:
        dt = datetime.fromtimestamp(t, UTC)
        values["time"] = dt.isoformat(timespec="seconds").replace("+00:00", "Z")
    if f.device_id is not None:
        values["device_id"] = device_id
    if f.seq is not None and seq is not None:
        values["seq"] = seq
    if f.status is not None:
        if status is None:
            status = (
                profile.status.bag_change[0]
                if bag_flag and profile.status.bag_change
                else profile.status.ok[0]
            )
        values["status"] = status
    if f.bag_change_flag is not None:
        values["bag_change_flag"] = bag_flag
    topic = profile.topic_for(device_id, dict(levels or {}))
    refs = {k: v for k, v in f.model_dump().items() if v is not None and k in values}
    enc = profile.payload.encoding
    if enc is Encoding.JSON:
        obj: dict[str, Any] = {}
        for key, path in refs.items():
            _set_path(obj, path, values[key])
        return topic, obj
    cs = profile.checksum
    if enc is Encoding.KEYVALUE:
        pairs, kv = profile.payload.pairs, profile.payload.kv
        text = pairs.join(f"{ref}{kv}{values[key]}" for key, ref in refs.items())
        if cs is not None:
            text += f"{pairs}{cs.field}{kv}{checksum_text(cs.algorithm, text)}"
        return topic, text
    sep = profile.payload.separator
    assert sep is not None
    cols = [""] * (max(refs.values()) + 1)
    for key, idx in refs.items():
        cols[idx] = str(values[key])
    text = sep.join(cols)
    if cs is not None:
        cols += [""] * (int(cs.field) - len(cols))
        text = sep.join(cols)
        text += sep + checksum_text(cs.algorithm, text)
    return topic, text
