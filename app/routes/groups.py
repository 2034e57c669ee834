"""The group labelling page and its JSON twin: a grid of similar crops, one name for what they share, misfits unticked."""

from __future__ import annotations

from typing import Annotated

from fastapi import Form, Query, Request
from fastapi.responses import RedirectResponse, Response
from pydantic import BaseModel, Field
from sqlalchemy.orm import Session

from .. import campaigns
from ..campaigns import CampaignInfo, GroupTask
from ..campaigns.groups import MAX_GROUP_CROPS
from ..deps import MAX_ID, AnnotatorDep, SessionDep, WriteSessionDep, guarded_router, require_annotator
from ..errors import InvalidRequestError
from ..people import Viewer
from .common import render
from .labelling import EntityIn, LabelCreate, RegionPublic, answer_form, campaign_for, page_context, parse_entities, public, structured_entities

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


class CropAdditions(BaseModel):
    """What one ticked crop shows besides what the group shares."""

    region_id: int = Field(ge=0, le=MAX_ID)
    entities: list[EntityIn] = Field(min_length=1, max_length=10)


class GroupLabelCreate(BaseModel):
    client_id: str = Field(min_length=8, max_length=40)
    entities: list[EntityIn] = Field(default_factory=list, max_length=10)
    nothing_recognisable: bool = False
    unsure: bool = False
    ticked: list[int] = Field(min_length=1, max_length=MAX_GROUP_CROPS)
    also: list[CropAdditions] = Field(default_factory=list, max_length=MAX_GROUP_CROPS)
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


def _additions(body: GroupLabelCreate) -> dict[int, list[tuple[str, list[str]]]]:
    """Each crop's own additions as sent, checked as a label's entities are; a crop named twice is refused."""
    out: dict[int, list[tuple[str, list[str]]]] = {}
    for item in body.also:
        if item.region_id in out:
            raise InvalidRequestError(f"region {item.region_id} appears twice in also; send its additions once.")
        out[item.region_id] = structured_entities(LabelCreate(client_id=body.client_id, entities=item.entities))
    return out


def _typed_additions(regions: list[int], texts: list[str]) -> dict[int, str]:
    """The form's per-crop boxes: one region id and one text per crop shown, in the same order; empty boxes left out."""
    if len(regions) != len(texts):
        raise InvalidRequestError(f"the form sent {len(texts)} per-region boxes for {len(regions)} regions; reload the page.")
    out: dict[int, str] = {}
    for r, text in zip(regions, texts):
        if len(text) > 1000:
            raise InvalidRequestError(f"what you added to region {r} is longer than 1000 characters; shorten it.")
        if text.strip():
            out[r] = text
    return out


def group_public(task: GroupTask) -> GroupPublic:
    return GroupPublic(group_id=task.group_id, crops=[public(t) for t in task.crops])


def _page(request: Request, s: Session, viewer: Viewer, c: CampaignInfo, *, typed: str = "", error: str = "", notice: str = "",
          status_code: int = 200, unticked: frozenset[int] = frozenset(), also: dict[int, str] | None = None, offer: bool = True) -> Response:
    task = campaigns.held_group(s, campaign=c, person_id=viewer.person_id)
    context = page_context(s, viewer, c, holding=task is not None, typed=typed, error=error, notice=notice, offer=offer)
    context |= {"group": group_public(task) if task else None, "keys": CROP_KEYS, "unticked": unticked, "also": also or {}}
    return render(request, "annotate_group.html", context, viewer=viewer, status_code=status_code)


@router.get("")
def group_page(request: Request, campaign_id: int, s: SessionDep, viewer: AnnotatorDep, notice: str = "", text: str = "", empty: bool = False,
               also: Annotated[list[str] | None, Query(max_length=MAX_GROUP_CROPS)] = None) -> Response:
    """Similar crops at once: name what they share, untick those that do not fit (taking a group is a POST to /next).
    ``text`` and ``also`` (``region:text``, one per crop) fill the boxes again after an undo."""
    typed_also: dict[int, str] = {}
    for item in also or []:
        region, _, added = item.partition(":")
        if region.isdigit() and len(region) <= 12:
            typed_also[int(region)] = added[:1000]
    return _page(request, s, viewer, campaign_for(s, viewer, campaign_id), typed=text[:1000], notice=notice[:200], offer=not empty,
                 also=typed_also)


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
    also_region: Annotated[list[int] | None, Form(max_length=MAX_GROUP_CROPS)] = None,
    also: Annotated[list[str] | None, Form(max_length=MAX_GROUP_CROPS)] = None,
) -> Response:
    """Save one label per ticked crop (what they share plus that crop's own additions) and show the next group; bad input
    re-shows the group with everything typed and the message."""
    c = campaign_for(s, viewer, campaign_id)
    ticked = list(tick or [])
    typed_also: dict[int, str] = {}

    def save() -> str:
        typed_also.update(_typed_additions(list(also_region or []), list(also or [])))
        extras = {r: parse_entities(text, False) for r, text in typed_also.items()}
        got = campaigns.save_group_label(s, campaign=c, person_id=viewer.person_id, group_id=group_id, ticked=ticked,
                                         entities=parse_entities(labels, bool(nothing)), unsure=bool(unsure), client_id=client_id,
                                         seconds_spent=seconds_spent, extras=extras)
        return f"{len(got.lost)} crop(s) had their places taken by others while you worked." if got.lost else ""

    def reshow(message: str) -> Response:
        held = campaigns.held_group(s, campaign=c, person_id=viewer.person_id)
        shown = frozenset(t.region_id for t in held.crops) if held else frozenset()
        return _page(request, s, viewer, c, typed=labels, error=message, status_code=422, unticked=shown - frozenset(ticked), also=typed_also)

    return answer_form(s, save=save, reshow=reshow, hand_out_next=lambda: campaigns.lease_group(s, campaign=c, person_id=viewer.person_id),
                       page=f"/campaigns/{campaign_id}/groups")


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
    """Store what the ticked crops of your group share, and what each shows besides (``also``): one label per ticked crop;
    a retried client_id stores nothing twice."""
    got = campaigns.save_group_label(s, campaign=campaign_for(s, viewer, campaign_id), person_id=viewer.person_id, group_id=group_id,
                                     ticked=body.ticked, entities=_entities(body), unsure=body.unsure, client_id=body.client_id, seconds_spent=body.seconds_spent,
                                     extras=_additions(body))
    return GroupLabelResult(stored=got.stored, group_id=got.group_id, labelled=list(got.labelled), returned=list(got.returned), lost=list(got.lost))
