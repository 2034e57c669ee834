"""The guard in front of every route: body size bounded before reading, anonymous writes refused
before reading, security headers, the signing key re-read when rotated, database faults explained.

It is plain ASGI so that it acts before FastAPI parses anything: a request body is only read
through ``receive``, and the guard counts what passes there.
"""

from __future__ import annotations

import hmac
import inspect
import json
import os
import re
from collections.abc import Awaitable, Callable, MutableMapping
from dataclasses import dataclass
from http.cookies import SimpleCookie
from pathlib import Path
from typing import Any

from fastapi import FastAPI, Request
from fastapi.responses import JSONResponse, Response
from sqlalchemy.exc import DBAPIError

from .db import explain_db_error
from .errors import AppError
from .people import key_path, load_key, session_cookie

Scope = MutableMapping[str, Any]
Message = MutableMapping[str, Any]
Receive = Callable[[], Awaitable[Message]]
Send = Callable[[Message], Awaitable[None]]
ASGIApp = Callable[[Scope, Receive, Send], Awaitable[None]]

COOKIE = "heedmap_session"
KIB = 1024
# Most bytes a request body may have, by path; the first match wins. Reads carry no body.
BODY_LIMITS: tuple[tuple[re.Pattern[str], int], ...] = (
    (re.compile(r"^/(api/)?campaigns/[^/]+/(label|skip|undo|regions/[^/]+/(labels|skip))$"), 16 * KIB),
    (re.compile(r"^/join/"), 4 * KIB),
    (re.compile(r"^/signout$"), 4 * KIB),
    (re.compile(r"^/campaigns/[^/]+/expectations$"), 512 * KIB),  # 50,000 characters, form-encoded
    (re.compile(r"^/admin/campaigns$"), 256 * KIB),  # instructions up to 20,000 characters
    (re.compile(r"^/admin/campaigns/[^/]+/settings$"), 256 * KIB),
)
DEFAULT_WRITE_LIMIT = 64 * KIB
READ_LIMIT = 0
# Writes anyone may send without a session: opening an invite link signs a browser in.
ANONYMOUS_WRITES = re.compile(r"^/join/[^/]+$")
SAFE_METHODS = frozenset({"GET", "HEAD", "OPTIONS"})

CSP = (
    "default-src 'self'; script-src 'self'; style-src 'self'; img-src 'self' data:; connect-src 'self'; "
    "object-src 'none'; base-uri 'none'; form-action 'self'; frame-ancestors 'none'"
)
# The report is one self-contained file: inline style and images, no script, nothing fetched.
REPORT_CSP = "default-src 'none'; style-src 'unsafe-inline'; img-src data:; base-uri 'none'; form-action 'none'; frame-ancestors 'none'"
HEADERS = {
    "x-content-type-options": "nosniff",
    "x-frame-options": "DENY",
    "referrer-policy": "no-referrer",
    "cross-origin-opener-policy": "same-origin",
    "permissions-policy": "camera=(), microphone=(), geolocation=()",
}


def body_limit(method: str, path: str) -> int:
    """The most bytes of body this request may send."""
    if method in SAFE_METHODS:
        return READ_LIMIT
    for pattern, limit in BODY_LIMITS:
        if pattern.match(path):
            return limit
    return DEFAULT_WRITE_LIMIT


@dataclass
class _KeyCache:
    """The signing key, re-read when its file changes (``heedmap keys --rotate`` ends every session)."""

    path: Path
    stamp: tuple[int, int, int] | None = None

    def refresh(self, app: Any) -> bytes | None:
        try:
            st = os.stat(self.path)
        except OSError:
            return getattr(app.state, "key", None)
        stamp = (st.st_ino, st.st_mtime_ns, st.st_size)
        if stamp != self.stamp and hasattr(app.state, "key"):
            app.state.key = load_key(self.path.parent, create=False)
            self.stamp = stamp
        return getattr(app.state, "key", None)


def _cookie(scope: Scope) -> str | None:
    for name, value in scope.get("headers", ()):
        if name == b"cookie":
            jar: SimpleCookie = SimpleCookie()
            try:
                jar.load(value.decode("latin-1"))
            except Exception:  # noqa: BLE001 - a malformed cookie header is no session
                return None
            morsel = jar.get(COOKIE)
            return morsel.value if morsel else None
    return None


def signed_in(scope: Scope, key: bytes | None) -> bool:
    """Whether the request carries a session cookie signed with the project key (no database look-up)."""
    cookie = _cookie(scope)
    if not cookie or key is None:
        return False
    raw_id, _, _ = cookie.partition(".")
    if not re.fullmatch(r"[0-9]{1,18}", raw_id):
        return False
    return hmac.compare_digest(cookie, session_cookie(key, int(raw_id)))


async def _send_json(send: Send, status: int, message: str, code: str, headers: dict[str, str]) -> None:
    body = json.dumps({"message": message, "code": code, "status": status}).encode()
    raw = [(b"content-type", b"application/json"), (b"content-length", str(len(body)).encode()), (b"connection", b"close")]
    raw += [(k.encode(), v.encode()) for k, v in headers.items()]
    await send({"type": "http.response.start", "status": status, "headers": raw})
    await send({"type": "http.response.body", "body": body})


class GuardMiddleware:
    """Bounds and refusals that must happen before a route reads anything, and headers on every answer."""

    def __init__(self, app: ASGIApp, *, project_dir: Path) -> None:
        self.app = app
        self.keys = _KeyCache(key_path(project_dir))

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        method, path = scope["method"], scope["path"]
        headers = {**HEADERS, "content-security-policy": REPORT_CSP if path.endswith("/report.html") else CSP}
        key = self.keys.refresh(scope["app"]) if "app" in scope else None
        limit = body_limit(method, path)
        if method not in SAFE_METHODS and not ANONYMOUS_WRITES.match(path) and not signed_in(scope, key):
            await _send_json(send, 401, "sign in first: open the invite link the project's admin gave you.", "sign_in_required", headers)
            return
        declared = _content_length(scope)
        if declared is not None and declared > limit:
            await _send_json(send, 413, _too_large(path, limit), "too_large", headers)
            return
        received = 0
        over = False
        replaced = False

        async def guarded_receive() -> Message:
            nonlocal received, over
            message = await receive()
            if message["type"] == "http.request":
                received += len(message.get("body", b""))
                if received > limit:
                    # Past the bound: the route sees a closed connection and answers; that answer becomes a 413.
                    over = True
                    return {"type": "http.disconnect"}
            return message

        async def guarded_send(message: Message) -> None:
            nonlocal replaced
            if replaced:
                return
            if message["type"] == "http.response.start":
                if over:
                    replaced = True
                    await _send_json(send, 413, _too_large(path, limit), "too_large", headers)
                    return
                present = {k.lower() for k, _ in message.get("headers", [])}
                message["headers"] = list(message.get("headers", [])) + [(k.encode(), v.encode()) for k, v in headers.items() if k.encode() not in present]
            await send(message)

        try:
            await self.app(scope, guarded_receive, guarded_send)
        except Exception:
            if not over:
                raise
            if not replaced:
                await _send_json(send, 413, _too_large(path, limit), "too_large", headers)


def _content_length(scope: Scope) -> int | None:
    for name, value in scope.get("headers", ()):
        if name == b"content-length":
            try:
                return int(value)
            except ValueError:
                return None
    return None


def _too_large(path: str, limit: int) -> str:
    return f"the request to {path} is larger than the {limit // KIB} KiB this form takes; shorten what you typed."


def install(app: FastAPI, *, project_dir: Path, debug: bool = False) -> None:
    """Put the guard in front of ``app`` and explain database faults (read-only, damaged, full) instead of a bare 500."""
    app.add_middleware(GuardMiddleware, project_dir=project_dir)

    async def _db_error(request: Request, exc: Exception) -> Response:
        found = explain_db_error(exc, project_dir)
        if found is None:
            import logging

            logging.getLogger("heedmap").exception("database error on %s", request.url.path)
            message = repr(exc) if debug else "Something went wrong on the server; the error is in its log."
            return JSONResponse({"message": message, "code": "internal_error", "status": 500}, status_code=500)
        handler = app.exception_handlers.get(AppError)
        if handler is not None:
            got = handler(request, found)
            return await got if inspect.isawaitable(got) else got
        return JSONResponse({"message": found.message, "code": found.code, "status": found.status_code}, status_code=found.status_code)

    app.add_exception_handler(DBAPIError, _db_error)
