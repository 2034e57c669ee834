"""The whole saliency job (every read and every write) against plain batched inference, side by side, and the
files it leaves on disk.

    .venv/bin/python -m benchmarks.saliency_job                 # 2,000 images (CNN), 256 (ResNet-18); files at 20,000
    .venv/bin/python -m benchmarks.saliency_job --quick         # 500 / 96 images; files at 2,000
    .venv/bin/python -m benchmarks.saliency_job --files-only 20000

Models: the demo CNN at 64 px on the demo generator's 64 px images, and a ResNet-18 (plain torch) at
224 px on 224 px demo images; random weights (speed does not depend on them). Batch 32.

Every side runs in this one process with the same torch threads (``--threads``, 2) and the same OpenMP
settings (whatever OMP_WAIT_POLICY the process started with, printed in the header):

- "plain": a loop reading each batch's images (decode, resize, normalise) and running the model forward
  without gradients on all the threads, nothing written;
- "plain, reads prefetched": the same with the next batch read on a second thread;
- "plain, two batches at once": reads prefetched, and two threads each running the forward of a batch of its
  own on an equal share of the threads (one each on two), which is how the job spreads its compute: the
  same organisation of the same threads, without the saliency and the writing;
- "job": ``app.jobs.run_saliency`` into a fresh project (prediction, Grad-CAM, regions, the map shard and
  every row committed, fsynced); image registration is not counted.

Each is run ``--rounds`` times (3), alternating, so load from others affects every side; the table gives the
best run of each, the ratios of the best runs, and the median of the per-round ratios (a round's job against
the same round's plain side), which moves less with the load. "CPU ms per image" is the process's CPU time
(every thread) over the images, the median of the rounds: on a loaded machine wall-clock rates favour
whichever side spreads its work over more threads (an OpenMP team of two waits for its slower member at
every layer when another process holds a core), CPU time does not.
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


def plain_rate(model, records, *, prefetch: bool = False, streams: int = 1) -> tuple[float, float]:  # type: ignore[no-untyped-def]
    """Images per second of read + forward (no gradients), batch by batch, and CPU ms per image.

    ``streams`` > 1: that many threads each read and run batches of their own, torch's threads shared out among them.
    """
    from analysis.images import read_rgb, to_model_input

    opts = model.sidecar.input_options()
    batches = [records[i : i + BATCH] for i in range(0, len(records), BATCH)]

    def read(batch):  # type: ignore[no-untyped-def]
        return to_model_input([read_rgb(r.path) for r in batch], **opts)

    def forward(x):  # type: ignore[no-untyped-def]
        with torch.inference_mode():
            model.module(x)

    threads = torch.get_num_threads()
    c, t = time.process_time(), time.perf_counter()
    if streams > 1:
        with ThreadPoolExecutor(1) as reader, ThreadPoolExecutor(streams, initializer=torch.set_num_threads, initargs=(max(1, threads // streams),)) as pool:
            reads = [reader.submit(read, b) for b in batches]  # the reader runs ahead; read batches are small
            for f in [pool.submit(lambda r: forward(r.result()), r) for r in reads]:
                f.result()
        torch.set_num_threads(threads)
    elif prefetch:
        with ThreadPoolExecutor(1) as pool:
            nxt = pool.submit(read, batches[0])
            for i in range(len(batches)):
                x = nxt.result()
                if i + 1 < len(batches):
                    nxt = pool.submit(read, batches[i + 1])
                forward(x)
    else:
        for batch in batches:
            forward(read(batch))
    took, cpu = time.perf_counter() - t, time.process_time() - c
    return len(records) / took, 1000 * cpu / len(records)


def job_rate(model, records, project: Path) -> tuple[float, int, int, float, float]:  # type: ignore[no-untyped-def]
    """Images per second of the whole saliency job into a fresh project; regions, files and MB it left; CPU ms per image."""
    from app.db import make_engine, session_factory
    from app.jobs import register_images, run_saliency

    shutil.rmtree(project, ignore_errors=True)
    engine = make_engine(project)
    factory = session_factory(engine)
    register_images(factory, records)
    c, t = time.process_time(), time.perf_counter()
    report = run_saliency(factory, project, model, images=records, batch_size=BATCH, progress=None)
    took, cpu = time.perf_counter() - t, time.process_time() - c
    engine.dispose()
    files, mb = _disk(project)
    return len(records) / took, report.regions, files, mb, 1000 * cpu / len(records)


def _median(values: list[float]) -> float:
    ordered = sorted(values)
    mid = len(ordered) // 2
    return ordered[mid] if len(ordered) % 2 else (ordered[mid - 1] + ordered[mid]) / 2


def speed_table(work: Path, sizes: dict[str, int], *, rounds: int = 3, models: tuple[str, ...] = ("sorter_cnn", "resnet18")) -> str:
    rows = []
    sides = ("plain", "plain, reads prefetched", "plain, two batches at once", "job")
    for arch, px, n in (("sorter_cnn", 64, sizes["cnn"]), ("resnet18", 224, sizes["resnet"])):
        if arch not in models:
            continue
        records = _images(work, n, px)
        model = _model(arch, px)
        plain_rate(model, records[:BATCH])  # warm-up (page cache, allocator)
        job_rate(model, records[: 2 * BATCH], work / "warm-up")  # and the job's first-use costs (imports, the tap's first pass)
        rate: dict[str, list[float]] = {k: [] for k in sides}
        cpu: dict[str, list[float]] = {k: [] for k in sides}
        for r in range(rounds):
            order = [("plain", {}), ("job", None), ("plain, reads prefetched", {"prefetch": True}), ("plain, two batches at once", {"streams": 2})]
            for side, kw in (order if r % 2 == 0 else order[::-1]):  # alternate which side runs first
                if kw is None:
                    got, _, _, _, c = job_rate(model, records, work / "project")
                else:
                    got, c = plain_rate(model, records, **kw)
                rate[side].append(got)
                cpu[side].append(c)
        best = {k: max(v) for k, v in rate.items()}
        for ref in ("plain, reads prefetched", "plain, two batches at once"):
            per_round = [j / q for j, q in zip(rate["job"], rate[ref])]
            rows.append([f"{arch} {px}px", n, ref, best[ref], best["job"], best["job"] / best[ref], _median(per_round),
                         _median(cpu[ref]), _median(cpu["job"]), _median(cpu[ref]) / _median(cpu["job"])])
        print(f"{arch} {px}px img/s: " + "; ".join(f"{k} {[round(v, 1) for v in rate[k]]}" for k in sides)
              + "; CPU ms/img: " + "; ".join(f"{k} {[round(v, 2) for v in cpu[k]]}" for k in sides)
              + f"; load average {os.getloadavg()[0]:.1f}", flush=True)
    return print_table(["model", "images", "plain side", "plain img/s (best)", "job img/s (best)", "job / plain (best runs)", "job / plain (median of rounds)",
                        "plain CPU ms per image", "job CPU ms per image", "plain CPU / job CPU"], rows)


def files_table(work: Path, n: int) -> str:
    records = _images(work, n, 64)
    model = _model("sorter_cnn", 64)
    rate, regions, files, mb, _ = job_rate(model, records, work / "project-files")
    return print_table(["images", "regions", "files in the project", "MB in the project", "files per 1,000 images", "job img/s"],
                       [[n, regions, files, mb, 1000 * files / n, rate]])


def main(argv: list[str] | None = None) -> str:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="500 / 96 images and files at 2,000")
    p.add_argument("--files-only", type=int, default=None, metavar="N", help="only the files table, at N images")
    p.add_argument("--rounds", type=int, default=3, help="alternating runs of each side (3)")
    p.add_argument("--models", default="sorter_cnn,resnet18", help="comma-separated: sorter_cnn, resnet18 (both)")
    p.add_argument("--no-files", action="store_true", help="skip the files table")
    p.add_argument("--threads", type=int, default=2, help="torch threads, the same for every side (2)")
    p.add_argument("--work", type=Path, default=None, help="keep generated images here (reused by later runs)")
    args = p.parse_args(argv)
    torch.set_num_threads(max(1, args.threads))
    with tempfile.TemporaryDirectory() as tmp:
        work = args.work or Path(tmp)
        work.mkdir(parents=True, exist_ok=True)
        print(f"torch {torch.__version__}, {torch.get_num_threads()} threads, batch {BATCH}, OMP_WAIT_POLICY {os.environ.get('OMP_WAIT_POLICY', 'unset')}; "
              f"load average {os.getloadavg()[0]:.1f}", flush=True)
        if args.files_only:
            return files_table(work, args.files_only)
        sizes = {"cnn": 500, "resnet": 96} if args.quick else {"cnn": 2000, "resnet": 256}
        speed = speed_table(work, sizes, rounds=max(1, args.rounds), models=tuple(m.strip() for m in args.models.split(",")))
        if args.no_files:
            return speed
        files = files_table(work, 2000 if args.quick else 20_000)
        return speed + "\n\n" + files


if __name__ == "__main__":
    main()
