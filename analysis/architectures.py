"""Named model architectures in plain torch, for loading a state_dict by name.

torchvision cannot be imported beside the CPU torch build we pin, so the few
architectures heedmap knows by name are written out here.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING

import torch
from torch import nn

from .errors import ModelInputError


class SorterCNN(nn.Module):
    """Small convolutional classifier used by the demo (about 60k parameters).

    ``features`` ends at 1/4 of the input resolution and is the Grad-CAM layer;
    ``head`` pools and classifies, so ``forward(x) == head(features(x))``.
    """

    def __init__(self, num_classes: int = 3, width: int = 32) -> None:
        super().__init__()
        w = width
        self.features = nn.Sequential(
            nn.Conv2d(3, w // 2, 3, padding=1),
            nn.BatchNorm2d(w // 2),
            nn.ReLU(),
            nn.MaxPool2d(2),
            nn.Conv2d(w // 2, w, 3, padding=1),
            nn.BatchNorm2d(w),
            nn.ReLU(),
            nn.MaxPool2d(2),
            nn.Conv2d(w, 2 * w, 3, padding=1),
            nn.BatchNorm2d(2 * w),
            nn.ReLU(),
            nn.Conv2d(2 * w, 2 * w, 3, padding=1),
            nn.BatchNorm2d(2 * w),
            nn.ReLU(),
        )
        self.head = nn.Sequential(
            nn.AdaptiveAvgPool2d(1),
            nn.Flatten(),
            nn.Linear(2 * w, num_classes),
        )

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        out: torch.Tensor = self.head(self.features(x))
        return out


class _BasicBlock(nn.Module):
    def __init__(self, cin: int, cout: int, stride: int) -> None:
        super().__init__()
        self.conv1 = nn.Conv2d(cin, cout, 3, stride, 1, bias=False)
        self.bn1 = nn.BatchNorm2d(cout)
        self.conv2 = nn.Conv2d(cout, cout, 3, 1, 1, bias=False)
        self.bn2 = nn.BatchNorm2d(cout)
        self.relu = nn.ReLU()
        self.downsample: nn.Module = nn.Identity()
        if stride != 1 or cin != cout:
            self.downsample = nn.Sequential(
                nn.Conv2d(cin, cout, 1, stride, bias=False), nn.BatchNorm2d(cout)
            )

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        out = self.relu(self.bn1(self.conv1(x)))
        out = self.bn2(self.conv2(out))
        summed: torch.Tensor = self.relu(out + self.downsample(x))
        return summed


class ResNet18(nn.Module):
    """ResNet-18 (He et al., 2016) with the usual layer names; Grad-CAM layer ``layer4``."""

    if TYPE_CHECKING:  # made in a loop below; declared for the type checker only, where TorchScript does not read them
        layer1: nn.Sequential
        layer2: nn.Sequential
        layer3: nn.Sequential
        layer4: nn.Sequential

    def __init__(self, num_classes: int = 1000) -> None:
        super().__init__()
        self.conv1 = nn.Conv2d(3, 64, 7, 2, 3, bias=False)
        self.bn1 = nn.BatchNorm2d(64)
        self.relu = nn.ReLU()
        self.maxpool = nn.MaxPool2d(3, 2, 1)
        widths = [64, 128, 256, 512]
        cin = 64
        for i, w in enumerate(widths, start=1):
            stride = 1 if i == 1 else 2
            setattr(self, f"layer{i}", nn.Sequential(_BasicBlock(cin, w, stride), _BasicBlock(w, w, 1)))
            cin = w
        self.avgpool = nn.AdaptiveAvgPool2d(1)
        self.fc = nn.Linear(512, num_classes)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = self.maxpool(self.relu(self.bn1(self.conv1(x))))
        x = self.layer4(self.layer3(self.layer2(self.layer1(x))))
        logits: torch.Tensor = self.fc(torch.flatten(self.avgpool(x), 1))
        return logits


ARCHITECTURES: dict[str, Callable[[int], nn.Module]] = {
    "sorter_cnn": lambda n: SorterCNN(num_classes=n),
    "resnet18": lambda n: ResNet18(num_classes=n),
}

DEFAULT_TARGET_LAYERS: dict[str, str] = {"sorter_cnn": "features", "resnet18": "layer4"}


def build_architecture(name: str, num_classes: int) -> nn.Module:
    """Instantiate a named architecture with ``num_classes`` outputs."""
    try:
        factory = ARCHITECTURES[name]
    except KeyError:
        known = ", ".join(sorted(ARCHITECTURES))
        raise ModelInputError(
            f"architecture {name!r} is not known; got it from the sidecar's 'architecture' key. "
            f"Use one of: {known}, or save the model as TorchScript instead."
        ) from None
    return factory(num_classes)
