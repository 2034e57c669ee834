"""One image's Grad-CAM map at each of several layers, and a contact sheet of them to choose a layer by eye."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import numpy.typing as npt
import torch
from PIL import Image, ImageDraw

from .errors import InvalidInputError
from .images import fit_to_aspect, mean_fill
from .model_io import LoadedModel
from .regions import saliency_overlay
from .saliency import compute_saliency
from .sidecar import Sidecar

TILE = 160
CAPTION = 16


def layer_maps(model: LoadedModel, x: torch.Tensor, names: list[str]) -> dict[str, npt.NDArray[np.float32]]:
    """The Grad-CAM map of the first image of ``x`` (predicted class) at each named layer."""
    if model.graph is None:
        raise InvalidInputError("this model was not prepared with its layer graph; load it with analysis.model_io.load_model.")
    infos = {i.name: i for i in model.layers}
    out = {}
    for name in names:
        info = infos.get(name)
        if info is None or info.map_size is None:
            raise InvalidInputError(f"layer {name!r} gives no map; choose one of {[n for n, i in infos.items() if i.map_size]}.")
        tap, layer = model.graph.tap(name)
        at_layer = replace(model, tap=tap, layer=layer, grid=info.grid, map_size=info.map_size, sidecar=model.sidecar.with_layer(name))
        out[name] = compute_saliency(at_layer, x[:1]).maps[0]
    return out


def preview_sheet(image: Image.Image, sidecar: Sidecar, items: list[tuple[str, tuple[int, int] | None, npt.NDArray[np.float32]]]) -> Image.Image:
    """Tiles of the image with each layer's map over it, captioned with the layer and its map size."""
    view = fit_to_aspect(image, sidecar.input_size, resize=sidecar.resize, fill=mean_fill(sidecar.mean, channel_order=sidecar.channel_order)).convert("RGB")
    cols = max(1, min(6, len(items)))
    rows = max(1, -(-len(items) // cols))
    sheet = Image.new("RGB", (cols * TILE, rows * (TILE + CAPTION)), (255, 255, 255))
    draw = ImageDraw.Draw(sheet)
    for k, (name, size, saliency) in enumerate(items):
        tile = saliency_overlay(view, saliency, min_side=TILE).resize((TILE, TILE), Image.Resampling.BILINEAR)
        x, y = (k % cols) * TILE, (k // cols) * (TILE + CAPTION)
        sheet.paste(tile, (x, y))
        label = f"{name} {size[0]}x{size[1]}" if size else name
        draw.text((x + 3, y + TILE + 2), label[:26], fill=(0, 0, 0))
    return sheet
