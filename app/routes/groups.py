"""The group labelling page and its JSON twin: a grid of similar crops, one name for what they share, misfits unticked."""

from __future__ import annotations

import uuid
from typing import Annotated
from urllib.parse import urlencode

from fastapi import Form, Request
from fastapi.responses import RedirectResponse, Response
from pydantic import BaseModel, Field
from sqlalchemy.orm import Session

from .. import campaigns
from ..campaigns import CampaignInfo, GroupTask
from ..campaigns.groups import MAX_GROUP_CROPS
from ..deps import MAX_ID, AnnotatorDep, SessionDep, WriteSessionDep, guarded_router, require_annotator
from ..errors import ConflictError, InvalidRequestError
from ..people import Viewer
from .common import render
from .labelling import ATTRIBUTE_KINDS, EntityIn, LabelCreate, RegionPublic, campaign_for, parse_entities, public, structured_entities

router = guarded_router(require_annotator, prefix="/campaigns/{campaign_id}/groups")
api = guarded_router(require_annotator, prefix="/api/campaigns/{campaign_id}/groups")
routers = (router, api)

# Keys that tick or untick the crops of the grid, in order (when the text box does not have the focus).
CROP_KEYS = "123456789abcdefghijklmnopqrstuvw"


class GroupPublic(BaseModel):
    group_id: int
    crops: list[RegionPublic]


class NextGroup(BaseModel):
    group: GroupPublic | None
    done: int
    total: int


class GroupLabelCreate(BaseModel):
    client_id: str = Field(min_length=8, max_length=40)
    entities: list[EntityIn] = Field(default_factory=list, max_length=10)
    nothing_recognisable: bool = False
    unsure: bool = False
    ticked: list[int] = Field(min_length=1, max_length=MAX_GROUP_CROPS)
    seconds_spent: float | None = Field(default=None, ge=0, le=86_400)


class GroupLabelResult(BaseModel):
    stored: bool
    group_id: int
    labelled: list[int]
    returned: list[int]
    lost: list[int]


def _entities(body: GroupLabelCreate) -> list[tuple[str, list[str]]]:
    """The entities as sent, checked exactly as a single crop's label is."""
    return structured_entities(LabelCreate(client_id=body.client_id, entities=body.entities, nothing_recognisable=body.nothing_recognisable))


def group_public(task: GroupTask) -> GroupPublic:
    return GroupPublic(group_id=task.group_id, crops=[public(t) for t in task.crops])


def _page(request: Request, s: Session, viewer: Viewer, c: CampaignInfo, *, typed: str = "", error: str = "", notice: str = "",
          status_code: int = 200, unticked: frozenset[int] = frozenset(), offer: bool = True) -> Response:
    task = campaigns.held_group(s, campaign=c, person_id=viewer.person_id)
    done, total = campaigns.person_progress(s, c, viewer.person_id)
    context = {
        "campaign": c, "group": group_public(task) if task else None, "keys": CROP_KEYS, "done": done, "total": total,
        "client_id": uuid.uuid4().hex, "typed": typed, "error": error, "notice": notice, "unticked": unticked,
        "attribute_kinds": ATTRIBUTE_KINDS, "examples": campaigns.examples(s, c.id),
        "may_start": offer and task is None and c.closed_at is None and done < total,
    }
    return render(request, "annotate_group.html", context, viewer=viewer, status_code=status_code)


@router.get("")
def group_page(request: Request, campaign_id: int, s: SessionDep, viewer: AnnotatorDep, notice: str = "", empty: bool = False) -> Response:
    """Similar crops at once: name what they share, untick those that do not fit (taking a group is a POST to /next)."""
    return _page(request, s, viewer, campaign_for(s, viewer, campaign_id), notice=notice[:200], offer=not empty)


@router.post("/next")
def take_group(campaign_id: int, s: WriteSessionDep, viewer: AnnotatorDep) -> Response:
    """Have the next group handed to you, then show it."""
    got = campaigns.lease_group(s, campaign=campaign_for(s, viewer, campaign_id), person_id=viewer.person_id)
    return RedirectResponse(f"/campaigns/{campaign_id}/groups" + ("" if got else "?empty=1"), status_code=303)


@router.post("/label")
def submit_group(
    request: Request,
    campaign_id: int,
    s: WriteSessionDep,
    viewer: AnnotatorDep,
    group_id: Annotated[int, Form(ge=0, le=MAX_ID)],
    client_id: Annotated[str, Form(min_length=8, max_length=40)],
    labels: Annotated[str, Form(max_length=2000)] = "",
    nothing: Annotated[str, Form()] = "",
    unsure: Annotated[str, Form()] = "",
    seconds_spent: Annotated[float | None, Form(ge=0, le=86_400)] = None,
    tick: Annotated[list[int] | None, Form(max_length=MAX_GROUP_CROPS)] = None,
) -> Response:
    """Save one label per ticked crop and show the next group; bad input re-shows the group with the text and the message."""
    c = campaign_for(s, viewer, campaign_id)
    ticked = list(tick or [])
    try:
        entities = parse_entities(labels, bool(nothing))
        got = campaigns.save_group_label(s, campaign=c, person_id=viewer.person_id, group_id=group_id, ticked=ticked, entities=entities,
                                         unsure=bool(unsure), client_id=client_id, seconds_spent=seconds_spent)
    except InvalidRequestError as exc:
        held = campaigns.held_group(s, campaign=c, person_id=viewer.person_id)
        shown = frozenset(t.region_id for t in held.crops) if held else frozenset()
        return _page(request, s, viewer, c, typed=labels, error=exc.message, status_code=422, unticked=shown - frozenset(ticked))
    except ConflictError as exc:
        s.rollback()
        campaigns.lease_group(s, campaign=c, person_id=viewer.person_id)
        return RedirectResponse(f"/campaigns/{campaign_id}/groups?{urlencode({'notice': exc.message})}", status_code=303)
    notice = f"{len(got.lost)} crop(s) had their places taken by others while you worked." if got.lost else ""
    campaigns.lease_group(s, campaign=c, person_id=viewer.person_id)  # the next group is ready when the page shows
    return RedirectResponse(f"/campaigns/{campaign_id}/groups" + (f"?{urlencode({'notice': notice})}" if notice else ""), status_code=303)


@router.post("/skip")
def skip_group_page(campaign_id: int, s: WriteSessionDep, viewer: AnnotatorDep, group_id: Annotated[int, Form(ge=0, le=MAX_ID)]) -> Response:
    """Pass over the group (its crops are not offered to you again) and show the next."""
    c = campaign_for(s, viewer, campaign_id)
    campaigns.skip_group(s, campaign=c, person_id=viewer.person_id, group_id=group_id)
    campaigns.lease_group(s, campaign=c, person_id=viewer.person_id)
    return RedirectResponse(f"/campaigns/{campaign_id}/groups", status_code=303)


# --- JSON ------------------------------------------------------------------------------------------


@api.post("/next")
def next_group(campaign_id: int, s: WriteSessionDep, viewer: AnnotatorDep) -> NextGroup:
    """Your current group (its crops leased to you); null when no group has a crop left for you."""
    c = campaign_for(s, viewer, campaign_id)
    task = campaigns.lease_group(s, campaign=c, person_id=viewer.person_id)
    done, total = campaigns.person_progress(s, c, viewer.person_id)
    return NextGroup(group=group_public(task) if task else None, done=done, total=total)


@api.post("/{group_id}/labels", status_code=201)
def create_group_label(campaign_id: int, group_id: int, body: GroupLabelCreate, s: WriteSessionDep, viewer: AnnotatorDep) -> GroupLabelResult:
    """Store what the ticked crops of your group share: one label per ticked crop; a retried client_id stores nothing twice."""
    got = campaigns.save_group_label(s, campaign=campaign_for(s, viewer, campaign_id), person_id=viewer.person_id, group_id=group_id,
                                     ticked=body.ticked, entities=_entities(body), unsure=body.unsure, client_id=body.client_id, seconds_spent=body.seconds_spent)
    return GroupLabelResult(stored=got.stored, group_id=got.group_id, labelled=list(got.labelled), returned=list(got.returned), lost=list(got.lost))
