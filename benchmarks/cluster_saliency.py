"""The saliency job on a local Dask cluster with 1 and 2 worker processes, side by side with the single-process job.

    .venv/bin/python -m benchmarks.cluster_saliency            # 1,500 demo images (64 px, demo CNN)
    .venv/bin/python -m benchmarks.cluster_saliency --quick    # 400 images
    .venv/bin/python -m benchmarks.cluster_saliency --arch resnet18 --size 224 --images 192

Each worker runs one torch thread; the single-process job runs two (the machine's cores). The cluster is
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

        rates: dict[str, list[float]] = {"1 worker": [], "2 workers": [], "single process (2 threads)": []}
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
            rates["single process (2 threads)"].append(n / (time.perf_counter() - t))
    load_end = os.getloadavg()[0]
    base = max(rates["1 worker"])
    rows = [[label, max(r), max(r) / base, f"{starts[label]:.1f}" if label in starts else "-"] for label, r in rates.items()]
    print(f"{args.arch} {args.size}px, {n} images, batch {BATCH}; {os.cpu_count()} CPUs; load average {load_start:.1f} at the start, {load_end:.1f} at the end")
    return print_table(["saliency job", "img/s", "x 1 worker", "cluster start-up (s)"], rows)


if __name__ == "__main__":
    main()
