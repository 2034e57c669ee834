"""The labelling page and its JSON twin: the next region, submit, skip, undo, vocabulary."""

from __future__ import annotations

import unicodedata
import uuid
from collections.abc import Callable
from typing import Annotated, Any
from urllib.parse import urlencode

from fastapi import Form, Request
from fastapi.responses import JSONResponse, RedirectResponse, Response
from pydantic import BaseModel, Field
from sqlalchemy.orm import Session

from analysis.concepts import parse_label_text
from analysis.errors import InvalidInputError

from .. import campaigns
from ..campaigns import CampaignInfo, Task
from ..deps import MAX_ID, AnnotatorDep, SessionDep, WriteSessionDep, guarded_router, require_annotator
from ..errors import ConflictError, ForbiddenError, InvalidRequestError
from ..people import Viewer
from .common import render

# Pages and their JSON twin, both for annotators and up.
router = guarded_router(require_annotator, prefix="/campaigns/{campaign_id}")
api = guarded_router(require_annotator, prefix="/api/campaigns/{campaign_id}")
routers = (router, api)

# Attribute words offered before a campaign has its own; grouped by what they describe.
ATTRIBUTE_KINDS: dict[str, list[str]] = {
    "colour": ["red", "orange", "yellow", "green", "blue", "white", "black", "grey", "brown", "silver", "clear"],
    "shape": ["round", "square", "rectangular", "triangular", "long", "flat", "bent"],
    "material": ["plastic", "metal", "paper", "paperboard", "glass", "fabric"],
    "texture": ["shiny", "matte", "smooth", "rough", "striped", "dotted"],
    "text": ["printed", "handwritten", "logo", "barcode", "digits"],
    "state": ["torn", "dented", "crushed", "dirty", "wet", "open", "closed", "partly hidden"],
}


class RegionPublic(BaseModel):
    region_id: int
    predicted: str
    confidence: float
    crop_url: str
    outline_url: str
    overlay_url: str


class NextTask(BaseModel):
    task: RegionPublic | None
    upcoming: RegionPublic | None
    done: int
    total: int


class EntityIn(BaseModel):
    entity: str = Field(min_length=1, max_length=60)
    attributes: list[str] = Field(default_factory=list, max_length=10)


class LabelCreate(BaseModel):
    client_id: str = Field(min_length=8, max_length=64)
    entities: list[EntityIn] = Field(default_factory=list, max_length=10)
    nothing_recognisable: bool = False
    unsure: bool = False
    seconds_spent: float | None = Field(default=None, ge=0, le=86_400)


class LabelResult(BaseModel):
    stored: bool
    region_id: int


class UndoResult(BaseModel):
    region_id: int
    text: str
    group_id: int | None = None  # set when the last submission was a group judgment: all its crop labels were withdrawn
    regions: list[int] = Field(default_factory=list)


def public(task: Task) -> RegionPublic:
    base = f"/api/regions/{task.region_id}"
    return RegionPublic(region_id=task.region_id, predicted=task.predicted, confidence=task.confidence,
                        crop_url=f"{base}/crop.png", outline_url=f"{base}/outline.png", overlay_url=f"{base}/overlay.png")


def campaign_for(s: Session, viewer: Viewer, campaign_id: int) -> CampaignInfo:
    """The campaign, if this person may label in it (an annotator's invite may tie them to one)."""
    c = campaigns.get_campaign(s, campaign_id)
    if viewer.role == "annotator" and viewer.campaign_id not in (None, campaign_id):
        raise ForbiddenError(f"your invite is for campaign {viewer.campaign_id}, not {campaign_id}.")
    return c


def parse_entities(text: str, nothing: bool) -> list[tuple[str, list[str]]]:
    """The entities of a label typed as text, or [] for nothing recognisable; exactly one of the two."""
    try:
        entities = parse_label_text(text)
    except InvalidInputError as exc:
        raise InvalidRequestError(str(exc)) from None
    if not entities and not nothing:
        raise InvalidRequestError("name at least one thing, e.g. 'cap: red', or mark the region as nothing recognisable.")
    if entities and nothing:
        raise InvalidRequestError("a region with named things cannot also be nothing recognisable; choose one.")
    return entities


_SEPARATORS = frozenset(";:,\n\r")


def _word(value: str, where: str) -> str:
    """One entity or attribute as sent, spaces tidied; characters that separate words in typed labels are refused, not split on."""
    raw = unicodedata.normalize("NFKC", value)
    bad = sorted({ch for ch in raw if ch in _SEPARATORS or unicodedata.category(ch).startswith("C")})
    word = " ".join(raw.split())
    if bad:
        raise InvalidRequestError(f"{where} is {value[:60]!r}, which holds {', '.join(repr(c) for c in bad)}; send one word or phrase per field "
                                  "(each thing its own entity, each attribute its own list item).")
    if not word:
        raise InvalidRequestError(f"{where} is empty; name the thing, or leave the field out.")
    if len(word) > 60:
        raise InvalidRequestError(f"{where} is longer than 60 characters; shorten it.")
    return word


def structured_entities(body: LabelCreate) -> list[tuple[str, list[str]]]:
    """The entities of a JSON label exactly as sent (one per item), after checking their characters."""
    entities = [(_word(e.entity, f"entities[{i}].entity"), [_word(a, f"entities[{i}].attributes[{j}]") for j, a in enumerate(e.attributes)])
                for i, e in enumerate(body.entities)]
    if not entities and not body.nothing_recognisable:
        raise InvalidRequestError("name at least one thing in entities, or set nothing_recognisable.")
    if entities and body.nothing_recognisable:
        raise InvalidRequestError("a region with named things cannot also be nothing recognisable; choose one.")
    return entities


def page_context(s: Session, viewer: Viewer, c: CampaignInfo, *, holding: bool, typed: str, error: str, notice: str, offer: bool) -> dict[str, Any]:
    """What the single-crop and the group page both show: progress, a fresh submission id, the text typed, messages, words, examples."""
    done, total = campaigns.person_progress(s, c, viewer.person_id)
    return {
        "campaign": c, "done": done, "total": total, "client_id": uuid.uuid4().hex, "typed": typed, "error": error, "notice": notice,
        "attribute_kinds": ATTRIBUTE_KINDS, "examples": campaigns.examples(s, c.id), "grouped": campaigns.has_groups(s, c.id),
        "may_start": offer and not holding and c.closed_at is None and done < total,
    }


def answer_form(s: Session, *, save: Callable[[], str], reshow: Callable[[str], Response], hand_out_next: Callable[[], object], page: str) -> Response:
    """One form submission of either labelling page: ``save`` stores it (and returns a notice, or ""), then the next work is handed
    out and the page shown. Bad input re-shows the form with its message and loses nothing; a conflict (a retried or stale form,
    places taken) rolls back, hands out the next work and says why."""
    try:
        notice = save()
    except InvalidRequestError as exc:
        return reshow(exc.message)
    except ConflictError as exc:
        s.rollback()
        notice = exc.message
    hand_out_next()  # the next work is ready when the page shows
    return RedirectResponse(page + (f"?{urlencode({'notice': notice})}" if notice else ""), status_code=303)


def _page(request: Request, s: Session, viewer: Viewer, c: CampaignInfo, *, typed: str = "", unsure: bool = False, error: str = "",
          notice: str = "", status_code: int = 200, lease: bool = True, offer: bool = True) -> Response:
    """The labelling page; ``lease`` (POST answers only) hands out new regions, a GET shows those already held."""
    tasks = (campaigns.lease_tasks if lease else campaigns.held_tasks)(s, campaign=c, person_id=viewer.person_id)
    context = page_context(s, viewer, c, holding=bool(tasks), typed=typed, error=error, notice=notice, offer=offer)
    context |= {"task": public(tasks[0]) if tasks else None, "upcoming": public(tasks[1]) if len(tasks) > 1 else None, "unsure": unsure}
    return render(request, "annotate.html", context, viewer=viewer, status_code=status_code)


@router.get("/label")
def label_page(request: Request, campaign_id: int, s: SessionDep, viewer: AnnotatorDep, text: str = "", notice: str = "", empty: bool = False) -> Response:
    """One region at a time, keyboard first; shows the region held for you (taking one is a POST to /next)."""
    return _page(request, s, viewer, campaign_for(s, viewer, campaign_id), typed=text[:1000], notice=notice[:200], lease=False, offer=not empty)


@router.post("/next")
def take_next(campaign_id: int, s: WriteSessionDep, viewer: AnnotatorDep) -> Response:
    """Have the next region handed to you, then show it."""
    got = campaigns.lease_tasks(s, campaign=campaign_for(s, viewer, campaign_id), person_id=viewer.person_id)
    return RedirectResponse(f"/campaigns/{campaign_id}/label" + ("" if got else "?empty=1"), status_code=303)


@router.post("/label")
def submit_label(
    request: Request,
    campaign_id: int,
    s: WriteSessionDep,
    viewer: AnnotatorDep,
    region_id: Annotated[int, Form(ge=0, le=MAX_ID)],
    client_id: Annotated[str, Form(min_length=8, max_length=64)],
    labels: Annotated[str, Form(max_length=2000)] = "",
    nothing: Annotated[str, Form()] = "",
    unsure: Annotated[str, Form()] = "",
    seconds_spent: Annotated[float | None, Form(ge=0, le=86_400)] = None,
) -> Response:
    """Save the label and show the next region; bad input re-shows the form with the text and the message."""
    c = campaign_for(s, viewer, campaign_id)

    def save() -> str:
        campaigns.save_label(s, campaign=c, region_id=region_id, person_id=viewer.person_id, entities=parse_entities(labels, bool(nothing)),
                             unsure=bool(unsure), client_id=client_id, seconds_spent=seconds_spent, require_lease=True)
        return ""

    return answer_form(s, save=save, reshow=lambda message: _page(request, s, viewer, c, typed=labels, unsure=bool(unsure), error=message, status_code=422),
                       hand_out_next=lambda: campaigns.lease_tasks(s, campaign=c, person_id=viewer.person_id), page=f"/campaigns/{campaign_id}/label")


@router.post("/skip")
def skip_page(campaign_id: int, s: WriteSessionDep, viewer: AnnotatorDep, region_id: Annotated[int, Form(ge=0, le=MAX_ID)]) -> Response:
    """Pass over a region and show the next."""
    c = campaign_for(s, viewer, campaign_id)
    campaigns.skip_region(s, campaign=c, region_id=region_id, person_id=viewer.person_id)
    campaigns.lease_tasks(s, campaign=c, person_id=viewer.person_id)
    return RedirectResponse(f"/campaigns/{campaign_id}/label", status_code=303)


@router.post("/undo")
def undo_page(campaign_id: int, s: WriteSessionDep, viewer: AnnotatorDep) -> Response:
    """Withdraw your last submission and show it again with the text to edit: a label's region, or a group judgment's group."""
    got = campaigns.undo_last_submission(s, campaign=campaign_for(s, viewer, campaign_id), person_id=viewer.person_id)
    if got is None:
        return RedirectResponse(f"/campaigns/{campaign_id}/label?{urlencode({'notice': 'nothing to undo: you have no label in this campaign.'})}",
                                status_code=303)
    if got.group_id is not None:
        notice = f"your judgment of this group was withdrawn ({len(got.regions)} crop labels); judge it again."
        query = [("text", got.text), ("notice", notice), *(("also", f"{r}:{text}") for r, text in got.additions)]
        return RedirectResponse(f"/campaigns/{campaign_id}/groups?{urlencode(query)}", status_code=303)
    return RedirectResponse(f"/campaigns/{campaign_id}/label?{urlencode({'text': got.text})}", status_code=303)


# --- JSON ------------------------------------------------------------------------------------------


@api.post("/tasks/next")
def next_task(campaign_id: int, s: WriteSessionDep, viewer: AnnotatorDep) -> NextTask:
    """Your current region (leased to you) and the one after; null task when none is left."""
    c = campaign_for(s, viewer, campaign_id)
    tasks = campaigns.lease_tasks(s, campaign=c, person_id=viewer.person_id)
    done, total = campaigns.person_progress(s, c, viewer.person_id)
    return NextTask(task=public(tasks[0]) if tasks else None, upcoming=public(tasks[1]) if len(tasks) > 1 else None, done=done, total=total)


@api.post("/regions/{region_id}/labels", status_code=201)
def create_label(campaign_id: int, region_id: int, body: LabelCreate, s: WriteSessionDep, viewer: AnnotatorDep) -> LabelResult:
    """Store your label of a region; a retried client_id stores nothing twice."""
    entities = structured_entities(body)
    stored = campaigns.save_label(s, campaign=campaign_for(s, viewer, campaign_id), region_id=region_id, person_id=viewer.person_id,
                                  entities=entities, unsure=body.unsure, client_id=body.client_id, seconds_spent=body.seconds_spent,
                                  require_lease=True)
    return LabelResult(stored=stored, region_id=region_id)


@api.post("/regions/{region_id}/skip", status_code=204)
def skip_api(campaign_id: int, region_id: int, s: WriteSessionDep, viewer: AnnotatorDep) -> Response:
    """Pass over a region; it is not offered to you again."""
    campaigns.skip_region(s, campaign=campaign_for(s, viewer, campaign_id), region_id=region_id, person_id=viewer.person_id)
    return Response(status_code=204)


@api.post("/undo")
def undo_api(campaign_id: int, s: WriteSessionDep, viewer: AnnotatorDep) -> UndoResult | None:
    """Withdraw your last submission in the campaign (a label, or a whole group judgment); it becomes your current task again."""
    got = campaigns.undo_last_submission(s, campaign=campaign_for(s, viewer, campaign_id), person_id=viewer.person_id)
    return UndoResult(region_id=got.region_id, text=got.text, group_id=got.group_id, regions=list(got.regions)) if got else None


@api.get("/vocabulary")
def vocabulary(campaign_id: int, s: SessionDep, viewer: AnnotatorDep) -> JSONResponse:
    """Entity and attribute words for suggestions: the campaign's own, most used first, then common attributes."""
    campaign_for(s, viewer, campaign_id)
    rules, _ = campaigns.synonym_rules(s, campaign_id)
    entities, attributes = campaigns.label_counts(s, campaign_id, rules)
    words = [w for w, _ in attributes.most_common(200)]
    words += [w for kind in ATTRIBUTE_KINDS.values() for w in kind if w not in attributes]
    body = {"entities": [w for w, _ in entities.most_common(300)], "attributes": words}
    return JSONResponse(body, headers={"Cache-Control": "no-store"})  # it grows with every label
