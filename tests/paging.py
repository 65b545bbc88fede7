"""Real servers on loopback for the paging tests (never mocks): an SMTP server (aiosmtpd,
optionally with STARTTLS and AUTH, with a certificate made by the `cryptography`
package), an HTTP server that checks a webhook's HMAC signature, and an MLLP listener
that parses each HL7 message with hl7apy and answers with the codes it is told.

Every server records what it received, independently of the code under test (the
signature and the HL7 escapes are checked here with their own few lines).
"""

from __future__ import annotations

import contextlib
import datetime as dt
import hashlib
import hmac
import json
import socket
import socketserver
import ssl
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from email import message_from_bytes, policy
from email.message import EmailMessage
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def wait_until(pred: Callable[[], Any], timeout: float, what: str) -> Any:
    deadline = time.monotonic() + timeout
    while True:
        found = pred()
        if found:
            return found
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout} s waiting for {what}")
        time.sleep(0.02)


# --- certificates ------------------------------------------------------------------------
@dataclass(frozen=True)
class TlsFiles:
    ca: Path
    cert: Path
    key: Path

    def server_context(self) -> ssl.SSLContext:
        ctx = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
        ctx.load_cert_chain(self.cert, self.key)
        return ctx


def make_certificates(folder: Path) -> TlsFiles:
    """A test CA and a server certificate for localhost and 127.0.0.1, made with the
    `cryptography` package."""
    import ipaddress

    from cryptography import x509
    from cryptography.hazmat.primitives import hashes, serialization
    from cryptography.hazmat.primitives.asymmetric import ec
    from cryptography.x509.oid import NameOID

    now = dt.datetime.now(dt.UTC)
    ca_key = ec.generate_private_key(ec.SECP256R1())
    ca_name = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, "hourwatch test CA")])
    ca = (
        x509.CertificateBuilder().subject_name(ca_name).issuer_name(ca_name)
        .public_key(ca_key.public_key()).serial_number(x509.random_serial_number())
        .not_valid_before(now - dt.timedelta(minutes=5))
        .not_valid_after(now + dt.timedelta(days=1))
        .add_extension(x509.BasicConstraints(ca=True, path_length=None), critical=True)
        .add_extension(x509.KeyUsage(digital_signature=True, key_cert_sign=True, crl_sign=True,
                                     content_commitment=False, key_encipherment=False,
                                     data_encipherment=False, key_agreement=False,
                                     encipher_only=False, decipher_only=False), critical=True)
        .sign(ca_key, hashes.SHA256())
    )  # fmt: skip
    key = ec.generate_private_key(ec.SECP256R1())
    cert = (
        x509.CertificateBuilder()
        .subject_name(x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, "localhost")]))
        .issuer_name(ca_name).public_key(key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(now - dt.timedelta(minutes=5))
        .not_valid_after(now + dt.timedelta(days=1))
        .add_extension(x509.SubjectAlternativeName([
            x509.DNSName("localhost"), x509.IPAddress(ipaddress.ip_address("127.0.0.1"))]),
            critical=False)
        .add_extension(x509.ExtendedKeyUsage([x509.oid.ExtendedKeyUsageOID.SERVER_AUTH]),
                       critical=False)
        .sign(ca_key, hashes.SHA256())
    )  # fmt: skip
    folder.mkdir(parents=True, exist_ok=True)
    files = TlsFiles(folder / "ca.pem", folder / "server.pem", folder / "server.key")
    files.ca.write_bytes(ca.public_bytes(serialization.Encoding.PEM))
    files.cert.write_bytes(cert.public_bytes(serialization.Encoding.PEM))
    files.key.write_bytes(key.private_bytes(serialization.Encoding.PEM,
                                            serialization.PrivateFormat.PKCS8,
                                            serialization.NoEncryption()))  # fmt: skip
    return files


# --- SMTP --------------------------------------------------------------------------------
class MailCatcher:
    """aiosmtpd on 127.0.0.1. With `tls`, STARTTLS is offered and required; with `users`,
    AUTH is required (aiosmtpd allows it only after STARTTLS). `reply` answers the DATA
    command (a 4xx or 5xx makes delivery fail)."""

    def __init__(self, tls: TlsFiles | None = None, users: dict[str, str] | None = None,
                 port: int | None = None) -> None:  # fmt: skip
        from aiosmtpd.controller import Controller
        from aiosmtpd.smtp import AuthResult

        self.mails: list[EmailMessage] = []
        self.envelopes: list[tuple[str, list[str]]] = []
        self.logins: list[str] = []
        self.reply = "250 2.0.0 Ok: queued"
        self._cond = threading.Condition()
        catcher = self

        class Handler:
            async def handle_DATA(self, server: Any, session: Any, envelope: Any) -> str:
                if not catcher.reply.startswith("250"):
                    return catcher.reply
                msg = message_from_bytes(envelope.original_content or envelope.content,
                                         policy=policy.default)  # fmt: skip
                with catcher._cond:
                    catcher.mails.append(msg)  # type: ignore[arg-type]
                    catcher.envelopes.append((envelope.mail_from, list(envelope.rcpt_tos)))
                    catcher._cond.notify_all()
                return catcher.reply

        def authenticate(server: Any, session: Any, envelope: Any, mechanism: str,
                         data: Any) -> Any:  # fmt: skip
            login = data.login.decode()
            ok = users is not None and users.get(login) == data.password.decode()
            if ok:
                catcher.logins.append(login)
            return AuthResult(success=ok, handled=False)  # the server answers 535

        kwargs: dict[str, Any] = {}
        if tls is not None:
            kwargs |= {"tls_context": tls.server_context(), "require_starttls": True}
        if users is not None:
            kwargs |= {"authenticator": authenticate, "auth_required": True,
                       "auth_require_tls": True}  # fmt: skip
        self.port = port or free_port()
        self.controller = Controller(Handler(), hostname="127.0.0.1", port=self.port,
                                     server_hostname="mail.test", **kwargs)  # fmt: skip
        self.controller.start()

    def wait(self, n: int, timeout: float = 10.0) -> list[EmailMessage]:
        deadline = time.monotonic() + timeout
        with self._cond:
            while len(self.mails) < n:
                left = deadline - time.monotonic()
                if left <= 0:
                    raise AssertionError(f"{len(self.mails)} mails after {timeout} s, wanted {n}")
                self._cond.wait(left)
            return list(self.mails)

    def stop(self) -> None:
        with contextlib.suppress(Exception):
            self.controller.stop()


@contextlib.contextmanager
def mail_catcher(**kw: Any) -> Iterator[MailCatcher]:
    m = MailCatcher(**kw)
    try:
        yield m
    finally:
        m.stop()


# --- webhook -----------------------------------------------------------------------------
@dataclass
class Hook:
    headers: dict[str, str]
    body: bytes
    signature_ok: bool

    def json(self) -> dict[str, Any]:
        out: dict[str, Any] = json.loads(self.body)
        return out


@dataclass
class WebhookReceiver:
    """A real http.server that checks `Hourwatch-Signature` (hex HMAC-SHA256 of the body)
    with the shared secret: 401 when it does not match, else `status`."""

    secret: bytes
    status: int = 200
    received: list[Hook] = field(default_factory=list)

    def __post_init__(self) -> None:
        recv = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:
                body = self.rfile.read(int(self.headers.get("Content-Length") or 0))
                want = hmac.new(recv.secret, body, hashlib.sha256).hexdigest()
                ok = hmac.compare_digest(want, self.headers.get("Hourwatch-Signature", ""))
                recv.received.append(Hook(dict(self.headers.items()), body, ok))
                code = recv.status if ok else 401
                data = b'{"ok": true}' if code < 300 else b'{"error": "refused"}'
                self.send_response(code)
                self.send_header("Content-Type", "application/json")
                self.send_header("Content-Length", str(len(data)))
                self.end_headers()
                self.wfile.write(data)

            def log_message(self, format: str, *args: Any) -> None:
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.server.daemon_threads = True
        self.port = int(self.server.server_address[1])
        self.url = f"http://127.0.0.1:{self.port}/pages"
        threading.Thread(target=self.server.serve_forever, daemon=True).start()

    def stop(self) -> None:
        self.server.shutdown()
        self.server.server_close()


# --- MLLP --------------------------------------------------------------------------------
@dataclass
class Hl7Received:
    raw: str
    message: Any  # the hl7apy Message
    answered: str


class MllpListener:
    """A real MLLP listener: each block is parsed and validated with hl7apy (STRICT); the
    answer is an ACK built with hl7apy, whose MSA-1 is the next code of `codes` (the last
    one repeats). A message that does not parse is answered AR."""

    def __init__(self, codes: list[str] | None = None, port: int = 0) -> None:
        self.codes = list(codes or ["AA"])
        self.received: list[Hl7Received] = []
        self.errors: list[str] = []
        outer = self

        class Handler(socketserver.BaseRequestHandler):
            def handle(self) -> None:
                buf = b""
                sock = self.request
                sock.settimeout(5)
                while True:
                    try:
                        chunk = sock.recv(65536)
                    except OSError:
                        return
                    if not chunk:
                        return
                    buf += chunk
                    while b"\x1c\r" in buf:
                        block, buf = buf.split(b"\x1c\r", 1)
                        sock.sendall(b"\x0b" + outer._answer(block.lstrip(b"\x0b")) + b"\x1c\r")

        class Server(socketserver.ThreadingTCPServer):
            allow_reuse_address = True
            daemon_threads = True

        self.server = Server(("127.0.0.1", port), Handler)
        self.port = int(self.server.server_address[1])
        threading.Thread(target=self.server.serve_forever, daemon=True).start()

    def _answer(self, block: bytes) -> bytes:
        from hl7apy.consts import VALIDATION_LEVEL
        from hl7apy.core import Message
        from hl7apy.parser import parse_message

        text = block.decode("utf-8")
        try:
            msg = parse_message(text, validation_level=VALIDATION_LEVEL.STRICT)
            msg.validate()
            control = msg.msh.msh_10.to_er7()
            code = self.codes.pop(0) if len(self.codes) > 1 else self.codes[0]
        except Exception as exc:  # anything hl7apy refuses is answered AR
            self.errors.append(f"{type(exc).__name__}: {exc}")
            msg, control, code = None, "", "AR"
        ack = Message("ACK", version="2.6")
        ack.msh.msh_3 = "ALERT-MANAGER-TEST"
        ack.msh.msh_9 = "ACK^R40^ACK"
        ack.msh.msh_10 = f"ack-{len(self.received) + len(self.errors)}"
        ack.msh.msh_11 = "P"
        ack.msa.msa_1 = code
        ack.msa.msa_2 = control
        if code != "AA":
            ack.msa.msa_3 = "test listener says no"
        if msg is not None:
            self.received.append(Hl7Received(text, msg, code))
        return bytes(ack.to_er7().encode("utf-8"))

    def stop(self) -> None:
        self.server.shutdown()
        self.server.server_close()


def hl7_unescape(text: str) -> str:
    """HL7 v2 escape sequences back to text (the receiving side's own few lines)."""
    for seq, ch in (("\\F\\", "|"), ("\\S\\", "^"), ("\\T\\", "&"), ("\\R\\", "~")):
        text = text.replace(seq, ch)
    return text.replace("\\E\\", "\\")


def observations(msg: Any) -> dict[str, tuple[str, str, str]]:
    """OBX-3 code -> (OBX-2 value type, OBX-5 value as sent, OBX-8 flags), from hl7apy."""
    order = msg.ORU_R01_PATIENT_RESULT.ORU_R01_ORDER_OBSERVATION
    out = {}
    for group in order.ORU_R01_OBSERVATION:
        obx = group.obx
        code = obx.obx_3.to_er7().split("^")[0]
        flags = "~".join(f.to_er7() for f in obx.children.get("OBX_8") or [])
        out[code] = (obx.obx_2.to_er7(), obx.obx_5.to_er7(), flags)
    return out
