"""Region images: the saliency job stores crops and maps but no outline; the outline is drawn when asked,
the same picture the job used to store."""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
from fastapi.testclient import TestClient
from PIL import Image
from sqlalchemy import select

from analysis.images import read_rgb
from analysis.regions import Region, outline_region
from app.db import make_engine, session_factory
from app.layout import ProjectLayout
from app.models import ImageRow, Prediction, RegionRow

from .conftest import join


def test_job_stores_crops_and_maps_but_no_outline(project: Path) -> None:
    engine = make_engine(project)
    with session_factory(engine)() as s:
        rows = s.execute(select(RegionRow.crop_path, RegionRow.outline_path)).all()
        maps = list(s.scalars(select(Prediction.map_path)))
    engine.dispose()
    layout = ProjectLayout(project)
    assert rows and all(outline == "" for _, outline in rows)
    assert all(layout.path(crop).is_file() for crop, _ in rows) and all(layout.path(m).is_file() for m in maps)
    assert not list(project.rglob("*outline*.png"))


def test_outline_is_drawn_over_the_original_image(client: TestClient, project: Path, campaign_id: int) -> None:
    join(client, "rev", "reviewer")
    engine = make_engine(project)
    with session_factory(engine)() as s:
        region, image_path, map_path = s.execute(select(RegionRow, ImageRow.path, Prediction.map_path).select_from(RegionRow)
                                                 .join(Prediction, Prediction.id == RegionRow.prediction_id).join(ImageRow, ImageRow.id == Prediction.image_id).order_by(RegionRow.id).limit(1)).first()
    engine.dispose()
    r = client.get(f"/api/regions/{region.id}/outline.png")
    assert r.status_code == 200 and r.headers["content-type"] == "image/png"
    got = np.asarray(Image.open(io.BytesIO(r.content)).convert("RGB"))
    size = np.load(ProjectLayout(project).path(map_path)).shape
    box = Region(rank=0, x0=region.x0, y0=region.y0, x1=region.x1, y1=region.y1, area=0, mass_share=0.0, peak_x=region.x0, peak_y=region.y0)
    expected = np.asarray(outline_region(read_rgb(Path(image_path)), box, map_size=size))
    assert got.shape == expected.shape and np.array_equal(got, expected)
    assert got.shape[0] >= 256  # enlarged for the page, as before
