"""Small request helpers: a bounded body, a URL-encoded form, a safe place to go back to."""

from __future__ import annotations

from urllib.parse import parse_qs, urlsplit

from starlette.requests import Request

FORM_MAX = 4096  # the board's own forms are a few hundred bytes


async def read_body(request: Request, limit: int) -> bytes | None:
    """The request body, or None when it is longer than `limit`."""
    declared = request.headers.get("content-length")
    if declared is not None and (not declared.isdigit() or int(declared) > limit):
        return None
    chunks, n = [], 0
    async for chunk in request.stream():
        n += len(chunk)
        if n > limit:
            return None
        chunks.append(chunk)
    return b"".join(chunks)


def form_fields(body: bytes | None) -> dict[str, str]:
    """A URL-encoded form's fields (first value of each); {} when it is not one."""
    if not body:
        return {}
    try:
        parsed = parse_qs(body.decode("utf-8"), max_num_fields=16)
    except (UnicodeDecodeError, ValueError):
        return {}
    return {k: v[0] for k, v in parsed.items() if v}


async def read_form(request: Request) -> dict[str, str]:
    return form_fields(await read_body(request, FORM_MAX))


def safe_next(value: str | None) -> str:
    """Only a path on this board is a place to go back to (after logging in, say)."""
    if not value or len(value) > 300 or not value.startswith("/") or value.startswith("//"):
        return "/"
    if "\\" in value or urlsplit(value).netloc or any(ord(c) < 32 for c in value):
        return "/"
    return value


def referer_path(url: str) -> str:
    """The path of a Referer ("" when there is none to use)."""
    path = urlsplit(url).path
    return path if path.startswith("/") else ""
