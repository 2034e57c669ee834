"""Prediction and Grad-CAM saliency for a batch, in one forward pass (captum's LayerGradCam is the reference).

Grad-CAM (Selvaraju et al., 2017) weights the target layer's feature maps by their
spatially averaged gradients, sums over channels and applies a ReLU; the coarse map is
then upsampled bilinearly to the input size.

The default ``single-pass`` implementation runs the model once: without gradients up to the
target layer, with them after it, so the prediction and the backward pass (down to the target
layer only) come from the same forward. ``captum`` predicts first and then lets
captum.attr.LayerGradCam run its own forward and backward (twice the forward work); the maps
are the same to float tolerance, which a test checks. captum's defaults (no ReLU, nearest
upsampling) are overridden to match the paper.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass
from typing import Literal

import captum
import numpy as np
import numpy.typing as npt
import torch
from captum.attr import LayerAttribution, LayerGradCam

from .errors import GradientUnavailableError, InvalidInputError
from .layer_taps import TokenGrid, channel_gradient
from .model_io import LoadedModel, batch_chunks

METHOD = "grad-cam"


@dataclass(frozen=True)
class SaliencyBatch:
    """Predictions and saliency maps for N images (maps are H x W in model-input pixels)."""

    predicted: npt.NDArray[np.int64]  # (N,)
    confidence: npt.NDArray[np.float32]  # (N,) softmax probability of the predicted class
    probabilities: npt.NDArray[np.float32]  # (N, C)
    maps: npt.NDArray[np.float32]  # (N, H, W), >= 0
    empty: npt.NDArray[np.bool_]  # (N,) True where the map is all zero after the ReLU


Implementation = Literal["single-pass", "captum"]


def saliency_provenance(model: LoadedModel, implementation: Implementation = "single-pass") -> dict[str, object]:
    """What a saliency run records about how its maps were made (and, for a factory model, the
    function that builds it and the folder it was imported from, so later steps can build it again)."""
    factory: dict[str, object] = {} if model.factory is None else {"model_factory": model.factory, "model_factory_folder": model.factory_folder}
    return {
        "method": METHOD,
        "implementation": "captum.attr.LayerGradCam" if implementation == "captum" else "heedmap single pass (checked against captum.attr.LayerGradCam)",
        "captum_version": captum.__version__,
        "torch_version": torch.__version__,
        "layer": model.sidecar.target_layer,
        "map_size": list(model.map_size),
        "tokens": None if model.grid is None else {"prefix": model.grid.prefix, "rows": model.grid.rows, "cols": model.grid.cols},
        "target": "predicted class",
        "relu_attributions": True,
        "upsample": "bilinear",
        "input_size": list(model.sidecar.input_size),
        "sidecar": model.sidecar.key_fields(),
        "model_sha256": model.sha256,
        "model_kind": model.kind,
        "model_notes": list(model.notes),
        **factory,
    }


def compute_saliency(model: LoadedModel, inputs: torch.Tensor, *, implementation: Implementation = "single-pass") -> SaliencyBatch:
    """Predict a batch and compute the Grad-CAM map of each image's predicted class.

    Parameters
    ----------
    model
        From :func:`analysis.model_io.load_model` or :func:`prepare_model`.
    inputs
        Normalised batch, N x 3 x H x W, H x W the sidecar's input size. Left unchanged.
    implementation
        ``single-pass`` (one forward) or ``captum`` (predict, then captum's own forward and backward).

    Raises
    ------
    InvalidInputError
        The batch has the wrong shape.
    GradientUnavailableError
        The backward pass cannot reach the target layer.
    """
    h, w = model.sidecar.input_size
    if inputs.ndim != 4 or inputs.shape[1] != 3 or tuple(inputs.shape[2:]) != (h, w):
        raise InvalidInputError(f"inputs must be N x 3 x {h} x {w}; got {tuple(inputs.shape)}.")
    if implementation not in ("single-pass", "captum"):
        raise InvalidInputError(f"implementation must be 'single-pass' or 'captum'; got {implementation!r}.")
    if model.max_batch is not None and len(inputs) != model.max_batch:
        parts = [_compute(model, chunk, implementation) for _, chunk in batch_chunks(inputs.detach(), model.max_batch)]
        probs = torch.cat([p for p, _ in parts])[: len(inputs)]
        maps = torch.cat([m for _, m in parts])[: len(inputs)]
    else:
        probs, maps = _compute(model, inputs.detach(), implementation)
    confidence, predicted = probs.max(dim=1)
    flat = maps[:, 0].float().clamp_min_(0)  # a fresh tensor: clamped in place, no copy
    empty = (flat.flatten(1).amax(dim=1) <= 0).numpy()  # torch's reduction (numpy's float32 max is several times slower); NaN is not empty in both
    maps_np = np.asarray(flat.numpy(), dtype=np.float32)
    return SaliencyBatch(
        predicted=predicted.numpy().astype(np.int64),
        confidence=confidence.numpy().astype(np.float32),
        probabilities=probs.numpy().astype(np.float32),
        maps=maps_np,
        empty=empty,
    )


def _compute(model: LoadedModel, x: torch.Tensor, implementation: Implementation) -> tuple[torch.Tensor, torch.Tensor]:
    x = x.to(model.device)
    try:
        if implementation == "captum":
            probs, maps = _captum(model, x.clone())
        else:
            probs, maps = _single_pass(model, x)
    except RuntimeError as exc:
        text = str(exc)
        if "inplace" in text or "in-place" in text:
            raise GradientUnavailableError(
                f"an in-place operation after layer {model.sidecar.target_layer!r} overwrote the activations Grad-CAM "
                "needs; replace functional in-place calls (x.relu_(), F.relu(x, inplace=True)) in forward()."
            ) from None
        if "does not require grad" in text or "grad_fn" in text:
            raise GradientUnavailableError(
                "no gradient reaches the target layer: forward() runs part of the model under torch.no_grad() "
                "or detaches a tensor after the target layer."
            ) from None
        raise
    return probs.cpu(), maps.cpu()


def _single_pass(model: LoadedModel, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """One forward: no graph before the target layer, a graph from its output on; then the gradient
    of each image's predicted-class logit with respect to that output only (or, where the output
    goes straight into a global pooling, with respect to the pooled values: the same channel weights
    without a gradient map)."""
    if model.tap is None:
        raise InvalidInputError("this LoadedModel has no tap; make it with analysis.model_io.prepare_model or load_model.")
    tapped = model.tap(x)
    logits = model.logits(tapped.out)
    if not logits.requires_grad:
        raise GradientUnavailableError(
            "no gradient reaches the target layer: forward() runs part of the model under torch.no_grad() "
            "or detaches a tensor after the target layer."
        )
    probs = torch.softmax(logits.detach().float(), dim=1)
    predicted = probs.argmax(dim=1)
    with torch.enable_grad():  # d (each image's predicted logit) / d layer
        # The sum of each image's predicted logit: its gradient reaches every logit as exactly the one-hot
        # of the predicted class. (Seeding the backward pass with that one-hot instead makes torch import
        # its symbolic-shape module, and sympy with it, on the first call: 1-2 s of a job's start.)
        target = logits.gather(1, predicted[:, None]).sum()
        alpha, _ = channel_gradient(tapped, target, model.grid)
    if alpha is None:
        raise GradientUnavailableError(
            f"the predicted class's logit does not depend on layer {model.sidecar.target_layer!r}; choose a layer before the output ('heedmap layers' lists them)."
        )
    coarse = torch.relu(weighted_sum(tapped.activation.detach(), alpha, model.grid))
    return probs, upsample_bilinear(coarse.float(), model.sidecar.input_size)


def upsample_bilinear(maps: torch.Tensor, size: tuple[int, int]) -> torch.Tensor:
    """``F.interpolate(maps, size, mode="bilinear", align_corners=False)`` for N x 1 x h x w maps, as
    two small matrix products (rows, then columns: bilinear interpolation is separable). torch's
    kernel works one channel at a time and costs several times more for one-channel maps; the
    values agree to float rounding (a test checks)."""
    n, _, h, w = maps.shape
    rows = _bilinear_weights(h, size[0], maps.dtype, maps.device)
    cols = _bilinear_weights(w, size[1], maps.dtype, maps.device)
    return torch.matmul(torch.matmul(rows, maps[:, 0]), cols.T).unsqueeze(1)


@functools.lru_cache(maxsize=64)
def _bilinear_weights(n_in: int, n_out: int, dtype: torch.dtype, device: torch.device) -> torch.Tensor:
    """n_out x n_in weights of bilinear interpolation along one axis, with torch's source positions
    for ``align_corners=False``: (i + 0.5) * n_in / n_out - 0.5, clamped at 0, between its two
    neighbouring inputs (the last input repeats at the edge)."""
    src = ((torch.arange(n_out, dtype=torch.float64) + 0.5) * (n_in / n_out) - 0.5).clamp_min(0.0)
    low = src.floor().long().clamp_max(n_in - 1)
    high = (low + 1).clamp_max(n_in - 1)
    frac = src - low
    out = torch.arange(n_out)
    weights = torch.zeros(n_out, n_in, dtype=torch.float64)
    weights.index_put_((out, low), 1.0 - frac, accumulate=True)
    weights.index_put_((out, high), frac, accumulate=True)
    return weights.to(dtype=dtype, device=device)


def weighted_sum(activation: torch.Tensor, alpha: torch.Tensor, grid: TokenGrid | None) -> torch.Tensor:
    """sum_k alpha_k A^k as N x 1 x h x w, alpha (N x C) the spatial mean of the gradient on channel k.

    A batched matrix product, so no activation-sized temporary is made (large temporaries cost
    page faults on every batch with the default allocator).
    """
    n = activation.shape[0]
    if grid is None:
        _, c, h, w = activation.shape
        return torch.bmm(alpha.unsqueeze(1).to(activation.dtype), activation.reshape(n, c, h * w)).view(n, 1, h, w)
    patches = activation[:, grid.prefix :, :]  # N x (rows*cols) x D
    return torch.bmm(patches, alpha.unsqueeze(2).to(activation.dtype)).view(n, 1, grid.rows, grid.cols)


def _captum(model: LoadedModel, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """The reference: predict, then captum's LayerGradCam with its own forward and backward."""
    if model.layer is None or model.grid is not None:
        raise InvalidInputError("the captum reference needs a hookable convolutional target layer (not TorchScript, not tokens).")
    with torch.no_grad():
        probs = torch.softmax(model.module(x).float(), dim=1)
    cam = LayerGradCam(model.module, model.layer)
    with torch.enable_grad():
        coarse = cam.attribute(x, target=probs.argmax(dim=1).tolist(), relu_attributions=True)
    if isinstance(coarse, tuple):
        coarse = coarse[0]
    h, w = model.sidecar.input_size
    return probs, LayerAttribution.interpolate(coarse.detach(), (h, w), interpolate_mode="bilinear")
