"""The sidecar: a JSON file beside a model that states what the weights cannot.

Class names in output order, the input size, how pixels become the model's input
(mean/std and the scale they are given in, resize policy, channel order), which output
holds the logits, and optionally the Grad-CAM layer and the patch grid of a transformer.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Literal, TypedDict

from .errors import ModelInputError

ResizePolicy = Literal["resize", "center_crop", "letterbox"]
ChannelOrder = Literal["RGB", "BGR"]
RESIZE_POLICIES: tuple[str, ...] = ("resize", "center_crop", "letterbox")
CHANNEL_ORDERS: tuple[str, ...] = ("RGB", "BGR")
SCALES: tuple[str, ...] = ("0-1", "0-255")



class InputOptions(TypedDict):
    """Keyword arguments of ``analysis.images.to_model_input`` for one model."""

    size: tuple[int, int]
    mean: tuple[float, float, float]
    std: tuple[float, float, float]
    resize: str
    channel_order: str

@dataclass(frozen=True)
class Sidecar:
    """What heedmap needs to know about a model besides its weights.

    ``mean`` and ``std`` are always held on the 0-1 pixel scale and in the model's channel
    order; a sidecar written on the 0-255 scale is converted when read.
    ``target_layer`` None means "choose the layer for me" (see ``analysis.layer_taps``).
    ``output`` names the logits in a dict output (a key) or a tuple output (an index).
    """

    classes: tuple[str, ...]
    input_size: tuple[int, int]  # (height, width)
    mean: tuple[float, float, float] = (0.0, 0.0, 0.0)
    std: tuple[float, float, float] = (1.0, 1.0, 1.0)
    target_layer: str | None = None
    stages: tuple[str, ...] = ()
    architecture: str | None = None
    output: str | int | None = None
    resize: ResizePolicy = "resize"
    channel_order: ChannelOrder = "RGB"
    token_grid: tuple[int, int] | None = None  # (rows, cols) of patch tokens, for transformers
    prefix_tokens: int | None = None  # class/register tokens before the patch tokens

    def with_layer(self, layer: str) -> Sidecar:
        return replace(self, target_layer=layer)

    def input_options(self) -> InputOptions:
        """Keyword arguments of ``analysis.images.to_model_input`` for this model."""
        return {"size": self.input_size, "mean": self.mean, "std": self.std, "resize": self.resize, "channel_order": self.channel_order}

    def to_json(self) -> dict[str, object]:
        out: dict[str, object] = {
            "classes": list(self.classes),
            "input_size": list(self.input_size),
            "mean": list(self.mean),
            "std": list(self.std),
            "mean_std_scale": "0-1",
            "resize": self.resize,
            "channel_order": self.channel_order,
            "target_layer": self.target_layer,
        }
        if self.output is not None:
            out["output"] = self.output
        if self.stages:
            out["stages"] = list(self.stages)
        if self.architecture is not None:
            out["architecture"] = self.architecture
        if self.token_grid is not None:
            out["token_grid"] = list(self.token_grid)
        if self.prefix_tokens is not None:
            out["prefix_tokens"] = self.prefix_tokens
        return out

    def key_fields(self) -> dict[str, object]:
        """Everything in the sidecar that changes what a saliency run produces."""
        return self.to_json()


KNOWN_KEYS = {
    "classes", "input_size", "mean", "std", "mean_std_scale", "target_layer", "stages", "architecture", "output",
    "resize", "channel_order", "token_grid", "prefix_tokens",
}


def _triple(value: object, key: str, where: str) -> tuple[float, float, float]:
    if not isinstance(value, list) or len(value) != 3 or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value):
        raise ModelInputError(f"{where}: '{key}' must be a list of three numbers (one per channel); got {value!r}.")
    if key == "std" and any(float(v) <= 0 for v in value):
        raise ModelInputError(f"{where}: every 'std' value must be positive; got {value!r}.")
    return (float(value[0]), float(value[1]), float(value[2]))


def sidecar_from_dict(raw: object, *, where: str = "sidecar") -> Sidecar:
    """Validate a parsed sidecar; every message names the key and says what to write instead."""
    if not isinstance(raw, dict):
        raise ModelInputError(f"{where} must hold a JSON object; got {type(raw).__name__}.")
    missing = [k for k in ("classes", "input_size") if k not in raw]
    if missing:
        raise ModelInputError(f"{where} lacks the key(s) {', '.join(missing)}; see README 'Bring your own model'.")
    unknown = sorted(set(raw) - KNOWN_KEYS)
    if unknown:
        raise ModelInputError(f"{where} has unknown key(s) {unknown}; the known keys are {sorted(KNOWN_KEYS)}.")
    classes = raw["classes"]
    if not isinstance(classes, list) or len(classes) < 2 or not all(isinstance(c, str) and c for c in classes):
        raise ModelInputError(f"{where}: 'classes' must list at least two non-empty class names; got {classes!r}.")
    if len(set(classes)) != len(classes):
        raise ModelInputError(f"{where}: 'classes' has duplicate names: {classes!r}.")
    size = raw["input_size"]
    if isinstance(size, int) and not isinstance(size, bool):
        size = [size, size]
    if not isinstance(size, list) or len(size) != 2 or not all(isinstance(v, int) and not isinstance(v, bool) and 8 <= v <= 4096 for v in size):
        raise ModelInputError(f"{where}: 'input_size' must be [height, width] in pixels (8..4096); got {size!r}.")
    mean = _triple(raw.get("mean", [0.0, 0.0, 0.0]), "mean", where)
    std = _triple(raw.get("std", [1.0, 1.0, 1.0]), "std", where)
    scale = raw.get("mean_std_scale")
    if scale is None:
        if max(mean) > 1.0 or max(std) > 1.0:
            raise ModelInputError(
                f"{where}: 'mean' {list(mean)} / 'std' {list(std)} have values above 1, which looks like the 0-255 pixel scale; "
                "add \"mean_std_scale\": \"0-255\" (or give them on the 0-1 scale and add \"mean_std_scale\": \"0-1\")."
            )
        scale = "0-1"
    if scale not in SCALES:
        raise ModelInputError(f"{where}: 'mean_std_scale' must be \"0-1\" or \"0-255\"; got {scale!r}.")
    if scale == "0-255":
        mean = (mean[0] / 255.0, mean[1] / 255.0, mean[2] / 255.0)
        std = (std[0] / 255.0, std[1] / 255.0, std[2] / 255.0)
    layer = raw.get("target_layer")
    if layer is not None and (not isinstance(layer, str) or not layer.strip()):
        raise ModelInputError(f"{where}: 'target_layer' must be a module path such as \"layer4\" or null to let heedmap choose; got {layer!r}.")
    stages = raw.get("stages") or []
    if not isinstance(stages, list) or not all(isinstance(s, str) for s in stages):
        raise ModelInputError(f"{where}: 'stages' must be a list of submodule names; got {stages!r}.")
    arch = raw.get("architecture")
    if arch is not None and not isinstance(arch, str):
        raise ModelInputError(f"{where}: 'architecture' must be a name such as 'sorter_cnn'; got {arch!r}.")
    output = raw.get("output")
    if output is not None and (isinstance(output, bool) or not isinstance(output, (str, int))):
        raise ModelInputError(f"{where}: 'output' must be the key (e.g. \"logits\") or index (e.g. 0) of the logits in the model's output; got {output!r}.")
    resize = raw.get("resize", "resize")
    if resize not in RESIZE_POLICIES:
        raise ModelInputError(f"{where}: 'resize' must be one of {list(RESIZE_POLICIES)}; got {resize!r}.")
    order = raw.get("channel_order", "RGB")
    if order not in CHANNEL_ORDERS:
        raise ModelInputError(f"{where}: 'channel_order' must be \"RGB\" or \"BGR\"; got {order!r}.")
    grid = raw.get("token_grid")
    if grid is not None:
        if not isinstance(grid, list) or len(grid) != 2 or not all(isinstance(v, int) and not isinstance(v, bool) and v >= 1 for v in grid):
            raise ModelInputError(f"{where}: 'token_grid' must be [rows, cols] of patch tokens, e.g. [14, 14]; got {grid!r}.")
        grid = (grid[0], grid[1])
    prefix = raw.get("prefix_tokens")
    if prefix is not None and (isinstance(prefix, bool) or not isinstance(prefix, int) or not 0 <= prefix <= 64):
        raise ModelInputError(f"{where}: 'prefix_tokens' must be the number of class/register tokens before the patches (0..64); got {prefix!r}.")
    return Sidecar(
        classes=tuple(classes),
        input_size=(size[0], size[1]),
        mean=mean,
        std=std,
        target_layer=layer.strip() if isinstance(layer, str) else None,
        stages=tuple(stages),
        architecture=arch,
        output=output,
        resize=resize,
        channel_order=order,
        token_grid=grid,
        prefix_tokens=prefix,
    )


def read_sidecar(path: Path) -> Sidecar:
    """Parse and validate a sidecar JSON file."""
    try:
        text = Path(path).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ModelInputError(f"sidecar {path} does not exist; give the JSON file that describes the model (see 'heedmap sidecar').") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ModelInputError(f"cannot read sidecar {path}: {exc}.") from None
    try:
        raw = json.loads(text)
    except json.JSONDecodeError as exc:
        raise ModelInputError(f"sidecar {path} is not valid JSON: {exc}.") from None
    return sidecar_from_dict(raw, where=f"sidecar {path}")


def write_sidecar(sidecar: Sidecar, path: Path) -> None:
    Path(path).write_text(json.dumps(sidecar.to_json(), indent=2) + "\n", encoding="utf-8")
