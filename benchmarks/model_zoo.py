"""Saliency-stage throughput against plain batched inference of the same model, for every zoo
architecture in every format users bring (exported program, TorchScript, factory + state_dict).

    nice -n 10 .venv/bin/python -m benchmarks.model_zoo            # 8 batches per measurement
    nice -n 10 .venv/bin/python -m benchmarks.model_zoo --quick    # 3 batches

The zoo is the one the tests use (tests/analysis/model_zoo.py), built wider and at a larger input
so the work is the model's, not Python's: width 32 (ViT: 64 wide, 12 blocks as in ViT-B, patch 8)
at 96 px, batch 16, random weights (speed does not depend on them). For each model and format the
loaded model's plain forward (inference mode) and heedmap's saliency stage (prediction, confidence
and Grad-CAM of the predicted class at the default layer) run alternately, batch by batch. Each is
timed as the process's CPU time on one thread: on a machine shared with other work, wall-clock
ratios swing by 2x from one batch to the next, while CPU time measures the work each side does.
Other processes still slow both sides through shared caches and memory bandwidth, and only ever
add time, so the table gives each side's best batch (images per CPU-second) and their ratio, with
the ratio of the medians beside it and the median of the back-to-back pairs' ratios (which side of a
pair runs first alternates). Goal: >= 0.9x.

Where the layer's map goes straight into a global pooling (mean, amax, sum, adaptive average
pooling to 1x1), the backward pass stops at the pooled values (analysis.layer_taps._Tail):
an amax's backward on the whole map used to cost almost as much as the two small convolutions
before it. TorchScript's layers after the tap are differentiated by eager autograd, not by its
symbolic derivatives (SiLU's is five elementwise operations where eager autograd uses one kernel).
Attention after the tap runs as analysis.attention_rows: below a class-token head only the class
token's query row carries gradient, and its backward works on that row alone. A mean of a later
map (SiLU or ReLU after the layer, then global pooling) hands its gradient back as a broadcast
view instead of writing it out (analysis.layer_taps._SpreadPooled, heedmap::spread_mean in
TorchScript); the q, k, v parts of attention's packed projection are taken by one unbind (one
backward step instead of three zero-filled copies added up); the part before the layer runs in
inference mode as plain inference does; maps are upsampled by two small matrix products.

Both sides run the same kernels before the layer: plain inference and the saliency stage's
gradient-free part both take nn.MultiheadAttention's fused path in an eager or TorchScript model
(it applies whenever nothing records gradients), and the same decomposed attention in an exported
program.
"""

from __future__ import annotations

import argparse
import importlib
import json
import os
import statistics
import sys
import tempfile
import time
import warnings
from pathlib import Path

import torch
from torch import nn

from analysis.model_io import LoadedModel, load_model
from analysis.saliency import compute_saliency

from .measure import print_table

ROOT = Path(__file__).resolve().parent.parent
BATCH = 16
SIZE = 96
FORMATS = ("exported", "torchscript", "factory")


def _zoo() -> tuple[object, ...]:
    if str(ROOT) not in sys.path:
        sys.path.insert(0, str(ROOT))
    from tests.analysis import model_zoo

    return model_zoo.ZOO


def _build(entry: object) -> nn.Module:
    torch.manual_seed(0)
    if entry.name == "vit":  # type: ignore[attr-defined]
        return entry.build(64, size=SIZE, patch=8, depth=12).eval()  # type: ignore[attr-defined, no-any-return]
    return entry.build(32).eval()  # type: ignore[attr-defined, no-any-return]


def _save_all(entry: object, model: nn.Module, folder: Path) -> dict[str, tuple[Path, str | None]]:
    x = torch.randn(2, 3, SIZE, SIZE)
    program = torch.export.export(model, (x,), dynamic_shapes=({0: torch.export.Dim("batch")},))
    torch.export.save(program, folder / "model.pt2")
    torch.jit.script(model).save(str(folder / "model.pt"))
    torch.save(model.state_dict(), folder / "state.pt")
    sidecar = {"classes": ["bottle", "can", "carton"], "input_size": [SIZE, SIZE], "mean": [0.5] * 3, "std": [0.25] * 3}
    sidecar.update(dict(entry.sidecar_extra))  # type: ignore[attr-defined]
    (folder / "sidecar.json").write_text(json.dumps(sidecar))
    return {"exported": (folder / "model.pt2", None), "torchscript": (folder / "model.pt", None), "factory": (folder / "state.pt", "factory")}


class _Factory:
    """Stands in for the user's module:function, building the wide variant."""

    model: nn.Module | None = None


def bench_factory() -> nn.Module:
    if _Factory.model is None:
        raise RuntimeError("set _Factory.model first")
    return _Factory.model


def measure(model: LoadedModel, batches: int) -> tuple[float, float, float, float]:
    """Best images per CPU-second of plain inference and of the saliency stage, measured alternately
    (which side goes first alternates too), the ratio of their medians, and the median of the batch
    pairs' ratios (each pair ran back to back, so a change of load between pairs cancels)."""
    x = torch.randn(BATCH, 3, SIZE, SIZE, generator=torch.Generator().manual_seed(1))

    def plain() -> object:
        with torch.inference_mode():
            return model.module(x)

    def saliency() -> object:
        return compute_saliency(model, x)

    for _ in range(2):  # warm-up (TorchScript profiles its first runs)
        plain()
        saliency()
    plain_rates: list[float] = []
    sal_rates: list[float] = []
    for i in range(batches):
        order = [(plain, plain_rates), (saliency, sal_rates)]
        for fn, rates in order if i % 2 == 0 else order[::-1]:
            t = time.process_time()
            fn()
            rates.append(BATCH / (time.process_time() - t))
    paired = statistics.median(s / p for s, p in zip(sal_rates, plain_rates))
    return max(plain_rates), max(sal_rates), statistics.median(sal_rates) / statistics.median(plain_rates), paired


def compare_attention(entry: object, batches: int) -> list[list[object]]:
    """The ViT's saliency stage with torch's attention backward and with the row-sparse one, against plain
    inference, in one process, batch by batch: rows of (format, side, best img/CPU-s, best ratio, median ratio).

    "torch's attention" swaps the tail's attention back to torch's own (analysis.layer_taps'
    hooks for it), for a second copy of the model loaded that way; nothing else differs."""
    from analysis import layer_taps

    rows: list[list[object]] = []
    x = torch.randn(BATCH, 3, SIZE, SIZE, generator=torch.Generator().manual_seed(1))
    originals = (layer_taps._attention_with_rows, layer_taps._mha_with_rows, layer_taps._ts_attention_node)

    def torch_attention(*args: object, **kwargs: object) -> torch.Tensor:
        return torch.nn.functional.scaled_dot_product_attention(*args, **kwargs)  # type: ignore[arg-type]

    def swap(off: bool) -> None:
        if off:
            layer_taps._attention_with_rows, layer_taps._mha_with_rows = torch_attention, lambda: None  # type: ignore[assignment]
            layer_taps._ts_attention_node = lambda *_a: None  # type: ignore[assignment]
        else:
            layer_taps._attention_with_rows, layer_taps._mha_with_rows, layer_taps._ts_attention_node = originals

    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        files = _save_all(entry, _build(entry), folder)
        for fmt in FORMATS:
            path, factory = files[fmt]
            models = []
            for off in (True, False):
                swap(off)
                if factory:
                    importlib.import_module("benchmarks.model_zoo")._Factory.model = _build(entry)
                    models.append(load_model(path, folder / "sidecar.json", factory="benchmarks.model_zoo:bench_factory"))
                else:
                    models.append(load_model(path, folder / "sidecar.json"))
            swap(False)

            def plain(model: LoadedModel = models[1]) -> None:
                with torch.inference_mode():
                    model.module(x)

            def torch_side(model: LoadedModel = models[0]) -> None:
                swap(True)
                try:
                    compute_saliency(model, x)
                finally:
                    swap(False)

            def rows_side(model: LoadedModel = models[1]) -> None:
                compute_saliency(model, x)

            sides = {"plain": plain, "torch's attention backward": torch_side, "row-sparse attention": rows_side}
            for fn in sides.values():
                fn()
                fn()
            times: dict[str, list[float]] = {k: [] for k in sides}
            for _ in range(batches):
                for k, fn in sides.items():
                    t = time.process_time()
                    fn()
                    times[k].append(time.process_time() - t)
            best, median = min(times["plain"]), statistics.median(times["plain"])
            for k, v in times.items():
                rows.append([fmt, k, BATCH / min(v), best / min(v), median / statistics.median(v)])
            print(f"{fmt}: done", flush=True)
    return rows


def main(argv: list[str] | None = None) -> str:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="3 batches per measurement instead of 8")
    p.add_argument("--only", nargs="*", help="zoo model names")
    p.add_argument("--batches", type=int, default=0, metavar="N", help="batch pairs per measurement (default 8, --quick 3)")
    p.add_argument("--compare-attention", type=int, metavar="BATCHES", default=0,
                   help="instead: the ViT with torch's attention backward and with the row-sparse one, BATCHES alternating batches each")
    args = p.parse_args(argv)
    batches = args.batches if args.batches > 0 else 3 if args.quick else 8
    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"torch {torch.__version__}, 1 thread, CPU time, batch {BATCH}, {SIZE} px, load average at start {load:.1f} on {os.cpu_count()} CPUs", flush=True)
    if args.compare_attention:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            found = compare_attention(next(e for e in _zoo() if e.name == "vit"), args.compare_attention)  # type: ignore[attr-defined]
        torch.set_num_threads(threads)
        load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
        print(f"load average at the end {load:.1f}", flush=True)
        return print_table(["format", "side", "img/CPU-s (best)", "/ plain (best)", "/ plain (medians)"], found)
    rows = []
    with tempfile.TemporaryDirectory() as tmp, warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for entry in _zoo():
            if args.only and entry.name not in args.only:  # type: ignore[attr-defined]
                continue
            folder = Path(tmp) / entry.name  # type: ignore[attr-defined]
            folder.mkdir()
            eager = _build(entry)
            files = _save_all(entry, eager, folder)
            for fmt in FORMATS:
                path, factory = files[fmt]
                if factory:
                    # The importable module (not __main__), which the factory spec names.
                    importlib.import_module("benchmarks.model_zoo")._Factory.model = _build(entry)
                    loaded = load_model(path, folder / "sidecar.json", factory="benchmarks.model_zoo:bench_factory")
                else:
                    loaded = load_model(path, folder / "sidecar.json")
                plain, sal, median_ratio, paired = measure(loaded, batches)
                size = f"{loaded.map_size[0]}x{loaded.map_size[1]}"
                rows.append([entry.name, fmt, f"{loaded.target_layer} ({size})", plain, sal, sal / plain, median_ratio, paired])  # type: ignore[attr-defined]
                print(f"{entry.name} {fmt}: {plain:.1f} / {sal:.1f} img/s", flush=True)  # type: ignore[attr-defined]
    torch.set_num_threads(threads)
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    met = ", ".join(f"{sum(r[k] >= 0.9 for r in rows)} by {what}" for k, what in ((5, "best batches"), (6, "medians"), (7, "paired ratios")))
    print(f"load average at the end {load:.1f}; meeting 0.9x, of {len(rows)}: {met}", flush=True)
    return print_table(["model", "format", "default layer (map)", "plain img/CPU-s (best)", "saliency img/CPU-s (best)", "saliency / plain", "ratio of medians", "median of paired ratios"], rows)


if __name__ == "__main__":
    main()
