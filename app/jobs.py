"""The saliency job: register images, predict, Grad-CAM and regions, stored one shard per batch, resumable batch by batch."""

from __future__ import annotations

import hashlib
import json
import logging
import os
import secrets
import sys
from collections import deque
from collections.abc import Callable, Iterable
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, cast

import numpy as np
import numpy.typing as npt
import torch
from sqlalchemy import Table, insert, select
from sqlalchemy.orm import Session, sessionmaker

from analysis.errors import ImageInputError
from analysis.images import DEFAULT_MAX_PIXELS, ImageRecord, check_image, read_rgb, to_model_input
from analysis.model_io import LoadedModel, Sidecar
from analysis.regions import Region, ThresholdPolicy, extract_regions_batch
from analysis.saliency import SaliencyBatch, compute_saliency, saliency_provenance

from . import store
from .db import write_session
from .errors import InvalidRequestError
from .layout import ProjectLayout
from .maps import as_float16, sync_folder, write_array
from .models import ImageRow, Prediction, RegionRow, SaliencyRun
from .services import run_snapshot

log = logging.getLogger("heedmap")


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


def resolved_paths(paths: Iterable[str | os.PathLike[str]]) -> list[str]:
    """``str(Path(p).resolve())`` of each path, each folder resolved once.

    Resolving a path checks every folder on the way for a link (eight checks for a path eight folders
    deep); images share a few folders, so a folder's resolution is kept and only the file itself is
    checked (a file that is a link is resolved in full). The strings are the same as pathlib's.
    """
    folders: dict[str, str] = {}
    out = []
    for p in paths:
        text = os.fspath(p)
        head, tail = os.path.split(text)
        if tail in ("", ".", ".."):
            out.append(str(Path(text).resolve()))
            continue
        folder = folders.get(head)
        if folder is None:
            folder = folders[head] = os.path.realpath(head or ".")
        candidate = os.path.join(folder, tail)
        out.append(str(Path(candidate).resolve()) if os.path.islink(candidate) else candidate)
    return out


def image_set_key(records: list[ImageRecord], *, paths: list[str] | None = None) -> dict[str, object]:
    """What identifies an image set in a run's key: its size and a hash of its paths, labels and splits.
    ``paths``: the records' paths resolved already (:func:`resolved_paths`)."""
    resolved = resolved_paths(r.path for r in records) if paths is None else paths
    rows = sorted(f"{p}\t{r.label}\t{r.split}" for p, r in zip(resolved, records))
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
        for rec, path in zip(records, resolved_paths(r.path for r in records)):
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


def show_progress(done: int, total: int) -> None:
    width = 30
    filled = int(width * done / max(1, total))
    sys.stderr.write(f"\rsaliency [{'#' * filled}{'.' * (width - filled)}] {done}/{total}")
    if done >= total:
        sys.stderr.write("\n")
    sys.stderr.flush()


@dataclass(frozen=True)
class BatchResult:
    """One batch computed: what the writer stores. Plain data, so a worker process can send it back.

    ``ids`` are the images with results, in batch order; row k of ``maps`` (N x H x W float16) and
    ``labels`` (N x H x W uint8, r + 1 where region rank r is) belongs to ``ids[k]``.
    """

    ids: tuple[int, ...]
    predicted: tuple[int, ...]  # class index
    confidence: tuple[float, ...]
    empty: tuple[bool, ...]
    regions: tuple[tuple[Region, ...], ...]
    maps: npt.NDArray[np.float16]
    labels: npt.NDArray[np.uint8]
    unreadable: tuple[tuple[int, str, str], ...] = ()  # (image id, path, why): the image could not be read
    nonfinite: tuple[tuple[int, str], ...] = ()  # (image id, path): the model gave NaN or inf

    @property
    def size(self) -> int:
        """Images of the batch, stored or not."""
        return len(self.ids) + len(self.unreadable) + len(self.nonfinite)


@dataclass(frozen=True)
class BatchInput:
    """A batch read from disk: the images read, their model input, and what could not be read."""

    ids: tuple[int, ...]
    paths: tuple[str, ...]
    inputs: torch.Tensor | None  # N x 3 x H x W, None when no image could be read
    unreadable: tuple[tuple[int, str, str], ...]


def read_batch(sidecar: Sidecar, batch: list[tuple[int, str]]) -> BatchInput:
    """Read a batch's images and make the model's input; an unreadable image is listed, not raised."""
    pictures, ids, paths, unreadable = [], [], [], []
    for image_id, path in batch:
        try:
            pictures.append(read_rgb(Path(path)))
            ids.append(image_id)
            paths.append(path)
        except ImageInputError as exc:
            unreadable.append((image_id, path, str(exc)))
    inputs = to_model_input(pictures, **sidecar.input_options()) if pictures else None
    return BatchInput(tuple(ids), tuple(paths), inputs, tuple(unreadable))


def finish_batch(read: BatchInput, res: SaliencyBatch | None, params: RegionParams) -> BatchResult:
    """Regions of each map; images whose output is not finite are set aside. Maps are kept as float16."""
    if res is None:  # no image of the batch could be read
        empty = np.zeros((0, 0, 0), np.float16)
        return BatchResult(ids=(), predicted=(), confidence=(), empty=(), regions=(), maps=empty, labels=empty.astype(np.uint8), unreadable=read.unreadable)
    finite = np.isfinite(res.confidence) & np.isfinite(res.maps).reshape(len(res.maps), -1).all(axis=1)
    keep = [k for k in range(len(read.ids)) if finite[k]]
    nonfinite = [(read.ids[k], read.paths[k]) for k in range(len(read.ids)) if not finite[k]]
    kept_maps = res.maps[keep] if len(keep) < len(res.maps) else res.maps
    regions, labels = extract_regions_batch(kept_maps, policy=params.policy, max_regions=params.max_regions, min_area=params.min_area)
    shape = (0, *res.maps.shape[1:])
    return BatchResult(
        ids=tuple(read.ids[k] for k in keep),
        predicted=tuple(int(res.predicted[k]) for k in keep),
        confidence=tuple(float(res.confidence[k]) for k in keep),
        empty=tuple(bool(res.empty[k]) for k in keep),
        regions=tuple(tuple(r) for r in regions),
        maps=as_float16(kept_maps) if keep else np.zeros(shape, np.float16),
        labels=labels if keep else np.zeros(shape, np.uint8),
        unreadable=read.unreadable,
        nonfinite=tuple(nonfinite),
    )


def compute_batch(model: LoadedModel, batch: list[tuple[int, str]], params: RegionParams) -> BatchResult:
    """Read, predict, Grad-CAM and regions of one batch: everything but storing (what a worker runs)."""
    read = read_batch(model.sidecar, batch)
    res = compute_saliency(model, read.inputs) if read.inputs is not None else None
    return finish_batch(read, res, params)


def store_batch(factory: sessionmaker[Session], layout: ProjectLayout, run_id: int, classes: tuple[str, ...], result: BatchResult, report: JobReport) -> None:
    """Write one batch's maps as one shard (maps and region labels), then its rows and problems in one transaction.

    The files are on disk (fsynced, renamed into place) before the rows commit, so a stored
    prediction never points at a missing file. No crop or outline is stored: the app cuts and draws
    them from the original image when asked.
    """
    shard_rel = ""
    if result.ids:
        shard_rel = layout.map_shard(run_id, f"b{result.ids[0]:08d}-{secrets.token_hex(4)}")
        shard = layout.path(shard_rel)
        write_array(shard, result.maps)
        write_array(layout.path(layout.region_labels_of(shard_rel)), result.labels)
        sync_folder(shard.parent)
    with write_session(factory) as s:
        for image_id, path, why in result.unreadable:
            report.skipped.append((path, why))
            row = s.get(ImageRow, image_id)
            if row is not None:
                row.problem = why
        for _, path in result.nonfinite:
            report.skipped.append((path, "the model gave NaN or infinite outputs for this image; nothing was stored for it (check the model and its input scaling)"))
        if result.ids:  # Core inserts of plain rows: a batch's rows cost two statements, not one ORM flush per image
            predictions = cast(Table, Prediction.__table__)
            inserted = s.execute(insert(predictions).returning(predictions.c.image_id, predictions.c.id), [
                {"run_id": run_id, "image_id": image_id, "predicted": classes[result.predicted[k]], "confidence": result.confidence[k],
                 "empty_map": result.empty[k], "map_path": layout.map_ref(shard_rel, k)} for k, image_id in enumerate(result.ids)])
            pred_of = {int(image_id): int(pid) for image_id, pid in inserted}
            rows = [{"prediction_id": pred_of[image_id], "rank": r.rank, "x0": r.x0, "y0": r.y0, "x1": r.x1, "y1": r.y1, "area": r.area,
                     "mass_share": r.mass_share, "crop_path": "", "outline_path": ""}
                    for image_id, regions in zip(result.ids, result.regions) for r in regions]
            if rows:
                s.execute(insert(cast(Table, RegionRow.__table__)), rows)
        pixels = int(np.prod(result.maps.shape[1:])) if result.maps.ndim == 3 else 0
        for k in range(len(result.ids)):
            regions = result.regions[k]
            report.empty_maps += int(result.empty[k])
            report.regions += len(regions)
            if regions and regions[0].area >= 0.9 * pixels:
                report.whole_image_regions += 1
    report.processed += len(result.ids)


@dataclass(frozen=True)
class PreparedRun:
    """A run found or made for a job, and the images it has still to do."""

    run_id: int
    todo: list[tuple[int, str]]  # (image id, path), in id order
    report: JobReport
    layout: ProjectLayout


def prepare_run(factory: sessionmaker[Session], project_dir: Path, model: LoadedModel, *, params: RegionParams, model_files: tuple[Path | None, Path] | None,
                images: list[ImageRecord] | None, name: str, source: Path | None) -> PreparedRun:
    """Find the run this job continues (same key) or make it, and list the images it has not done."""
    with factory() as s:  # plain rows, not ORM objects: a run of 100,000 images reads them all
        rows = s.execute(select(ImageRow.id, ImageRow.path, ImageRow.label, ImageRow.split, ImageRow.problem).order_by(ImageRow.id)).all()
    if images is not None:
        paths = resolved_paths(r.path for r in images)
        wanted = set(paths)
        rows = [r for r in rows if r.path in wanted]
        records = images
    else:
        records = [ImageRecord(path=Path(r.path), label=r.label, split=r.split) for r in rows]
        paths = resolved_paths(r.path for r in records)
    provenance = {
        **saliency_provenance(model),
        "regions": params.to_json(),
        "images": image_set_key(records, paths=paths),
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
    layout = ProjectLayout(Path(project_dir))
    layout.make_run_dirs(run_id)
    return PreparedRun(run_id=run_id, todo=[t for t in todo if t[0] not in done], report=report, layout=layout)


def compute_streams(model: LoadedModel, threads: int) -> tuple[int, int]:
    """How many batches the job computes at once, and the torch threads each one gets, out of ``threads``.

    On CPU, two batches at once with half the threads each (one each on two threads): one image batch
    of a small model (the demo CNN at 64 px) is a row of short layers, and two threads splitting each
    layer wait on each other at every one of them, while two batches in threads of their own each keep
    a core busy. A large model gives up nothing by it. Elsewhere (cuda), and with one thread, one batch.
    """
    if model.device != "cpu" or threads < 2:
        return 1, max(1, threads)
    return 2, threads // 2


def run_saliency(
    factory: sessionmaker[Session],
    project_dir: Path,
    model: LoadedModel,
    *,
    params: RegionParams = RegionParams(),
    batch_size: int = 32,
    progress: Callable[[int, int], None] | None = show_progress,
    after_batch: Callable[[int], None] | None = None,
    model_files: tuple[Path | None, Path] | None = None,
    images: list[ImageRecord] | None = None,
    name: str = "default",
    source: Path | None = None,
    streams: int | None = None,
) -> JobReport:
    """Process every image of the run's image set that it has not done yet; each batch commits once.

    ``images`` is the run's image set (registered first with :func:`register_images`); None means
    every registered image. The run is keyed by :func:`run_key` (model hash, sidecar, layer,
    method, region parameters, image set): the same again continues the run, so an interrupted job
    resumes without duplicates, while a changed sidecar or another image folder starts a new run.
    ``name`` labels the run ("test", "counterfactual"); ``model_files`` (model, sidecar) are
    recorded so later steps can load the same model again.

    A reader thread decodes and resizes images ahead; ``streams`` threads (default from
    :func:`compute_streams`, sharing torch's threads) predict and compute Grad-CAM, each on a batch of
    its own; this thread finds each batch's regions and stores the batches in order. Every batch is
    computed alone, so the results do not depend on how many run at once.
    """
    if streams is not None and streams < 1:  # before anything is written: a refused job leaves no run behind
        raise InvalidRequestError(f"streams must be 1 or more; got {streams}.")
    prep = prepare_run(factory, project_dir, model, params=params, model_files=model_files, images=images, name=name, source=source)
    todo, sc = prep.todo, model.sidecar
    total = len(todo)
    batches = iter([todo[start : start + batch_size] for start in range(0, total, batch_size)])
    outer_threads = torch.get_num_threads()
    n_streams, stream_threads = compute_streams(model, outer_threads) if streams is None else (streams, max(1, outer_threads // streams))
    in_flight: deque[tuple[Future[BatchInput], Future[SaliencyBatch | None]]] = deque()
    # torch's thread count is the process's (and, for some libraries under it, each thread's): set here and
    # in every compute thread. Reading and storing do little torch work (normalising, float16) and get the
    # same small count, so no wide OpenMP team of theirs spins on the cores the compute threads need.
    torch.set_num_threads(stream_threads)
    try:
        with ThreadPoolExecutor(max_workers=1, thread_name_prefix="heedmap-reader", initializer=torch.set_num_threads, initargs=(stream_threads,)) as reader, \
                ThreadPoolExecutor(max_workers=n_streams, thread_name_prefix="heedmap-compute", initializer=torch.set_num_threads,
                                   initargs=(stream_threads,)) as compute:

            def start_next() -> None:
                batch = next(batches, None)
                if batch is not None:
                    read = reader.submit(read_batch, sc, batch)
                    in_flight.append((read, compute.submit(_saliency_of, model, read)))

            try:
                # Every compute thread busy, the next batches read and queued behind them, and room for
                # results waiting while this thread stores (an fsync can stall it for a while).
                for _ in range(2 * n_streams + 2):
                    start_next()
                done = stored = 0
                while in_flight:
                    read_f, saliency_f = in_flight.popleft()
                    res, read = saliency_f.result(), read_f.result()
                    start_next()
                    store_batch(factory, prep.layout, prep.run_id, sc.classes, finish_batch(read, res, params), prep.report)
                    done += len(read.ids) + len(read.unreadable)
                    if progress:
                        progress(done, total)
                    if after_batch:
                        after_batch(stored)
                    stored += 1
            finally:
                for read_f, saliency_f in in_flight:  # stopped early: nothing more is started
                    saliency_f.cancel()
                    read_f.cancel()
    finally:
        torch.set_num_threads(outer_threads)
    keep_predictions(factory, prep.layout, prep.run_id)
    return prep.report


def keep_predictions(factory: sessionmaker[Session], layout: ProjectLayout, run_id: int) -> None:
    """Keep the finished run's prediction frame beside the database (``services.run_snapshot``), so that the first page
    a server shows does not assemble it from the database (a quarter of a second at 20,000 images)."""
    try:
        with factory() as s:
            sums = run_snapshot.run_sums(s, run_id)
            frame = store.prediction_frame(s, run_id)
        run_snapshot.write(layout.label_cache, run_id, frame, sums)
    except Exception as exc:  # noqa: BLE001 - the run is stored; a first page then reads the frame from the database
        log.info("could not keep run %s's predictions beside the database (%s)", run_id, exc)


def _saliency_of(model: LoadedModel, read: Future[BatchInput]) -> SaliencyBatch | None:
    batch = read.result()
    return compute_saliency(model, batch.inputs) if batch.inputs is not None else None
