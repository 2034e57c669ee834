"""Dependency aliases: one session per request, the settings, who is asking, and the forgery check."""

from __future__ import annotations

import hmac
import re
from collections.abc import AsyncIterator, Awaitable, Callable, Iterator
from contextlib import nullcontext
from typing import Annotated

from anyio import to_thread
from fastapi import APIRouter, Depends, Request
from sqlalchemy.orm import Session

from .errors import ForbiddenError, InvalidRequestError, UnauthorizedError
from .people import Viewer, csrf_token, viewer_from_cookie
from .settings import Settings

COOKIE = "heedmap_session"
CSRF_HEADER = "x-csrf-token"
CSRF_FIELD = "csrf"


def _session(request: Request) -> Iterator[Session]:
    with request.app.state.sessions() as s:
        yield s


async def _write_session(request: Request) -> AsyncIterator[Session]:
    """A write session for one request, committed before the response is sent.

    Write requests take the app's write lock on the event loop before their session starts.
    SQLite has one writer anyway; waiting here, rather than in SQLite's busy handler inside a
    worker thread, keeps the worker threads free for the request that holds the lock (when all
    of them wait for the lock, the holder cannot get a thread to finish on, and everything
    stalls until the busy timeout).
    """
    lock = request.app.state.write_lock  # None on PostgreSQL: row locks keep concurrent writes correct there
    async with lock if lock is not None else nullcontext():
        s = request.app.state.writers()
        try:
            yield s
            # The commit waits for the disk (synchronous=FULL): in a worker thread, so the event loop
            # keeps reading and checking the requests queued behind this one meanwhile.
            await to_thread.run_sync(s.commit)
        except BaseException:
            s.rollback()
            raise
        finally:
            s.close()


async def _settings(request: Request) -> Settings:
    settings: Settings = request.app.state.settings
    return settings


def optional_viewer(request: Request) -> Viewer | None:
    """The signed-in person, or None; a revoked or expired invite is an error that says so."""
    with request.app.state.sessions() as s:
        return viewer_from_cookie(s, request.app.state.key, request.cookies.get(COOKIE))


# Dependencies that only look at what they are given are ``async def``: FastAPI runs those on the event
# loop, where a plain ``def`` would cost a hop to a worker thread and back on every request.
async def _viewer(viewer: Annotated[Viewer | None, Depends(optional_viewer)]) -> Viewer:
    if viewer is None:
        raise UnauthorizedError("sign in first: open the invite link the project's admin gave you.")
    return viewer


def require(role: str) -> Callable[[Viewer], Awaitable[Viewer]]:
    """A dependency that lets through people with ``role`` or a higher one."""

    async def check(viewer: Annotated[Viewer, Depends(_viewer)]) -> Viewer:
        if not viewer.can(role):
            raise ForbiddenError(f"this needs the {role} role; {viewer.name} is signed in as {viewer.role}.")
        return viewer

    return check


def request_csrf(request: Request) -> str:
    """The anti-forgery token of this browser's session ('' when not signed in); pages put it in their forms."""
    cookie = request.cookies.get(COOKIE)
    return csrf_token(request.app.state.key, cookie) if cookie else ""


SAFE_METHODS = frozenset({"GET", "HEAD", "OPTIONS"})


async def check_csrf(request: Request) -> None:
    """Refuse a state-changing request that lacks this session's token (header or form field); reads pass.

    Every router carries this as a router-level dependency, so a new POST route cannot forget it.
    """
    if request.method in SAFE_METHODS:
        return
    sent = request.headers.get(CSRF_HEADER)
    if sent is None and request.headers.get("content-type", "").startswith(("application/x-www-form-urlencoded", "multipart/form-data")):
        sent = str((await request.form()).get(CSRF_FIELD, ""))
    expected = request_csrf(request)
    if not expected or not sent or not hmac.compare_digest(sent, expected):
        raise ForbiddenError("the anti-forgery check failed: this form is out of date or was sent from another site. Reload the page and try again.")


SessionDep = Annotated[Session, Depends(_session)]
# scope="function": the commit happens before the response goes out, so a client never sees
# "stored" for a label that is not.
WriteSessionDep = Annotated[Session, Depends(_write_session, scope="function")]
SettingsDep = Annotated[Settings, Depends(_settings)]
ViewerDep = Annotated[Viewer, Depends(_viewer)]
OptionalViewerDep = Annotated[Viewer | None, Depends(optional_viewer)]
# One checker per role, made once: a router-level Depends(require_x) and a route's XDep parameter
# are then the same dependency, which FastAPI runs once per request.
require_viewer = _viewer
require_annotator = require("annotator")
require_reviewer = require("reviewer")
require_analyst = require("analyst")
require_admin = require("admin")
AnnotatorDep = Annotated[Viewer, Depends(require_annotator)]
ReviewerDep = Annotated[Viewer, Depends(require_reviewer)]
AnalystDep = Annotated[Viewer, Depends(require_analyst)]
AdminDep = Annotated[Viewer, Depends(require_admin)]
CsrfDep = Depends(check_csrf)


MAX_ID = 2**63 - 1  # SQLite's largest integer


async def check_path_ids(request: Request) -> None:
    """Refuse an id in the path that is not a whole number SQLite can hold, before any query sees it."""
    for name, value in request.path_params.items():
        # ASCII digits only: "²".isdigit() is true, and int() of it fails.
        if name.endswith("_id") and not (re.fullmatch(r"[0-9]{1,19}", str(value)) and int(value) <= MAX_ID):
            raise InvalidRequestError(f"{name} must be a whole number from 0 to {MAX_ID}; got {str(value)[:40]!r}.")


def guarded_router(role: Callable[..., Awaitable[Viewer]] | None = None, *, prefix: str = "", tags: list[str] | None = None) -> APIRouter:
    """A router whose every route checks the anti-forgery token on writes and, given ``role``, who may call it."""
    dependencies = [Depends(check_path_ids), CsrfDep] + ([Depends(role)] if role is not None else [])
    return APIRouter(prefix=prefix, dependencies=dependencies, tags=list(tags or []))
