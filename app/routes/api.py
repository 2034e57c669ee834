"""JSON routes and files served by id."""

from __future__ import annotations

import re
from pathlib import Path

from fastapi import APIRouter
from fastapi.responses import FileResponse, PlainTextResponse
from pydantic import BaseModel, Field

from analysis.concepts import parse_label_text
from analysis.errors import InvalidInputError
from analysis.rules import to_csv

from .. import store
from ..deps import SessionDep, SettingsDep, WriteSessionDep
from ..errors import InvalidRequestError, NotFoundError

router = APIRouter()
_NAME = re.compile(r"^[\w .@-]{1,40}$")


def check_name(name: str) -> str:
    name = name.strip()
    if not _NAME.match(name):
        raise InvalidRequestError("annotator name must be 1-40 letters, digits, spaces or . @ - _")
    return name


def run_id_or_404(s: SessionDep) -> int:
    run_id = store.latest_run_id(s)
    if run_id is None:
        raise NotFoundError("no saliency run yet; run 'heedmap saliency' or 'heedmap demo' first.")
    return run_id


class RegionPublic(BaseModel):
    region_id: int
    predicted: str
    confidence: float
    labels_so_far: int
    crop_url: str
    outline_url: str


class EntityIn(BaseModel):
    entity: str = Field(min_length=1, max_length=60)
    attributes: list[str] = Field(default_factory=list, max_length=10)


class LabelCreate(BaseModel):
    annotator: str
    client_id: str = Field(min_length=8, max_length=64)
    entities: list[EntityIn] = Field(default_factory=list, max_length=10)
    nothing_recognisable: bool = False
    seconds_spent: float | None = Field(default=None, ge=0)


class LabelResult(BaseModel):
    stored: bool
    region_id: int


def region_public(task: store.RegionTask) -> RegionPublic:
    return RegionPublic(
        region_id=task.region_id, predicted=task.predicted, confidence=task.confidence, labels_so_far=task.labels_so_far,
        crop_url=f"/api/regions/{task.region_id}/crop.png", outline_url=f"/api/regions/{task.region_id}/outline.png",
    )


@router.get("/api/regions/next")
def next_region(annotator: str, s: SessionDep, settings: SettingsDep) -> RegionPublic | None:
    """The next region for this annotator, or null when none is left."""
    run_id = run_id_or_404(s)
    ident = store.annotator_id(s, check_name(annotator))
    s.commit()
    task = store.next_region(s, annotator=ident, run_id=run_id, per_region=settings.labels_per_region)
    return None if task is None else region_public(task)


def _file(s: SessionDep, settings: SettingsDep, region_id: int, which: int) -> FileResponse:
    rel = store.region_files(s, region_id)[which]
    path = Path(settings.project_dir) / rel
    if not path.is_file():
        raise NotFoundError(f"the image file of region {region_id} is missing from the project folder.")
    return FileResponse(path, media_type="image/png")


@router.get("/api/regions/{region_id}/crop.png")
def region_crop(region_id: int, s: SessionDep, settings: SettingsDep) -> FileResponse:
    """The region's crop."""
    return _file(s, settings, region_id, 0)


@router.get("/api/regions/{region_id}/outline.png")
def region_outline(region_id: int, s: SessionDep, settings: SettingsDep) -> FileResponse:
    """The full image with the region outlined."""
    return _file(s, settings, region_id, 1)


def store_label(s: WriteSessionDep, region_id: int, annotator: str, entities: list[tuple[str, list[str]]], nothing: bool, client_id: str, seconds: float | None) -> bool:
    if not entities and not nothing:
        raise InvalidRequestError("name at least one entity, or mark the region as nothing recognisable.")
    if entities and nothing:
        raise InvalidRequestError("a region with entities cannot also be nothing recognisable; choose one.")
    ident = store.annotator_id(s, check_name(annotator))
    return store.save_annotation(s, region_id=region_id, annotator=ident, entities=entities, client_id=client_id, seconds_spent=seconds)


@router.post("/api/regions/{region_id}/labels", status_code=201)
def create_label(region_id: int, body: LabelCreate, s: WriteSessionDep) -> LabelResult:
    """Store one annotator's label of a region; a retried client_id stores nothing twice."""
    text = "; ".join(f"{e.entity}: {', '.join(e.attributes)}" for e in body.entities)
    try:
        entities = parse_label_text(text)
    except InvalidInputError as exc:
        raise InvalidRequestError(str(exc)) from None
    stored = store_label(s, region_id, body.annotator, entities, body.nothing_recognisable, body.client_id, body.seconds_spent)
    return LabelResult(stored=stored, region_id=region_id)


@router.get("/exports/rules.csv", response_class=PlainTextResponse)
def export_rules(s: SessionDep, settings: SettingsDep) -> PlainTextResponse:
    """Per-class concept rules as CSV."""
    res = store.compute_results(s, run_id_or_404(s), min_support=settings.min_support)
    return PlainTextResponse(to_csv(res.rules.rules), media_type="text/csv", headers={"Content-Disposition": "attachment; filename=rules.csv"})


@router.get("/exports/concepts.csv", response_class=PlainTextResponse)
def export_concepts(s: SessionDep, settings: SettingsDep) -> PlainTextResponse:
    """The image-by-concept table as CSV (0/1 per concept)."""
    res = store.compute_results(s, run_id_or_404(s), min_support=settings.min_support)
    frame = res.concepts.reset_index()
    for c in frame.columns:
        if frame[c].dtype == bool:
            frame[c] = frame[c].astype(int)
    return PlainTextResponse(to_csv(frame), media_type="text/csv", headers={"Content-Disposition": "attachment; filename=concepts.csv"})
