"""Train the demo's small CNN on the generated scenes, on the CPU, in seconds."""

from __future__ import annotations

import csv
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch
from PIL import Image
from torch import nn

from analysis.architectures import SorterCNN
from analysis.model_io import Sidecar, write_sidecar

from .scenes import CLASSES

MEAN = (0.40, 0.40, 0.41)
STD = (0.18, 0.18, 0.18)


@dataclass(frozen=True)
class TrainResult:
    """Where the trained model was saved and how it did."""

    model_path: Path
    sidecar_path: Path
    state_dict_path: Path
    accuracy: dict[str, float]  # split -> accuracy
    seconds: float
    epochs: int


def _load_split(root: Path, split: str, size: int) -> tuple[torch.Tensor, torch.Tensor]:
    with open(root / "manifest.csv", newline="", encoding="utf-8") as fh:
        rows = [r for r in csv.DictReader(fh) if r["split"] == split]
    arrays = np.stack([np.asarray(Image.open(root / r["path"]).convert("RGB").resize((size, size)), dtype=np.float32) / 255.0 for r in rows])
    x = torch.from_numpy(arrays).permute(0, 3, 1, 2)
    x = (x - torch.tensor(MEAN).view(1, 3, 1, 1)) / torch.tensor(STD).view(1, 3, 1, 1)
    y = torch.tensor([CLASSES.index(r["label"]) for r in rows], dtype=torch.long)
    return x.contiguous(), y


def _accuracy(model: nn.Module, x: torch.Tensor, y: torch.Tensor) -> float:
    model.eval()
    with torch.no_grad():
        pred = torch.cat([model(x[i : i + 256]).argmax(1) for i in range(0, len(x), 256)])
    return float((pred == y).float().mean()) if len(y) else float("nan")


def train_demo_model(data_root: Path, out_dir: Path, *, size: int = 64, epochs: int = 8, seed: int = 0, batch_size: int = 64) -> TrainResult:
    """Fit SorterCNN on the train split; save TorchScript, a state_dict and the sidecar."""
    torch.manual_seed(seed)
    start = time.perf_counter()
    x_train, y_train = _load_split(data_root, "train", size)
    model = SorterCNN(num_classes=len(CLASSES))
    optimiser = torch.optim.Adam(model.parameters(), lr=3e-3, weight_decay=1e-4)
    schedule = torch.optim.lr_scheduler.OneCycleLR(optimiser, max_lr=3e-3, total_steps=epochs * ((len(x_train) + batch_size - 1) // batch_size))
    loss_fn = nn.CrossEntropyLoss()
    gen = torch.Generator().manual_seed(seed)
    for _ in range(epochs):
        model.train()
        order = torch.randperm(len(x_train), generator=gen)
        for i in range(0, len(order), batch_size):
            idx = order[i : i + batch_size]
            xb = x_train[idx]
            flip = torch.rand(len(idx), generator=gen) < 0.5
            xb = torch.where(flip.view(-1, 1, 1, 1), xb.flip(3), xb)
            optimiser.zero_grad()
            loss_fn(model(xb), y_train[idx]).backward()
            optimiser.step()
            schedule.step()
    model.eval()
    accuracy = {"train": _accuracy(model, x_train, y_train)}
    for split in ("test", "counterfactual"):
        x, y = _load_split(data_root, split, size)
        accuracy[split] = _accuracy(model, x, y)
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    model_path = out_dir / "model.pt"
    state_path = out_dir / "model_state.pt"
    sidecar_path = out_dir / "model.json"
    torch.jit.script(model).save(str(model_path))
    torch.save(model.state_dict(), state_path)
    write_sidecar(
        Sidecar(classes=CLASSES, input_size=(size, size), mean=MEAN, std=STD, target_layer="features", stages=("features", "head"), architecture="sorter_cnn"),
        sidecar_path,
    )
    return TrainResult(model_path, sidecar_path, state_path, accuracy, time.perf_counter() - start, epochs)
