"""Region embeddings from the model's own features: the target layer's activations averaged over a region.

No outside weights: a region is described by what the audited model computes there. Each region's
mask (model-input pixels; the app uses the region's box, which is what the annotator's crop shows)
is area-averaged down to the layer's grid, and the activation at each cell is weighted by the share
of that cell the region covers, so a region smaller than a cell still gets the cell it sits in.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import numpy.typing as npt
import torch
import torch.nn.functional as F

from .errors import InvalidInputError
from .layer_taps import TokenGrid
from .model_io import LoadedModel, batch_chunks


def feature_grid(activation: torch.Tensor, grid: TokenGrid | None) -> torch.Tensor:
    """The layer's output as N x C x h x w: a feature map as it is, patch tokens laid out on their grid."""
    if grid is None:
        if activation.ndim != 4:
            raise InvalidInputError(f"a convolutional layer's output must be N x C x h x w; got {tuple(activation.shape)}.")
        return activation
    patches = activation[:, grid.prefix :, :]
    if patches.shape[1] != grid.rows * grid.cols:
        raise InvalidInputError(f"the layer gave {patches.shape[1]} patch tokens; the grid says {grid.rows} x {grid.cols}.")
    return patches.transpose(1, 2).reshape(activation.shape[0], activation.shape[2], grid.rows, grid.cols)


def box_masks(boxes: Sequence[tuple[int, int, int, int]], size: tuple[int, int]) -> npt.NDArray[np.bool_]:
    """R x H x W masks of boxes (x0, y0, x1, y1), each [x0, x1) x [y0, y1) in model-input pixels, clipped to the image."""
    h, w = size
    out = np.zeros((len(boxes), h, w), dtype=bool)
    for k, (x0, y0, x1, y1) in enumerate(boxes):
        out[k, max(0, y0) : min(h, y1), max(0, x0) : min(w, x1)] = True
    return out


def region_weights(masks: npt.NDArray[np.bool_], grid: tuple[int, int]) -> npt.NDArray[np.float32]:
    """Per region, the share of each grid cell it covers: R x h x w from R x H x W masks.

    Raises InvalidInputError for a mask with no pixel.
    """
    m = np.asarray(masks, dtype=bool)
    if m.ndim != 3:
        raise InvalidInputError(f"region masks must be R x H x W; got shape {m.shape}.")
    if len(m) == 0:
        return np.zeros((0, *grid), dtype=np.float32)
    empty = [k for k in range(len(m)) if not m[k].any()]
    if empty:
        raise InvalidInputError(f"region(s) {empty} have no pixel inside the image; their boxes and the input size disagree.")
    pooled = F.adaptive_avg_pool2d(torch.from_numpy(m.astype(np.float32))[:, None], grid)[:, 0]
    return pooled.numpy().astype(np.float32)


def pool_regions(features: torch.Tensor, weights: Sequence[npt.NDArray[np.float32]]) -> npt.NDArray[np.float32]:
    """Weighted mean of each image's feature map over each of its regions.

    Parameters
    ----------
    features
        N x C x h x w, one map per image.
    weights
        For image i, an R_i x h x w array from :func:`region_weights`.

    Returns
    -------
    (sum R_i) x C, images in order and their regions in the order given.
    """
    if len(weights) != len(features):
        raise InvalidInputError(f"one weight array per image is needed; got {len(weights)} for {len(features)} images.")
    out = []
    for f, w in zip(features.detach().float().cpu(), weights):
        if len(w) == 0:
            continue
        if tuple(w.shape[1:]) != tuple(f.shape[1:]):
            raise InvalidInputError(f"region weights are {tuple(w.shape[1:])}; the layer's grid is {tuple(f.shape[1:])}.")
        wt = torch.from_numpy(np.ascontiguousarray(w, dtype=np.float32)).reshape(len(w), -1)
        summed = wt @ f.reshape(f.shape[0], -1).T  # R x C
        out.append((summed / wt.sum(dim=1, keepdim=True)).numpy())
    c = int(features.shape[1])
    return np.concatenate(out).astype(np.float32) if out else np.zeros((0, c), dtype=np.float32)


def layer_features(model: LoadedModel, inputs: torch.Tensor) -> torch.Tensor:
    """The target layer's activations for a normalised batch (N x 3 x H x W), as N x C x h x w.

    One forward pass through the tap Grad-CAM uses; no backward.
    """
    if model.tap is None:
        raise InvalidInputError("this LoadedModel has no tap; make it with analysis.model_io.load_model or prepare_model.")
    h, w = model.sidecar.input_size
    if inputs.ndim != 4 or inputs.shape[1] != 3 or tuple(inputs.shape[2:]) != (h, w):
        raise InvalidInputError(f"inputs must be N x 3 x {h} x {w}; got {tuple(inputs.shape)}.")
    x = inputs.detach().to(model.device)
    if model.max_batch is not None and len(x) != model.max_batch:
        parts = [model.tap(chunk).activation.detach() for _, chunk in batch_chunks(x, model.max_batch)]
        activation = torch.cat(parts)[: len(x)]
    else:
        activation = model.tap(x).activation.detach()
    return feature_grid(activation, model.grid).float().cpu()


def embed_regions(model: LoadedModel, inputs: torch.Tensor, masks: Sequence[npt.NDArray[np.bool_]]) -> npt.NDArray[np.float32]:
    """Embeddings of the regions of a batch: (sum of R_i) x C, in image order, each image's R_i x H x W
    masks (model-input pixels) in the order given."""
    if len(masks) != len(inputs):
        raise InvalidInputError(f"one mask array per image is needed; got {len(masks)} for {len(inputs)} images.")
    features = layer_features(model, inputs)
    grid = (int(features.shape[2]), int(features.shape[3]))
    return pool_regions(features, [region_weights(m, grid) for m in masks])
