"""Throughput of the saliency stage against plain batched inference of the same model, side by side.

    .venv/bin/python -m benchmarks.saliency_throughput            # 10 batches per measurement
    .venv/bin/python -m benchmarks.saliency_throughput --quick    # 3 batches

For the demo CNN and a ResNet-18 (plain torch, random weights: speed does not depend on them) at
128 and 224 pixels, batch 32: images per second of plain inference (forward, no gradients), of
heedmap's saliency stage (prediction, confidence and Grad-CAM of the predicted class in one forward
pass), and of the naive pipeline (predict, then captum's LayerGradCam with its own forward); the
time region extraction adds; and what channels-last memory format, one thread instead of two, and
the glibc allocator knob (GLIBC_TUNABLES=glibc.malloc.hugetlb=1, set for a child process) change.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from collections.abc import Callable

import torch

from analysis.architectures import build_architecture
from analysis.model_io import LoadedModel, Sidecar, prepare_model
from analysis.regions import extract_regions
from analysis.saliency import compute_saliency

from .measure import print_table

BATCH = 32


def _model(arch: str, size: int, channels_last: bool = False) -> LoadedModel:
    torch.manual_seed(0)
    module = build_architecture(arch, 3).eval()
    if channels_last:
        module = module.to(memory_format=torch.channels_last)
    layer = "features" if arch == "sorter_cnn" else "layer4"
    sidecar = Sidecar(classes=("bottle", "can", "carton"), input_size=(size, size), mean=(0.4, 0.4, 0.4), std=(0.2, 0.2, 0.2), target_layer=layer)
    return prepare_model(module, sidecar)


def _rate(fn: Callable[[], object], batches: int) -> float:
    """Images per second over ``batches`` batches, after one warm-up batch (median of per-batch rates)."""
    fn()
    rates = []
    for _ in range(batches):
        t = time.perf_counter()
        fn()
        rates.append(BATCH / (time.perf_counter() - t))
    rates.sort()
    return rates[len(rates) // 2]


def measure(arch: str, size: int, batches: int, *, channels_last: bool = False, naive: bool = True) -> dict[str, float]:
    model = _model(arch, size, channels_last)
    x = torch.randn(BATCH, 3, size, size, generator=torch.Generator().manual_seed(1))
    if channels_last:
        x = x.contiguous(memory_format=torch.channels_last)

    def plain() -> object:
        with torch.inference_mode():
            return model.module(x)

    out = {"plain": _rate(plain, batches), "saliency": _rate(lambda: compute_saliency(model, x), batches)}
    if naive:
        out["naive"] = _rate(lambda: compute_saliency(model, x, implementation="captum"), batches)
        maps = compute_saliency(model, x).maps
        t = time.perf_counter()
        for _ in range(batches):
            for m in maps:
                extract_regions(m)
        out["regions_s_per_image"] = (time.perf_counter() - t) / (batches * BATCH)
    return out


def main(argv: list[str] | None = None) -> str:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="3 batches per measurement instead of 10")
    p.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    batches = 3 if args.quick else 10
    torch.set_num_threads(2)
    if args.child:  # the allocator comparison: ResNet-18 at 128 px only
        print(json.dumps(measure("resnet18", 128, batches, naive=False)))
        return ""
    print(f"torch {torch.__version__}, {torch.get_num_threads()} threads, batch {BATCH}", flush=True)
    rows = []
    for arch in ("sorter_cnn", "resnet18"):
        for size in (128, 224):
            m = measure(arch, size, batches)
            region_share = m["regions_s_per_image"] / (1 / m["saliency"])
            rows.append([f"{arch} {size}px", m["plain"], m["saliency"], m["saliency"] / m["plain"], m["naive"], m["naive"] / m["plain"], 100 * region_share])
            print(f"{arch} {size}px done", flush=True)
    main_table = print_table(
        ["model", "plain img/s", "saliency img/s", "saliency / plain", "naive img/s", "naive / plain", "regions add %"], rows
    )
    knobs = []
    base = measure("resnet18", 128, batches, naive=False)
    cl = measure("resnet18", 128, batches, channels_last=True, naive=False)
    torch.set_num_threads(1)
    one = measure("resnet18", 128, batches, naive=False)
    torch.set_num_threads(2)
    env = {**os.environ, "GLIBC_TUNABLES": "glibc.malloc.hugetlb=1"}
    child = subprocess.run([sys.executable, "-m", "benchmarks.saliency_throughput", "--child"] + (["--quick"] if args.quick else []),
                           capture_output=True, text=True, env=env, check=True)
    tuned = json.loads(child.stdout.strip().splitlines()[-1])
    for name, m in [("2 threads (baseline)", base), ("channels-last", cl), ("1 thread", one), ("GLIBC_TUNABLES hugetlb", tuned)]:
        knobs.append([name, m["plain"], m["plain"] / base["plain"], m["saliency"], m["saliency"] / base["saliency"]])
    knob_table = print_table(["resnet18 128px, setting", "plain img/s", "x baseline", "saliency img/s", "x baseline"], knobs)
    return main_table + "\n\n" + knob_table


if __name__ == "__main__":
    main()
