"""Prediction and Grad-CAM saliency for a batch, through captum's LayerGradCam.

Grad-CAM (Selvaraju et al., 2017) weights the target layer's feature maps by their
spatially averaged gradients, sums over channels and applies a ReLU; the coarse map is
then upsampled bilinearly to the input size. captum's defaults differ on both counts
(no ReLU, nearest upsampling), so both are set here explicitly.
"""

from __future__ import annotations

from dataclasses import dataclass

import captum
import numpy as np
import numpy.typing as npt
import torch
from captum.attr import LayerAttribution, LayerGradCam

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


def saliency_provenance(model: LoadedModel) -> dict[str, object]:
    """What a saliency run records about how its maps were made."""
    return {
        "method": METHOD,
        "implementation": "captum.attr.LayerGradCam",
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


def compute_saliency(model: LoadedModel, inputs: torch.Tensor) -> SaliencyBatch:
    """Predict a batch and compute the Grad-CAM map of each image's predicted class.

    Parameters
    ----------
    model
        From :func:`analysis.model_io.load_model` or :func:`prepare_model`.
    inputs
        Normalised batch, N x 3 x H x W, H x W the sidecar's input size. Left unchanged.

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
    x = inputs.detach().clone()
    with torch.no_grad():
        logits = model.module(x)
        probs = torch.softmax(logits.float(), dim=1)
        confidence, predicted = probs.max(dim=1)
    cam = LayerGradCam(model.module, model.layer)
    try:
        with torch.enable_grad():
            coarse = cam.attribute(x, target=predicted.tolist(), relu_attributions=True)
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
    if isinstance(coarse, tuple):
        coarse = coarse[0]
    maps = LayerAttribution.interpolate(coarse.detach(), (h, w), interpolate_mode="bilinear")
    maps_np = maps[:, 0].clamp_min(0).numpy().astype(np.float32)
    empty = maps_np.reshape(len(maps_np), -1).max(axis=1) <= 0
    return SaliencyBatch(
        predicted=predicted.numpy().astype(np.int64),
        confidence=confidence.numpy().astype(np.float32),
        probabilities=probs.numpy().astype(np.float32),
        maps=maps_np,
        empty=empty,
    )
