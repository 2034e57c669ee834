"""`heedmap embed`: every region of a saliency run described by the model's own target-layer features.

A separate step after the saliency job rather than inside it: the job's compute and writing sides
are tuned for throughput, and an embedding is only needed for campaigns labelled in groups. It costs
one forward pass per image without a backward pass (a fraction of the saliency job) and writes one
array file per run (region ids and float16 vectors), never one file per region. Regions are pooled
over their box, which is what the annotator's crop shows.
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import numpy.typing as npt
from sqlalchemy import select
from sqlalchemy.orm import Session, sessionmaker

from analysis.errors import ImageInputError
from analysis.images import read_rgb, to_model_input
from analysis.model_io import LoadedModel
from analysis.region_embeddings import box_masks, embed_regions

from .errors import NotFoundError
from .layout import ProjectLayout
from .models import ImageRow, Prediction, RegionRow


@dataclass(frozen=True)
class EmbedReport:
    run_id: int
    regions: int
    dimensions: int
    layer: str
    file: str  # relative to the project folder
    skipped_images: int
    seconds: float


@dataclass(frozen=True)
class RegionEmbeddings:
    region_ids: npt.NDArray[np.int64]  # (n,)
    vectors: npt.NDArray[np.float32]  # (n, d)
    layer: str


def _regions_by_image(s: Session, run_id: int) -> dict[int, tuple[str, list[tuple[int, tuple[int, int, int, int]]]]]:
    rows = s.execute(
        select(Prediction.image_id, ImageRow.path, RegionRow.id, RegionRow.x0, RegionRow.y0, RegionRow.x1, RegionRow.y1)
        .join(RegionRow, RegionRow.prediction_id == Prediction.id).join(ImageRow, ImageRow.id == Prediction.image_id)
        .where(Prediction.run_id == run_id).order_by(Prediction.image_id, RegionRow.rank)
    ).all()
    out: dict[int, tuple[str, list[tuple[int, tuple[int, int, int, int]]]]] = {}
    for image_id, path, region_id, x0, y0, x1, y1 in rows:
        out.setdefault(image_id, (path, []))[1].append((region_id, (x0, y0, x1, y1)))
    return out


def _save(path: Path, region_ids: npt.NDArray[np.int64], vectors: npt.NDArray[np.float32], layer: str) -> None:
    """Write the file whole or not at all: a temporary file, synced, then renamed over the old one."""
    tmp = path.with_name(path.name + ".tmp")
    with open(tmp, "wb") as fh:
        np.savez(fh, region_ids=region_ids, vectors=vectors.astype(np.float16), layer=np.array(layer))
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)


def embed_run(factory: sessionmaker[Session], project_dir: Path, run_id: int, model: LoadedModel, *, batch_size: int = 64,
              progress: Callable[[int, int], None] | None = None) -> EmbedReport:
    """Embed every region of the run with ``model`` (the run's own model) and write the run's embedding file."""
    started = time.perf_counter()
    layout = ProjectLayout(Path(project_dir))
    with factory() as s:
        by_image = _regions_by_image(s, run_id)
    if not by_image:
        raise NotFoundError(f"saliency run {run_id} has no regions; run `heedmap saliency` first.")
    sc = model.sidecar
    ids: list[int] = []
    parts: list[npt.NDArray[np.float32]] = []
    skipped = 0
    items = list(by_image.items())
    for start in range(0, len(items), batch_size):
        pictures, masks, batch_ids = [], [], []
        for _image_id, (path, regions) in items[start : start + batch_size]:
            try:
                pictures.append(read_rgb(Path(path)))
            except ImageInputError:
                skipped += 1  # an image that went missing since the run: its regions get no embedding
                continue
            masks.append(box_masks([box for _, box in regions], sc.input_size))
            batch_ids += [r for r, _ in regions]
        if pictures:
            parts.append(embed_regions(model, to_model_input(pictures, **sc.input_options()), masks))
            ids += batch_ids
        if progress:
            progress(min(start + batch_size, len(items)), len(items))
    vectors = np.concatenate(parts) if parts else np.zeros((0, 0), dtype=np.float32)
    rel = layout.region_embeddings(run_id)
    layout.run_dir(run_id).mkdir(parents=True, exist_ok=True)
    layer = str(sc.target_layer or "")
    _save(layout.path(rel), np.asarray(ids, dtype=np.int64), vectors, layer)
    return EmbedReport(run_id, len(ids), int(vectors.shape[1]) if vectors.ndim == 2 else 0, layer, rel, skipped, time.perf_counter() - started)


def load_embeddings(project_dir: Path, run_id: int) -> RegionEmbeddings:
    """The run's region embeddings; NotFoundError saying how to make them when there are none."""
    layout = ProjectLayout(Path(project_dir))
    rel = layout.region_embeddings(run_id)
    path = layout.path(rel)
    if not path.is_file():
        raise NotFoundError(f"run {run_id} has no region embeddings yet; run `heedmap embed {project_dir} --run {run_id}` first.")
    try:
        with np.load(path, allow_pickle=False) as data:
            return RegionEmbeddings(data["region_ids"].astype(np.int64), data["vectors"].astype(np.float32), str(data["layer"]))
    except (OSError, ValueError, KeyError) as exc:
        raise NotFoundError(f"the region embeddings of run {run_id} ({rel}) cannot be read ({exc}); run `heedmap embed` again.") from None
