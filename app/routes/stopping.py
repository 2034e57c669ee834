"""Knowing when to stop: per class whether its top rules have settled, and closing a class early."""

from __future__ import annotations

from typing import Annotated

from fastapi import Depends, Form, Request
from fastapi.responses import RedirectResponse, Response

from .. import campaigns
from ..deps import ReviewerDep, SessionDep, SettingsDep, WriteSessionDep, guarded_router, require_analyst, require_reviewer
from ..services.campaign_analysis import campaign_progress
from ..services.stopping import TOP_RULES, stopping_status
from .common import render

router = guarded_router(require_reviewer, prefix="/campaigns/{campaign_id}")
routers = (router,)


@router.get("/stopping")
def stopping(request: Request, campaign_id: int, s: SessionDep, settings: SettingsDep, viewer: ReviewerDep) -> Response:
    """Per predicted class: whether its top rules have settled, and a way to close it early."""
    c = campaigns.get_campaign(s, campaign_id)
    status = stopping_status(s, c, min_support=settings.min_support, cache=request.app.state.results_cache)
    _, progress = campaign_progress(s, c, cache=request.app.state.results_cache)
    context = {"campaign": c, "status": status, "progress": {p.cls: p for p in progress}, "top": TOP_RULES,
               "can_close": viewer.can("analyst")}
    return render(request, "stopping.html", context, viewer=viewer)


@router.post("/classes/close", dependencies=[Depends(require_analyst)])
def close_class(campaign_id: int, s: WriteSessionDep, cls: Annotated[str, Form(max_length=200)], reopen: Annotated[str, Form(max_length=10)] = "") -> Response:
    """Close a predicted class early (its regions leave the labelling queue), or open it again."""
    campaigns.close_class(s, campaign_id=campaign_id, cls=cls, closed=not reopen)
    return RedirectResponse(f"/campaigns/{campaign_id}/stopping", status_code=303)
