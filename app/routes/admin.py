"""The admin's pages: campaigns, invite links, check items, progress and the raw labels."""

from __future__ import annotations

import re
from typing import Annotated

from fastapi import Form, Request
from fastapi.responses import PlainTextResponse, RedirectResponse, Response
from sqlalchemy import select

from analysis.concepts import format_label_text
from analysis.reliability import METHODS

from .. import campaigns, people
from ..deps import (
    MAX_ID,
    AdminDep,
    SessionDep,
    SettingsDep,
    WriteSessionDep,
    guarded_router,
    require_admin,
)
from ..errors import AppError, InvalidRequestError
from ..models import ROLES, CampaignRegion, Prediction, RegionRow, SaliencyRun, utcnow
from ..services.campaign_analysis import campaign_progress
from ..services.exports import raw_labels_export
from .common import render
from .labelling import parse_entities

router = guarded_router(require_admin, prefix="/admin")
routers = (router,)


def _admin_page(request: Request, s: SessionDep, viewer: AdminDep, *, new_link: str = "", error: str = "", form: dict[str, str] | None = None,
                status_code: int = 200) -> Response:
    runs = list(s.scalars(select(SaliencyRun.id).order_by(SaliencyRun.id.desc())))
    context = {
        "campaigns": campaigns.list_campaigns(s), "invites": people.list_invites(s), "now": utcnow(), "roles": ROLES,
        "runs": runs, "classes": {r: campaigns.run_classes(s, r) for r in runs}, "methods": METHODS, "new_link": new_link,
        "error": error, "form": form or {},
    }
    return render(request, "admin.html", context, viewer=viewer, status_code=status_code)


@router.get("")
def admin(request: Request, s: SessionDep, viewer: AdminDep) -> Response:
    """Campaigns and invite links."""
    return _admin_page(request, s, viewer)


@router.post("/campaigns")
def create_campaign(
    request: Request, s: WriteSessionDep, viewer: AdminDep,
    name: Annotated[str, Form()], run_id: Annotated[int, Form(ge=0, le=MAX_ID)], labels_per_region: Annotated[int, Form(ge=0, le=MAX_ID)] = 3,
    classes: Annotated[list[str] | None, Form()] = None, instructions: Annotated[str, Form()] = "",
    lease_minutes: Annotated[float, Form(allow_inf_nan=False)] = 10, check_every: Annotated[int, Form(ge=0, le=MAX_ID)] = 10, method: Annotated[str, Form()] = "majority",
    budget: Annotated[str, Form(max_length=20)] = "", regions_per_class: Annotated[str, Form(max_length=20)] = "",
    confident_at: Annotated[float, Form(allow_inf_nan=False)] = 0.8, adaptive: Annotated[str, Form(max_length=10)] = "",
) -> Response:
    """Create a campaign over a run's regions, or over a stratified sample of its images sized by a budget."""
    try:
        cid = campaigns.create_campaign(s, name=name, run_id=run_id, classes=classes or [], labels_per_region=labels_per_region,
                                        instructions=instructions, lease_seconds=int(lease_minutes * 60), check_every=check_every, method=method,
                                        budget=_optional_count(budget, "the judgment budget"),
                                        regions_per_class=_optional_count(regions_per_class, "regions per class"),
                                        adaptive=bool(adaptive), confident_at=confident_at)
    except AppError as exc:
        s.rollback()
        form = {"name": name, "instructions": instructions, "labels_per_region": str(labels_per_region), "budget": budget,
                "regions_per_class": regions_per_class, "adaptive": adaptive}
        return _admin_page(request, s, viewer, error=exc.message, form=form, status_code=exc.status_code)
    return RedirectResponse(f"/admin/campaigns/{cid}", status_code=303)


def _optional_count(raw: str, what: str) -> int | None:
    """A whole number typed in a form field, or None when left empty."""
    raw = raw.strip().replace(",", "")
    if not raw:
        return None
    if not re.fullmatch(r"[0-9]{1,9}", raw):
        raise InvalidRequestError(f"{what} must be a whole number of at most 9 digits, e.g. 3000; got {raw[:20]!r}.")
    return int(raw)


@router.post("/invites")
def create_invite(
    request: Request, s: WriteSessionDep, viewer: AdminDep, settings: SettingsDep,
    name: Annotated[str, Form()], role: Annotated[str, Form()], campaign_id: Annotated[str, Form()] = "",
    days: Annotated[float, Form(allow_inf_nan=False)] = 14, note: Annotated[str, Form()] = "",
) -> Response:
    """Make an invite link; it is shown once, on the page that answers this form."""
    try:
        raw = campaign_id.strip()
        if raw and not re.fullmatch(r"[0-9]{1,18}", raw):
            raise ValueError(raw)
        cid = int(raw) if raw else None
        if cid is not None:
            campaigns.get_campaign(s, cid)
        _, token = people.create_invite(s, name=name, role=role, campaign_id=cid, days=days, note=note)
    except (AppError, ValueError) as exc:
        s.rollback()
        message = exc.message if isinstance(exc, AppError) else f"campaign must be a number; got {campaign_id!r}."
        status = exc.status_code if isinstance(exc, AppError) else 422
        return _admin_page(request, s, viewer, error=message, form={"invite_name": name, "note": note}, status_code=status)
    link = f"{str(request.base_url).rstrip('/')}/join/{token}"
    return _admin_page(request, s, viewer, new_link=link)


@router.post("/people/role")
def change_role(request: Request, s: WriteSessionDep, viewer: AdminDep, name: Annotated[str, Form(max_length=60)],
                role: Annotated[str, Form(max_length=20)]) -> Response:
    """Change a person's role on purpose (an invite never does); the last admin stays admin."""
    try:
        people.set_role(s, name, role)
    except AppError as exc:
        s.rollback()
        return _admin_page(request, s, viewer, error=exc.message, status_code=exc.status_code)
    return RedirectResponse("/admin", status_code=303)


@router.post("/invites/{invite_id}/revoke")
def revoke_invite(invite_id: int, s: WriteSessionDep) -> Response:
    """Revoke an invite link; browsers signed in through it are signed out."""
    people.revoke_invite(s, invite_id)
    return RedirectResponse("/admin", status_code=303)


@router.get("/campaigns/{campaign_id}")
def campaign_admin(request: Request, campaign_id: int, s: SessionDep, viewer: AdminDep, settings: SettingsDep) -> Response:
    """Progress per annotator and class, check-item scores, settings and check items."""
    c = campaigns.get_campaign(s, campaign_id)
    annotators, classes = campaign_progress(s, c, cache=request.app.state.results_cache)
    answers = {r: format_label_text([(e, list(a)) for e, a in j.entities]) for r, j in campaigns.check_answers(s, campaign_id).items()}
    # A sample of regions to pick check items from: a spread over the campaign, not only its start.
    ids = list(s.scalars(select(CampaignRegion.region_id).where(CampaignRegion.campaign_id == campaign_id, CampaignRegion.check_answer.is_(None),
                                                                 CampaignRegion.example_answer.is_(None)).order_by(CampaignRegion.region_id)))
    step = max(1, len(ids) // 24)
    sample = ids[::step][:24]
    preds = dict(s.execute(select(RegionRow.id, Prediction.predicted).join(Prediction, Prediction.id == RegionRow.prediction_id).where(RegionRow.id.in_(sample + list(answers)))).all())
    context = {"campaign": c, "annotators": annotators, "classes": classes, "answers": answers, "sample": sample, "predicted": preds,
               "examples": campaigns.examples(s, campaign_id),
               "methods": METHODS, "careless_seconds": settings.careless_seconds,
               "plan": campaigns.plan_of(s, campaign_id), "strata": campaigns.strata_of(s, campaign_id),
               "redundancy": campaigns.redundancy_counts(s, campaign_id), "groups": campaigns.group_counts(s, campaign_id),
               "judgments_spent": sum(a.labels for a in annotators)}
    return render(request, "campaign_admin.html", context, viewer=viewer)


@router.post("/campaigns/{campaign_id}/settings")
def campaign_settings(
    campaign_id: int, s: WriteSessionDep,
    instructions: Annotated[str, Form()] = "", labels_per_region: Annotated[int, Form(ge=0, le=MAX_ID)] = 3, method: Annotated[str, Form()] = "majority",
    closed: Annotated[str, Form()] = "",
) -> Response:
    """Change the instructions, labels per region, aggregation method, or close the campaign."""
    campaigns.update_campaign(s, campaign_id, instructions=instructions, labels_per_region=labels_per_region, method=method, closed=bool(closed))
    return RedirectResponse(f"/admin/campaigns/{campaign_id}", status_code=303)


@router.post("/campaigns/{campaign_id}/checks")
def set_check(
    campaign_id: int, s: WriteSessionDep, region_id: Annotated[int, Form(ge=0, le=MAX_ID)], answer: Annotated[str, Form()] = "",
    nothing: Annotated[str, Form()] = "", clear: Annotated[str, Form()] = "", role: Annotated[str, Form()] = "check",
) -> Response:
    """Make a region a check item (or an example shown with the instructions) with a known answer, or a normal region again."""
    if role not in ("check", "example"):
        raise InvalidRequestError("a region can be made a check item or an example.")
    setter = campaigns.set_check_answer if role == "check" else campaigns.set_example
    if clear:
        setter(s, campaign_id=campaign_id, region_id=region_id, entities=None)
    else:
        setter(s, campaign_id=campaign_id, region_id=region_id, entities=parse_entities(answer, bool(nothing)))
    return RedirectResponse(f"/admin/campaigns/{campaign_id}", status_code=303)


@router.get("/campaigns/{campaign_id}/labels.csv", response_class=PlainTextResponse)
def raw_labels(campaign_id: int, s: SessionDep) -> Response:
    """Every raw label of the campaign, one row per named entity."""
    found = raw_labels_export(s, campaign_id)
    return Response(found.body, media_type=found.media_type, headers={"Content-Disposition": f"attachment; filename={found.filename}"})
