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

from dataclasses import dataclass
from typing import Literal

import captum
import numpy as np
import numpy.typing as npt
import torch
import torch.nn.functional as F
from captum.attr import LayerAttribution, LayerGradCam
from torch import nn

from .errors import GradientUnavailableError, InvalidInputError
from .model_io import LoadedModel

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
    """What a saliency run records about how its maps were made."""
    return {
        "method": METHOD,
        "implementation": "captum.attr.LayerGradCam" if implementation == "captum" else "heedmap single pass (checked against captum.attr.LayerGradCam)",
        "captum_version": captum.__version__,
        "torch_version": torch.__version__,
        "layer": model.sidecar.target_layer,
        "target": "predicted class",
        "relu_attributions": True,
        "upsample": "bilinear",
        "input_size": list(model.sidecar.input_size),
        "model_sha256": model.sha256,
        "model_kind": model.kind,
        "model_notes": list(model.notes),
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
    x = inputs.detach()
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
    confidence, predicted = probs.max(dim=1)
    maps_np = maps[:, 0].clamp_min(0).numpy().astype(np.float32)
    empty = maps_np.reshape(len(maps_np), -1).max(axis=1) <= 0
    return SaliencyBatch(
        predicted=predicted.numpy().astype(np.int64),
        confidence=confidence.numpy().astype(np.float32),
        probabilities=probs.numpy().astype(np.float32),
        maps=maps_np,
        empty=empty,
    )


def _single_pass(model: LoadedModel, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """One forward: no graph before the target layer, a graph from its output on; then the gradient
    of each image's predicted-class logit with respect to that output only."""
    captured: list[torch.Tensor] = []

    def tap(_module: nn.Module, _inputs: object, output: torch.Tensor) -> torch.Tensor:
        if captured:
            raise GradientUnavailableError(
                f"layer {model.sidecar.target_layer!r} runs more than once in one forward pass; choose a layer that runs once."
            )
        if not isinstance(output, torch.Tensor) or output.ndim != 4:
            raise GradientUnavailableError(
                f"layer {model.sidecar.target_layer!r} must give an N x C x h x w feature map; it gave {type(output).__name__}"
                + (f" of shape {tuple(output.shape)}" if isinstance(output, torch.Tensor) else "") + ". Choose a convolutional layer."
            )
        activation = output.detach().requires_grad_(True)
        captured.append(activation)
        torch.set_grad_enabled(True)  # record the graph from here on, for this forward only
        return activation

    handle = model.layer.register_forward_hook(tap)
    previous = torch.is_grad_enabled()
    try:
        torch.set_grad_enabled(False)
        logits = model.module(x)
    finally:
        handle.remove()
        torch.set_grad_enabled(previous)
    if not captured:
        raise GradientUnavailableError(f"layer {model.sidecar.target_layer!r} did not run in the forward pass; check 'target_layer'.")
    activation = captured[0]
    if not logits.requires_grad:
        raise GradientUnavailableError(
            "no gradient reaches the target layer: forward() runs part of the model under torch.no_grad() "
            "or detaches a tensor after the target layer."
        )
    probs = torch.softmax(logits.detach().float(), dim=1)
    predicted = probs.argmax(dim=1)
    with torch.enable_grad():
        (grads,) = torch.autograd.grad(logits.gather(1, predicted[:, None]).sum(), activation)
    weights = grads.mean(dim=(2, 3), keepdim=True)
    coarse = torch.relu((weights * activation.detach()).sum(dim=1, keepdim=True))
    h, w = model.sidecar.input_size
    return probs, F.interpolate(coarse, size=(h, w), mode="bilinear", align_corners=False)


def _captum(model: LoadedModel, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """The reference: predict, then captum's LayerGradCam with its own forward and backward."""
    with torch.no_grad():
        probs = torch.softmax(model.module(x).float(), dim=1)
    cam = LayerGradCam(model.module, model.layer)
    with torch.enable_grad():
        coarse = cam.attribute(x, target=probs.argmax(dim=1).tolist(), relu_attributions=True)
    if isinstance(coarse, tuple):
        coarse = coarse[0]
    h, w = model.sidecar.input_size
    return probs, LayerAttribution.interpolate(coarse.detach(), (h, w), interpolate_mode="bilinear")
