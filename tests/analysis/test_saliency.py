"""Grad-CAM against a direct computation of its formula (Selvaraju et al., 2017, eq. 1-2)."""

from __future__ import annotations

import json

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from torch import nn

from analysis.architectures import SorterCNN
from analysis.errors import GradientUnavailableError, ModelInputError
from analysis.model_io import Sidecar, prepare_model
from analysis.saliency import compute_saliency

SIDECAR = Sidecar(classes=("a", "b", "c"), input_size=(32, 32), mean=(0.0, 0.0, 0.0), std=(1.0, 1.0, 1.0), target_layer="features")


def _model(seed: int = 0) -> nn.Module:
    torch.manual_seed(seed)
    return SorterCNN(num_classes=3, width=8).eval()


def direct_gradcam(model: nn.Module, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """ReLU(sum_k alpha_k A^k), alpha_k = spatial mean of d y_c / d A^k, upsampled bilinearly."""
    feats = model.features(x)
    logits = model.head(feats)
    pred = logits.argmax(1)
    grads = torch.autograd.grad(logits.gather(1, pred[:, None]).sum(), feats)[0]
    alpha = grads.mean(dim=(2, 3), keepdim=True)
    cam = F.relu((alpha * feats).sum(1, keepdim=True))
    return F.interpolate(cam, size=x.shape[2:], mode="bilinear")[:, 0].detach(), pred


def test_gradcam_matches_direct_formula() -> None:
    model = _model()
    x = torch.randn(6, 3, 32, 32, generator=torch.Generator().manual_seed(1))
    ours = compute_saliency(prepare_model(model, SIDECAR), x)
    ref, pred = direct_gradcam(model, x)
    assert ours.predicted.tolist() == pred.tolist()
    torch.testing.assert_close(torch.from_numpy(ours.maps), ref, rtol=1e-4, atol=1e-6)
    assert (ours.maps >= 0).all()


def test_gradcam_batched_equals_unbatched_and_leaves_input() -> None:
    loaded = prepare_model(_model(), SIDECAR)
    x = torch.randn(5, 3, 32, 32, generator=torch.Generator().manual_seed(2))
    before = x.clone()
    whole = compute_saliency(loaded, x)
    torch.testing.assert_close(x, before)
    for i in range(5):
        one = compute_saliency(loaded, x[i : i + 1])
        torch.testing.assert_close(torch.from_numpy(one.maps[0]), torch.from_numpy(whole.maps[i]), rtol=1e-4, atol=1e-6)


def test_torchscript_with_stages_matches_python_model() -> None:
    model = _model()
    scripted = torch.jit.script(model)
    staged = prepare_model(scripted, Sidecar(**{**SIDECAR.__dict__, "stages": ("features", "head")}), kind="torchscript")
    x = torch.randn(3, 3, 32, 32, generator=torch.Generator().manual_seed(3))
    a = compute_saliency(staged, x)
    b = compute_saliency(prepare_model(model, SIDECAR), x)
    torch.testing.assert_close(torch.from_numpy(a.maps), torch.from_numpy(b.maps), rtol=1e-4, atol=1e-6)


def test_torchscript_needs_no_stages_and_reaches_layers_inside_them() -> None:
    # A layer inside a top-level submodule (features.10, a ReLU) is found in the TorchScript graph.
    model = _model()
    sidecar = Sidecar(**{**SIDECAR.__dict__, "target_layer": "features.10"})
    scripted = prepare_model(torch.jit.script(model), sidecar, kind="torchscript")
    x = torch.randn(3, 3, 32, 32, generator=torch.Generator().manual_seed(4))
    a = compute_saliency(scripted, x)
    b = compute_saliency(prepare_model(model, sidecar), x)
    assert scripted.target_layer == "features.10"
    torch.testing.assert_close(torch.from_numpy(a.maps), torch.from_numpy(b.maps), rtol=1e-4, atol=1e-6)


def test_unknown_layer_names_the_layers_that_exist() -> None:
    with pytest.raises(ModelInputError, match=r"'nope'.*features \(8x8\)"):
        prepare_model(torch.jit.script(_model()), Sidecar(**{**SIDECAR.__dict__, "target_layer": "nope"}), kind="torchscript")


class _Tuple(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.features = nn.Sequential(nn.Conv2d(3, 4, 3, padding=1), nn.ReLU(inplace=True))
        self.fc = nn.Linear(4, 3)

    def forward(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        f = self.features(x)
        return self.fc(f.mean((2, 3))), f


class _NoGrad(_Tuple):
    def forward(self, x: torch.Tensor) -> torch.Tensor:  # type: ignore[override]
        with torch.no_grad():
            return self.fc(self.features(x).mean((2, 3)))


def test_tuple_output_and_inplace_relu_are_handled() -> None:
    loaded = prepare_model(_Tuple(), SIDECAR)
    assert any("inplace" in n for n in loaded.notes) and any("tuple" in n for n in loaded.notes)
    out = compute_saliency(loaded, torch.randn(2, 3, 32, 32))
    assert out.maps.shape == (2, 32, 32)


def test_no_grad_model_is_refused() -> None:
    with pytest.raises(GradientUnavailableError, match="no_grad"):
        prepare_model(_NoGrad(), SIDECAR)


def test_output_size_mismatch_is_refused() -> None:
    with pytest.raises(ModelInputError, match="lists 2 classes"):
        prepare_model(_model(), Sidecar(**{**SIDECAR.__dict__, "classes": ("a", "b")}))


def test_empty_map_is_flagged() -> None:
    model = _model()
    with torch.no_grad():
        for p in model.features.parameters():
            p.zero_()
    out = compute_saliency(prepare_model(model, SIDECAR), torch.randn(2, 3, 32, 32))
    assert out.empty.all() and (out.maps == 0).all()


@pytest.mark.parametrize("arch", ["sorter_cnn", "resnet18"])
def test_single_pass_equals_captum_layergradcam(arch: str) -> None:
    # The reference is captum's LayerGradCam (ReLU on, bilinear upsampling), run after a separate prediction.
    from analysis.architectures import build_architecture

    torch.manual_seed(5)
    model = build_architecture(arch, 3).eval()
    layer = "features" if arch == "sorter_cnn" else "layer3"  # layer4 is 2x2 at 64 px (and warns)
    sidecar = Sidecar(**{**SIDECAR.__dict__, "target_layer": layer, "input_size": (64, 64)})
    loaded = prepare_model(model, sidecar)
    x = torch.randn(4, 3, 64, 64, generator=torch.Generator().manual_seed(6))
    ours = compute_saliency(loaded, x)
    ref = compute_saliency(loaded, x, implementation="captum")
    assert ours.predicted.tolist() == ref.predicted.tolist()
    np.testing.assert_allclose(ours.probabilities, ref.probabilities, rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(ours.maps, ref.maps, rtol=1e-4, atol=1e-6 * max(1.0, float(ref.maps.max())))


class _InplaceAfter(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.features = nn.Conv2d(3, 4, 3, padding=1)
        self.fc = nn.Linear(4, 3)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        f = self.features(x)
        f.relu_()  # overwrites the target layer's output
        return self.fc(f.mean((2, 3)))


def test_inplace_after_target_layer_is_a_clear_error() -> None:
    loaded = prepare_model(_InplaceAfter(), SIDECAR)
    with pytest.raises(GradientUnavailableError, match="in-place"):
        compute_saliency(loaded, torch.randn(2, 3, 32, 32))


@pytest.mark.parametrize(("h", "w", "size"), [(12, 12, (96, 96)), (7, 5, (64, 48)), (1, 1, (32, 32)), (16, 16, (16, 16)), (6, 9, (37, 101)), (20, 20, (8, 8))])
def test_upsample_bilinear_equals_torch_interpolate(h: int, w: int, size: tuple[int, int]) -> None:
    # The reference is torch's own bilinear kernel (align_corners=False), which Grad-CAM's maps used before.
    from analysis.saliency import upsample_bilinear

    maps = torch.rand(5, 1, h, w, generator=torch.Generator().manual_seed(h * w)) * 10
    ref = F.interpolate(maps, size=size, mode="bilinear", align_corners=False)
    ours = upsample_bilinear(maps, size)
    assert ours.shape == ref.shape
    torch.testing.assert_close(ours, ref, rtol=1e-5, atol=1e-5)


def test_gradient_of_the_summed_predicted_logits_is_the_one_hot_seeded_gradient_bit_for_bit() -> None:
    """Grad-CAM's d y^c / d A (Selvaraju et al., 2017, eq. 1) for every image at once: the backward pass
    from the sum of each image's predicted logit reaches the logits as exactly the one-hot of the
    predicted class, so it equals the pass seeded with that one-hot, bit for bit."""
    from analysis.layer_taps import channel_gradient

    loaded = prepare_model(_model(3), SIDECAR)
    x = torch.randn(7, 3, 32, 32, generator=torch.Generator().manual_seed(4))
    assert loaded.tap is not None
    alphas = []
    for seeded in (False, True):
        tapped = loaded.tap(x)
        logits = loaded.logits(tapped.out)
        pred = logits.detach().argmax(1)
        with torch.enable_grad():
            if seeded:
                alpha, _ = channel_gradient(tapped, logits, None, seed=torch.zeros_like(logits).scatter_(1, pred[:, None], 1.0))
            else:
                alpha, _ = channel_gradient(tapped, logits.gather(1, pred[:, None]).sum(), None)
        assert alpha is not None
        alphas.append(alpha)
    assert torch.equal(alphas[0], alphas[1])


def test_saliency_does_not_import_sympy() -> None:
    """Seeding torch's backward pass with a gradient tensor imports its symbolic-shape module and sympy
    (1-2 s at the start of every saliency job); Grad-CAM here does without (a fresh interpreter)."""
    import subprocess
    import sys

    code = ("import sys, torch\nfrom analysis.architectures import SorterCNN\nfrom analysis.model_io import Sidecar, prepare_model\n"
            "from analysis.saliency import compute_saliency\n"
            "m = prepare_model(SorterCNN(num_classes=3, width=8).eval(), Sidecar(classes=('a', 'b', 'c'), input_size=(32, 32), mean=(0.0, 0.0, 0.0), "
            "std=(1.0, 1.0, 1.0), target_layer='features'))\n"
            "compute_saliency(m, torch.randn(2, 3, 32, 32))\nprint('sympy' in sys.modules)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300, check=True)
    assert out.stdout.strip() == "False", out.stderr


def test_a_module_given_is_left_trainable_and_a_loaded_one_is_frozen(tmp_path) -> None:  # type: ignore[no-untyped-def]
    # prepare_model must not change a model the caller may still train; load_model owns what it loads and freezes
    # it (a parameter that requires grad makes every layer after the tap compute its weight's gradient too).
    from analysis.model_io import load_model

    model = _model()
    prepare_model(model, SIDECAR)
    assert all(p.requires_grad for p in model.parameters())
    frozen = prepare_model(_model(), SIDECAR, freeze_parameters=True)
    assert not any(p.requires_grad for p in frozen.module.parameters())
    program = torch.export.export(_model().eval(), (torch.randn(2, 3, 32, 32),), dynamic_shapes=({0: torch.export.Dim("batch")},))
    torch.export.save(program, tmp_path / "model.pt2")
    (tmp_path / "sidecar.json").write_text(json.dumps({"classes": list(SIDECAR.classes), "input_size": list(SIDECAR.input_size),
                                                       "mean": list(SIDECAR.mean), "std": list(SIDECAR.std), "target_layer": SIDECAR.target_layer}))
    loaded = load_model(tmp_path / "model.pt2", tmp_path / "sidecar.json")
    assert not any(p.requires_grad for p in loaded.module.parameters())
    x = torch.randn(3, 3, 32, 32, generator=torch.Generator().manual_seed(8))
    torch.testing.assert_close(torch.from_numpy(compute_saliency(loaded, x).maps), torch.from_numpy(compute_saliency(prepare_model(model, SIDECAR), x).maps),
                               rtol=1e-4, atol=1e-6)
