"""The saliency job: register images, predict, Grad-CAM, regions and crops, resumable batch by batch."""

from __future__ import annotations

import hashlib
import json
import sys
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from sqlalchemy import select
from sqlalchemy.orm import Session, sessionmaker

from analysis.errors import ImageInputError
from analysis.images import DEFAULT_MAX_PIXELS, ImageRecord, check_image, read_rgb, to_model_input
from analysis.model_io import LoadedModel
from analysis.regions import ThresholdPolicy, crop_region, extract_regions, outline_region
from analysis.saliency import compute_saliency, saliency_provenance

from .db import write_session
from .layout import ProjectLayout
from .models import ImageRow, Prediction, RegionRow, SaliencyRun


@dataclass(frozen=True)
class RegionParams:
    policy: ThresholdPolicy = ThresholdPolicy()
    max_regions: int = 3
    min_area: int = 4
    margin: float = 0.25

    def to_json(self) -> dict[str, object]:
        return {**self.policy.to_json(), "max_regions": self.max_regions, "min_area": self.min_area, "margin": self.margin}


@dataclass
class JobReport:
    run_id: int
    processed: int = 0
    already_done: int = 0
    regions: int = 0
    empty_maps: int = 0
    skipped: list[tuple[str, str]] = field(default_factory=list)  # (path, reason)


def register_images(factory: sessionmaker[Session], records: list[ImageRecord], *, max_pixels: int = DEFAULT_MAX_PIXELS) -> list[tuple[str, str]]:
    """Add images not yet known; a missing, corrupt or oversized one is stored with its problem and listed."""
    problems = []
    with write_session(factory) as s:
        known = set(s.scalars(select(ImageRow.path)))
        for rec in records:
            path = str(Path(rec.path).resolve())
            if path in known:
                continue
            known.add(path)
            try:
                w, h = check_image(Path(path), max_pixels=max_pixels)
                s.add(ImageRow(path=path, label=rec.label, split=rec.split, width=w, height=h))
            except ImageInputError as exc:
                s.add(ImageRow(path=path, label=rec.label, split=rec.split, problem=str(exc)))
                problems.append((path, str(exc)))
    return problems


def _progress(done: int, total: int) -> None:
    width = 30
    filled = int(width * done / max(1, total))
    sys.stderr.write(f"\rsaliency [{'#' * filled}{'.' * (width - filled)}] {done}/{total}")
    if done >= total:
        sys.stderr.write("\n")
    sys.stderr.flush()


def run_saliency(
    factory: sessionmaker[Session],
    project_dir: Path,
    model: LoadedModel,
    *,
    params: RegionParams = RegionParams(),
    batch_size: int = 32,
    progress: Callable[[int, int], None] | None = _progress,
    after_batch: Callable[[int], None] | None = None,
    model_files: tuple[Path, Path] | None = None,
) -> JobReport:
    """Process every registered image that this run has not done yet; each batch commits once.

    The run is keyed by its provenance (model hash, method, layer, parameters): running the
    same again continues it, so an interrupted job resumes without duplicates. ``model_files``
    (model, sidecar) are recorded so later steps can load the same model again.
    """
    provenance = {**saliency_provenance(model), "regions": params.to_json()}
    key = hashlib.sha256(json.dumps(provenance, sort_keys=True).encode()).hexdigest()[:16]
    with write_session(factory) as s:
        run = s.scalar(select(SaliencyRun).where(SaliencyRun.config_key == key))
        if run is None:
            run = SaliencyRun(config_key=key, provenance=provenance)
            s.add(run)
            s.flush()
        if model_files is not None:
            run.model_path, run.sidecar_path = (str(Path(p).resolve()) for p in model_files)
        run_id = run.id
    with factory() as s:
        done = set(s.scalars(select(Prediction.image_id).where(Prediction.run_id == run_id)))
        todo = [(i.id, i.path) for i in s.scalars(select(ImageRow).where(ImageRow.problem.is_(None)).order_by(ImageRow.id))]
    report = JobReport(run_id=run_id, already_done=sum(1 for i, _ in todo if i in done))
    todo = [t for t in todo if t[0] not in done]
    layout = ProjectLayout(Path(project_dir))
    layout.make_run_dirs(run_id)
    sc = model.sidecar
    total = len(todo)
    for b, start in enumerate(range(0, total, batch_size)):
        batch = todo[start : start + batch_size]
        images, ids = [], []
        for image_id, path in batch:
            try:
                images.append(read_rgb(Path(path)))
                ids.append(image_id)
            except ImageInputError as exc:
                report.skipped.append((path, str(exc)))
                with write_session(factory) as s:
                    row = s.get(ImageRow, image_id)
                    if row is not None:
                        row.problem = str(exc)
        if images:
            res = compute_saliency(model, to_model_input(images, size=sc.input_size, mean=sc.mean, std=sc.std))
            with write_session(factory) as s:
                for k, image_id in enumerate(ids):
                    sal = res.maps[k]
                    map_rel = layout.saliency_map(run_id, image_id)
                    regions, labels = extract_regions(sal, policy=params.policy, max_regions=params.max_regions, min_area=params.min_area)
                    np.save(layout.path(map_rel), sal.astype(np.float16))
                    np.save(layout.path(layout.region_labels(run_id, image_id)), labels.astype(np.uint8))
                    pred = Prediction(run_id=run_id, image_id=image_id, predicted=sc.classes[int(res.predicted[k])], confidence=float(res.confidence[k]), empty_map=bool(res.empty[k]), map_path=map_rel)
                    s.add(pred)
                    s.flush()
                    report.empty_maps += int(res.empty[k])
                    for r in regions:
                        crop_rel = layout.crop(run_id, image_id, r.rank)
                        outline_rel = layout.outline(run_id, image_id, r.rank)
                        crop_region(images[k], r, map_size=sc.input_size, margin=params.margin).save(layout.path(crop_rel))
                        outline_region(images[k], r, map_size=sc.input_size).save(layout.path(outline_rel))
                        s.add(RegionRow(prediction_id=pred.id, rank=r.rank, x0=r.x0, y0=r.y0, x1=r.x1, y1=r.y1, area=r.area, mass_share=r.mass_share, crop_path=crop_rel, outline_path=outline_rel))
                        report.regions += 1
            report.processed += len(ids)
        if progress:
            progress(start + len(batch), total)
        if after_batch:
            after_batch(b)
    return report
