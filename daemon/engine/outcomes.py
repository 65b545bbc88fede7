"""Reason codes for everything that can happen to an inbound message.

Bad input is an outcome, never an exception: every reading ends in exactly one
of these codes and is counted per device.
"""

from __future__ import annotations

from collections import Counter
from enum import StrEnum


class Outcome(StrEnum):
    # accepted into the series (possibly adjusted)
    ACCEPTED = "accepted"
    REORDERED = "reordered"  # arrived out of order within tolerance, inserted
    STORE_FORWARD = "store_forward"  # buffered upload, device time well in the past
    CLOCK_SKEW = "clock_skew"  # device time untrusted, receive time used
    NOISE_FALL = "noise_fall"  # small fall on a cumulative meter, smoothed
    BAG_CHANGE = "bag_change"  # emptying seen (flag or fall to near zero)
    BAG_CHANGE_INFERRED = "bag_change_inferred"  # large fall confirmed by the next reading
    SPIKE_HELD = "spike_held"  # implausible jump waiting for confirmation
    SPIKE_CONFIRMED = "spike_confirmed"  # held jump confirmed by the next reading
    # ignored or rejected
    DUPLICATE = "duplicate"
    CONFLICTING_DUPLICATE = "conflicting_duplicate"
    LATE = "late"
    TOO_OLD = "too_old"
    ARTEFACT_DROPPED = "artefact_dropped"
    OUT_OF_RANGE = "out_of_range"
    IMPLAUSIBLE_FLOW = "implausible_flow"
    DEVICE_FAULT = "device_fault"
    BAD_ENCODING = "bad_encoding"
    BAD_PAYLOAD = "bad_payload"
    MISSING_FIELD = "missing_field"
    BAD_TIME = "bad_time"
    BAD_NUMBER = "bad_number"
    BAD_UNIT = "bad_unit"
    BAD_CHECKSUM = "bad_checksum"  # the payload's checksum does not match its text
    DEVICE_ID_MISMATCH = "device_id_mismatch"
    TOO_LARGE = "too_large"  # payload over the service's size limit, never read
    UNBOUND = "unbound"
    WRONG_PROFILE = "wrong_profile"  # a device id on another meter family's topic
    UNKNOWN_TOPIC = "unknown_topic"
    BAD_IDENTIFIER = "bad_identifier"  # a bed id (or user) outside the identifier pattern
    BAD_CONTEXT = "bad_context"
    DEVICE_ON_OTHER_BED = "device_on_other_bed"  # a context claims a meter another bed holds
    BAD_CLINICAL_INPUT = "bad_clinical_input"
    FUTURE_TIME = "future_time"  # a clinical time too far ahead of the receive time
    BAD_ACK = "bad_ack"
    UNKNOWN_ROLE = "unknown_role"  # an acknowledgement by a role the policy does not name
    UNKNOWN_BED = "unknown_bed"


# Outcomes after which the reading's volume is (or will be) in the series.
COUNTED_IN_SERIES = frozenset(
    {
        Outcome.ACCEPTED,
        Outcome.REORDERED,
        Outcome.STORE_FORWARD,
        Outcome.CLOCK_SKEW,
        Outcome.NOISE_FALL,
        Outcome.BAG_CHANGE,
        Outcome.BAG_CHANGE_INFERRED,
        Outcome.SPIKE_CONFIRMED,
    }
)

# Decode-stage rejections: the message never became a reading.
DECODE_REJECTIONS = frozenset(
    {
        Outcome.BAD_ENCODING,
        Outcome.BAD_PAYLOAD,
        Outcome.MISSING_FIELD,
        Outcome.BAD_TIME,
        Outcome.BAD_NUMBER,
        Outcome.BAD_UNIT,
        Outcome.BAD_CHECKSUM,
        Outcome.DEVICE_ID_MISMATCH,
        Outcome.OUT_OF_RANGE,
        Outcome.DEVICE_FAULT,
        Outcome.TOO_LARGE,
    }
)


class DeviceQuality:
    """Per-device counters for the data-quality summary."""

    __slots__ = ("counts", "profile", "received")

    def __init__(self, profile: str) -> None:
        self.profile = profile
        self.received = 0
        self.counts: Counter[Outcome] = Counter()

    def add(self, outcome: Outcome) -> None:
        self.counts[outcome] += 1

    def to_dict(self) -> dict[str, object]:
        return {
            "profile": self.profile,
            "received": self.received,
            "outcomes": {str(k): v for k, v in sorted(self.counts.items())},
        }


# A payload that was withheld (too large, or refused content redacted in an export) is
# replaced by this marker and the reason code, so a replay refuses it for the same reason.
# U+FFFE is a Unicode noncharacter: no meter or clinical system sends it.
WITHHELD = "\ufffewithheld:"


def withheld(reason: Outcome) -> str:
    return WITHHELD + str(reason)


def withheld_reason(payload: object, allowed: frozenset[Outcome]) -> Outcome | None:
    """The reason in a withheld-payload marker (one of `allowed`, else `bad_payload`);
    None when the payload is not a marker."""
    if isinstance(payload, bytes):
        if not payload.startswith(_WITHHELD_BYTES):
            return None
        code = payload[len(_WITHHELD_BYTES) :].decode("utf-8", "replace")
    elif isinstance(payload, str):
        if not payload.startswith(WITHHELD):
            return None
        code = payload[len(WITHHELD) :]
    else:
        return None
    try:
        reason = Outcome(code.strip())
    except ValueError:
        return Outcome.BAD_PAYLOAD
    return reason if reason in allowed else Outcome.BAD_PAYLOAD


_WITHHELD_BYTES = WITHHELD.encode("utf-8")
