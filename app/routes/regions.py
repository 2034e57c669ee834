"""Region images, served by region id only: the crop, the outlined image and the saliency overlay."""

from __future__ import annotations

from pathlib import Path

from fastapi.responses import Response
from sqlalchemy.orm import Session

from analysis.errors import ImageInputError
from analysis.images import thumbnail_png

from .. import campaigns, region_images, store
from ..deps import ReviewerDep, SessionDep, SettingsDep, ViewerDep, guarded_router, require_viewer
from ..errors import NotFoundError
from ..layout import ProjectLayout
from ..models import ImageRow
from ..people import Viewer

router = guarded_router(require_viewer, prefix="/api")
routers = (router,)
_CACHE = {"Cache-Control": "private, max-age=3600"}


def _files(s: Session, viewer: Viewer, region_id: int) -> store.RegionFiles:
    """The region's files, if this person may see it: reviewers and up see every region; an annotator
    only what their campaigns handed them (or show as examples)."""
    if not viewer.can("reviewer") and not campaigns.region_visible_to(s, person_id=viewer.person_id, campaign_id=viewer.campaign_id, region_id=region_id):
        raise NotFoundError(f"region {region_id} is not one of the regions handed to you.")
    return store.region_files(s, region_id)


def _layout(settings: SettingsDep) -> ProjectLayout:
    return ProjectLayout(Path(settings.project_dir))


@router.get("/regions/{region_id}/crop.png")
def region_crop(region_id: int, s: SessionDep, settings: SettingsDep, viewer: ViewerDep) -> Response:
    """The region's crop, cut from the original image (projects made before serve their stored crop)."""
    png = region_images.crop_png(s, _layout(settings), _files(s, viewer, region_id), region_id)
    return Response(png, media_type="image/png", headers=_CACHE)


@router.get("/regions/{region_id}/outline.png")
def region_outline(region_id: int, s: SessionDep, settings: SettingsDep, viewer: ViewerDep) -> Response:
    """The full image with the region outlined, drawn over the original image."""
    png = region_images.outline_png(s, _layout(settings), _files(s, viewer, region_id), region_id)
    return Response(png, media_type="image/png", headers=_CACHE)


@router.get("/regions/{region_id}/overlay.png")
def region_overlay(region_id: int, s: SessionDep, settings: SettingsDep, viewer: ViewerDep) -> Response:
    """The full image with its saliency map as heat and the region outlined."""
    png = region_images.overlay_png(_layout(settings), _files(s, viewer, region_id), region_id)
    return Response(png, media_type="image/png", headers=_CACHE)


@router.get("/images/{image_id}/thumb.png")
def image_thumb(image_id: int, s: SessionDep, viewer: ReviewerDep) -> Response:
    """A small view of a whole image (reviewers and up)."""
    row = s.get(ImageRow, image_id)
    if row is None:
        raise NotFoundError(f"image {image_id} does not exist.")
    try:
        return Response(thumbnail_png(Path(row.path)), media_type="image/png", headers=_CACHE)
    except ImageInputError as exc:
        raise NotFoundError(f"image {image_id} cannot be read: {exc}") from None
