"""Load a user's image classifier in the format they have, with its sidecar, ready for Grad-CAM.

Formats: an exported program (``.pt2`` from ``torch.export``, the first choice), TorchScript with
any forward, a Python model built by the user's own factory function (optionally with a
checkpoint), or a state_dict of an architecture heedmap knows by name.
"""

from __future__ import annotations

import copy
import hashlib
import importlib
import sys
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from pathlib import Path

import torch
from torch import nn

from .architectures import build_architecture
from .errors import GradientUnavailableError, ModelInputError
from .layer_taps import (
    EagerGraph,
    FxGraph,
    LayerInfo,
    ModelGraph,
    ScriptGraph,
    Tap,
    TokenGrid,
    choose_layer,
    freeze,
    select_logits,
    warn_coarse,
)
from .sidecar import Sidecar, read_sidecar, sidecar_from_dict, write_sidecar

__all__ = [
    "EXPORT_HELP", "LoadedModel", "Sidecar", "check_finite_outputs", "factory_folder", "import_factory", "load_checkpoint", "load_model",
    "prepare_model", "read_sidecar", "sidecar_from_dict", "write_sidecar",
]

_INPLACE_ACTIVATIONS = (nn.ReLU, nn.ReLU6, nn.LeakyReLU, nn.ELU, nn.SELU, nn.Hardtanh, nn.SiLU, nn.Hardswish, nn.Mish, nn.Hardsigmoid)

EXPORT_HELP = (
    "Export it as a program instead: ep = torch.export.export(model.eval(), (torch.randn(2, 3, H, W),), "
    "dynamic_shapes=({0: torch.export.Dim('batch')},)); torch.export.save(ep, 'model.pt2') "
    "(see README 'Bring your own model'), or give the Python code with --model-factory package.module:function."
)


@dataclass(frozen=True)
class LoadedModel:
    """A model ready for saliency.

    ``module(x)`` gives the logits (N x classes) in eval mode; ``tap(x)`` gives the model's raw
    output and the target layer's activation, with an autograd graph only from that layer on.
    ``layer`` is a hookable module at the target (None for TorchScript). ``sidecar.target_layer``
    is the layer actually used (chosen when the sidecar left it out).
    """

    module: nn.Module
    layer: nn.Module | None
    sidecar: Sidecar
    kind: str  # "exported" | "torchscript" | "state_dict" | "factory" | "module"
    sha256: str
    notes: tuple[str, ...] = field(default=())
    tap: Tap | None = None
    grid: TokenGrid | None = None  # patch grid when the target layer gives tokens
    map_size: tuple[int, int] = (0, 0)
    layers: tuple[LayerInfo, ...] = ()
    warnings: tuple[str, ...] = ()
    device: str = "cpu"
    max_batch: int | None = None  # an exported program fixed to one batch size
    graph: ModelGraph | None = None  # taps other layers (layer previews)
    factory: str | None = None  # package.module:function that built it (a factory model)
    factory_folder: str | None = None  # the folder that function's package was imported from

    @property
    def classes(self) -> tuple[str, ...]:
        return self.sidecar.classes

    @property
    def target_layer(self) -> str:
        return self.sidecar.target_layer or ""

    def logits(self, out: object) -> torch.Tensor:
        return select_logits(out, self.sidecar.output)


class _Logits(nn.Module):
    """The model with its output reduced to the logits tensor (a dict key or tuple index)."""

    def __init__(self, inner: nn.Module, output: str | int | None, max_batch: int | None = None) -> None:
        super().__init__()
        self.inner = inner
        self.output = output
        self.max_batch = max_batch

    def train(self, mode: bool = True) -> _Logits:
        self.training = mode
        if not isinstance(self.inner, torch.fx.GraphModule):  # an exported program's module refuses train()/eval()
            self.inner.train(mode)
        return self

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if isinstance(self.inner, torch.jit.ScriptModule) and torch.is_inference_mode_enabled():
            # TorchScript keeps tensors made on its first runs; made in inference mode, they would
            # break every later Grad-CAM pass on this model. Plain no-grad gives the same logits.
            with torch.inference_mode(False), torch.no_grad():
                return self._forward(x.clone() if x.is_inference() else x)
        return self._forward(x)

    def _forward(self, x: torch.Tensor) -> torch.Tensor:
        if self.max_batch is None or len(x) == self.max_batch:
            return select_logits(self.inner(x), self.output)
        return torch.cat([select_logits(self.inner(chunk), self.output)[: len(x) - start] for start, chunk in batch_chunks(x, self.max_batch)])


def batch_chunks(x: torch.Tensor, size: int) -> list[tuple[int, torch.Tensor]]:
    """Slices of exactly ``size`` images (the last padded by repeating its final image)."""
    out = []
    for start in range(0, len(x), size):
        chunk = x[start : start + size]
        if len(chunk) < size:
            chunk = torch.cat([chunk, chunk[-1:].expand(size - len(chunk), *chunk.shape[1:])])
        out.append((start, chunk))
    return out


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


def _probe(batch: int, size: tuple[int, int], device: str) -> torch.Tensor:
    h, w = size
    gen = torch.Generator().manual_seed(0)
    return torch.randn(batch, 3, h, w, generator=gen).to(device)


def _static_batch(gm: torch.fx.GraphModule, size: tuple[int, int]) -> int | None:
    """The batch size an exported program was fixed to (None when dynamic); checks its input size."""
    placeholders = [n for n in gm.graph.nodes if n.op == "placeholder"]
    if len(placeholders) != 1:
        raise ModelInputError(f"the exported program takes {len(placeholders)} inputs; heedmap gives it one image batch. Export forward(x) only.")
    val = placeholders[0].meta.get("val")
    shape = getattr(val, "shape", None)
    if shape is None or len(shape) != 4:
        return None
    hw = [s for s in shape[2:] if isinstance(s, int)]
    if len(hw) == 2 and tuple(hw) != tuple(size):
        raise ModelInputError(
            f"the exported program was exported for {hw[0]}x{hw[1]} inputs but the sidecar's 'input_size' is {list(size)}; "
            f"set 'input_size' to [{hw[0]}, {hw[1]}] or export again with that size."
        )
    return shape[0] if isinstance(shape[0], int) else None


def prepare_model(module: nn.Module, sidecar: Sidecar, *, kind: str = "module", sha256: str = "", device: str = "cpu",
                  freeze_parameters: bool = False) -> LoadedModel:
    """Check a model against its sidecar, find (or choose) its Grad-CAM layer and tap it.

    ``module`` is an eager ``nn.Module``, the module of an exported program
    (``torch.export.load(path).module()``) or a TorchScript module (whose parameters are always
    frozen). ``freeze_parameters`` sets ``requires_grad`` False on an eager or exported module's
    parameters too (what :func:`load_model` does with the modules it makes): Grad-CAM differentiates
    by the layer's output only, and a parameter that requires grad makes every layer after the tap
    compute its weight's gradient too (the ViT's saliency stage ran 0.87-0.93x of plain inference
    so). Left off by default, a module given here is not changed (an exported program made in the
    same process shares its parameters with the eager model, which may still be trained).

    Raises
    ------
    ModelInputError
        The output does not fit the class list, the target layer does not exist or gives no map,
        or transformer tokens do not form the patch grid.
    GradientUnavailableError
        The forward pass runs without gradients (``torch.no_grad`` or ``detach`` inside it).
    """
    notes: list[str] = []
    graph: ModelGraph
    max_batch: int | None = None
    if isinstance(module, torch.jit.ScriptModule):
        module = module.eval()
        graph = ScriptGraph(module)
    elif isinstance(module, torch.fx.GraphModule):
        max_batch = _static_batch(module, sidecar.input_size)
        if freeze_parameters:
            freeze(module)
        graph = FxGraph(module)
        if max_batch is not None:
            notes.append(f"the exported program is fixed to batch size {max_batch}; images are run {max_batch} at a time")
    else:
        module, n_inplace = _disable_inplace(module.eval())
        if n_inplace:
            notes.append(f"switched off inplace on {n_inplace} activation module(s) so hooked activations stay intact")
        if freeze_parameters:
            freeze(module)
        graph = EagerGraph(module)
    if device != "cpu":
        module = module.to(device)
    probe = _probe(max_batch or 2, sidecar.input_size, device)
    _check_output(module, sidecar, probe, notes)

    infos = graph.layers(probe, input_size=sidecar.input_size, grid=sidecar.token_grid, prefix=sidecar.prefix_tokens)
    if sidecar.target_layer:
        info = next((i for i in infos if i.name == sidecar.target_layer), None)
        if info is None and isinstance(module, torch.jit.ScriptModule) and sidecar.stages:
            return _prepare_staged(module, sidecar, kind=kind, sha256=sha256, device=device, notes=notes)
        if info is None:
            raise _unknown_layer(graph, sidecar.target_layer, infos, kind=graph.kind)
        if info.map_size is None:
            raise ModelInputError(_no_map_message(info, sidecar))
    else:
        info = choose_layer(graph, infos, probe, sidecar.output)
        size = f"{info.map_size[0]}x{info.map_size[1]}" if info.map_size else "?"
        notes.append(f"target layer chosen: {info.name} ({size} map); state 'target_layer' in the sidecar to use another")
    tap, layer = graph.tap(info.name)
    message = warn_coarse(info, infos)
    logits_module = _Logits(module, sidecar.output, max_batch)
    return LoadedModel(
        module=logits_module.eval(),
        layer=layer,
        sidecar=sidecar.with_layer(info.name),
        kind=kind,
        sha256=sha256,
        notes=tuple(notes),
        tap=tap,
        grid=info.grid,
        map_size=info.map_size or (0, 0),
        layers=tuple(infos),
        warnings=(message,) if message else (),
        device=device,
        max_batch=max_batch,
        graph=graph,
    )


def _check_output(module: nn.Module, sidecar: Sidecar, probe: torch.Tensor, notes: list[str]) -> None:
    with torch.enable_grad():
        x = probe.clone().requires_grad_(True)
        try:
            out = module(x)
        except GradientUnavailableError:
            raise
        except Exception as exc:  # noqa: BLE001 - any failure of the user's forward is reported with what to check
            first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
            raise ModelInputError(
                f"the model fails on a batch of {len(x)} images of 3 x {sidecar.input_size[0]} x {sidecar.input_size[1]} "
                f"(the sidecar's 'input_size'): {type(exc).__name__}: {first[:300]}. Check 'input_size' and that forward() takes one image batch."
            ) from None
        if isinstance(out, (tuple, list)) and sidecar.output is None:
            notes.append("the model returns a tuple; its first element is used as the logits (state 'output' in the sidecar to pick another)")
        logits = select_logits(out, sidecar.output)
        if logits.ndim != 2 or logits.shape[1] != len(sidecar.classes):
            raise ModelInputError(
                f"the model gives output of shape {tuple(logits.shape[1:])} per image, but the sidecar lists "
                f"{len(sidecar.classes)} classes ({', '.join(sidecar.classes)}). Fix 'classes' in the sidecar "
                "or give the model that was trained on them."
            )
        if not logits.requires_grad:
            raise GradientUnavailableError(
                "the model's output carries no gradient: its forward pass runs under torch.no_grad(), "
                "inference_mode() or detaches a tensor. Remove that from forward(); heedmap switches gradients "
                "off itself wherever it only predicts."
            )


def _no_map_message(info: LayerInfo, sidecar: Sidecar) -> str:
    if len(info.shape) == 2:
        return (
            f"layer {info.name!r} gives {info.shape[0]} tokens of {info.shape[1]} values, which do not form a patch grid for a "
            f"{sidecar.input_size[0]}x{sidecar.input_size[1]} input (after up to 5 class/register tokens). State the grid in the "
            "sidecar: \"token_grid\": [rows, cols] and \"prefix_tokens\": N (tokens before the patches), or choose a layer with a map."
        )
    return f"layer {info.name!r} gives output of shape {list(info.shape)} per image, not a map; choose a layer that does ('heedmap layers' lists them)."


def _unknown_layer(graph: ModelGraph, name: str, infos: list[LayerInfo], *, kind: str) -> ModelInputError:
    with_maps = [i for i in infos if i.map_size]
    listing = ", ".join(f"{i.name} ({i.map_size[0]}x{i.map_size[1]})" for i in with_maps[-12:] if i.map_size)
    if name in graph.names():
        return ModelInputError(
            f"layer {name!r} exists but its output is not one map (N x C x h x w) or one token tensor; layers with maps: {listing}."
        )
    extra = ""
    if kind == "torchscript":
        extra = " TorchScript keeps module paths only where its compiled code calls the module; " + EXPORT_HELP
    return ModelInputError(
        f"target layer {name!r} (sidecar 'target_layer') is not a layer of the model; layers with maps, last ones: {listing or 'none'}. "
        "Leave 'target_layer' out to let heedmap choose." + extra
    )


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


def _prepare_staged(model: torch.jit.ScriptModule, sidecar: Sidecar, *, kind: str, sha256: str, device: str, notes: list[str]) -> LoadedModel:
    """Fallback for TorchScript whose target cannot be found in its graph: the sidecar's 'stages'."""
    if sidecar.target_layer not in sidecar.stages:
        raise ModelInputError(f"for TorchScript the target layer {sidecar.target_layer!r} must be one of the sidecar 'stages' {list(sidecar.stages)}.")
    children = dict(model.named_children())
    missing = [s for s in sidecar.stages if s not in children]
    if missing:
        raise ModelInputError(f"the TorchScript model has no top-level submodule(s) {missing}; it has {sorted(children)}. Fix 'stages'.")
    staged = _Staged([children[s] for s in sidecar.stages], sidecar.stages.index(sidecar.target_layer)).eval()
    probe = _probe(2, sidecar.input_size, device)
    with torch.no_grad():
        ref = select_logits(model(probe), sidecar.output)
        got = staged(probe)
    if not isinstance(got, torch.Tensor) or got.shape != ref.shape or not torch.allclose(got, ref, atol=1e-4, rtol=1e-4):
        raise ModelInputError(
            f"calling the stages {list(sidecar.stages)} one after another does not reproduce the model's output; " + EXPORT_HELP
        )
    loaded = prepare_model(staged, replace(sidecar, target_layer="tap", output=None), kind=kind, sha256=sha256, device=device)
    return replace(loaded, sidecar=sidecar, notes=(*notes, "TorchScript run through its 'stages'", *loaded.notes))


def import_factory(spec: str, *, folder: str | Path | None = None) -> Callable[[], nn.Module]:
    """The function named by ``package.module:function``, imported from ``folder`` (where a run
    recorded it), the working folder or sys.path."""
    if spec.count(":") != 1 or not all(spec.split(":")):
        raise ModelInputError(f"--model-factory must look like package.module:function; got {spec!r}.")
    mod_name, fn_name = spec.split(":")
    for place in ([str(folder)] if folder else []) + [str(Path.cwd())]:
        if place not in sys.path:
            sys.path.insert(0, place)
    try:
        mod = importlib.import_module(mod_name)
    except Exception as exc:  # noqa: BLE001 - the user's module may fail in any way on import
        where = f" (the run recorded the folder {folder})" if folder else ""
        raise ModelInputError(f"cannot import {mod_name!r} for --model-factory{where} ({type(exc).__name__}: {exc}); run heedmap from the folder that holds it or install it.") from None
    fn = getattr(mod, fn_name, None)
    if not callable(fn):
        raise ModelInputError(f"{mod_name!r} has no function {fn_name!r} for --model-factory.")
    return fn  # type: ignore[no-any-return]


def factory_folder(spec: str) -> str | None:
    """The folder to import ``package.module`` of an imported factory from (None if unknown)."""
    mod_name = spec.split(":", 1)[0]
    mod = sys.modules.get(mod_name)
    file = getattr(mod, "__file__", None)
    if not file:
        return None
    up = mod_name.count(".") + (1 if Path(file).name == "__init__.py" else 0)
    return str(Path(file).resolve().parents[up])


def load_checkpoint(path: Path) -> dict[str, torch.Tensor]:
    """A state_dict from a checkpoint file: plain, ``{"state_dict": ...}``/``{"model": ...}``, or safetensors."""
    path = Path(path)
    if path.suffix == ".safetensors":
        try:
            from safetensors.torch import load_file
        except ImportError:
            raise ModelInputError(f"{path} is a safetensors file; install the package: pip install safetensors.") from None
        try:
            return dict(load_file(str(path)))
        except Exception as exc:  # noqa: BLE001
            raise ModelInputError(f"{path} is not a readable safetensors file: {exc}") from None
    try:
        state = torch.load(str(path), map_location="cpu", weights_only=True)
    except Exception as exc:  # noqa: BLE001 - torch raises many kinds here
        raise ModelInputError(f"{path} is not a loadable checkpoint (a state_dict saved with torch.save): {str(exc).splitlines()[0][:200]}") from None
    for key in ("state_dict", "model_state_dict", "model"):
        if isinstance(state, dict) and isinstance(state.get(key), dict):
            state = state[key]
            break
    if not isinstance(state, dict) or not all(isinstance(v, torch.Tensor) for v in state.values()):
        raise ModelInputError(f"{path} holds a {type(state).__name__} that is not a state_dict (names to tensors).")
    return state


def fit_state_dict(module: nn.Module, state: dict[str, torch.Tensor], *, source: str) -> list[str]:
    """Load ``state`` into ``module``, stripping ``module.``/``model.`` prefixes that DataParallel or wrappers add."""
    notes = []
    expected = set(module.state_dict())
    for prefix in ("module.", "model.", "_orig_mod."):
        if not (set(state) & expected) and state and all(k.startswith(prefix) for k in state):
            state = {k[len(prefix) :]: v for k, v in state.items()}
            notes.append(f"stripped the prefix {prefix!r} from the checkpoint's keys")
    missing = sorted(expected - set(state))
    unexpected = sorted(set(state) - expected)
    if missing or unexpected:
        raise ModelInputError(
            f"the weights in {source} do not fit the model: {len(missing)} missing key(s) (e.g. {missing[:3]}), "
            f"{len(unexpected)} unexpected (e.g. {unexpected[:3]}). Build the same model the checkpoint was saved from."
        )
    try:
        module.load_state_dict(state, strict=True)
    except RuntimeError as exc:
        lines = [ln.strip() for ln in str(exc).splitlines() if "size mismatch" in ln][:2]
        raise ModelInputError(f"the weights in {source} do not fit the model: {' '.join(lines) or str(exc)[:300]}") from None
    return notes


def load_model(model_path: Path | None, sidecar_path: Path, *, factory: str | None = None, device: str = "cpu", folder: str | Path | None = None) -> LoadedModel:
    """Load an exported program (.pt2), TorchScript, a factory's model (+ optional checkpoint), or a
    state_dict whose sidecar names an ``architecture``. ``folder`` is where to import the factory
    from (what a run recorded), before the working folder."""
    sidecar = read_sidecar(Path(sidecar_path))
    device = check_device(device)
    if factory is not None:
        build = import_factory(factory, folder=folder)
        try:
            module = build()
        except Exception as exc:  # noqa: BLE001 - the user's factory may fail in any way
            raise ModelInputError(f"--model-factory {factory} failed: {type(exc).__name__}: {exc}") from None
        if not isinstance(module, nn.Module):
            raise ModelInputError(f"--model-factory {factory} returned a {type(module).__name__}, not a torch nn.Module.")
        sha = hashlib.sha256(f"factory:{factory}".encode()).hexdigest()
        notes: list[str] = []
        if model_path is not None:
            _must_exist(model_path)
            notes = fit_state_dict(module, load_checkpoint(model_path), source=str(model_path))
            sha = _file_sha256(Path(model_path))
        loaded = prepare_model(module, sidecar, kind="factory", sha256=sha, device=device, freeze_parameters=True)
        return replace(loaded, notes=(*notes, *loaded.notes), factory=factory, factory_folder=factory_folder(factory))
    if model_path is None:
        raise ModelInputError("give --model FILE (an exported .pt2, TorchScript or a state_dict), or --model-factory package.module:function.")
    model_path = Path(model_path)
    _must_exist(model_path)
    sha = _file_sha256(model_path)
    if model_path.suffix == ".pt2":
        return prepare_model(_load_exported(model_path), sidecar, kind="exported", sha256=sha, device=device, freeze_parameters=True)
    try:
        scripted = torch.jit.load(str(model_path), map_location="cpu")  # type: ignore[no-untyped-call]  # untyped in torch
    except Exception:  # noqa: BLE001 - not TorchScript; try the other formats next
        scripted = None
    if scripted is not None:
        return prepare_model(scripted, sidecar, kind="torchscript", sha256=sha, device=device)
    if sidecar.architecture is None:
        raise ModelInputError(
            f"{model_path} is not TorchScript nor an exported program (.pt2), so it must be a state_dict: name its 'architecture' "
            "in the sidecar, or give the code that builds it with --model-factory package.module:function."
        )
    module = build_architecture(sidecar.architecture, len(sidecar.classes))
    notes = fit_state_dict(module, load_checkpoint(model_path), source=f"{model_path} (architecture {sidecar.architecture!r})")
    loaded = prepare_model(module, sidecar, kind="state_dict", sha256=sha, device=device, freeze_parameters=True)
    return replace(loaded, notes=(*notes, *loaded.notes))


def _must_exist(path: Path) -> None:
    if not Path(path).is_file():
        raise ModelInputError(f"model file {path} does not exist.")


def _load_exported(path: Path) -> torch.fx.GraphModule:
    try:
        program = torch.export.load(str(path))
    except Exception as exc:  # noqa: BLE001 - a damaged or foreign file
        raise ModelInputError(f"{path} is not an exported program saved with torch.export.save: {str(exc).splitlines()[0][:200]}") from None
    gm = program.module()
    if not isinstance(gm, torch.fx.GraphModule):
        raise ModelInputError(f"{path}: the exported program did not give a graph module; export it again with torch.export.export.")
    return gm


def check_device(device: str) -> str:
    """``cpu`` or a CUDA device that is present; anything else is refused with what to use."""
    if device == "cpu":
        return device
    if device.startswith("cuda"):
        if not torch.cuda.is_available():
            raise ModelInputError(f"--device {device}: no CUDA device is available here (this torch build: {torch.__version__}); use --device cpu.")
        return device
    raise ModelInputError(f"--device must be 'cpu' or 'cuda' (or 'cuda:N'); got {device!r}.")


def check_finite_outputs(model: LoadedModel, x: torch.Tensor, names: list[str]) -> None:
    """Refuse a model that returns NaN or inf on real images, naming the first such image."""
    with torch.no_grad():
        logits = model.module(x.to(model.device)).float().cpu()
    bad = (~torch.isfinite(logits)).any(dim=1)
    if bool(bad.any()):
        first = names[int(bad.nonzero()[0, 0])]
        raise ModelInputError(
            f"the model returns NaN or infinite logits for {first} ({int(bad.sum())} of {len(names)} images checked). "
            "Check the sidecar's mean/std, 'mean_std_scale' and 'channel_order', and that the weights loaded are the trained ones."
        )
