"""Engine snapshots: the engine's state as compact bytes, and back (no I/O).

A restart loads the newest snapshot and feeds only the journal after it, instead of
re-feeding the longest rule window (daemon/recovery.py).

The walker is generic and explicit: it knows a short list of kinds and refuses every
other type (`Unsupported`), so a state type it cannot carry fails a test instead of
being lost in silence.
- None, bool, int, float, str; tuples, lists, dicts, sets, frozensets, deques, Counters;
- typed arrays (array.array), numpy arrays and numpy scalars (type kept);
- enum members, by name;
- dataclasses (slots or not, frozen or not) and classes with __slots__ of the engine's
  own modules, field by field;
- pydantic models by value (their JSON, validated again on load);
- "links": objects of the engine's configuration (profiles, decoders, rules, policies),
  by name. Configuration is never copied into a snapshot: the engine that loads one is
  built from the configuration of its own start, and the fingerprint says it is the same.
Shared objects stay shared (a cleaner and its bed hold the same minute series): each
object is written once, later occurrences refer back to it.

Format: zlib of [8-byte length][JSON document][binary blobs]. The document is
{"format", "layout", "config", "classes", "extra", "blobs", "state"}; typed arrays,
numpy arrays and long lists of floats or ints are raw bytes in the blobs (their
lengths in "blobs"), referred to by index from the state.
- `format`: FORMAT, raised when the encoding itself changes;
- `layout`: a hash of every class encoded, with its field names (and the engine's own
  state attributes); on load each class must still exist with exactly those fields;
- `config`: a hash of the loaded profiles, rules, policies and engine settings.
A snapshot that differs in any of these is refused (`Mismatch`), a damaged one too
(`Corrupt`): the caller then re-feeds the journal in full. Never misread.
"""

from __future__ import annotations

import base64
import dataclasses
import enum
import hashlib
import json
import struct
import sys
import zlib
from array import array
from collections import Counter, deque
from collections.abc import Mapping, Sequence
from typing import Any, NamedTuple

import numpy as np
from pydantic import BaseModel

from .engine import Engine

FORMAT = 1
# The engine's own modules: only their classes are walked field by field.
MODULES = ("daemon.engine.",)
PACK_MIN = 8  # lists at least this long of only floats (or ints) are packed as bytes

# Engine attributes made from its constructor's arguments (re-made by Engine(...) on a
# restart) or caches of them: not state. Every other attribute is state and is walked;
# a new attribute that is configuration belongs here (a test checks the split).
ENGINE_CONFIG = frozenset({
    "observe", "profiles", "_routes", "_decoders", "_calibration", "prefix", "_bed_topic",
    "_ack_topic", "_ack_users", "_ack_advertised", "_id", "_clinical_ahead_s",
    "_unbound_expiry_s", "_max_unbound", "_max_beds", "_slowest_period", "_max_ml_per_min",
    "_route_cache", "rules", "_ack_roles", "_staff", "advice_policy", "clock", "evaluator",
    "_advice_sources", "_advice_rules", "_ack_valid", "_hypovolaemia_rules",
    "_series_keep_min",
})  # fmt: skip
ENGINE_CLASS = "daemon.engine.engine:Engine"  # the pseudo-class of the state attributes


class Unsupported(TypeError):
    """A type the walker does not know: add it to the walker, or to the links."""


class Mismatch(ValueError):
    """The snapshot was made by another format, code layout or configuration."""


class Corrupt(ValueError):
    """The bytes are not a whole snapshot."""


# --- encoding ------------------------------------------------------------------------
def _fields(cls: type) -> list[str]:
    """A class's fields as the walker writes them, or Unsupported."""
    if not cls.__module__.startswith(MODULES):
        raise Unsupported(f"{cls.__module__}.{cls.__qualname__}: not an engine class")
    if dataclasses.is_dataclass(cls):
        return [f.name for f in dataclasses.fields(cls)]
    slots: list[str] = []
    for c in reversed(cls.__mro__[:-1]):  # object last: nothing of its own
        if "__slots__" not in c.__dict__:
            raise Unsupported(f"{cls.__qualname__}: neither a dataclass nor slotted ({c.__name__})")
        own = c.__dict__["__slots__"]
        slots += [own] if isinstance(own, str) else [s for s in own if s != "__weakref__"]
    if "__dict__" in slots:
        raise Unsupported(f"{cls.__qualname__}: has a __dict__ beside its slots")
    return slots


def _class_name(cls: type) -> str:
    return f"{cls.__module__}:{cls.__qualname__}"


def _layout(cls: type) -> list[str]:
    if issubclass(cls, enum.Enum):
        return [m.name for m in cls]
    if issubclass(cls, BaseModel):
        return sorted(cls.model_fields)
    if issubclass(cls, tuple):  # a NamedTuple
        return list(cls._fields)  # type: ignore[attr-defined]
    return _fields(cls)


def _unpack(kind: str, raw: bytes) -> list[Any]:
    a = array(kind)
    a.frombytes(raw)
    return a.tolist()


class _Encoder:
    def __init__(self, links: Mapping[str, object]) -> None:
        self.links = {id(obj): name for name, obj in links.items()}
        self.memo: dict[int, int] = {}  # id(obj) -> its number, in order of first meeting
        self.keep: list[object] = []  # the objects numbered: their ids stay theirs
        self.classes: dict[type, int] = {}
        self.blobs: list[bytes] = []  # raw bytes, referred to by index

    def blob(self, data: bytes) -> int:
        self.blobs.append(data)
        return len(self.blobs) - 1

    def cls(self, cls: type) -> int:
        n = self.classes.get(cls)
        if n is None:
            _layout(cls)  # refuses what it cannot carry
            n = self.classes[cls] = len(self.classes)
        return n

    def table(self) -> list[list[object]]:
        return [[_class_name(c), _layout(c)] for c in self.classes]

    def number(self, obj: object) -> None:
        self.memo[id(obj)] = len(self.memo)
        self.keep.append(obj)

    def enc(self, x: Any) -> Any:
        t = type(x)
        if x is None or t is bool or t is int or t is str or t is float:
            return x
        name = self.links.get(id(x))
        if name is not None:
            return ["@", name]
        seen = self.memo.get(id(x))
        if seen is not None:
            return ["r", seen]
        if t is list:
            self.number(x)
            return self.seq("L", x)
        if t is tuple:
            self.number(x)
            return ["T", *[self.enc(v) for v in x]]
        if t is dict or t is Counter:
            self.number(x)
            return ["D" if t is dict else "C", self.items(list(x)), self.items(list(x.values()))]
        if t is set or t is frozenset:
            self.number(x)
            return ["S" if t is set else "F", *[self.enc(v) for v in x]]
        if t is deque:
            self.number(x)
            return ["Q", x.maxlen, self.seq("L", list(x))]
        if t is array:
            self.number(x)
            return ["Y", x.typecode, self.blob(x.tobytes())]
        if t is np.ndarray:
            self.number(x)
            if x.dtype.hasobject:
                raise Unsupported("numpy array of objects")
            return ["A", x.dtype.str, list(x.shape), self.blob(np.ascontiguousarray(x).tobytes())]
        if isinstance(x, np.generic) and not isinstance(x, np.object_):
            return ["N", x.dtype.str, base64.b64encode(x.tobytes()).decode("ascii")]
        if isinstance(x, enum.Enum):
            return ["E", self.cls(t), x.name]
        if isinstance(x, BaseModel):
            self.number(x)
            return ["P", self.cls(t), x.model_dump_json()]
        if isinstance(x, tuple) and hasattr(t, "_fields"):  # a NamedTuple
            self.number(x)
            return ["U", self.cls(t), *[self.enc(v) for v in x]]
        if not isinstance(t, type) or isinstance(x, type):
            raise Unsupported(f"{t!r}")
        n = self.cls(t)  # refuses classes that are not the engine's, or not slotted
        self.number(x)
        names = _fields(t)
        if hasattr(x, "__dict__") and set(vars(x)) - set(names):
            raise Unsupported(f"{t.__qualname__}: attributes beside its fields")
        return ["O", n, *[self.enc(getattr(x, f)) for f in names]]

    def items(self, values: list[Any]) -> Any:
        """A dict's keys or values: one list, packed when it can be (not numbered)."""
        return self.seq("L", values)

    def seq(self, tag: str, values: list[Any]) -> list[Any]:
        if len(values) >= PACK_MIN:
            if all(type(v) is float for v in values):
                return [tag + "f", self.blob(array("d", values).tobytes())]
            ints = all(type(v) is int for v in values)
            if ints and min(values) >= -(2**63) and max(values) < 2**63:
                return [tag + "i", self.blob(array("q", values).tobytes())]
            # rows of floats (a cleaner's (time, level) history): one blob, row by row
            # (immutable tuples: that they are not numbered changes nothing)
            w = len(values[0]) if type(values[0]) is tuple else 0
            if w and all(type(v) is tuple and len(v) == w for v in values):
                flat = [f for v in values for f in v]
                if all(type(f) is float for f in flat):
                    return [tag + "t", w, self.blob(array("d", flat).tobytes())]
        return [tag, *[self.enc(v) for v in values]]


# --- decoding ------------------------------------------------------------------------
_PENDING = object()  # a numbered tuple still being built


def _resolve(name: str) -> type:
    module, _, qual = name.partition(":")
    if not module.startswith(MODULES):
        raise Mismatch(f"class {name} is not an engine class")
    obj: Any = sys.modules.get(module)  # loaded with the engine: no import, no I/O
    for part in qual.split("."):
        obj = getattr(obj, part, None)
    if not isinstance(obj, type):
        raise Mismatch(f"class {name} is gone")
    return obj


class _Decoder:
    def __init__(self, classes: list[Any], links: Mapping[str, object],
                 blobs: list[bytes]) -> None:  # fmt: skip
        self.classes = classes
        self.links = links
        self.blobs = blobs
        self.memo: list[Any] = []

    def number(self, obj: Any) -> int:
        self.memo.append(obj)
        return len(self.memo) - 1

    def dec(self, x: Any) -> Any:
        if not isinstance(x, list):
            return x
        tag = x[0]
        if tag == "@":
            if x[1] not in self.links:
                raise Mismatch(f"no configuration object {x[1]!r}")
            return self.links[x[1]]
        if tag == "r":
            obj = self.memo[x[1]]
            if obj is _PENDING:
                raise Corrupt("a reference into a tuple being built")
            return obj
        if tag in ("L", "Lf", "Li", "Lt"):
            out: list[Any] = []
            self.number(out)
            out += self.seq(x)
            return out
        if tag == "T" or tag == "U":
            n = self.number(_PENDING)
            if tag == "T":
                tup: Any = tuple(self.dec(v) for v in x[1:])
            else:
                tup = self.classes[x[1]](*[self.dec(v) for v in x[2:]])
            self.memo[n] = tup
            return tup
        if tag == "D" or tag == "C":
            d: dict[Any, Any] = {} if tag == "D" else Counter()
            self.number(d)
            keys, values = self.seq(x[1]), self.seq(x[2])
            if len(keys) != len(values):
                raise Corrupt("a dict's keys and values differ in number")
            for k, v in zip(keys, values, strict=True):
                d[k] = v  # not Counter.update, which would count the pairs
            return d
        if tag == "S":
            s: set[Any] = set()
            self.number(s)
            s.update(self.dec(v) for v in x[1:])
            return s
        if tag == "F":
            n = self.number(_PENDING)
            self.memo[n] = frozenset(self.dec(v) for v in x[1:])
            return self.memo[n]
        if tag == "Q":
            q: deque[Any] = deque(maxlen=x[1])
            self.number(q)
            q.extend(self.seq(x[2]))
            return q
        if tag == "Y":
            typed = array(x[1])
            typed.frombytes(self.blobs[x[2]])
            self.number(typed)
            return typed
        if tag == "A":
            raw = self.blobs[x[3]]
            arr = np.frombuffer(raw, dtype=np.dtype(x[1])).reshape(x[2]).copy()
            self.number(arr)
            return arr
        if tag == "N":
            return np.frombuffer(base64.b64decode(x[2], validate=True), dtype=np.dtype(x[1]))[0]
        if tag == "E":
            return self.classes[x[1]][x[2]]
        if tag == "P":
            n = self.number(_PENDING)
            model = self.classes[x[1]].model_validate_json(x[2])
            self.memo[n] = model
            return model
        if tag == "O":
            cls = self.classes[x[1]]
            obj = object.__new__(cls)
            self.number(obj)
            names = _fields(cls)
            if len(names) != len(x) - 2:
                raise Corrupt(f"{cls.__qualname__}: {len(x) - 2} values for {len(names)} fields")
            for f, v in zip(names, x[2:], strict=True):
                object.__setattr__(obj, f, self.dec(v))
            return obj
        raise Corrupt(f"unknown tag {tag!r}")

    def seq(self, x: list[Any]) -> list[Any]:
        tag = x[0]
        if tag.endswith("t"):
            w, flat = x[1], _unpack("d", self.blobs[x[2]])
            if w < 1 or len(flat) % w:
                raise Corrupt("rows of floats of another width")
            return [tuple(flat[i : i + w]) for i in range(0, len(flat), w)]
        if tag.endswith("f"):
            return _unpack("d", self.blobs[x[1]])
        if tag.endswith("i"):
            return _unpack("q", self.blobs[x[1]])
        return [self.dec(v) for v in x[1:]]


# --- whole documents -------------------------------------------------------------------
def _digest(obj: object) -> str:
    text = json.dumps(obj, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()[:16]


class Captured(NamedTuple):
    """A state encoded but not yet compressed: taken while the engine stands still,
    compressed after (it shares nothing with the engine any more)."""

    document: bytes
    blobs: list[bytes]

    def pack(self, level: int = 1) -> bytes:
        head = struct.pack("<Q", len(self.document))
        return zlib.compress(b"".join([head, self.document, *self.blobs]), level)


def capture(root: object, links: Mapping[str, object], config: str = "",
            extra_layout: Mapping[str, list[str]] | None = None) -> Captured:  # fmt: skip
    """`root` encoded; Unsupported names the first type it cannot carry."""
    enc = _Encoder(links)
    state = enc.enc(root)
    table = enc.table()
    layout = dict(extra_layout or {})
    doc = {
        "format": FORMAT,
        "layout": _digest([table, sorted(layout.items())]),
        "config": config,
        "classes": table,
        "extra": layout,
        "blobs": [len(b) for b in enc.blobs],
        "state": state,
    }
    text = json.dumps(doc, separators=(",", ":"), allow_nan=True)
    return Captured(text.encode(), enc.blobs)


def encode(root: object, links: Mapping[str, object], config: str = "",
           extra_layout: Mapping[str, list[str]] | None = None) -> bytes:  # fmt: skip
    """`root` as snapshot bytes; Unsupported names the first type it cannot carry."""
    return capture(root, links, config, extra_layout).pack()


def _open(blob: bytes) -> tuple[dict[str, Any], list[bytes]]:
    """The document and its blobs (Corrupt if the bytes are not a whole snapshot)."""
    try:
        raw = zlib.decompress(blob)  # its checksum catches damage and truncation
        (n,) = struct.unpack_from("<Q", raw)
        doc = json.loads(raw[8 : 8 + n])
    except (zlib.error, struct.error, ValueError, RecursionError) as exc:
        raise Corrupt(f"not a snapshot: {exc}") from None
    keys = {"format", "layout", "config", "classes", "extra", "blobs", "state"}
    if not isinstance(doc, dict) or not keys <= set(doc):
        raise Corrupt("not a snapshot: fields missing")
    sizes = doc["blobs"]
    if not isinstance(sizes, list) or 8 + n + sum(sizes) != len(raw):
        raise Corrupt("not a snapshot: its binary part has another length")
    blobs, at = [], 8 + n
    for size in sizes:
        blobs.append(raw[at : at + size])
        at += size
    return doc, blobs


def header(blob: bytes) -> dict[str, Any]:
    """The snapshot's document (Corrupt if it is not one)."""
    return _open(blob)[0]


def decode(blob: bytes, links: Mapping[str, object], config: str = "",
           extra_layout: Mapping[str, list[str]] | None = None) -> Any:  # fmt: skip
    """The state `encode` was given, rebuilt; Mismatch or Corrupt, never a misreading."""
    doc, blobs = _open(blob)
    if doc["format"] != FORMAT:
        raise Mismatch(f"snapshot format {doc['format']}, this version reads {FORMAT}")
    if doc["config"] != config:
        raise Mismatch("made with other profiles, rules, policies or settings")
    try:
        table = [(name, list(fields)) for name, fields in doc["classes"]]
        if _digest([[list(t) for t in table], sorted(doc["extra"].items())]) != doc["layout"]:
            raise Corrupt("layout fingerprint does not match the class table")
        classes = []
        for name, fields in table:
            cls = _resolve(name)
            try:
                now = _layout(cls)
            except Unsupported as exc:
                raise Mismatch(f"class {name}: {exc}") from None
            if now != fields:
                raise Mismatch(f"class {name} has other fields now")
            classes.append(cls)
        for name, fields in (extra_layout or {}).items():
            if doc["extra"].get(name) != list(fields):
                raise Mismatch(f"{name} has other state attributes now")
        return _Decoder(classes, links, blobs).dec(doc["state"])
    except (Mismatch, Corrupt):
        raise
    except Exception as exc:  # anything else the bytes can provoke: not a snapshot we read
        raise Corrupt(f"{type(exc).__name__}: {str(exc)[:200]}") from None


# --- the engine --------------------------------------------------------------------------
def state_names(engine: Engine) -> list[str]:
    return sorted(k for k in vars(engine) if k not in ENGINE_CONFIG)


def links(engine: Engine) -> dict[str, object]:
    """The engine's configuration objects its state may point at, by name."""
    # values that Python may share (a small int, "", the empty tuple) are never links
    shared = (int, float, str, tuple, frozenset)
    out: dict[str, object] = {
        f"engine.{k}": v for k, v in vars(engine).items()
        if k in ENGINE_CONFIG and v is not None and not isinstance(v, shared)
    }  # fmt: skip
    for p in engine.profiles:
        out[f"profile:{p.name}"] = p
    for name, d in engine._decoders.items():
        out[f"decoder:{name}"] = d
    for r in engine.rules:
        out[f"rule:{r.id}"] = r
    out["policy"] = engine.book._policy
    return out


def config_fingerprint(engine: Engine) -> str:
    """Of what the engine was built from: profiles, rules, policies and settings."""
    parts: list[object] = [
        [p.model_dump_json() for p in engine.profiles],
        [r.model_dump_json() for r in engine.rules],
        engine.book._policy.model_dump_json(),
        engine.book.ack_validity_s,
        engine.advice_policy.model_dump_json(),
        str(engine.clock.tz),
        sorted((k, v.model_dump_json()) for k, v in engine._calibration.items()),
        None if engine._staff is None else sorted((u, sorted(r)) for u, r in engine._staff.items()),
        [engine.prefix, engine._ack_advertised, engine._id.pattern, engine._clinical_ahead_s,
         engine._unbound_expiry_s, engine._max_unbound, engine._max_beds,
         engine._series_keep_min],
    ]  # fmt: skip
    return _digest(parts)


EXTRA = "extra:"  # state keys of what the shell keeps beside the engine (its observer's)


def take(engine: Engine, extra: Mapping[str, object] | None = None) -> bytes:
    """The engine's state as snapshot bytes."""
    return take_captured(engine, extra).pack()


def take_captured(engine: Engine, extra: Mapping[str, object] | None = None) -> Captured:
    """The engine's state encoded, for `pack()` later (the service captures under the
    engine's lock and compresses outside it). `extra`: named plain data the shell keeps
    in step with the engine (what its observer saw), restored with it or not at all."""
    engine.book.settle()  # alarm words built lazily are built now: closures do not travel
    state = {k: getattr(engine, k) for k in state_names(engine)}
    for name, value in (extra or {}).items():
        state[EXTRA + name] = value
    return capture(state, links(engine), config_fingerprint(engine),
                   {ENGINE_CLASS: sorted(state)})  # fmt: skip


def restore(engine: Engine, blob: bytes, extra: Sequence[str] = ()) -> dict[str, Any]:
    """Put a snapshot's state into `engine`, freshly built from the same configuration,
    and return the `extra` it was taken with, by name; a snapshot taken with other
    extras is a Mismatch (a full re-feed rebuilds them). Mismatch or Corrupt leave the
    engine untouched."""
    names = sorted(state_names(engine) + [EXTRA + n for n in extra])
    state = decode(blob, links(engine), config_fingerprint(engine), {ENGINE_CLASS: names})
    if not isinstance(state, dict) or sorted(state) != names:
        raise Corrupt("the engine's state attributes are not all there")
    extras = {k[len(EXTRA) :]: state.pop(k) for k in names if k.startswith(EXTRA)}
    for k, v in state.items():
        setattr(engine, k, v)
    engine.evaluator.book = engine.book  # the evaluator (configuration) asks the book
    return extras

