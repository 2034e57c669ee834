"""Signing in through an invite link, and out again."""

from __future__ import annotations

from fastapi import Request
from fastapi.responses import RedirectResponse, Response

from .. import people
from ..deps import COOKIE, SettingsDep, WriteSessionDep, guarded_router

router = guarded_router()
routers = (router,)


@router.get("/join/{token}")
def join(request: Request, token: str, s: WriteSessionDep, settings: SettingsDep) -> Response:
    """Open an invite link: sign this browser in as the invite's person."""
    viewer = people.redeem_invite(s, token)
    target = f"/campaigns/{viewer.campaign_id}/label" if viewer.role == "annotator" and viewer.campaign_id else "/"
    response = RedirectResponse(target, status_code=303)
    key: bytes = request.app.state.key
    response.set_cookie(COOKIE, people.session_cookie(key, viewer.invite_id), httponly=True, samesite="lax", max_age=settings.session_days * 86400)
    return response


@router.post("/signout")
def signout() -> Response:
    """Forget this browser's sign-in."""
    response = RedirectResponse("/", status_code=303)
    response.delete_cookie(COOKIE)
    return response
