"""HL7 v2.6 alert messages over MLLP: ORU^R40 (Report Alert; message structure ORU_R01,
as the IHE Patient Care Device "Alert Communication Management" profile sends it), built
and validated with hl7apy, framed by MLLP, and the receiver's ACK read (original
acknowledgement mode: MSA-1 AA confirms; AE and AR are failures, with MSA-3's text).

Our layout (docs/operations.md, "HL7 v2"): no PID or PV1 segment, because the service
knows no patient identity and the ward and bed are all it may send; they travel in an
observation of type PL. Observations use a local coding system, 99HW.
"""

from __future__ import annotations

import socket
import socketserver
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

from hl7apy.consts import VALIDATION_LEVEL  # type: ignore[import-untyped]
from hl7apy.core import Message  # type: ignore[import-untyped]
from hl7apy.exceptions import HL7apyException  # type: ignore[import-untyped]
from hl7apy.parser import parse_message  # type: ignore[import-untyped]

from ..pages import Answer, Page
from ..settings import Hl7Channel

VERSION = "2.6"
START, END = b"\x0b", b"\x1c\r"  # MLLP block framing
MAX_ACK_BYTES = 1 << 20
CODES = "99HW"  # our local coding system (HL7 table 0396: 99zzz is for local use)
# OBR-4: the alert as an event, IEEE 11073-10101 MDC_EVT_ALARM (from memory: IHE PCD ACM)
ALERT_EVENT = "196616^MDC_EVT_ALARM^MDC"
# OBX-8 in IHE PCD ACM (from memory): alert priority, then the alert source kind
PRIORITY_FLAG = {"high": "PH", "medium": "PM", "low": "PL", "info": "PN"}
KIND_FLAG = {"physiological": "SP", "technical": "ST", "advisory": "SA", "reminder": "SA"}


def escape(text: str) -> str:
    """HL7 v2 escape sequences (chapter 2) for the default delimiters |^~\\&; line breaks
    become spaces (a page is one line)."""
    out = text.replace("\\", "\\E\\").replace("|", "\\F\\").replace("^", "\\S\\")
    out = out.replace("&", "\\T\\").replace("~", "\\R\\")
    return out.replace("\r", " ").replace("\n", " ")


def hl7_time(t: float) -> str:
    return datetime.fromtimestamp(t, UTC).strftime("%Y%m%d%H%M%S+0000")


def control_id(page: Page) -> str:
    """MSH-10 from the idempotency key: a copy of a page has the same control id."""
    return page.key[:20]


def oru_r40(page: Page, cfg: Hl7Channel, now: float) -> str:
    """The page as ER7 text (segments separated by CR), validated against HL7 v2.6."""
    m = Message("ORU_R01", version=VERSION, validation_level=VALIDATION_LEVEL.STRICT)
    m.msh.msh_3 = escape(cfg.sending_application)
    m.msh.msh_4 = escape(cfg.sending_facility)
    m.msh.msh_5 = escape(cfg.receiving_application)
    m.msh.msh_6 = escape(cfg.receiving_facility)
    m.msh.msh_7 = hl7_time(now)
    m.msh.msh_9 = "ORU^R40^ORU_R01"
    m.msh.msh_10 = control_id(page)
    m.msh.msh_11 = "P"
    m.msh.msh_18 = "UNICODE UTF-8"
    order = m.add_group("ORU_R01_PATIENT_RESULT").add_group("ORU_R01_ORDER_OBSERVATION")
    order.obr.obr_1 = "1"
    order.obr.obr_3 = escape(page.alarm_id)  # the alert's own identifier
    order.obr.obr_4 = ALERT_EVENT
    order.obr.obr_7 = hl7_time(page.event_time)
    flags = [PRIORITY_FLAG.get(page.priority, "PN"), KIND_FLAG.get(page.alarm_kind, "SA")]
    rows: list[tuple[str, str, str, list[str]]] = [
        ("TX", f"PAGE^Page text^{CODES}", escape(page.text), flags),
        ("CWE", f"ALARM-RULE^Alarm rule^{CODES}",
         f"{escape(page.rule)}^{escape(page.title)}^{CODES}", []),
        ("ST", f"ALARM-STATE^Alarm state^{CODES}", escape(page.state), []),
        ("PL", f"LOCATION^Alarm location^{CODES}",
         f"{escape(page.ward or '')}^^{escape(page.bed or '')}", []),
        ("ST", f"RECIPIENT^Intended recipient^{CODES}", escape(page.recipient), []),
        ("ST", f"ROLE^Paged role^{CODES}", escape(page.role), []),
    ]  # fmt: skip
    for n, (vtype, code, value, abnormal) in enumerate(rows, start=1):
        obx = order.add_group("ORU_R01_OBSERVATION").obx
        obx.obx_1 = str(n)
        obx.obx_2 = vtype
        obx.obx_3 = code
        obx.obx_4 = "1"
        obx.obx_5 = value
        for k, flag in enumerate(abnormal):  # a repeated field: one repetition per flag
            if k == 0:
                obx.obx_8 = flag
            else:
                obx.add_field("OBX_8").value = flag
        obx.obx_11 = "F"
        obx.obx_14 = hl7_time(page.event_time)
    m.validate()  # hl7apy: structure, required fields, data types; raises if not valid
    text: str = m.to_er7()
    return text


def exchange(host: str, port: int, message: bytes, timeout_s: float) -> bytes:
    """Send one MLLP block and read one back (the ACK), within `timeout_s` per step."""
    with socket.create_connection((host, port), timeout=timeout_s) as sock:
        _not_self(sock)
        sock.sendall(START + message + END)
        buf = b""
        while END not in buf:
            chunk = sock.recv(4096)
            if not chunk:
                raise ConnectionError("the receiver closed the connection before its ACK")
            buf += chunk
            if len(buf) > MAX_ACK_BYTES:
                raise ConnectionError("no end of block within 1 MiB")
    start = buf.find(START)
    return buf[start + 1 if start >= 0 else 0 : buf.find(END)]


def _not_self(sock: socket.socket) -> None:
    """A connect to a loopback port nobody listens on can meet itself (TCP simultaneous
    open, when the kernel picks that very port as the local one): that is no receiver."""
    if sock.getsockname() == sock.getpeername():
        raise ConnectionRefusedError(111, "connection refused (connected to itself)")


def read_ack(raw: bytes, expected_control_id: str) -> Answer:
    """MSA-1 of the receiver's ACK: AA confirms; AE and AR fail with MSA-3's text."""
    try:
        text = raw.decode("utf-8").replace("\n", "\r").strip("\r")
        ack = parse_message(text, validation_level=VALIDATION_LEVEL.TOLERANT, find_groups=False)
        msa = ack.msa
        code = msa.msa_1.to_er7()
        refers = msa.msa_2.to_er7()
        text = msa.msa_3.to_er7() if msa.msa_3 is not None else ""
    except (HL7apyException, UnicodeDecodeError, AttributeError, IndexError, ValueError) as exc:
        return Answer(False, f"unreadable ACK: {type(exc).__name__}: {exc}"[:300])
    if refers != expected_control_id:
        return Answer(False, f"ACK {code} for message {refers!r}, not {expected_control_id!r}")
    label = {"AA": "accepted", "AE": "error", "AR": "rejected"}.get(code, "unknown code")
    answer = f"ACK {code} ({label})" + (f": {text}" if text else "")
    return Answer(code == "AA", answer[:300], channel_fault=code != "AR")


class Hl7Sender:
    kind = "hl7v2-mllp"

    def __init__(self, cfg: Hl7Channel, clock: Callable[[], float] = time.time) -> None:
        self.cfg = cfg
        self.name = cfg.name
        self._clock = clock

    def send(self, pages: Sequence[Page]) -> list[Answer]:
        return [self._one(p) for p in pages]

    def _one(self, page: Page) -> Answer:
        try:
            text = oru_r40(page, self.cfg, self._clock())
        except (HL7apyException, ValueError) as exc:
            return Answer(False, f"HL7 message not valid: {exc}"[:300], channel_fault=False)
        try:
            raw = exchange(self.cfg.host, self.cfg.port, text.encode("utf-8"), self.cfg.timeout_s)
        except OSError as exc:
            return Answer(False, f"MLLP: {exc.strerror or exc or type(exc).__name__}"[:300])
        return read_ack(raw, control_id(page))

    def probe(self) -> Answer:
        try:
            with socket.create_connection((self.cfg.host, self.cfg.port),
                                          self.cfg.timeout_s) as sock:  # fmt: skip
                _not_self(sock)
        except OSError as exc:
            return Answer(False, f"MLLP: {exc.strerror or exc}"[:300])
        return Answer(True, "MLLP: connection accepted")


# --- status reports from the alert manager (optional) --------------------------------------
@dataclass(frozen=True)
class StatusReport:
    """An ORU^R41 from the alert manager about one of our alerts (our layout, modelled
    on IHE PCD ACM "Report Alert Status"): OBR-3 our alarm id, an OBX `STATUS` with the
    status word, optionally `RECIPIENT` (as we sent it) and OBX-16 the person."""

    control_id: str
    alarm_id: str
    status: str
    recipient: str | None
    by: str | None


def read_status(text: str) -> StatusReport:
    """Parse and validate (hl7apy) an ORU^R41; ValueError says what is wrong."""
    try:
        msg = parse_message(text, validation_level=VALIDATION_LEVEL.STRICT)
        msg.validate()
    except HL7apyException as exc:
        raise ValueError(f"not a valid HL7 v2 message: {exc}") from None
    control = msg.msh.msh_10.to_er7()
    mtype = msg.msh.msh_9.to_er7().split("^")
    if mtype[:2] != ["ORU", "R41"]:
        raise ValueError(f"expected ORU^R41, got {'^'.join(mtype[:2])}")
    order = msg.ORU_R01_PATIENT_RESULT.ORU_R01_ORDER_OBSERVATION
    alarm_id = unescape(order.obr.obr_3.to_er7().split("^")[0])
    values: dict[str, str] = {}
    by: str | None = None
    for group in order.ORU_R01_OBSERVATION:
        obx = group.obx
        code = obx.obx_3.to_er7().split("^")[0].upper()
        values[code] = unescape(obx.obx_5.to_er7())
        if code == "STATUS":
            person = [unescape(x) for x in obx.obx_16.to_er7().split("^")[:2]]
            by = next((x.strip() for x in person if x.strip()), None)
    if not alarm_id or "STATUS" not in values:
        raise ValueError("OBR-3 (the alarm id) and an OBX STATUS are required")
    return StatusReport(control, alarm_id, values["STATUS"].strip(), values.get("RECIPIENT"), by)


def unescape(text: str) -> str:
    for seq, ch in (("\\F\\", "|"), ("\\S\\", "^"), ("\\T\\", "&"), ("\\R\\", "~")):
        text = text.replace(seq, ch)
    return text.replace("\\E\\", "\\")


def ack_message(cfg: Hl7Channel, control: str, code: str, text: str, now: float) -> str:
    """Our ACK (original mode) to a message the alert manager sent us."""
    ack = Message("ACK", version=VERSION, validation_level=VALIDATION_LEVEL.STRICT)
    ack.msh.msh_3 = escape(cfg.sending_application)
    ack.msh.msh_4 = escape(cfg.sending_facility)
    ack.msh.msh_5 = escape(cfg.receiving_application)
    ack.msh.msh_6 = escape(cfg.receiving_facility)
    ack.msh.msh_7 = hl7_time(now)
    ack.msh.msh_9 = "ACK^R41^ACK"
    ack.msh.msh_10 = f"ack-{control}"[:20]
    ack.msh.msh_11 = "P"
    ack.msa.msa_1 = code
    ack.msa.msa_2 = escape(control)
    if text:
        ack.msa.msa_3 = escape(text)[:80]
    out: str = ack.to_er7()
    return out


OnStatus = Callable[[StatusReport], tuple[str, str]]  # -> (MSA-1 code, MSA-3 text)


class StatusListener:
    """An MLLP listener for the alert manager's status reports. Each block is answered:
    AA (taken), AE (understood, not acted on: e.g. the alarm is over), AR (not a
    valid ORU^R41)."""

    def __init__(self, cfg: Hl7Channel, host: str, port: int, on_status: OnStatus,
                 clock: Callable[[], float] = time.time, log: Any = None) -> None:  # fmt: skip
        self.cfg = cfg
        listener = self

        class Handler(socketserver.BaseRequestHandler):
            def handle(self) -> None:
                sock = self.request
                sock.settimeout(max(30.0, cfg.timeout_s))
                buf = b""
                while True:
                    try:
                        chunk = sock.recv(65536)
                    except OSError:
                        return
                    if not chunk:
                        return
                    buf += chunk
                    if len(buf) > MAX_ACK_BYTES:
                        return
                    while END in buf:
                        block, buf = buf.split(END, 1)
                        start = block.find(START)
                        reply = listener.answer(block[start + 1 if start >= 0 else 0 :])
                        sock.sendall(START + reply.encode("utf-8") + END)

        class Server(socketserver.ThreadingTCPServer):
            allow_reuse_address = True
            daemon_threads = True

        self._on_status = on_status
        self._clock = clock
        self._log = log
        self.server = Server((host, port), Handler)
        self.address: tuple[str, int] = self.server.server_address[:2]  # type: ignore[assignment]
        self._thread = threading.Thread(
            target=self.server.serve_forever, name=f"hourwatch-hl7-status-{cfg.name}", daemon=True
        )

    def answer(self, block: bytes) -> str:
        text = block.decode("utf-8", errors="replace").replace("\n", "\r").strip("\r")
        control = ""
        try:
            control = text.split("\r", 1)[0].split("|")[9] if text.startswith("MSH|") else ""
            report = read_status(text)
        except (ValueError, IndexError) as exc:
            if self._log is not None:
                self._log.warning("hl7_status_refused", channel=self.cfg.name, error=str(exc)[:200])
            return ack_message(self.cfg, control, "AR", str(exc), self._clock())
        code, why = self._on_status(report)
        return ack_message(self.cfg, report.control_id, code, why, self._clock())

    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        if self._thread.is_alive():
            self.server.shutdown()
            self._thread.join(2.0)
        self.server.server_close()
