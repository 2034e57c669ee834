"""Signing in through an invite link, and out again.

Opening a link (GET) only shows who it signs in as; the sign-in itself is a POST from that page.
The page sets a short-lived, same-site-only cookie and puts a token derived from it in its form,
so another site can neither sign a browser in by a link nor by posting a form (login forgery).
"""

from __future__ import annotations

import hmac
import secrets
from typing import Annotated

from fastapi import APIRouter, Depends, Form, Request
from fastapi.responses import RedirectResponse, Response

from .. import people
from ..deps import COOKIE, SessionDep, SettingsDep, WriteSessionDep, check_path_ids, guarded_router
from ..errors import ForbiddenError
from .common import render

JOIN_COOKIE = "heedmap_join"

# Joining is the one write anyone may send without a session: it has its own forgery check.
joining = APIRouter(prefix="/join", dependencies=[Depends(check_path_ids)])
router = guarded_router()
routers = (joining, router)


def _join_token(key: bytes, nonce: str, token: str) -> str:
    return hmac.new(key, f"join|{nonce}|{token}".encode(), "sha256").hexdigest()[:40]


@joining.get("/{token}")
def join_page(request: Request, token: str, s: SessionDep) -> Response:
    """Show whom an invite link signs in as, with a button to do it; nothing changes yet."""
    viewer = people.check_invite(s, token)
    nonce = secrets.token_urlsafe(16)
    context = {"person": viewer.name, "role": viewer.role, "token": token, "join_token": _join_token(request.app.state.key, nonce, token)}
    response = render(request, "join.html", context, viewer=None)
    response.set_cookie(JOIN_COOKIE, nonce, httponly=True, samesite="strict", max_age=900, path="/join")
    return response


@joining.post("/{token}")
def join(request: Request, token: str, s: WriteSessionDep, settings: SettingsDep, join: Annotated[str, Form(max_length=100)] = "") -> Response:
    """Sign this browser in as the invite's person (the button on the invite page)."""
    nonce = request.cookies.get(JOIN_COOKIE, "")
    if not nonce or not hmac.compare_digest(join, _join_token(request.app.state.key, nonce, token)):
        raise ForbiddenError("this sign-in was not confirmed on the invite page; open the invite link again and press the button.")
    viewer = people.redeem_invite(s, token)
    target = f"/campaigns/{viewer.campaign_id}/label" if viewer.role == "annotator" and viewer.campaign_id else "/"
    response = RedirectResponse(target, status_code=303)
    key: bytes = request.app.state.key
    response.set_cookie(COOKIE, people.session_cookie(key, viewer.invite_id), httponly=True, samesite="lax", max_age=settings.session_days * 86400)
    response.delete_cookie(JOIN_COOKIE, path="/join")
    return response


@router.post("/signout")
def signout() -> Response:
    """Forget this browser's sign-in."""
    response = RedirectResponse("/", status_code=303)
    response.delete_cookie(COOKIE)
    return response
