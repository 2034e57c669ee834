"""Throughput of the ablation and insertion tests against plain batched inference of the same model
(the floor), counting every forward image: originals, interventions and their matched controls.

    .venv/bin/python -m benchmarks.interventions            # 256 images, 3 rounds
    .venv/bin/python -m benchmarks.interventions --quick    # 128 images, 2 rounds

Plain inference and each test alternate, and the medians are compared, because this machine's
speed drifts by tens of percent from one minute to the next.
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
    """One pass over the images, batched as the tests batch them, after a warm-up batch."""
    with torch.inference_mode():
        model.module(x[:batch])
        t = time.perf_counter()
        for i in range(0, len(x), batch):
            model.module(x[i : i + batch])
    return len(x) / (time.perf_counter() - t)


def main(argv: list[str] | None = None) -> str:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true")
    args = p.parse_args(argv)
    n = 128 if args.quick else 256
    reps = 2 if args.quick else 3
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
        tests = [
            (f"ablation, {fill}", n * (2 + DRAWS), lambda fill=fill: ablation_test(model, x, masks, 0, fill=fill, draws=DRAWS, n_boot=1000, n_perm=1000))
            for fill in ("blur", "mean", "inpaint")
        ]
        tests.append(("insertion", (n // 2) * (1 + 2 * DRAWS),
                      lambda: insertion_test(model, x[: n // 2], x[n // 2 :], masks[n // 2 :], 0, draws=DRAWS, n_boot=1000, n_perm=1000)))
        for name, images, run in tests:
            plain, inside = [], []
            for _ in range(reps):  # interleaved, so a slow spell of the machine hits both
                plain.append(_rate_plain(model, x))
                t = time.perf_counter()
                run()
                inside.append(images / (time.perf_counter() - t))
            rows.append([f"{arch} {size}px", name, float(np.median(plain)), float(np.median(inside)), float(np.median(inside) / np.median(plain))])
        print(f"{arch} done", flush=True)
    return print_table(["model", "test", "plain img/s", "forward img/s in the test", "x plain"], rows)


if __name__ == "__main__":
    main()
