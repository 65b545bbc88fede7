"""Intake's fast paths (issue 18) give what the checked paths give, to the last bit: the
decoder's plain path for a family's usual message.

A fast path may only be faster: every generated input here, well formed or not, must
come out of it exactly as it comes out of the checked path (same reading, or the same
rejection with the same reason and detail). Compared by repr, so -0.0 and 0.0, 1 and
1.0 differ.

ALL DATA HERE IS INVENTED (generated payloads, made-up meters and times).
"""

from __future__ import annotations

import math
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from daemon.engine import decode as decode_module
from daemon.engine.decode import Decoder
from tests.conftest import PROFILES

DEVICE = "rc-0101"  # invented


def _read(dec: Decoder, payload: Any) -> str:
    """What a decoder makes of a payload, as text; an exception (a bug of the checked path
    both paths must share, see the report of issue 18) by its type."""
    try:
        return repr(dec.decode(DEVICE, payload))
    except Exception as exc:
        return f"raised {type(exc).__name__}"


def _checked(name: str) -> Decoder:
    """A decoder without its plain path: every message through the general accessors."""
    dec = Decoder(PROFILES[name])
    dec._plain = None
    return dec


def test_the_plain_path_is_taken_by_the_benchmarks_family_only_where_it_may_be() -> None:
    plain = {n for n, p in PROFILES.items() if Decoder(p)._plain is not None}
    assert "reference-cumulative" in plain
    assert "nested-telemetry" not in plain  # nested fields
    assert "interval-10min" not in plain  # unit and offset fields
    assert "gravimetric-text" not in plain and "keyvalue-decilitre" not in plain  # not JSON


# --- generated payloads of the reference family, well formed or not ---------------------
_MISSING = object()


def _mostly(valid: st.SearchStrategy[Any], junk: st.SearchStrategy[Any]) -> st.SearchStrategy[Any]:
    """Usually a well-formed value (so whole payloads often are), else junk or no field."""
    return st.one_of(valid, valid, valid, junk, st.just(_MISSING))


_times = _mostly(
    st.builds(
        lambda d, h, m, s, z: f"2026-03-{d:02d}T{h:02d}:{m:02d}:{s:02d}{z}",
        st.integers(1, 28), st.integers(0, 23), st.integers(0, 59), st.integers(0, 59),
        st.sampled_from(["Z", "+01:00", "-05:30", ".5Z", ".123456Z", "+00:00"]),
    ),
    st.one_of(
        st.builds(
            lambda d, h, m, s, z: f"2026-03-{d:02d}T{h:02d}:{m:02d}:{s:02d}{z}",
            st.integers(0, 32), st.integers(0, 25), st.integers(0, 60), st.integers(0, 61),
            st.sampled_from(["", " ", "z", "+14:30", "+24:00", "Zulu"]),
        ),
        st.sampled_from([" 2026-03-14T02:00:00Z ", "2026-03-14 02:00:00+00:00",
                         "20260314T020000Z", "2026-03-14T02:00:00.123456789Z",
                         "2026-W11-6T02:00Z", ""]),
        st.text(max_size=30), st.integers(), st.floats(), st.none(), st.booleans(),
    ),
)  # fmt: skip
_junk_numbers = st.one_of(
    st.floats(), st.integers(), st.integers(-(2**70), 2**70),
    st.sampled_from([-0.0, 4000.000001, -1, 1e308 * 10, math.nan, True, False, 10**400]),
    st.text(max_size=8), st.none(), st.lists(st.integers(), max_size=2),
)  # fmt: skip
_volumes = _mostly(
    st.one_of(st.floats(0.0, 4000.0), st.integers(0, 4000), st.sampled_from([0, 0.0, 4000])),
    _junk_numbers,
)
_seqs = _mostly(
    st.one_of(st.integers(0, 10**6), st.sampled_from([2**53 - 1, 2**53, 2**53 + 1, -(2**53) - 1,
                                                      2**63, 0.0, 7.0])),
    _junk_numbers,
)  # fmt: skip
_devices = _mostly(
    st.just(DEVICE),
    st.one_of(st.sampled_from([f" {DEVICE} ", "rc-0102", DEVICE.upper(), ""]),
              st.text(max_size=8), st.integers(), st.none()),
)  # fmt: skip


def _payload(device: Any, time: Any, volume: Any, seq: Any, extra: dict[str, Any]) -> Any:
    fields = {"device_id": device, "time": time, "volume_ml": volume, "seq": seq}
    return extra | {k: v for k, v in fields.items() if v is not _MISSING}


_payloads = st.builds(
    _payload, _devices, _times, _volumes, _seqs,
    st.dictionaries(st.text(max_size=5), st.integers(), max_size=2),
)  # fmt: skip


@settings(max_examples=300)  # cheap: microseconds an example
@given(payloads=st.lists(_payloads, min_size=1, max_size=12))
def test_the_plain_path_reads_every_payload_as_the_checked_path(payloads: list[Any]) -> None:
    fast, checked = Decoder(PROFILES["reference-cumulative"]), _checked("reference-cumulative")
    for p in payloads:  # one decoder for all: its remembered times must not change a thing
        assert _read(fast, p) == _read(checked, p)


@given(payloads=st.lists(_payloads, min_size=1, max_size=30))
def test_forgetting_remembered_times_changes_nothing(payloads: list[Any]) -> None:
    fast, checked = Decoder(PROFILES["reference-cumulative"]), _checked("reference-cumulative")
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(decode_module, "TIME_MEMO", 2)
        for p in payloads + payloads:
            assert _read(fast, p) == _read(checked, p)


def test_remembered_times_are_bounded(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(decode_module, "TIME_MEMO", 3)
    fast, checked = Decoder(PROFILES["reference-cumulative"]), _checked("reference-cumulative")
    for m in range(10):
        p = {"device_id": DEVICE, "time": f"2026-03-14T02:{m:02d}:00Z", "volume_ml": 1.0 + m}
        assert _read(fast, p) == _read(checked, p)
        assert 1 <= len(fast._times) <= 3


_EDGES = [  # the edges of what the plain path takes itself, each beside a well-formed message
    {"seq": 2**53}, {"seq": 2**53 + 1}, {"seq": -(2**53) - 1}, {"seq": 7.0}, {"seq": True},
    {"seq": None}, {"volume_ml": 4000}, {"volume_ml": 4000.000001}, {"volume_ml": -0.0},
    {"volume_ml": 10**400}, {"volume_ml": 1e300}, {"volume_ml": math.inf}, {"volume_ml": False},
    {"device_id": f" {DEVICE}"}, {"device_id": None}, {"time": "2026-03-14T02:00:00"},
    {"time": " 2026-03-14T02:00:00Z"}, {"time": "2026-03-14T02:00:00+01:00"},
]  # fmt: skip


@pytest.mark.parametrize("change", _EDGES, ids=repr)
def test_the_edges_of_the_plain_path(change: dict[str, Any]) -> None:
    p = {"device_id": DEVICE, "time": "2026-03-14T02:00:00Z", "volume_ml": 412.5, "seq": 1042}
    fast = Decoder(PROFILES["reference-cumulative"])
    assert _read(fast, p | change) == _read(_checked("reference-cumulative"), p | change)


def test_the_usual_message_takes_the_plain_path() -> None:
    """So the property above compares two paths, not one path with itself."""
    dec = Decoder(PROFILES["reference-cumulative"])
    p = {"device_id": DEVICE, "time": "2026-03-14T02:00:00Z", "volume_ml": 412.5, "seq": 1042}
    assert dec._plain is not None
    assert dec._decode_plain(DEVICE, p, *dec._plain) is not None
    assert dec._times == {"2026-03-14T02:00:00Z": 1773453600.0}


def test_long_times_are_not_remembered() -> None:
    dec = Decoder(PROFILES["reference-cumulative"])
    long = "2026-03-14T02:00:00.000000000000000000000000Z"  # valid, and longer than the limit
    p = {"device_id": DEVICE, "time": long, "volume_ml": 1.0}
    assert repr(dec.decode(DEVICE, p)) == repr(_checked("reference-cumulative").decode(DEVICE, p))
    assert dec._times == {}
