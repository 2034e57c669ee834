"""A zoo of small image classifiers in plain torch, shaped like the ones users bring.

Each builder takes ``width`` (channels) so tests stay tiny (32 px, a few channels) and the
benchmark can use larger ones. Every model scripts with TorchScript and exports with torch.export.
The zero-argument functions at the bottom are the ``--model-factory`` entry points.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import torch
import torch.nn.functional as F
from torch import nn

N_CLASSES = 3


class _ResBlock(nn.Module):
    def __init__(self, cin: int, cout: int, stride: int) -> None:
        super().__init__()
        self.conv1 = nn.Conv2d(cin, cout, 3, stride, 1, bias=False)
        self.bn1 = nn.BatchNorm2d(cout)
        self.conv2 = nn.Conv2d(cout, cout, 3, 1, 1, bias=False)
        self.bn2 = nn.BatchNorm2d(cout)
        self.shortcut = nn.Sequential() if stride == 1 and cin == cout else nn.Sequential(nn.Conv2d(cin, cout, 1, stride, bias=False), nn.BatchNorm2d(cout))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        out = F.relu(self.bn1(self.conv1(x)))
        out = self.bn2(self.conv2(out))
        return F.relu(out + self.shortcut(x))


class ResidualFlatten(nn.Module):
    """Residual blocks, global pooling, then ``torch.flatten`` inside forward."""

    def __init__(self, width: int = 8, num_classes: int = N_CLASSES) -> None:
        super().__init__()
        self.stem = nn.Sequential(nn.Conv2d(3, width, 3, 1, 1, bias=False), nn.BatchNorm2d(width), nn.ReLU())
        self.block1 = _ResBlock(width, width, 1)
        self.block2 = _ResBlock(width, 2 * width, 2)
        self.pool = nn.AdaptiveAvgPool2d(1)
        self.fc = nn.Linear(2 * width, num_classes)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = self.block2(self.block1(self.stem(x)))
        return self.fc(torch.flatten(self.pool(x), 1))


class _SqueezeExcite(nn.Module):
    def __init__(self, channels: int) -> None:
        super().__init__()
        self.reduce = nn.Conv2d(channels, max(2, channels // 4), 1)
        self.expand = nn.Conv2d(max(2, channels // 4), channels, 1)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        s = F.adaptive_avg_pool2d(x, 1)
        s = F.hardsigmoid(self.expand(F.relu(self.reduce(s))))
        return x * s


class _DepthwiseBlock(nn.Module):
    def __init__(self, cin: int, cout: int, stride: int) -> None:
        super().__init__()
        self.dw = nn.Conv2d(cin, cin, 3, stride, 1, groups=cin, bias=False)
        self.bn1 = nn.BatchNorm2d(cin)
        self.act1 = nn.Hardswish(inplace=True)
        self.se = _SqueezeExcite(cin)
        self.pw = nn.Conv2d(cin, cout, 1, bias=False)
        self.bn2 = nn.BatchNorm2d(cout)
        self.act2 = nn.Hardswish(inplace=True)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = self.se(self.act1(self.bn1(self.dw(x))))
        return self.act2(self.bn2(self.pw(x)))


class DepthwiseSE(nn.Module):
    """Depthwise-separable blocks with in-place hardswish and squeeze-excitation."""

    def __init__(self, width: int = 8, num_classes: int = N_CLASSES) -> None:
        super().__init__()
        self.stem = nn.Sequential(nn.Conv2d(3, width, 3, 2, 1, bias=False), nn.BatchNorm2d(width), nn.Hardswish(inplace=True))
        self.blocks = nn.Sequential(_DepthwiseBlock(width, 2 * width, 1), _DepthwiseBlock(2 * width, 2 * width, 2))
        self.head = nn.Sequential(nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(2 * width, num_classes))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.head(self.blocks(self.stem(x)))


class SiLUNet(nn.Module):
    """Plain convolutions with SiLU (module and functional) and a max pool."""

    def __init__(self, width: int = 8, num_classes: int = N_CLASSES) -> None:
        super().__init__()
        self.conv1 = nn.Conv2d(3, width, 3, padding=1)
        self.act = nn.SiLU()
        self.conv2 = nn.Conv2d(width, 2 * width, 3, padding=1)
        self.conv3 = nn.Conv2d(2 * width, 2 * width, 3, padding=1)
        self.fc = nn.Linear(2 * width, num_classes)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = F.max_pool2d(self.act(self.conv1(x)), 2)
        x = F.silu(self.conv2(x))
        x = F.silu(self.conv3(x))
        return self.fc(x.mean(dim=(2, 3)))


class _LayerNormBlock(nn.Module):
    """Depthwise conv, then LayerNorm and an MLP over channels in channels-last layout, residual."""

    def __init__(self, dim: int) -> None:
        super().__init__()
        self.dw = nn.Conv2d(dim, dim, 7, padding=3, groups=dim)
        self.norm = nn.LayerNorm(dim)
        self.fc1 = nn.Linear(dim, 2 * dim)
        self.fc2 = nn.Linear(2 * dim, dim)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        y = self.dw(x).permute(0, 2, 3, 1)
        y = self.fc2(F.gelu(self.fc1(self.norm(y))))
        return x + y.permute(0, 3, 1, 2)


class LayerNormNet(nn.Module):
    """LayerNorm over channels with permutes in forward, patchify stem, downsampling between stages."""

    def __init__(self, width: int = 8, num_classes: int = N_CLASSES) -> None:
        super().__init__()
        self.stem = nn.Conv2d(3, width, 2, stride=2)
        self.stage1 = _LayerNormBlock(width)
        self.down = nn.Conv2d(width, 2 * width, 2, stride=2)
        self.stage2 = _LayerNormBlock(2 * width)
        self.norm = nn.LayerNorm(2 * width)
        self.fc = nn.Linear(2 * width, num_classes)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = self.stage2(self.down(self.stage1(self.stem(x))))
        return self.fc(self.norm(x.mean(dim=(2, 3))))


class _DenseLayer(nn.Module):
    def __init__(self, cin: int, growth: int) -> None:
        super().__init__()
        self.bn = nn.BatchNorm2d(cin)
        self.conv = nn.Conv2d(cin, growth, 3, padding=1, bias=False)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return torch.cat([x, self.conv(F.relu(self.bn(x)))], dim=1)


class DenseNet(nn.Module):
    """Densely concatenated layers (each sees all earlier maps), a transition, then pooling."""

    def __init__(self, width: int = 8, num_classes: int = N_CLASSES) -> None:
        super().__init__()
        g = max(2, width // 2)
        self.stem = nn.Conv2d(3, width, 3, padding=1, bias=False)
        self.dense1 = nn.Sequential(_DenseLayer(width, g), _DenseLayer(width + g, g))
        c = width + 2 * g
        self.transition = nn.Sequential(nn.BatchNorm2d(c), nn.ReLU(), nn.Conv2d(c, width, 1, bias=False), nn.AvgPool2d(2))
        self.dense2 = nn.Sequential(_DenseLayer(width, g), _DenseLayer(width + g, g))
        self.norm = nn.BatchNorm2d(c)
        self.fc = nn.Linear(c, num_classes)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = self.dense2(self.transition(self.dense1(self.stem(x))))
        x = F.relu(self.norm(x))
        return self.fc(F.adaptive_avg_pool2d(x, 1).flatten(1))


class _ViTBlock(nn.Module):
    def __init__(self, dim: int, heads: int) -> None:
        super().__init__()
        self.norm1 = nn.LayerNorm(dim)
        self.attn = nn.MultiheadAttention(dim, heads, batch_first=True)
        self.norm2 = nn.LayerNorm(dim)
        self.mlp = nn.Sequential(nn.Linear(dim, 2 * dim), nn.GELU(), nn.Linear(2 * dim, dim))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        y = self.norm1(x)
        x = x + self.attn(y, y, y, need_weights=False)[0]
        return x + self.mlp(self.norm2(x))


class TinyViT(nn.Module):
    """Patch embedding, a class token and ``registers`` register tokens, transformer blocks, class-token head."""

    def __init__(self, width: int = 16, num_classes: int = N_CLASSES, *, size: int = 32, patch: int = 4, depth: int = 2, registers: int = 0) -> None:
        super().__init__()
        dim = width
        self.patch_embed = nn.Conv2d(3, dim, patch, stride=patch)
        self.cls_token = nn.Parameter(torch.randn(1, 1 + registers, dim) * 0.02)
        self.pos_embed = nn.Parameter(torch.randn(1, (size // patch) ** 2 + 1 + registers, dim) * 0.02)
        self.blocks = nn.Sequential(*[_ViTBlock(dim, 2) for _ in range(depth)])
        self.norm = nn.LayerNorm(dim)
        self.head = nn.Linear(dim, num_classes)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = self.patch_embed(x).flatten(2).transpose(1, 2)
        x = torch.cat([self.cls_token.expand(x.shape[0], -1, -1), x], dim=1) + self.pos_embed
        x = self.norm(self.blocks(x))
        return self.head(x[:, 0])


class DictOutput(nn.Module):
    """Returns a dict with the logits and the pooled features (the sidecar names the logits key)."""

    def __init__(self, width: int = 8, num_classes: int = N_CLASSES) -> None:
        super().__init__()
        self.features = nn.Sequential(
            nn.Conv2d(3, width, 3, padding=1), nn.BatchNorm2d(width), nn.ReLU(), nn.MaxPool2d(2),
            nn.Conv2d(width, 2 * width, 3, padding=1), nn.BatchNorm2d(2 * width), nn.ReLU(),
        )
        self.classifier = nn.Linear(2 * width, num_classes)

    def forward(self, x: torch.Tensor) -> dict[str, torch.Tensor]:
        pooled = self.features(x).mean(dim=(2, 3))
        return {"embedding": pooled, "logits": self.classifier(pooled)}


class NormalisingInput(nn.Module):
    """Takes 0-1 pixels and normalises them inside forward (the sidecar's mean/std stay 0 and 1)."""

    def __init__(self, width: int = 8, num_classes: int = N_CLASSES) -> None:
        super().__init__()
        self.register_buffer("mean", torch.tensor([0.485, 0.456, 0.406]).view(1, 3, 1, 1))
        self.register_buffer("std", torch.tensor([0.229, 0.224, 0.225]).view(1, 3, 1, 1))
        self.body = nn.Sequential(
            nn.Conv2d(3, width, 3, stride=2, padding=1), nn.ReLU(),
            nn.Conv2d(width, 2 * width, 3, padding=1), nn.ReLU(),
        )
        self.fc = nn.Linear(2 * width, num_classes)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = (x - self.mean) / self.std
        return self.fc(self.body(x).amax(dim=(2, 3)))


@dataclass(frozen=True)
class ZooEntry:
    """A zoo model: how to build it, what its sidecar adds, and the layer a person would pick."""

    name: str
    build: Callable[..., nn.Module]
    expected_layer: str
    sidecar_extra: tuple[tuple[str, object], ...] = ()
    token_prefix: int | None = None  # class/register tokens before the patches, for transformers


ZOO: tuple[ZooEntry, ...] = (
    ZooEntry("residual_flatten", ResidualFlatten, "block2"),
    ZooEntry("depthwise_se", DepthwiseSE, "blocks"),
    ZooEntry("silu", SiLUNet, "conv3"),
    ZooEntry("layernorm_permute", LayerNormNet, "stage2"),
    ZooEntry("dense_concat", DenseNet, "norm"),
    ZooEntry("vit", TinyViT, "blocks.1.norm1", token_prefix=1),
    ZooEntry("dict_output", DictOutput, "features", (("output", "logits"),)),
    ZooEntry("normalising_input", NormalisingInput, "body"),
)
BY_NAME = {e.name: e for e in ZOO}


def _seeded(name: str) -> nn.Module:
    torch.manual_seed(123)
    return BY_NAME[name].build()


# --model-factory entry points (package.module:function): a fresh model, weights come from a checkpoint.
def residual_flatten() -> nn.Module:
    return _seeded("residual_flatten")


def depthwise_se() -> nn.Module:
    return _seeded("depthwise_se")


def silu() -> nn.Module:
    return _seeded("silu")


def layernorm_permute() -> nn.Module:
    return _seeded("layernorm_permute")


def dense_concat() -> nn.Module:
    return _seeded("dense_concat")


def vit() -> nn.Module:
    return _seeded("vit")


def dict_output() -> nn.Module:
    return _seeded("dict_output")


def normalising_input() -> nn.Module:
    return _seeded("normalising_input")
