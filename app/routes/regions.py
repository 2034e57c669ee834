"""Region images, served by region id only: the crop, the outlined image and the saliency overlay."""

from __future__ import annotations

import io
from pathlib import Path
from typing import Any

import numpy as np
from fastapi.responses import FileResponse, Response
from sqlalchemy import select
from sqlalchemy.orm import Session

from analysis.errors import ImageInputError
from analysis.images import fit_to_aspect, mean_fill, read_rgb, thumbnail_png
from analysis.regions import Region, outline_region, saliency_overlay

from .. import campaigns, store
from ..deps import ReviewerDep, SessionDep, SettingsDep, ViewerDep, guarded_router, require_viewer
from ..errors import InvalidRequestError, NotFoundError
from ..jobs import MAX_ASPECT
from ..layout import ProjectLayout
from ..models import ImageRow, Prediction, RegionRow, SaliencyRun
from ..people import Viewer

router = guarded_router(require_viewer, prefix="/api")
routers = (router,)
_CACHE = {"Cache-Control": "private, max-age=3600"}
MAX_OVERLAY_SIDE = 1024


def _project_file(settings: SettingsDep, rel: str, region_id: int) -> Path:
    return ProjectLayout(Path(settings.project_dir)).existing(rel, what=f"an image file of region {region_id}")


def _files(s: Session, viewer: Viewer, region_id: int) -> store.RegionFiles:
    """The region's files, if this person may see it: reviewers and up see every region; an annotator
    only what their campaigns handed them (or show as examples)."""
    if not viewer.can("reviewer") and not campaigns.region_visible_to(s, person_id=viewer.person_id, campaign_id=viewer.campaign_id, region_id=region_id):
        raise NotFoundError(f"region {region_id} is not one of the regions handed to you.")
    return store.region_files(s, region_id)


@router.get("/regions/{region_id}/crop.png")
def region_crop(region_id: int, s: SessionDep, settings: SettingsDep, viewer: ViewerDep) -> FileResponse:
    """The region's crop."""
    return FileResponse(_project_file(settings, _files(s, viewer, region_id).crop, region_id), media_type="image/png", headers=_CACHE)


@router.get("/regions/{region_id}/outline.png", response_model=None)
def region_outline(region_id: int, s: SessionDep, settings: SettingsDep, viewer: ViewerDep) -> FileResponse | Response:
    """The full image with the region outlined: drawn now over the original image (the saliency job
    stores no outline file; projects made before that keep theirs)."""
    files = _files(s, viewer, region_id)
    if files.outline:
        return FileResponse(_project_file(settings, files.outline, region_id), media_type="image/png", headers=_CACHE)
    height, width = np.load(_project_file(settings, files.saliency_map, region_id), mmap_mode="r").shape[:2]
    size = (int(height), int(width))
    try:
        image = read_rgb(Path(files.image_path))
    except ImageInputError as exc:
        raise NotFoundError(f"the image of region {region_id} cannot be read: {exc}") from None
    # The view the model saw (as the saliency job cut it), so the box lands where the map put it.
    provenance = s.scalar(select(SaliencyRun.provenance).join(Prediction, Prediction.run_id == SaliencyRun.id)
                          .join(RegionRow, RegionRow.prediction_id == Prediction.id).where(RegionRow.id == region_id))
    found = provenance.get("sidecar") if isinstance(provenance, dict) else None
    sidecar: dict[str, Any] = found if isinstance(found, dict) else {}
    mean = [float(m) for m in (sidecar.get("mean") or (0.0, 0.0, 0.0))]
    fill = mean_fill((mean[0], mean[1], mean[2]), channel_order=str(sidecar.get("channel_order") or "RGB"))
    view = fit_to_aspect(image, size, resize=str(sidecar.get("resize") or "resize"), fill=fill)
    x0, y0, x1, y1 = files.box
    box = Region(rank=0, x0=x0, y0=y0, x1=x1, y1=y1, area=0, mass_share=0.0, peak_x=x0, peak_y=y0)
    buf = io.BytesIO()
    outline_region(view, box, map_size=size).save(buf, format="PNG")
    return Response(buf.getvalue(), media_type="image/png", headers=_CACHE)


@router.get("/regions/{region_id}/overlay.png")
def region_overlay(region_id: int, s: SessionDep, settings: SettingsDep, viewer: ViewerDep) -> Response:
    """The full image with its saliency map as heat and the region outlined."""
    files = _files(s, viewer, region_id)
    saliency = np.load(_project_file(settings, files.saliency_map, region_id)).astype(np.float32)
    try:
        image = read_rgb(Path(files.image_path))
    except ImageInputError as exc:
        raise NotFoundError(f"the image of region {region_id} cannot be read: {exc}") from None
    if max(image.size) > MAX_ASPECT * max(1, min(image.size)):
        raise InvalidRequestError(f"the image of region {region_id} is {image.width}x{image.height} pixels, too elongated for an overlay "
                                  f"(more than {MAX_ASPECT} to 1); look at its crop and outline instead.")
    if max(image.size) > MAX_OVERLAY_SIDE:
        image.thumbnail((MAX_OVERLAY_SIDE, MAX_OVERLAY_SIDE))  # the overlay is for looking at, not for the full resolution
    x0, y0, x1, y1 = files.box
    box = Region(rank=0, x0=x0, y0=y0, x1=x1, y1=y1, area=0, mass_share=0.0, peak_x=x0, peak_y=y0)
    buf = io.BytesIO()
    saliency_overlay(image, saliency, box).save(buf, format="PNG")
    return Response(buf.getvalue(), media_type="image/png", headers=_CACHE)


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
