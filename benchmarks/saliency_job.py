"""The whole saliency job (every read and every write) against plain batched inference, side by side, and the
files it leaves on disk.

    .venv/bin/python -m benchmarks.saliency_job                 # 2,000 images (CNN), 256 (ResNet-18); files at 20,000
    .venv/bin/python -m benchmarks.saliency_job --quick         # 500 / 96 images; files at 2,000
    .venv/bin/python -m benchmarks.saliency_job --files-only 20000

Models: the demo CNN at 64 px on the demo generator's 64 px images, and a ResNet-18 (plain torch) at
224 px on 224 px demo images; random weights (speed does not depend on them). Batch 32, two threads.

"plain": a loop reading each batch's images (decode, resize, normalise) and running the model forward
without gradients, nothing written. "plain, reads prefetched": the same with the next batch read on a
second thread, for reference. "job": ``app.jobs.run_saliency`` into a fresh project (prediction,
Grad-CAM, regions, the map shard and every row committed, fsynced); image registration is not counted.
Each is run ``--rounds`` times (3), alternating, so load from others affects both sides; the table gives the
best run of each and, beside it, the median of the per-round ratios (a round's job against the same round's
prefetched plain), which moves less with the load.
"""

from __future__ import annotations

import argparse
import os
import shutil
import tempfile
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import torch

from .measure import print_table

BATCH = 32


def _disk(root: Path) -> tuple[int, float]:
    files, size = 0, 0
    for dirpath, _, names in os.walk(root):
        for n in names:
            files += 1
            size += os.path.getsize(os.path.join(dirpath, n))
    return files, size / 1e6


def _images(work: Path, n: int, size: int) -> list:  # type: ignore[type-arg]
    from analysis.images import find_images
    from demo_data.scenes import SceneConfig, generate_dataset

    data = work / f"data64-{n}"
    if not (data / "manifest.csv").exists():
        generate_dataset(data, SceneConfig(seed=0, n_train=0, n_test=n, n_counterfactual=0))
    records = [r for r in find_images(data / "manifest.csv") if r.split == "test"][:n]
    if size == 64:
        return records
    # The generator draws 64 px scenes; larger inputs are those scenes enlarged (bilinear) and stored as PNG.
    from dataclasses import replace

    from PIL import Image

    big = work / f"data{size}-{n}"
    out = []
    for r in records:
        target = big / Path(r.path).relative_to(data)
        if not target.exists():
            target.parent.mkdir(parents=True, exist_ok=True)
            Image.open(r.path).convert("RGB").resize((size, size), Image.Resampling.BILINEAR).save(target)
        out.append(replace(r, path=target))
    return out


def _model(arch: str, size: int):  # type: ignore[no-untyped-def]
    from analysis.architectures import build_architecture
    from analysis.model_io import Sidecar, prepare_model

    torch.manual_seed(0)
    module = build_architecture(arch, 3).eval()
    layer = "features" if arch == "sorter_cnn" else "layer4"
    sidecar = Sidecar(classes=("bottle", "can", "carton"), input_size=(size, size), mean=(0.4, 0.4, 0.4), std=(0.2, 0.2, 0.2), target_layer=layer)
    return prepare_model(module, sidecar)


def plain_rate(model, records, *, prefetch: bool = False) -> float:  # type: ignore[no-untyped-def]
    """Images per second of read + forward (no gradients), batch by batch."""
    from analysis.images import read_rgb, to_model_input

    opts = model.sidecar.input_options()
    batches = [records[i : i + BATCH] for i in range(0, len(records), BATCH)]

    def read(batch):  # type: ignore[no-untyped-def]
        return to_model_input([read_rgb(r.path) for r in batch], **opts)

    t = time.perf_counter()
    if prefetch:
        with ThreadPoolExecutor(1) as pool:
            nxt = pool.submit(read, batches[0])
            for i in range(len(batches)):
                x = nxt.result()
                if i + 1 < len(batches):
                    nxt = pool.submit(read, batches[i + 1])
                with torch.inference_mode():
                    model.module(x)
    else:
        for batch in batches:
            x = read(batch)
            with torch.inference_mode():
                model.module(x)
    return len(records) / (time.perf_counter() - t)


def job_rate(model, records, project: Path) -> tuple[float, int, int, float]:  # type: ignore[no-untyped-def]
    """Images per second of the whole saliency job into a fresh project; regions, files and MB it left."""
    from app.db import make_engine, session_factory
    from app.jobs import register_images, run_saliency

    shutil.rmtree(project, ignore_errors=True)
    engine = make_engine(project)
    factory = session_factory(engine)
    register_images(factory, records)
    t = time.perf_counter()
    report = run_saliency(factory, project, model, images=records, batch_size=BATCH, progress=None)
    took = time.perf_counter() - t
    engine.dispose()
    files, mb = _disk(project)
    return len(records) / took, report.regions, files, mb


def speed_table(work: Path, sizes: dict[str, int], *, rounds: int = 3) -> str:
    rows = []
    for arch, px, n in (("sorter_cnn", 64, sizes["cnn"]), ("resnet18", 224, sizes["resnet"])):
        records = _images(work, n, px)
        model = _model(arch, px)
        plain_rate(model, records[:BATCH])  # warm-up (page cache, allocator)
        plain, pre, job = [], [], []
        for _ in range(rounds):
            plain.append(plain_rate(model, records))
            job.append(job_rate(model, records, work / "project")[0])
            pre.append(plain_rate(model, records, prefetch=True))
        p, j, q = max(plain), max(job), max(pre)
        per_round = sorted(jr / qr for jr, qr in zip(job, pre))
        rows.append([f"{arch} {px}px", n, p, q, j, j / p, j / q, per_round[len(per_round) // 2]])
        print(f"{arch} {px}px: plain {plain}, prefetched {pre}, job {job} img/s; load average {os.getloadavg()[0]:.1f}", flush=True)
    return print_table(["model", "images", "plain img/s", "plain, reads prefetched img/s", "job img/s", "job / plain", "job / prefetched plain",
                        "median of rounds: job / prefetched plain"], rows)


def files_table(work: Path, n: int) -> str:
    records = _images(work, n, 64)
    model = _model("sorter_cnn", 64)
    rate, regions, files, mb = job_rate(model, records, work / "project-files")
    return print_table(["images", "regions", "files in the project", "MB in the project", "files per 1,000 images", "job img/s"],
                       [[n, regions, files, mb, 1000 * files / n, rate]])


def main(argv: list[str] | None = None) -> str:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="500 / 96 images and files at 2,000")
    p.add_argument("--files-only", type=int, default=None, metavar="N", help="only the files table, at N images")
    p.add_argument("--rounds", type=int, default=3, help="alternating runs of each side (3)")
    p.add_argument("--work", type=Path, default=None, help="keep generated images here (reused by later runs)")
    args = p.parse_args(argv)
    torch.set_num_threads(2)
    with tempfile.TemporaryDirectory() as tmp:
        work = args.work or Path(tmp)
        work.mkdir(parents=True, exist_ok=True)
        print(f"torch {torch.__version__}, {torch.get_num_threads()} threads, batch {BATCH}, OMP_WAIT_POLICY {os.environ.get('OMP_WAIT_POLICY', 'unset')}; "
              f"load average {os.getloadavg()[0]:.1f}", flush=True)
        if args.files_only:
            return files_table(work, args.files_only)
        sizes = {"cnn": 500, "resnet": 96} if args.quick else {"cnn": 2000, "resnet": 256}
        speed = speed_table(work, sizes, rounds=max(1, args.rounds))
        files = files_table(work, 2000 if args.quick else 20_000)
        return speed + "\n\n" + files


if __name__ == "__main__":
    main()
