"""Intake's fast paths (issue 18) give what the checked paths give, to the last bit: the
decoder's plain path for a family's usual message, and replay's log reader, which reads the
usual line without building a record.

A fast path may only be faster: every generated input here, well formed or not, must
come out of it exactly as it comes out of the checked path (same reading, or the same
rejection with the same reason and detail). Compared by repr, so -0.0 and 0.0, 1 and
1.0 differ.

ALL DATA HERE IS INVENTED (generated payloads, made-up meters and times).
"""

from __future__ import annotations

import json
import math
import tempfile
from collections.abc import Callable, Iterable
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from daemon.engine import decode as decode_module
from daemon.engine.decode import Decoder
from daemon.engine.engine import Engine
from daemon.errors import UserError
from daemon.logfile import BadLine, Message, _plain, as_messages, read_log, read_messages
from daemon.replay import replay_file
from daemon.rule_files import load_policy, load_rules
from simulator.meterlog import MeterFaults, context_record, simulate, write_log
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


@settings(max_examples=300)
@given(payloads=st.lists(_payloads, min_size=1, max_size=12), text=st.booleans())
def test_the_plain_path_reads_every_payload_sent_as_json_text_as_the_checked_path(
    payloads: list[Any], text: bool
) -> None:
    """As a meter sends it: bytes (or text) that decode parses before either path reads it."""
    fast, checked = Decoder(PROFILES["reference-cumulative"]), _checked("reference-cumulative")
    for p in payloads:
        raw = json.dumps(p) if text else json.dumps(p).encode()
        assert _read(fast, raw) == _read(checked, raw)


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
    assert dec._decode_plain(DEVICE, p) is not None
    assert dec._times == {"2026-03-14T02:00:00Z": 1773453600.0}


def test_the_usual_message_as_bytes_takes_the_plain_path() -> None:
    dec = Decoder(PROFILES["reference-cumulative"])
    raw = b'{"device_id": "rc-0101", "time": "2026-03-14T02:05:00Z", "volume_ml": 1.5}'
    checked = _checked("reference-cumulative")
    assert repr(dec.decode(DEVICE, raw)) == repr(checked.decode(DEVICE, raw))
    assert dec._times == {"2026-03-14T02:05:00Z": 1773453900.0}  # remembered: the plain path


def test_long_times_are_not_remembered() -> None:
    dec = Decoder(PROFILES["reference-cumulative"])
    long = "2026-03-14T02:00:00.000000000000000000000000Z"  # valid, and longer than the limit
    p = {"device_id": DEVICE, "time": long, "volume_ml": 1.0}
    assert repr(dec.decode(DEVICE, p)) == repr(_checked("reference-cumulative").decode(DEVICE, p))
    assert dec._times == {}


# --- the log reader: replay's messages against the model's records -----------------------
def _both(raw: bytes) -> tuple[list[str], list[str]]:
    """What read_messages and read_log (as messages) make of a log holding `raw`."""
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "log.jsonl"
        path.write_bytes(raw)
        return _lines_of(read_messages, path), _lines_of(lambda p: as_messages(read_log(p)), path)


def _lines_of(reader: Callable[[Path], Iterable[Message | BadLine]], path: Path) -> list[str]:
    """A reader's lines, or its one refusal of the whole file (a NUL byte in the first
    line: not a log at all) as a line of its own, so both readers are compared on it."""
    try:
        return _shown(reader(path))
    except UserError as exc:
        return [f"refused: {exc}"]


def _shown(items: Iterable[Message | BadLine]) -> list[str]:
    # repr: the time's float to the last bit, 1 and 1.0 apart, the payload's key order
    return [repr(item) if isinstance(item, BadLine) else repr((*item, type(item[3])))
            for item in items]  # fmt: skip


_DIGITS = st.text("0123456789", min_size=1, max_size=30)
_json_numbers = st.one_of(
    st.integers(), st.integers(-(2**80), 2**80), st.floats(allow_nan=False, allow_infinity=False),
    st.builds(lambda a, b, e: f"{a}.{b}e{e}", _DIGITS, _DIGITS, st.integers(-400, 400)),
    st.sampled_from(["-0", "-0.0", "1E2", "1e400", "-1e400", "NaN", "Infinity", "4.9e-324",
                     "18446744073709551616", "-9223372036854775809", "01", "1.", ".5"]),
)  # fmt: skip


def _num(x: Any) -> str:
    return x if isinstance(x, str) else json.dumps(x)


_json_values = st.recursive(
    st.one_of(st.none().map(json.dumps), st.booleans().map(json.dumps), _json_numbers.map(_num),
              st.text(max_size=10).map(json.dumps)),
    lambda inner: st.one_of(
        st.lists(inner, max_size=3).map(lambda xs: "[" + ",".join(xs) + "]"),
        st.lists(st.tuples(st.text(max_size=4), inner), max_size=3).map(
            lambda kv: "{" + ",".join(f"{json.dumps(k)}:{v}" for k, v in kv) + "}"),
    ),
    max_leaves=8,
)  # fmt: skip
_fixed_form = "{:04d}-{:02d}-{:02d}T{:02d}:{:02d}:{:02d}{}Z".format
_log_times = st.one_of(
    st.builds(  # the form the plain path reads, a real date and time (usually)
        _fixed_form, st.integers(1, 9999), st.integers(1, 12), st.integers(1, 28),
        st.integers(0, 23), st.integers(0, 59), st.integers(0, 59),
        st.one_of(st.just(""), st.text("0123456789", min_size=1, max_size=6).map(".{}".format)),
    ),
    st.builds(  # the same form, any digits in it
        _fixed_form, st.integers(0, 9999), st.integers(0, 13), st.integers(0, 32),
        st.integers(0, 25), st.integers(0, 60), st.integers(0, 61),
        st.one_of(st.just(""), st.text("0123456789", max_size=8).map(".{}".format)),
    ),
    st.sampled_from(["2026-03-14T02:00:00.123+00:00", "2026-03-14T02:00:00", "2026-03-14",
                     "2026-03-14 02:00:00Z", "2026-03-14t02:00:00z", "2026-03-14T02:00:00,5Z",
                     "2026-03-14T02:00Z", "20260314T020000Z", "2026-03-14T02:00:00.1234567Z",
                     "2026-03-14T02:00:00.+1:0Z", "2026-03-14T02:00:00.12Z4Z", "1700000000",
                     "2026-03-14T02:00:00\u0661Z", "2026-03-14T02:00:00.\u0661Z",
                     "\uff12\uff10\uff12\uff16-03-14T02:00:00Z", "2026-03-14T02:00:00.5Z",
                     "2026-03-14T0200:00.5Z", "2026-03-14T02:0000.50Z", "2026-0314T02:00:00.5Z",
                     "2026-03-14T02:00:00.5ZZ", "2026-03-14T02:00:00.-5Z", "2026-02-29T00:00:00Z",
                     "2024-02-29T00:00:00Z", "0000-01-01T00:00:00Z", "2026-03-14T24:00:00Z"]),
    st.text(max_size=28),
).map(json.dumps)  # fmt: skip
_topics = st.one_of(
    st.just("meters/rc-0101/volume"),
    st.text(max_size=12),
    st.just("x" * 512),
    st.just("x" * 513),
    st.just("é" * 512),
).map(json.dumps)


@st.composite
def _log_lines(draw: st.DrawFn) -> bytes:
    fields = [
        ("time", draw(_log_times)),
        ("topic", draw(_topics)),
        ("payload", draw(st.one_of(_json_values, st.text(max_size=8).map(json.dumps)))),
    ]
    kind = draw(st.integers(0, 9))
    if kind == 1:  # a key twice, either value last
        k = draw(st.integers(0, 2))
        fields.insert(draw(st.integers(0, 3)), (fields[k][0], draw(_json_values)))
    elif kind == 2:  # a key missing
        del fields[draw(st.integers(0, 2))]
    elif kind == 3:  # an extra key
        fields.append((draw(st.sampled_from(["extra", "Time", "payload "])), "1"))
    elif kind == 4:  # a value of another type
        k = draw(st.integers(0, 2))
        fields[k] = (fields[k][0], draw(_json_values))
    text = "{" + ", ".join(f"{json.dumps(k)}: {v}" for k, v in draw(st.permutations(fields))) + "}"
    if kind == 5:  # not an object
        text = draw(st.one_of(_json_values, st.just(f"[{text}]")))
    raw = text.encode()
    if kind == 6:  # bytes cut, or bytes that are not UTF-8, or a byte-order mark
        cut = draw(st.integers(0, len(raw)))
        raw = draw(st.sampled_from([raw[:cut], raw[:cut] + b"\xff" + raw[cut:],
                                    raw[:cut] + b"\xed\xa0\x80" + raw[cut:], b"\xef\xbb\xbf" + raw,
                                    raw + b"\x00", raw[:cut] + b"\n" + raw[cut:]]))  # fmt: skip
    elif kind == 7:
        raw = draw(st.sampled_from([b"", b"   ", b"\t\r", b" " + raw + b" \r", raw + b"x"]))
    return raw


def _parsed(parse: Any, text: str) -> str:
    try:
        return repr(parse(text))
    except Exception as exc:
        return f"raised {type(exc).__name__}"


@settings(max_examples=300)
@given(
    text=st.one_of(
        _json_values,
        st.tuples(_json_values, st.sampled_from(["", " ", "\n", "x", "}", "{}", ",1"]),
                  st.sampled_from(["", " ", "\t"])).map(lambda x: x[2] + x[0] + x[1]),
        st.text(max_size=12).map("{".__add__),
    )
)
def test_the_scanner_reads_json_text_as_the_decoder_does(text: str) -> None:
    """decode's shortcut for an object with nothing around it: the same value, or the
    same kind of refusal, as json's own decoder."""
    assert _parsed(decode_module._json_text, text) == _parsed(decode_module._JSON, text)


@pytest.mark.parametrize("text", ['{"a": }', '{"a": [}', '{"a": [1,]}', '{"a": x', "{",
                                  '{"a":1,}', '{"a": 1} ', '{"a": 1}x', " {}", "{}", '{"a": NaN}'])
def test_the_scanner_refuses_bad_json_as_the_decoder_does(text: str) -> None:
    # the scanner alone says a missing value by StopIteration: it must not escape
    assert _parsed(decode_module._json_text, text) == _parsed(decode_module._JSON, text)


@settings(max_examples=200)
@given(lines=st.lists(_log_lines(), min_size=1, max_size=8))
def test_replay_reads_every_line_as_the_model_does(lines: list[bytes]) -> None:
    fast, checked = _both(b"\n".join(lines) + b"\n")
    assert fast == checked


@pytest.mark.parametrize("depth", [1, 100, 126, 127, 128, 129, 150, 199, 200, 201, 255, 256, 300])
def test_deep_payloads_are_read_as_the_model_does(depth: int) -> None:
    nested = "[" * depth + "]" * depth
    line = '{"time": "2026-03-14T02:00:00Z", "topic": "t", "payload": {"a": ' + nested + "}}"
    fast, checked = _both(line.encode())
    assert fast == checked


def test_the_usual_line_takes_the_plain_path() -> None:
    """So the property above compares two readers, not one reader with itself."""
    line = (b'{"time": "2026-03-14T02:00:00.250Z", "topic": "meters/rc-0101/volume", '
            b'"payload": {"volume_ml": 1.5, "seq": 123456789012345678901234567890}}')  # fmt: skip
    assert _plain(7, line) == (7, 1773453600.25, "meters/rc-0101/volume",
                            {"volume_ml": 1.5, "seq": 123456789012345678901234567890})  # fmt: skip
    assert _plain(7, line.replace(b".250Z", b".250+00:00")) is None  # the model reads offsets


# --- replay on messages against replay on records ----------------------------------------
def test_replay_of_messages_gives_what_replay_of_records_gives(tmp_path: Path) -> None:
    """A simulated ward (invented flows) with bad and unusual lines among its own: every
    effect, bad line and count alike whether replay builds the records or not."""
    prof = PROFILES["reference-cumulative"]
    start = datetime(2026, 3, 14, tzinfo=UTC).timestamp()  # invented
    records: list[Any] = []
    for b in range(3):
        dev = f"rc-{b:03d}"
        records.append(context_record(start - 60, f"bed-{b}", "ward-r", [dev]))
        s = simulate(prof, dev, datetime.fromtimestamp(start, UTC), 6.0,
                     lambda m, b=b: 20.0 + 40 * b + 10 * math.sin(m / 50),
                     MeterFaults(noise_sd_ml=1.0, duplicate_p=0.05, reorder_p=0.05,
                                 bag_change_every_s=2 * 3600 + 61 * b), seed=b)  # fmt: skip
        records += s.records
    log = tmp_path / "ward.jsonl"
    write_log(log, records)
    lines = log.read_bytes().splitlines()
    odd = [b"", b"not json", b'{"time": "2026-03-14T01:00:00+01:00", "topic": "meters/rc-000/'
           b'volume", "payload": {"device_id": "rc-000", "time": "2026-03-14T00:00:30Z", '
           b'"volume_ml": 5, "seq": 99999}}', b'{"time": "2026-03-14T00:00:00Z", "topic": ""}',
           b'{"time": "2026-03-13T23:00:00Z", "topic": "meters/rc-001/volume", "payload": "x"}']
    for k, line in enumerate(odd):  # fmt: skip
        lines.insert(100 + 200 * k, line)
    log.write_bytes(b"\n".join(lines) + b"\n")

    def replayed(wrap: Any) -> tuple[list[str], list[BadLine], int, int]:
        engine = Engine(list(PROFILES.values()), load_rules(), load_policy())
        r = replay_file(log, engine, warn=None, wrap=wrap)
        shown = [json.dumps(e.to_json()) for e in r.effects if hasattr(e, "to_json")]
        return shown, r.bad_lines, r.messages, r.clock_went_back

    messages, records_ = replayed(None), replayed(lambda items: items)
    assert messages == records_
    assert messages[1] and messages[3]  # bad lines, and a receive time gone back, in both
