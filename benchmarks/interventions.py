"""Throughput of the ablation and insertion tests against plain batched inference of the same model
(the floor), counting every forward image: originals, interventions and their matched controls.

    .venv/bin/python -m benchmarks.interventions            # 512 images
    .venv/bin/python -m benchmarks.interventions --quick    # 128 images
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import torch

from analysis.interventions import ablation_test, insertion_test

from .measure import print_table
from .saliency_throughput import _model

DRAWS = 5


def _rate_plain(model, x: torch.Tensor, batch: int = 64) -> float:  # type: ignore[no-untyped-def]
    """Best of three passes over the images, batched as the tests batch them."""
    best = 0.0
    with torch.inference_mode():
        model.module(x[:batch])
        for _ in range(3):
            t = time.perf_counter()
            for i in range(0, len(x), batch):
                model.module(x[i : i + batch])
            best = max(best, len(x) / (time.perf_counter() - t))
    return best


def main(argv: list[str] | None = None) -> str:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true")
    args = p.parse_args(argv)
    n = 128 if args.quick else 512
    torch.set_num_threads(2)
    rows = []
    for arch, size in (("sorter_cnn", 64), ("resnet18", 128)):
        model = _model(arch, size)
        x = torch.randn(n, 3, size, size, generator=torch.Generator().manual_seed(0))
        rng = np.random.default_rng(0)
        masks = np.zeros((n, size, size), dtype=bool)
        for i in range(n):  # a concept region: a box of a tenth of the image side
            y, xx = rng.integers(0, size - size // 10, 2)
            masks[i, y : y + size // 10, xx : xx + size // 10] = True
        plain = _rate_plain(model, x)
        for name, fill in (("ablation, blur", "blur"), ("ablation, mean colour", "mean"), ("ablation, inpaint", "inpaint")):
            t = time.perf_counter()
            ablation_test(model, x, masks, 0, fill=fill, draws=DRAWS, n_boot=1000, n_perm=1000)  # type: ignore[arg-type]
            rate = n * (2 + DRAWS) / (time.perf_counter() - t)
            rows.append([f"{arch} {size}px", name, plain, rate, rate / plain])
        t = time.perf_counter()
        insertion_test(model, x[: n // 2], x[n // 2 :], masks[n // 2 :], 0, draws=DRAWS, n_boot=1000, n_perm=1000)
        rate = (n // 2) * (1 + 2 * DRAWS) / (time.perf_counter() - t)
        rows.append([f"{arch} {size}px", "insertion", plain, rate, rate / plain])
        print(f"{arch} done", flush=True)
    return print_table(["model", "test", "plain img/s", "forward img/s in the test", "x plain"], rows)


if __name__ == "__main__":
    main()
