"""The saliency job on a local Dask cluster with 1 and 2 worker processes, side by side with the single-process job.

    .venv/bin/python -m benchmarks.cluster_saliency            # 1,500 demo images (64 px, demo CNN)
    .venv/bin/python -m benchmarks.cluster_saliency --quick    # 400 images
    .venv/bin/python -m benchmarks.cluster_saliency --arch resnet18 --size 224 --images 192

The machine's cores are shared out among the workers (1 worker: two torch threads; 2 workers: one each), as
`--workers N` does; the single-process job runs two threads. The cluster is
started before the clock starts (its start-up is reported on its own line); every run writes a fresh
project through the one writer, so the rates count every read, computation and write. Runs alternate
(1 worker, 2 workers, single process) twice and the faster of each is kept. The load average printed is
the machine's at the start and the end: other people's work shares these cores.
"""

from __future__ import annotations

import argparse
import os
import shutil
import tempfile
import time
from pathlib import Path

import torch

from .measure import print_table
from .saliency_job import BATCH, _images


def _model_files(work: Path, arch: str, size: int) -> tuple[Path, Path]:
    import json

    from analysis.architectures import build_architecture

    torch.manual_seed(0)
    module = build_architecture(arch, 3).eval()
    program = torch.export.export(module, (torch.randn(2, 3, size, size),), dynamic_shapes=({0: torch.export.Dim("batch")},))
    torch.export.save(program, work / "model.pt2")
    layer = "features" if arch == "sorter_cnn" else "layer4"
    (work / "sidecar.json").write_text(json.dumps({"classes": ["bottle", "can", "carton"], "input_size": [size, size], "mean": [0.4] * 3,
                                                   "std": [0.2] * 3, "target_layer": layer}))
    return work / "model.pt2", work / "sidecar.json"


def main(argv: list[str] | None = None) -> str:
    from analysis.model_io import load_model
    from app.cluster import ClusterOptions, ModelSpec, connect, run_saliency_on_cluster
    from app.db import make_engine, session_factory
    from app.jobs import register_images, run_saliency

    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="400 images")
    p.add_argument("--images", type=int, default=None)
    p.add_argument("--arch", default="sorter_cnn", choices=["sorter_cnn", "resnet18"])
    p.add_argument("--size", type=int, default=64)
    args = p.parse_args(argv)
    n = args.images or (400 if args.quick else 1500)
    torch.set_num_threads(2)
    load_start = os.getloadavg()[0]
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        records = _images(work, n, args.size)
        model_path, sidecar = _model_files(work, args.arch, args.size)
        model = load_model(model_path, sidecar)
        spec = ModelSpec(model=str(model_path), sidecar=str(sidecar), factory=None, sha256=model.sha256)

        def fresh(name: str):  # type: ignore[no-untyped-def]
            project = work / name
            shutil.rmtree(project, ignore_errors=True)
            factory = session_factory(make_engine(project))
            register_images(factory, records)
            return project, factory

        rates: dict[str, list[float]] = {"1 worker": [], "2 workers": [], "single process": []}
        starts: dict[str, float] = {}
        for _ in range(2):
            for label, workers in (("1 worker", 1), ("2 workers", 2)):
                t = time.perf_counter()
                with connect(ClusterOptions(workers=workers)) as client:
                    client.wait_for_workers(workers)
                    starts[label] = time.perf_counter() - t
                    project, factory = fresh("p")
                    t = time.perf_counter()
                    run_saliency_on_cluster(factory, project, model, spec, ClusterOptions(workers=workers), batch_size=BATCH, images=records, client=client)
                    rates[label].append(n / (time.perf_counter() - t))
            project, factory = fresh("p")
            t = time.perf_counter()
            run_saliency(factory, project, model, batch_size=BATCH, images=records, progress=None)
            rates["single process"].append(n / (time.perf_counter() - t))
        writer = writer_rates(work, records)
    load_end = os.getloadavg()[0]
    base = max(rates["1 worker"])
    rows = [[label, max(r), max(r) / base, f"{starts[label]:.1f}" if label in starts else "-"] for label, r in rates.items()]
    print(f"{args.arch} {args.size}px, {n} images, batch {BATCH}; {os.cpu_count()} CPUs; load average {load_start:.1f} at the start, {load_end:.1f} at the end")
    main_table = print_table(["saliency job", "img/s", "x 1 worker", "cluster start-up (s)"], rows)
    writer_table = print_table(["the one writer alone (store_batch), map size", "img/s", "bytes on disk per image"], writer)
    return main_table + "\n\n" + writer_table


def writer_rates(work: Path, records: list) -> list[list[object]]:  # type: ignore[type-arg]
    """How many images a second the one writer stores (shard files fsynced, rows committed) when batches arrive
    ready-made, at 64 and 224 px maps with three regions each: the ceiling on workers one writer can serve."""
    import numpy as np
    from sqlalchemy import select

    from analysis.regions import Region
    from app.db import make_engine, session_factory, write_session
    from app.jobs import BatchResult, JobReport, register_images, store_batch
    from app.layout import ProjectLayout
    from app.models import ImageRow, SaliencyRun

    out: list[list[object]] = []
    rng = np.random.default_rng(0)
    for px in (64, 224):
        project = work / f"writer{px}"
        shutil.rmtree(project, ignore_errors=True)
        engine = make_engine(project)
        factory = session_factory(engine)
        register_images(factory, records)
        with write_session(factory) as s:
            run = SaliencyRun(config_key=f"writer{px}", provenance={})
            s.add(run)
            s.flush()
            run_id = run.id
        layout = ProjectLayout(project)
        layout.make_run_dirs(run_id)
        with factory() as s:
            ids = list(s.scalars(select(ImageRow.id).order_by(ImageRow.id)))
        maps = rng.random((BATCH, px, px)).astype(np.float16)
        labels = (rng.random((BATCH, px, px)) * 4).astype(np.uint8)
        regions = tuple(tuple(Region(rank=r, x0=0, y0=0, x1=8, y1=8, area=40, mass_share=0.2, peak_x=1, peak_y=1) for r in range(3)) for _ in range(BATCH))
        report = JobReport(run_id=run_id)
        before = _disk_bytes(project)
        t = time.perf_counter()
        stored = 0
        for start in range(0, len(ids) - BATCH + 1, BATCH):
            batch = tuple(ids[start : start + BATCH])
            store_batch(factory, layout, run_id, ("bottle", "can", "carton"), BatchResult(
                ids=batch, predicted=(0,) * BATCH, confidence=(0.5,) * BATCH, empty=(False,) * BATCH, regions=regions, maps=maps, labels=labels), report)
            stored += BATCH
        rate = stored / (time.perf_counter() - t)
        engine.dispose()
        out.append([f"{px} x {px}", rate, (_disk_bytes(project) - before) / max(1, stored)])
    return out


def _disk_bytes(root: Path) -> int:
    return sum(p.stat().st_size for p in root.rglob("*") if p.is_file())


if __name__ == "__main__":
    main()
