"""Load a user's classifier (TorchScript or state_dict + named architecture) with its sidecar.

The sidecar is a JSON file beside the model that says what the model cannot:
class names, input size, normalisation and the layer Grad-CAM should use.
"""

from __future__ import annotations

import copy
import hashlib
import json
from dataclasses import dataclass, field
from pathlib import Path

import torch
from torch import nn

from .architectures import build_architecture
from .errors import GradientUnavailableError, ModelInputError

_INPLACE_ACTIVATIONS = (nn.ReLU, nn.ReLU6, nn.LeakyReLU, nn.ELU, nn.SELU, nn.Hardtanh, nn.SiLU, nn.Hardswish)


@dataclass(frozen=True)
class Sidecar:
    """What heedmap needs to know about a model besides its weights."""

    classes: tuple[str, ...]
    input_size: tuple[int, int]  # (height, width)
    mean: tuple[float, float, float]
    std: tuple[float, float, float]
    target_layer: str
    stages: tuple[str, ...] = ()
    architecture: str | None = None

    def to_json(self) -> dict[str, object]:
        return {
            "classes": list(self.classes),
            "input_size": list(self.input_size),
            "mean": list(self.mean),
            "std": list(self.std),
            "target_layer": self.target_layer,
            "stages": list(self.stages),
            "architecture": self.architecture,
        }


@dataclass(frozen=True)
class LoadedModel:
    """A model ready for saliency: eval mode, one logits tensor out, a hookable target layer."""

    module: nn.Module
    layer: nn.Module
    sidecar: Sidecar
    kind: str  # "torchscript" | "state_dict" | "module"
    sha256: str
    notes: tuple[str, ...] = field(default=())

    @property
    def classes(self) -> tuple[str, ...]:
        return self.sidecar.classes


def _triple(value: object, key: str, path: Path) -> tuple[float, float, float]:
    if not isinstance(value, list) or len(value) != 3 or not all(isinstance(v, (int, float)) for v in value):
        raise ModelInputError(f"{path}: '{key}' must be a list of three numbers (one per RGB channel); got {value!r}.")
    if key == "std" and any(float(v) <= 0 for v in value):
        raise ModelInputError(f"{path}: every 'std' value must be positive; got {value!r}.")
    return (float(value[0]), float(value[1]), float(value[2]))


def read_sidecar(path: Path) -> Sidecar:
    """Parse and validate a sidecar JSON file."""
    try:
        raw = json.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ModelInputError(f"sidecar {path} does not exist; give the JSON file that describes the model.") from None
    except json.JSONDecodeError as exc:
        raise ModelInputError(f"sidecar {path} is not valid JSON: {exc}.") from None
    if not isinstance(raw, dict):
        raise ModelInputError(f"sidecar {path} must hold a JSON object; got {type(raw).__name__}.")
    missing = [k for k in ("classes", "input_size", "target_layer") if k not in raw]
    if missing:
        raise ModelInputError(f"sidecar {path} lacks the key(s) {', '.join(missing)}; see README 'Bring your own model'.")
    classes = raw["classes"]
    if not isinstance(classes, list) or len(classes) < 2 or not all(isinstance(c, str) and c for c in classes):
        raise ModelInputError(f"{path}: 'classes' must list at least two non-empty class names; got {classes!r}.")
    if len(set(classes)) != len(classes):
        raise ModelInputError(f"{path}: 'classes' has duplicate names: {classes!r}.")
    size = raw["input_size"]
    if not isinstance(size, list) or len(size) != 2 or not all(isinstance(v, int) and 8 <= v <= 4096 for v in size):
        raise ModelInputError(f"{path}: 'input_size' must be [height, width] in pixels (8..4096); got {size!r}.")
    stages = raw.get("stages") or []
    if not isinstance(stages, list) or not all(isinstance(s, str) for s in stages):
        raise ModelInputError(f"{path}: 'stages' must be a list of submodule names; got {stages!r}.")
    arch = raw.get("architecture")
    if arch is not None and not isinstance(arch, str):
        raise ModelInputError(f"{path}: 'architecture' must be a name such as 'sorter_cnn'; got {arch!r}.")
    return Sidecar(
        classes=tuple(classes),
        input_size=(size[0], size[1]),
        mean=_triple(raw.get("mean", [0.0, 0.0, 0.0]), "mean", path),
        std=_triple(raw.get("std", [1.0, 1.0, 1.0]), "std", path),
        target_layer=str(raw["target_layer"]),
        stages=tuple(stages),
        architecture=arch,
    )


def write_sidecar(sidecar: Sidecar, path: Path) -> None:
    Path(path).write_text(json.dumps(sidecar.to_json(), indent=2) + "\n", encoding="utf-8")


class _FirstOutput(nn.Module):
    """Wraps a model that returns a tuple, keeping its first element as the logits."""

    def __init__(self, inner: nn.Module) -> None:
        super().__init__()
        self.inner = inner

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        out = self.inner(x)
        return out[0] if isinstance(out, (tuple, list)) else out


class _Staged(nn.Module):
    """Calls a TorchScript model's top-level stages from Python, with a hookable tap after the target."""

    def __init__(self, stages: list[nn.Module], tap_after: int) -> None:
        super().__init__()
        self.stages = nn.ModuleList(stages)
        self.tap = nn.Identity()
        self.tap_after = tap_after

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        for i, stage in enumerate(self.stages):
            x = stage(x)
            if i == self.tap_after:
                x = self.tap(x)
        return x


def _file_sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


def _disable_inplace(module: nn.Module) -> tuple[nn.Module, int]:
    """Copy the model with in-place activations switched off (they corrupt hooked activations)."""
    count = sum(1 for m in module.modules() if isinstance(m, _INPLACE_ACTIVATIONS) and getattr(m, "inplace", False))
    if count == 0:
        return module, 0
    module = copy.deepcopy(module)
    for m in module.modules():
        if isinstance(m, _INPLACE_ACTIVATIONS) and getattr(m, "inplace", False):
            m.inplace = False
    return module, count


def prepare_model(module: nn.Module, sidecar: Sidecar, *, kind: str = "module", sha256: str = "") -> LoadedModel:
    """Check a model against its sidecar and make it ready for Grad-CAM.

    Raises
    ------
    ModelInputError
        The output size differs from the class list, the target layer does not exist,
        or a TorchScript model's stages do not reproduce its forward pass.
    GradientUnavailableError
        The forward pass runs without gradients (``torch.no_grad`` or ``detach`` inside it).
    """
    notes: list[str] = []
    h, w = sidecar.input_size
    probe = torch.linspace(-1, 1, 3 * h * w).reshape(1, 3, h, w)
    module = module.eval()
    if isinstance(module, torch.jit.ScriptModule):
        module, layer = _stage_scripted(module, sidecar, probe)
    else:
        module, n_inplace = _disable_inplace(module)
        if n_inplace:
            notes.append(f"switched off inplace on {n_inplace} activation module(s) so hooked activations stay intact")
        try:
            layer = module.get_submodule(sidecar.target_layer)
        except AttributeError:
            names = [n for n, _ in module.named_modules() if n][:30]
            raise ModelInputError(
                f"target layer {sidecar.target_layer!r} (sidecar 'target_layer') is not a submodule of the model; "
                f"some of its submodules: {', '.join(names)}."
            ) from None
    with torch.enable_grad():
        x = probe.clone().requires_grad_(True)
        out = module(x)
        if isinstance(out, (tuple, list)):
            if not out or not isinstance(out[0], torch.Tensor):
                raise ModelInputError("the model returns a tuple whose first element is not a logits tensor.")
            module = _FirstOutput(module).eval()
            out = out[0]
            notes.append("the model returns a tuple; its first element is used as the logits")
        if not isinstance(out, torch.Tensor):
            raise ModelInputError(f"the model must return a logits tensor (N x classes); it returned {type(out).__name__}.")
        if out.ndim != 2 or out.shape[1] != len(sidecar.classes):
            raise ModelInputError(
                f"the model gives output of shape {tuple(out.shape)} for one image, but the sidecar lists "
                f"{len(sidecar.classes)} classes ({', '.join(sidecar.classes)}). Fix 'classes' in the sidecar "
                "or give the model that was trained on them."
            )
        if not out.requires_grad:
            raise GradientUnavailableError(
                "the model's output carries no gradient: its forward pass runs under torch.no_grad(), "
                "inference_mode() or detaches a tensor. Remove that from forward(); heedmap switches gradients "
                "off itself wherever it only predicts."
            )
    return LoadedModel(module=module, layer=layer, sidecar=sidecar, kind=kind, sha256=sha256, notes=tuple(notes))


def _stage_scripted(model: torch.jit.ScriptModule, sidecar: Sidecar, probe: torch.Tensor) -> tuple[nn.Module, nn.Module]:
    if not sidecar.stages:
        raise ModelInputError(
            "TorchScript runs its forward pass in compiled code, where no hook can see the target layer. "
            "List in the sidecar 'stages' the top-level submodules whose chained calls give the output "
            "(e.g. [\"features\", \"head\"]) with the target layer among them, or give a state_dict and an 'architecture'."
        )
    if sidecar.target_layer not in sidecar.stages:
        raise ModelInputError(
            f"for TorchScript the target layer {sidecar.target_layer!r} must be one of the sidecar 'stages' {list(sidecar.stages)}."
        )
    children = dict(model.named_children())
    missing = [s for s in sidecar.stages if s not in children]
    if missing:
        raise ModelInputError(
            f"the TorchScript model has no top-level submodule(s) {missing}; it has {sorted(children)}. Fix 'stages'."
        )
    staged = _Staged([children[s] for s in sidecar.stages], sidecar.stages.index(sidecar.target_layer)).eval()
    with torch.no_grad():
        ref = model(probe)
        got = staged(probe)
    ref_t = ref[0] if isinstance(ref, (tuple, list)) else ref
    if not isinstance(got, torch.Tensor) or got.shape != ref_t.shape or not torch.allclose(got, ref_t, atol=1e-4, rtol=1e-4):
        raise ModelInputError(
            f"calling the stages {list(sidecar.stages)} one after another does not reproduce the model's output; "
            "list in 'stages' the submodules that forward() calls, in order, with nothing between them."
        )
    return staged, staged.tap


def load_model(model_path: Path, sidecar_path: Path) -> LoadedModel:
    """Load a TorchScript file, or a state_dict whose sidecar names its architecture."""
    model_path = Path(model_path)
    sidecar = read_sidecar(Path(sidecar_path))
    if not model_path.is_file():
        raise ModelInputError(f"model file {model_path} does not exist.")
    sha = _file_sha256(model_path)
    try:
        scripted = torch.jit.load(str(model_path), map_location="cpu")
    except Exception:  # noqa: BLE001 - not TorchScript; try a state_dict next
        scripted = None
    if scripted is not None:
        return prepare_model(scripted, sidecar, kind="torchscript", sha256=sha)
    if sidecar.architecture is None:
        raise ModelInputError(
            f"{model_path} is not TorchScript, so it must be a state_dict and the sidecar must name its 'architecture'."
        )
    try:
        state = torch.load(str(model_path), map_location="cpu", weights_only=True)
    except Exception as exc:  # noqa: BLE001 - torch raises many kinds here
        raise ModelInputError(f"{model_path} is neither TorchScript nor a loadable state_dict: {exc}") from None
    if isinstance(state, dict) and "state_dict" in state and isinstance(state["state_dict"], dict):
        state = state["state_dict"]
    if not isinstance(state, dict):
        raise ModelInputError(f"{model_path} holds a {type(state).__name__}, not a state_dict.")
    module = build_architecture(sidecar.architecture, len(sidecar.classes))
    try:
        module.load_state_dict(state, strict=True)
    except RuntimeError as exc:
        first = str(exc).splitlines()[0:3]
        raise ModelInputError(
            f"the weights in {model_path} do not fit architecture {sidecar.architecture!r} with "
            f"{len(sidecar.classes)} classes: {' '.join(first)}"
        ) from None
    return prepare_model(module, sidecar, kind="state_dict", sha256=sha)
