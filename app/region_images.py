"""A region's pictures, made when asked: the crop cut from the original image, the outlined view, the overlay.

The saliency job stores no crop or outline file (one array file per batch holds the maps); a region's crop
is cut from the image the model saw, exactly as the job used to cut it. Projects made before keep their
stored crop and outline files, which are served as they are (from inside the project folder only).
"""

from __future__ import annotations

import io
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from PIL import Image
from sqlalchemy import select
from sqlalchemy.orm import Session

from analysis.errors import ImageInputError
from analysis.images import fit_to_aspect, mean_fill, read_rgb
from analysis.regions import Region, crop_region, outline_region, saliency_overlay

from . import store
from .errors import InvalidRequestError, NotFoundError
from .jobs import MAX_ASPECT
from .layout import ProjectLayout
from .maps import read_saliency
from .models import Prediction, RegionRow, SaliencyRun

MAX_OVERLAY_SIDE = 1024
MAX_CROP_SIDE = 1024  # a crop cut from a large photo is scaled down to this for the page
DEFAULT_MARGIN = 0.25
MAX_STORED_BYTES = 64 * 1024 * 1024  # an older project's stored picture larger than this is refused, not read


@dataclass(frozen=True)
class RunView:
    """What a run recorded about how the model saw an image: its input size, resize policy, fill and the crop margin."""

    size: tuple[int, int]  # (h, w) of the map
    resize: str
    fill: tuple[int, int, int]
    margin: float


def run_view(provenance: dict[str, Any] | None) -> RunView:
    """The view settings a run's provenance records (sizes and fills of projects made before default sensibly)."""
    p = provenance if isinstance(provenance, dict) else {}
    found = p.get("sidecar")
    sidecar: dict[str, Any] = found if isinstance(found, dict) else {}
    size = p.get("input_size") or p.get("map_size") or sidecar.get("input_size") or (0, 0)
    mean = [float(m) for m in (sidecar.get("mean") or (0.0, 0.0, 0.0))]
    fill = mean_fill((mean[0], mean[1], mean[2]), channel_order=str(sidecar.get("channel_order") or "RGB"))
    regions = p.get("regions")
    margin = float(regions.get("margin", DEFAULT_MARGIN)) if isinstance(regions, dict) else DEFAULT_MARGIN
    return RunView(size=(int(size[0]), int(size[1])), resize=str(sidecar.get("resize") or "resize"), fill=fill, margin=margin)


def _provenance(s: Session, region_id: int) -> dict[str, Any] | None:
    found = s.scalar(select(SaliencyRun.provenance).join(Prediction, Prediction.run_id == SaliencyRun.id)
                     .join(RegionRow, RegionRow.prediction_id == Prediction.id).where(RegionRow.id == region_id))
    return found if isinstance(found, dict) else None


def _image(files: store.RegionFiles, region_id: int) -> Image.Image:
    try:
        return read_rgb(Path(files.image_path))
    except ImageInputError as exc:
        raise NotFoundError(f"the image of region {region_id} cannot be read: {exc}") from None


def _box(files: store.RegionFiles) -> Region:
    x0, y0, x1, y1 = files.box
    return Region(rank=0, x0=x0, y0=y0, x1=x1, y1=y1, area=0, mass_share=0.0, peak_x=x0, peak_y=y0)


def _png(image: Image.Image) -> bytes:
    buf = io.BytesIO()
    image.save(buf, format="PNG")
    return buf.getvalue()


def _view(s: Session, layout: ProjectLayout, files: store.RegionFiles, region_id: int) -> tuple[Image.Image, RunView]:
    """The part of the original image the model saw (as the saliency job cut it), and the run's view settings."""
    view = run_view(_provenance(s, region_id))
    if min(view.size) <= 0:  # provenance without a size: the map knows it
        h, w = read_saliency(layout, files.saliency_map).shape
        view = RunView(size=(int(h), int(w)), resize=view.resize, fill=view.fill, margin=view.margin)
    return fit_to_aspect(_image(files, region_id), view.size, resize=view.resize, fill=view.fill), view


def stored_png(layout: ProjectLayout, rel: str, region_id: int) -> bytes:
    """The bytes of a stored region picture of a project made before: only a file inside the project folder, of bounded size."""
    path = layout.existing(rel, what=f"an image file of region {region_id}")
    if path.stat().st_size > MAX_STORED_BYTES:
        raise NotFoundError(f"the stored image file of region {region_id} ({rel[:200]}) is over {MAX_STORED_BYTES // 2**20} MB; "
                            "heedmap did not write it. Run the saliency job again for this run.")
    return path.read_bytes()


def crop_image(s: Session, layout: ProjectLayout, files: store.RegionFiles, region_id: int) -> Image.Image:
    """The region cut from the image the model saw, with the run's margin (the picture the saliency job used to store)."""
    view, settings = _view(s, layout, files, region_id)
    return crop_region(view, _box(files), map_size=settings.size, margin=settings.margin)


def crop_png(s: Session, layout: ProjectLayout, files: store.RegionFiles, region_id: int) -> bytes:
    """PNG bytes of the region's crop: the stored file of an older project, else cut now (at most MAX_CROP_SIDE a side)."""
    if files.crop:
        return stored_png(layout, files.crop, region_id)
    crop = crop_image(s, layout, files, region_id)
    if max(crop.size) > MAX_CROP_SIDE:
        crop.thumbnail((MAX_CROP_SIDE, MAX_CROP_SIDE))
    return _png(crop)


def outline_png(s: Session, layout: ProjectLayout, files: store.RegionFiles, region_id: int) -> bytes:
    """PNG bytes of the whole view with the region's box drawn on it."""
    if files.outline:
        return stored_png(layout, files.outline, region_id)
    view, settings = _view(s, layout, files, region_id)
    return _png(outline_region(view, _box(files), map_size=settings.size))


def overlay_png(layout: ProjectLayout, files: store.RegionFiles, region_id: int) -> bytes:
    """PNG bytes of the whole image with its saliency map as heat and the region outlined."""
    saliency = read_saliency(layout, files.saliency_map)
    image = _image(files, region_id)
    if max(image.size) > MAX_ASPECT * max(1, min(image.size)):
        raise InvalidRequestError(f"the image of region {region_id} is {image.width}x{image.height} pixels, too elongated for an overlay "
                                  f"(more than {MAX_ASPECT} to 1); look at its crop and outline instead.")
    if max(image.size) > MAX_OVERLAY_SIDE:
        image.thumbnail((MAX_OVERLAY_SIDE, MAX_OVERLAY_SIDE))  # the overlay is for looking at, not for the full resolution
    return _png(saliency_overlay(image, saliency, _box(files)))
