"""The saliency job: register images, predict, Grad-CAM, regions and crops, resumable batch by batch."""

from __future__ import annotations

import hashlib
import json
import sys
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from PIL import Image
from sqlalchemy import select
from sqlalchemy.orm import Session, sessionmaker

from analysis.errors import ImageInputError
from analysis.images import DEFAULT_MAX_PIXELS, ImageRecord, check_image, fit_to_aspect, mean_fill, read_rgb, to_model_input
from analysis.model_io import LoadedModel, Sidecar
from analysis.regions import ThresholdPolicy, crop_region, extract_regions
from analysis.saliency import SaliencyBatch, compute_saliency, saliency_provenance

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
    name: str = ""
    processed: int = 0
    already_done: int = 0
    regions: int = 0
    empty_maps: int = 0
    whole_image_regions: int = 0  # top regions covering 90% of the image or more: a sign of a too-coarse layer
    skipped: list[tuple[str, str]] = field(default_factory=list)  # (path, reason)
    new_run: bool = False


@dataclass(frozen=True)
class RunSummary:
    """A saliency run as `heedmap runs` lists it."""

    id: int
    name: str
    created: str
    images: int
    done: int
    layer: str
    model_kind: str
    model_sha256: str
    key: str


def image_set_key(records: list[ImageRecord]) -> dict[str, object]:
    """What identifies an image set in a run's key: its size and a hash of its paths, labels and splits."""
    rows = sorted(f"{Path(r.path).resolve()}\t{r.label}\t{r.split}" for r in records)
    return {"count": len(rows), "sha256": hashlib.sha256("\n".join(rows).encode()).hexdigest()}


def run_key(provenance: dict[str, object]) -> str:
    """The run key: a hash of everything that changes a run's results (model hash, sidecar, layer,
    method, region parameters and the image set); the run's name is a label, not part of it."""
    keyed = {k: v for k, v in provenance.items() if k not in ("run_name", "image_source", "model_notes", "model_factory_folder")}
    return hashlib.sha256(json.dumps(keyed, sort_keys=True, default=str).encode()).hexdigest()[:16]


def find_run(s: Session, ref: str | int | None) -> int | None:
    """A run by id, or the latest run of that name; None gives the latest run of all."""
    if ref is None:
        return s.scalar(select(SaliencyRun.id).order_by(SaliencyRun.id.desc()).limit(1))
    text = str(ref).strip()
    if text.isdigit():
        return s.scalar(select(SaliencyRun.id).where(SaliencyRun.id == int(text)))
    for run in s.scalars(select(SaliencyRun).order_by(SaliencyRun.id.desc())):
        if (run.provenance or {}).get("run_name") == text:
            return run.id
    return None


def list_runs(factory: sessionmaker[Session]) -> list[RunSummary]:
    """Every saliency run of the project, oldest first, with how many images it has done."""
    from sqlalchemy import func

    with factory() as s:
        done = dict(s.execute(select(Prediction.run_id, func.count(Prediction.id)).group_by(Prediction.run_id)).all())
        out = []
        for run in s.scalars(select(SaliencyRun).order_by(SaliencyRun.id)):
            p = run.provenance or {}
            listed = p.get("images")
            images: dict[str, Any] = listed if isinstance(listed, dict) else {}
            out.append(RunSummary(
                id=run.id, name=str(p.get("run_name") or f"run {run.id}"), created=run.created_at.isoformat(timespec="minutes"),
                images=int(images.get("count", done.get(run.id, 0))), done=int(done.get(run.id, 0)), layer=str(p.get("layer", "")),
                model_kind=str(p.get("model_kind", "")), model_sha256=str(p.get("model_sha256", ""))[:12], key=run.config_key,
            ))
    return out


MAX_ASPECT = 16  # longest side over shortest; beyond it an image is refused with a message


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
                if max(w, h) > MAX_ASPECT * max(1, min(w, h)):
                    raise ImageInputError(f"{path} is {w}x{h} pixels, more than {MAX_ASPECT} times longer one way than the other; "
                                          "crop or pad it to a less extreme shape (its crops and outlines would be mostly scaling).")
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


def _store_batch(factory: sessionmaker[Session], layout: ProjectLayout, run_id: int, sc: Sidecar, params: RegionParams, ids: list[int],
                 paths: dict[int, str], views: list[Image.Image], res: SaliencyBatch, report: JobReport) -> None:
    """Write one batch's maps and crops, then its rows in one transaction.

    The region's outline is not stored: the app draws it over the original image when asked.
    """
    with write_session(factory) as s:
        for k, image_id in enumerate(ids):
            sal = res.maps[k]
            if not (np.isfinite(float(res.confidence[k])) and np.isfinite(sal).all()):
                why = "the model gave NaN or infinite outputs for this image; nothing was stored for it (check the model and its input scaling)"
                report.skipped.append((paths[image_id], why))
                continue
            map_rel = layout.saliency_map(run_id, image_id)
            regions, labels = extract_regions(sal, policy=params.policy, max_regions=params.max_regions, min_area=params.min_area)
            np.save(layout.path(map_rel), sal.astype(np.float16))
            np.save(layout.path(layout.region_labels(run_id, image_id)), labels.astype(np.uint8))
            pred = Prediction(run_id=run_id, image_id=image_id, predicted=sc.classes[int(res.predicted[k])], confidence=float(res.confidence[k]),
                              empty_map=bool(res.empty[k]), map_path=map_rel)
            s.add(pred)
            s.flush()
            report.empty_maps += int(res.empty[k])
            if regions and regions[0].area >= 0.9 * sal.size:
                report.whole_image_regions += 1
            for r in regions:
                crop_rel = layout.crop(run_id, image_id, r.rank)
                crop_region(views[k], r, map_size=sc.input_size, margin=params.margin).save(layout.path(crop_rel))
                s.add(RegionRow(prediction_id=pred.id, rank=r.rank, x0=r.x0, y0=r.y0, x1=r.x1, y1=r.y1, area=r.area, mass_share=r.mass_share,
                                crop_path=crop_rel, outline_path=""))
                report.regions += 1
    report.processed += len(ids)


def run_saliency(
    factory: sessionmaker[Session],
    project_dir: Path,
    model: LoadedModel,
    *,
    params: RegionParams = RegionParams(),
    batch_size: int = 32,
    progress: Callable[[int, int], None] | None = _progress,
    after_batch: Callable[[int], None] | None = None,
    model_files: tuple[Path | None, Path] | None = None,
    images: list[ImageRecord] | None = None,
    name: str = "default",
    source: Path | None = None,
) -> JobReport:
    """Process every image of the run's image set that it has not done yet; each batch commits once.

    ``images`` is the run's image set (registered first with :func:`register_images`); None means
    every registered image. The run is keyed by :func:`run_key` (model hash, sidecar, layer,
    method, region parameters, image set): the same again continues the run, so an interrupted job
    resumes without duplicates, while a changed sidecar or another image folder starts a new run.
    ``name`` labels the run ("test", "counterfactual"); ``model_files`` (model, sidecar) are
    recorded so later steps can load the same model again.
    """
    with factory() as s:
        rows = list(s.scalars(select(ImageRow).order_by(ImageRow.id)))
    if images is not None:
        wanted = {str(Path(r.path).resolve()) for r in images}
        rows = [r for r in rows if r.path in wanted]
        records = images
    else:
        records = [ImageRecord(path=Path(r.path), label=r.label, split=r.split) for r in rows]
    provenance = {
        **saliency_provenance(model),
        "regions": params.to_json(),
        "images": image_set_key(records),
        "run_name": name,
        "image_source": str(source) if source is not None else None,
    }
    key = run_key(provenance)
    with write_session(factory) as s:
        run = s.scalar(select(SaliencyRun).where(SaliencyRun.config_key == key))
        new_run = run is None
        if run is None:
            run = SaliencyRun(config_key=key, provenance=provenance)
            s.add(run)
            s.flush()
        if model_files is not None:
            run.model_path = str(Path(model_files[0]).resolve()) if model_files[0] is not None else None  # None: a factory without checkpoint
            run.sidecar_path = str(Path(model_files[1]).resolve())
        run_id = run.id
        run_name = str((run.provenance or {}).get("run_name") or name)
    with factory() as s:
        done = set(s.scalars(select(Prediction.image_id).where(Prediction.run_id == run_id)))
    todo = [(r.id, r.path) for r in rows if r.problem is None]
    report = JobReport(run_id=run_id, name=run_name, already_done=sum(1 for i, _ in todo if i in done), new_run=new_run)
    todo = [t for t in todo if t[0] not in done]
    layout = ProjectLayout(Path(project_dir))
    layout.make_run_dirs(run_id)
    sc = model.sidecar
    total = len(todo)
    # Files are written and each batch committed on a writer thread while the next batch is computed:
    # the PNG and array encoding no longer holds up the model. A batch's rows commit only after its
    # files are on disk, so a stored prediction never points at a missing file.
    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="heedmap-writer") as writer:
        pending: Future[None] | None = None
        for b, start in enumerate(range(0, total, batch_size)):
            batch = todo[start : start + batch_size]
            pictures, ids = [], []
            for image_id, path in batch:
                try:
                    pictures.append(read_rgb(Path(path)))
                    ids.append(image_id)
                except ImageInputError as exc:
                    report.skipped.append((path, str(exc)))
                    if pending is not None:
                        pending.result()
                        pending = None
                    with write_session(factory) as s:
                        row = s.get(ImageRow, image_id)
                        if row is not None:
                            row.problem = str(exc)
            if pictures:
                fill = mean_fill(sc.mean, channel_order=sc.channel_order)
                views = [fit_to_aspect(im, sc.input_size, resize=sc.resize, fill=fill) for im in pictures]
                res = compute_saliency(model, to_model_input(pictures, **sc.input_options()))
                if pending is not None:
                    pending.result()  # the previous batch is stored before this one is handed over
                pending = writer.submit(_store_batch, factory, layout, run_id, sc, params, ids, dict(batch), views, res, report)
            if pending is not None and after_batch:
                pending.result()  # what after_batch sees is stored
                pending = None
            if progress:
                progress(start + len(batch), total)
            if after_batch:
                after_batch(b)
        if pending is not None:
            pending.result()
    return report
