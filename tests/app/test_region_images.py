"""Region images and the file layout: the saliency job stores one map shard per batch and no crop or outline;
the crop is cut from the original image when asked (the same picture the job used to store), the outline is
drawn; projects made before (one map file per image, one crop PNG per region) are still served."""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
from fastapi.testclient import TestClient
from PIL import Image
from sqlalchemy import select, update

from analysis.images import find_images, read_rgb, to_model_input
from analysis.model_io import LoadedModel
from analysis.regions import Region, crop_region, extract_regions, outline_region
from analysis.saliency import compute_saliency
from app.db import make_engine, session_factory, write_session
from app.jobs import register_images, run_saliency
from app.layout import ProjectLayout
from app.maps import read_region_labels, read_saliency, region_labels_for
from app.models import ImageRow, Prediction, RegionRow

from .conftest import join


def _regions(project: Path) -> list[tuple[RegionRow, str, str, int]]:
    engine = make_engine(project)
    with session_factory(engine)() as s:
        rows = [(r, path, ref, image_id) for r, path, ref, image_id in s.execute(
            select(RegionRow, ImageRow.path, Prediction.map_path, Prediction.image_id).select_from(RegionRow)
            .join(Prediction, Prediction.id == RegionRow.prediction_id).join(ImageRow, ImageRow.id == Prediction.image_id).order_by(RegionRow.id)).all()]
        for r, *_ in rows:
            s.expunge(r)
    engine.dispose()
    return rows


def _box(region: RegionRow) -> Region:
    return Region(rank=0, x0=region.x0, y0=region.y0, x1=region.x1, y1=region.y1, area=0, mass_share=0.0, peak_x=region.x0, peak_y=region.y0)


def test_job_stores_one_map_shard_per_batch_and_no_crop_or_outline(tmp_path: Path, small_scenes: Path, tiny_model: LoadedModel) -> None:
    records = find_images(small_scenes / "manifest.csv")
    project = tmp_path / "p"
    factory = session_factory(make_engine(project))
    register_images(factory, records)
    run_saliency(factory, project, tiny_model, batch_size=5, progress=None)
    files = sorted(p.relative_to(project).as_posix() for p in (project / "runs").rglob("*") if p.is_file())
    batches = -(-len(records) // 5)
    assert len(files) == 2 * batches and all(f.startswith("runs/1/maps/b") and f.endswith(".npy") for f in files)
    assert not list(project.rglob("*.png"))
    with factory() as s:
        stored = s.execute(select(Prediction.image_id, Prediction.map_path).order_by(Prediction.image_id)).all()
        assert all(c == "" and o == "" for c, o in s.execute(select(RegionRow.crop_path, RegionRow.outline_path)))
    layout = ProjectLayout(project)
    # Each prediction's row of its shard is that image's map: recompute one image alone and compare (float16 as stored).
    with factory() as s:
        path_of = dict(s.execute(select(ImageRow.id, ImageRow.path)).all())
    for image_id, ref in stored[:: max(1, len(stored) // 4)]:
        alone = compute_saliency(tiny_model, to_model_input([read_rgb(Path(path_of[image_id]))], **tiny_model.sidecar.input_options())).maps[0]
        got = read_saliency(layout, ref)
        np.testing.assert_allclose(got, alone.astype(np.float16).astype(np.float32), rtol=2e-3, atol=1e-4 * float(alone.max()) + 1e-6)
        _, labels = extract_regions(got)
        assert read_region_labels(layout, ref).shape == got.shape and labels.shape == got.shape


def test_crop_is_cut_from_the_original_image_as_the_job_used_to_store_it(client: TestClient, project: Path) -> None:
    join(client, "rev", "reviewer")
    for region, image_path, ref, _ in _regions(project)[:6]:
        r = client.get(f"/api/regions/{region.id}/crop.png")
        assert r.status_code == 200 and r.headers["content-type"] == "image/png"
        got = np.asarray(Image.open(io.BytesIO(r.content)).convert("RGB"))
        size = read_saliency(ProjectLayout(project), ref).shape
        # What the job stored before crops were cut on demand: analysis.regions.crop_region over the image, margin 0.25.
        expected = np.asarray(crop_region(read_rgb(Path(image_path)), _box(region), map_size=size, margin=0.25).convert("RGB"))
        assert got.shape == expected.shape and np.array_equal(got, expected)


def test_outline_is_drawn_over_the_original_image(client: TestClient, project: Path) -> None:
    join(client, "rev", "reviewer")
    region, image_path, ref, _ = _regions(project)[0]
    r = client.get(f"/api/regions/{region.id}/outline.png")
    assert r.status_code == 200 and r.headers["content-type"] == "image/png"
    got = np.asarray(Image.open(io.BytesIO(r.content)).convert("RGB"))
    size = read_saliency(ProjectLayout(project), ref).shape
    expected = np.asarray(outline_region(read_rgb(Path(image_path)), _box(region), map_size=size))
    assert got.shape == expected.shape and np.array_equal(got, expected)
    assert got.shape[0] >= 256  # enlarged for the page, as before


def _make_legacy(project: Path) -> dict[int, bytes]:
    """Turn the project into the layout of before: one map and one region-label file per image, one crop PNG per region."""
    layout = ProjectLayout(project)
    crops: dict[int, bytes] = {}
    engine = make_engine(project)
    factory = session_factory(engine)
    with write_session(factory) as s:
        for pred in s.scalars(select(Prediction)):
            rel = layout.legacy_map(pred.run_id, pred.image_id)
            np.save(layout.path(rel), read_saliency(layout, pred.map_path).astype(np.float16))
            np.save(layout.path(layout.region_labels_of(rel)), read_region_labels(layout, pred.map_path))
            pred.map_path = rel
        (project / "runs" / "1" / "crops").mkdir()
        for rid, image_id in s.execute(select(RegionRow.id, Prediction.image_id).join(Prediction)).all():
            png = io.BytesIO()
            Image.new("RGB", (7, 5), (rid % 255, 10, 20)).save(png, format="PNG")  # a marker picture: served as stored, not recut
            rel = f"runs/1/crops/{image_id}_{rid}.png"
            layout.path(rel).write_bytes(png.getvalue())
            crops[rid] = png.getvalue()
            s.execute(update(RegionRow).where(RegionRow.id == rid).values(crop_path=rel))
    for shard in (project / "runs" / "1" / "maps").glob("b*.npy"):
        shard.unlink()
    engine.dispose()
    return crops


def test_a_project_made_before_shards_is_still_served(client: TestClient, project: Path) -> None:
    join(client, "rev", "reviewer")
    first = _regions(project)[0][0]
    overlay_new = client.get(f"/api/regions/{first.id}/overlay.png").content
    crops = _make_legacy(project)
    for region, _, ref, _ in _regions(project)[:4]:
        assert "#" not in ref
        assert client.get(f"/api/regions/{region.id}/crop.png").content == crops[region.id]
        assert client.get(f"/api/regions/{region.id}/outline.png").status_code == 200
    assert client.get(f"/api/regions/{first.id}/overlay.png").content == overlay_new
    engine = make_engine(project)
    with session_factory(engine)() as s:
        ids = [i for *_, i in _regions(project)]
        labels = region_labels_for(s, ProjectLayout(project), 1, ids)
    engine.dispose()
    assert set(labels) == set(ids) and all(v.dtype == np.uint8 and v.max() >= 1 for v in labels.values())


def test_a_damaged_map_reference_or_shard_gives_a_clear_404(client: TestClient, project: Path) -> None:
    join(client, "rev", "reviewer")
    region, _, ref, _ = _regions(project)[0]
    engine = make_engine(project)
    factory = session_factory(engine)
    rel, row = ProjectLayout.split_map_ref(ref)
    for bad, words in ((f"{rel}#99999", "has no row"), (f"{rel}#x", "damaged"), ("../../etc/passwd#0", "outside the project folder")):
        with write_session(factory) as s:
            s.execute(update(Prediction).where(Prediction.id == region.prediction_id).values(map_path=bad))
        r = client.get(f"/api/regions/{region.id}/overlay.png")
        assert r.status_code == 404 and words in r.json()["message"], bad
    with write_session(factory) as s:
        s.execute(update(Prediction).where(Prediction.id == region.prediction_id).values(map_path=ref))
    ProjectLayout(project).path(rel).write_bytes(b"\x93NUMPY damaged")
    r = client.get(f"/api/regions/{region.id}/overlay.png")
    assert r.status_code == 404 and "cannot be read" in r.json()["message"]
    assert client.get(f"/api/regions/{region.id}/crop.png").status_code == 200  # the crop needs only the original image
    engine.dispose()
